"""Relative B1 from AFI and the double-angle method (qmap.b1).

Sources: actual flip-angle imaging, Yarnykh, Magn Reson Med 2007;57:192
(r = S2/S1, n = TR2/TR1, a = arccos((r n - 1)/(n - r)); worked value
a = 60 deg, n = 5 -> r = 0.636364); double-angle method, Insko & Bolinger,
J Magn Reson A 1993;103:82 (S(a) = M0 sin a with full recovery). Synthetic
signals are written out here from those signal equations, independently of
qmap; noise propagation is checked by seeded Monte Carlo.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from qmap.b1 import afi_angle, afi_b1, afi_ratio, b1_maps, dam_angle, dam_b1
from qmap.fitting import status as st


def _afi_signals(fa_deg, tr1, tr2, t1, m0=1.0):
    # finite-T1 AFI steady state with perfect spoiling (Yarnykh 2007, (memory); checked against a
    # Bloch simulation in tests/models/test_signal_equations.py):
    # S1 = M0 sin a (1 - E2 + (1 - E1) E2 cos a) / (1 - E1 E2 cos^2 a), S2 likewise with 1 <-> 2
    a = np.radians(fa_deg)
    e1, e2, c = math.exp(-tr1 / t1), math.exp(-tr2 / t1), np.cos(a)
    den = 1 - e1 * e2 * c * c
    return (m0 * np.sin(a) * (1 - e2 + (1 - e1) * e2 * c) / den,
            m0 * np.sin(a) * (1 - e1 + (1 - e2) * e1 * c) / den)


def _b1_field(shape):
    # smooth relative B1 in 0.75 .. 1.25 (typical body-coil range at 3 T, (memory))
    x, y, z = np.meshgrid(*[np.linspace(-1, 1, s) for s in shape], indexing="ij")
    return 1.0 + 0.2 * x + 0.04 * (1 - y**2) - 0.01 * z


def test_afi_worked_value_and_round_trip():
    # Yarnykh 2007: a = 60 deg, n = 5 -> r = (1 + 5/2)/(5 + 1/2) = 7/11 = 0.636364, and back
    assert float(afi_ratio(60.0, 5.0)) == pytest.approx(0.636364, abs=5e-7)
    assert float(afi_angle(0.636364, 5.0)) == pytest.approx(60.0, abs=1e-4)
    assert float(afi_angle(7.0 / 11.0, 5.0)) == pytest.approx(60.0, abs=1e-10)
    # the inverse is NaN (no angle) for ratios above 1
    assert np.isnan(afi_angle(1.05, 5.0))


def test_afi_recovers_b1_map_in_long_t1_limit():
    # with T1 = 1000 s the TR << T1 limit of Yarnykh's formula is exact to ~1e-5
    b1 = _b1_field((12, 10, 3))
    s1, s2 = _afi_signals(60.0 * b1, 0.02, 0.10, 1000.0, m0=500.0)
    tb1, se, status = afi_b1(s1, s2, 60.0, 5.0)
    assert np.all(status == 0)
    np.testing.assert_allclose(tb1, b1, rtol=1e-4)
    assert np.all(np.isnan(se))  # no sigma given: no standard error


def test_dam_recovers_known_b1_map_with_noise():
    # Insko & Bolinger 1993: S(a) = M0 sin(B1 a), S(2a) = M0 sin(2 B1 a) (TR >> T1)
    rng = np.random.default_rng(11)
    shape = (20, 16, 4)
    b1 = _b1_field(shape)
    m0, fa, sigma = 1000.0, 50.0, 2.0
    data = np.stack([m0 * np.sin(np.radians(fa * b1)), m0 * np.sin(np.radians(2 * fa * b1))], axis=-1)
    noisy = data + sigma * rng.standard_normal(data.shape)
    maps = b1_maps(noisy, method="dam", fa=fa, sigma=sigma)
    assert np.all(maps.status == 0)
    assert maps.units["TB1"] == "fraction"
    err = maps["TB1"] / b1 - 1
    assert abs(np.median(err)) < 1e-3
    assert np.median(np.abs(err)) < 3e-3
    # the propagated standard error describes the actual scatter (within 10 %)
    assert np.std(maps["TB1"] - b1) == pytest.approx(np.sqrt(np.mean(maps.stderr["TB1"] ** 2)), rel=0.1)


@pytest.mark.parametrize("method", ["afi", "dam"])
def test_standard_error_matches_monte_carlo(method):
    # first-order noise propagation vs the sd over 20000 seeded noise draws (common practice:
    # delta method, valid at high SNR)
    rng = np.random.default_rng(12)
    n, sigma, fa, b1 = 20000, 3.0, 60.0, 1.1
    if method == "afi":
        s = np.array(_afi_signals(fa * b1, 0.02, 0.10, 1000.0, m0=1e7))  # S1 ~ 1000
        kw = {"n": 5.0}
    else:
        s = 1000.0 * np.sin(np.radians([fa * b1, 2 * fa * b1]))
        kw = {}
    y = s[None, :] + sigma * rng.standard_normal((n, 2))
    maps = b1_maps(y, method=method, fa=fa, sigma=sigma, **kw)
    assert np.all(maps.status == 0)
    mc = np.std(maps["TB1"], ddof=1)
    assert float(np.median(maps.stderr["TB1"])) == pytest.approx(mc, rel=0.05)


@pytest.mark.parametrize("method", ["afi", "dam"])
def test_noise_map_holes_give_nan_standard_errors_not_zero(method):
    # a noise map that is NaN, zero or negative somewhere: no noise sd known there, so no standard error
    # (NaN) -- never 0 or a negative one; the angle itself does not use sigma
    b1 = _b1_field((6, 5, 2))
    if method == "afi":
        s1, s2 = _afi_signals(60.0 * b1, 0.02, 0.10, 1000.0, m0=500.0)
        data, kw = np.stack([s1, s2], axis=-1), {"n": 5.0}
    else:
        data = np.stack([500.0 * np.sin(np.radians(60.0 * b1)), 500.0 * np.sin(np.radians(120.0 * b1))], axis=-1)
        kw = {}
    smap = np.full(b1.shape, 2.0)
    smap[0, 0, 0], smap[2, 3, 1], smap[5, 4, 0] = np.nan, 0.0, -2.0
    holes = ~(smap > 0)
    whole = b1_maps(data, method=method, fa=60.0, sigma=2.0, **kw)
    holed = b1_maps(data, method=method, fa=60.0, sigma=smap, **kw)
    np.testing.assert_array_equal(whole["TB1"], holed["TB1"])
    assert np.isnan(holed.stderr["TB1"][holes]).all()
    np.testing.assert_array_equal(whole.stderr["TB1"][~holes], holed.stderr["TB1"][~holes])
    assert (whole.stderr["TB1"] > 0).all()


def test_invalid_ratios_get_status_8_not_silent_nan():
    # AFI: r > 1 has no angle; S1 = 0 has no ratio. DAM: S(2a) > 2 S(a) has no angle.
    s1 = np.array([100.0, 100.0, 0.0, 100.0, np.nan, 100.0])
    s2 = np.array([60.0, 120.0, 10.0, 100.0, 50.0, 0.0])
    mask = np.array([True, True, True, True, True, False])
    tb1, se, status = afi_b1(s1, s2, 60.0, 5.0, mask=mask, sigma=1.0)
    assert status.tolist() == [0, st.NO_VALID_ANGLE, st.NO_VALID_ANGLE, 0, st.NONFINITE, st.MASKED]
    assert np.isfinite(tb1[0]) and np.isnan(tb1[[1, 2, 4, 5]]).all()
    assert float(tb1[3]) == 0.0  # r = 1 is exactly a = 0 (valid, at the edge)
    assert np.isfinite(se[0]) and np.isnan(se[[1, 2, 4, 5]]).all()
    tb1, _se, status = dam_b1(np.array([10.0, 10.0, 0.0]), np.array([25.0, 19.0, 3.0]), 45.0)
    assert status.tolist() == [st.NO_VALID_ANGLE, 0, st.NO_VALID_ANGLE]
    assert np.isnan(tb1[[0, 2]]).all()
    assert float(tb1[1]) == pytest.approx(math.degrees(math.acos(0.95)) / 45.0, rel=1e-12)
    # a MapSet never carries NaN with status 0
    maps = b1_maps(np.stack([s1, s2], -1), method="afi", fa=60.0, n=5.0)
    assert np.all(np.isfinite(maps["TB1"][maps.status == 0]))
    assert np.all(np.isnan(maps["TB1"][maps.status != 0]))


def test_dam_angle_function_matches_closed_form():
    # a = arccos(S(2a) / (2 S(a))) for magnitude signals S = M0 sin (Insko & Bolinger 1993)
    a = np.array([10.0, 30.0, 60.0, 89.0])
    np.testing.assert_allclose(dam_angle(7 * np.sin(np.radians(a)), 7 * np.sin(np.radians(2 * a))), a, atol=1e-9)
