"""The MP2RAGE signal model and its lookup, against references outside qmap.

- Closed form vs an independent pulse-by-pulse simulation (rotations of the
  magnetisation vector, exact relaxation between events, repeated cycles to the
  steady state: tests/reference/mp2rage_pulses.py).
- Vanishing flip angles: the cycle becomes a periodic inversion recovery,
  Mz(TI) = 1 - (1 + e Mss) exp(-TI/T1), Mss = (1 - E)/(1 + e E), E = exp(-TR_prep/T1)
  (derived here: Mss is the fixed point of Mss = 1 - (1 + e Mss) E).
- UNI = Re(S1* S2)/(|S1|^2 + |S2|^2) lies in [-0.5, 0.5] (Marques et al., NeuroImage
  2010;49:1271: |S1 S2| <= (S1^2 + S2^2)/2) and is monotonic in T1 over the brain range.
- The lookup against scipy's brentq root of the closed form.
- First-order standard errors against Monte-Carlo with complex Gaussian noise.

Protocol: TR_prep 5 s, TI 0.7/2.5 s, 4/5 deg, 176 shots spaced 7 ms -- close to the
3 T protocol of Marques et al. 2010 (values from memory), an invented test scenario.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from qmap.errors import InputError
from qmap.models.mp2rage import (
    Mp2rageLookup,
    MP2RAGEProtocol,
    monotonic_run,
    mp2rage_signals,
    mp2rage_uni,
    uni_from_signals,
)
from qmap.workflows.mp2rage import fit_t1_mp2rage
from tests.reference.mp2rage_pulses import simulate

PROTO = MP2RAGEProtocol(ti=(0.7, 2.5), fa=(4.0, 5.0), tr_prep=5.0, tr_exc=0.007, shots=176)


def _pulses(t1, b1, p: MP2RAGEProtocol):
    return simulate(t1, b1, ti=p.ti, fa=p.fa, tr_prep=p.tr_prep, tr_exc=p.tr_exc, shots=p.shots,
                    efficiency=p.efficiency)


@pytest.mark.parametrize("proto", [
    PROTO,
    # odd number of shots, imperfect inversion, larger angles, a short TC
    MP2RAGEProtocol(ti=(0.9, 3.2), fa=(6.0, 3.0), tr_prep=6.0, tr_exc=0.0065, shots=151, efficiency=0.85),
    # 7 T-like: long TR_prep, tightly packed blocks (TB small)
    MP2RAGEProtocol(ti=(0.9, 2.75), fa=(4.0, 5.0), tr_prep=6.0, tr_exc=0.0068, shots=256, efficiency=1.0),
])
def test_closed_form_matches_pulse_by_pulse(proto):
    t1 = np.geomspace(0.15, 5.0, 15)
    b1 = np.linspace(0.55, 1.45, 15)
    t1, b1 = np.meshgrid(t1, b1)
    r1, r2 = _pulses(t1.ravel(), b1.ravel(), proto)
    c1, c2 = mp2rage_signals(t1.ravel(), proto, b1.ravel())
    scale = np.maximum(np.abs(r1), np.abs(r2))
    assert np.max(np.abs(c1 - r1) / scale) < 1e-6
    assert np.max(np.abs(c2 - r2) / scale) < 1e-6
    # where the signal is not near its null, relative to itself as well
    big = np.abs(r1) > 1e-3 * scale
    assert np.max(np.abs(c1 - r1)[big] / np.abs(r1)[big]) < 1e-6
    np.testing.assert_allclose(uni_from_signals(c1, c2), uni_from_signals(r1, r2), atol=1e-9)


@pytest.mark.parametrize("eff", [1.0, 0.9])
def test_vanishing_flip_angle_is_periodic_inversion_recovery(eff):
    p = MP2RAGEProtocol(ti=(0.7, 2.5), fa=(1e-4, 1e-4), tr_prep=5.0, tr_exc=0.007, shots=176, efficiency=eff)
    t1 = np.geomspace(0.2, 4.0, 25)
    s1, s2 = mp2rage_signals(t1, p)
    E = np.exp(-p.tr_prep / t1)
    mss = (1 - E) / (1 + eff * E)  # derived in the module docstring of this test
    for s, ti in ((s1, p.ti[0]), (s2, p.ti[1])):
        mz = 1 - (1 + eff * mss) * np.exp(-ti / t1)
        np.testing.assert_allclose(s / np.sin(np.deg2rad(1e-4)), mz, rtol=1e-7, atol=1e-9)


def test_uni_range_and_monotonicity():
    rng = np.random.default_rng(3)
    for _ in range(20):  # random protocols: UNI stays in [-0.5, 0.5]
        n = int(rng.integers(40, 260))
        tau = rng.uniform(0.004, 0.01)
        ti1 = n // 2 * tau + rng.uniform(0.01, 1.0)
        ti2 = ti1 + n * tau + rng.uniform(0.01, 1.5)
        p = MP2RAGEProtocol((ti1, ti2), tuple(rng.uniform(2, 12, 2)), ti2 + n * tau + rng.uniform(0.01, 3), tau, n,
                            rng.uniform(0.7, 1.0))
        u = mp2rage_uni(np.geomspace(0.05, 8, 300)[:, None], p, rng.uniform(0.5, 1.5, 7)[None, :])
        assert np.all(np.abs(u) <= 0.5 + 1e-12)
    t1 = np.geomspace(0.45, 3.2, 400)
    for b1 in (0.64, 0.8, 1.0, 1.22):
        u = mp2rage_uni(t1, PROTO, b1)
        assert np.all(np.diff(u) < 0), b1  # decreasing over the brain range
        lut = Mp2rageLookup(PROTO, b1_range=(b1, b1))
        lo, hi = lut.limits[np.argmin(np.abs(lut.b1 - b1))]
        assert lo < 0.45 and hi > 3.2
    assert monotonic_run(np.array([0.0, 1.0, 0.5, 0.2, 0.1, 0.3])) == (1, 4)


def test_lookup_against_brentq():
    rng = np.random.default_rng(4)
    b1 = rng.uniform(0.64, 1.22, 300)
    t1 = np.geomspace(0.45, 3.2, 300)
    rng.shuffle(t1)
    u = mp2rage_uni(t1, PROTO, b1)
    ref = np.array([brentq(lambda x, ui=ui, bi=bi: float(mp2rage_uni(x, PROTO, bi)) - ui, 0.1, 4.5, xtol=1e-12)
                    for ui, bi in zip(u, b1)])  # scipy's root of the closed form
    est = Mp2rageLookup(PROTO, b1_range=(0.6, 1.25)).t1(u, b1)
    np.testing.assert_allclose(ref, t1, rtol=1e-9)
    np.testing.assert_allclose(est, ref, rtol=1e-4)
    # outside the table: NaN
    assert np.isnan(Mp2rageLookup(PROTO, b1_range=(0.9, 1.1)).t1(np.array([0.0]), np.array([1.5])))[0]
    assert np.isnan(Mp2rageLookup(PROTO).t1(np.array([0.4999999]))[0])


def test_stderr_against_monte_carlo():
    """First-order SE of T1 and M0 vs the sd over 4000 noisy repetitions (complex Gaussian noise)."""
    rng = np.random.default_rng(5)
    t1 = np.array([0.6, 1.0, 1.6, 2.6])
    b1 = np.array([0.8, 1.0, 1.15, 0.95])
    m0, sigma, reps = 1000.0, 0.25, 4000  # SNR ~ 150 on the brighter inversion image
    s1, s2 = mp2rage_signals(t1, PROTO, b1, m0)
    phase = np.exp(1j * rng.uniform(-np.pi, np.pi, t1.size))  # a common receive phase per voxel
    shape = (reps, t1.size)
    z1 = s1 * phase + rng.normal(0, sigma, shape) + 1j * rng.normal(0, sigma, shape)
    z2 = s2 * phase + rng.normal(0, sigma, shape) + 1j * rng.normal(0, sigma, shape)
    uni = uni_from_signals(z1, z2)
    maps = fit_t1_mp2rage(uni, PROTO, b1=np.broadcast_to(b1, shape), inv1=z1, inv2=z2, sigma=sigma)
    assert np.all(maps.status == 0)
    for name in ("T1", "M0"):
        sd_mc = np.std(maps[name], axis=0)
        se = np.median(maps.stderr[name], axis=0)
        np.testing.assert_allclose(se, sd_mc, rtol=0.10, err_msg=name)
    np.testing.assert_allclose(np.mean(maps["T1"], axis=0), t1, rtol=0.01)
    np.testing.assert_allclose(np.median(maps["M0"], axis=0), m0, rtol=0.01)
    np.testing.assert_allclose(maps.stderr["R1"], maps.stderr["T1"] / maps["T1"] ** 2, rtol=1e-5)


@pytest.mark.parametrize("kw, delay", [
    ({"ti": (0.5, 2.5)}, "TA"),  # 88 excitations x 7 ms = 0.616 s before the centre of block 1
    ({"ti": (0.7, 1.8)}, "TB"),  # the blocks (1.232 s each) overlap
    ({"tr_prep": 3.0}, "TC"),  # block 2 runs past the next inversion
])
def test_overlapping_timings_name_the_negative_delay(kw, delay):
    base = {"ti": (0.7, 2.5), "fa": (4.0, 5.0), "tr_prep": 5.0, "tr_exc": 0.007, "shots": 176}
    base.update(kw)
    with pytest.raises(InputError, match=f"delay {delay} = -"):
        MP2RAGEProtocol(**base).check()


def test_simulator_signals_match_pulse_by_pulse():
    """``qmap simulate``'s event-by-event MP2RAGE signals against the independent reference simulation."""
    from qmap.simulate.signals import mp2rage as sim_mp2rage

    p = MP2RAGEProtocol(ti=(0.3, 2.2), fa=(3.0, 5.0), tr_prep=4.0, tr_exc=0.006, shots=96)
    t1 = np.array([0.1, 0.5, 1.4, 2.0])
    b1 = np.array([0.85, 1.0, 1.1, 1.15])
    s = sim_mp2rage(ti=p.ti, fa_deg=p.fa, tr_prep=p.tr_prep, tr_exc=p.tr_exc, shots=p.shots, efficiency=p.efficiency,
                    te=0.003, t1=t1, t2star=np.full(4, 0.04), pd=np.full(4, 0.9), b1=b1)
    r1, r2 = _pulses(t1, b1, p)
    np.testing.assert_allclose(s, 0.9 * np.exp(-0.003 / 0.04) * np.stack([r1, r2], -1), rtol=1e-9, atol=1e-12)


def test_b1_stderr_is_propagated():
    """se(T1)^2 = se_noise^2 + (dT1/dB1 se_B1)^2, dT1/dB1 from the lookup itself by central differences."""
    t1 = np.array([0.8, 1.5, 2.5])
    b1 = np.array([0.9, 1.0, 1.1])
    s1, s2 = mp2rage_signals(t1, PROTO, b1, 1000.0)
    uni = uni_from_signals(s1, s2)
    se_b1 = np.array([0.02, 0.0, 0.05])
    base = fit_t1_mp2rage(uni, PROTO, b1=b1, inv1=s1, inv2=s2, sigma=0.3)
    withb = fit_t1_mp2rage(uni, PROTO, b1=b1, inv1=s1, inv2=s2, sigma=0.3, b1_se=se_b1)
    lut = Mp2rageLookup(PROTO, b1_range=(0.8, 1.2))
    d_t1 = (lut.t1(uni, b1 + 0.01) - lut.t1(uni, b1 - 0.01)) / 0.02
    expect = np.sqrt(base.stderr["T1"] ** 2 + (d_t1 * se_b1) ** 2)
    np.testing.assert_allclose(withb.stderr["T1"], expect, rtol=0.01)
    assert withb.stderr["T1"][1] == pytest.approx(base.stderr["T1"][1], rel=1e-6)  # se_B1 = 0
    assert withb.stderr["T1"][2] > 1.5 * base.stderr["T1"][2]  # 5 % of B1 matters at long T1
