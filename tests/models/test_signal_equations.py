"""qmap's closed-form signal equations against independent Bloch integration.

The reference is ``tests/reference/bloch.py``: scipy ``solve_ivp`` on the Bloch
equations (rotating frame, on resonance) with finite rectangular RF blocks; it
shares no code with qmap. Worked values from the papers cited beside each check are
checked as transcribed AND re-derived here from the published formula.

Finite-pulse error budget: the closed forms assume instantaneous pulses. With
an RF block of duration tau the magnetisation relaxes while it is being
rotated, which changes the signal by roughly tau / T2 (transverse decay during
the block) and tau / T1. The checks below use tau = 1 us and T2 = T1 where T2
does not otherwise enter the signal (IR readout after crushing, spoiled
sequences), so the finite-pulse error is <= ~1e-5 for T1 >= 0.1 s (IR) and a few 1e-7 or
less for the SPGR / AFI / DAM checks (T1 >= 0.3 s), inside the tolerances; the
last test shows that the residual does shrink in proportion to tau.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from qmap.b1 import afi_angle, afi_ratio, dam_angle
from qmap.models.ir import ir_signal
from qmap.models.vfa import ernst_angle, spgr_signal
from tests.reference.bloch import Tissue, afi_signals_bloch, ir_signal_bloch, spgr_signal_bloch

TAU = 1e-6  # RF block duration for the reference simulations, s

# TI grid up to 5 s (dense near the null of short T1s), s
TI_GRID = np.array([0.01, 0.03, 0.07, 0.15, 0.3, 0.6, 1.0, 1.6, 2.5, 3.5, 5.0])


# ---------------------------------------------------------------- inversion recovery
# Mz(TI) = M0 (1 - (1 + k) exp(-TI/T1)), TR >> T1, inversion efficiency k:
# Bernstein, King & Zhou, Handbook of MRI Pulse Sequences (2004);
# Haacke et al., Magnetic Resonance Imaging (1999).
@pytest.mark.parametrize("efficiency", [1.0, 0.9])
@pytest.mark.parametrize("t1", [0.1, 0.5, 1.0, 2.0, 4.0])
def test_ir_closed_form_matches_bloch(t1: float, efficiency: float) -> None:
    bloch = ir_signal_bloch(TI_GRID, Tissue(t1, t1), efficiency=efficiency, pulse_duration=TAU)
    closed = np.asarray(ir_signal(TI_GRID, t1, efficiency=efficiency), dtype=float)
    assert closed.shape == TI_GRID.shape
    # absolute, M0 = 1; finite-pulse error <= ~1e-5 (module docstring)
    np.testing.assert_allclose(closed, bloch, rtol=0, atol=1e-4)


def test_ir_m0_scales_signal() -> None:
    # Bloch equations are linear in M0 (the driving term is M0 / T1).
    bloch = ir_signal_bloch(TI_GRID, Tissue(0.8, 0.8, m0=2.5), efficiency=0.95, pulse_duration=TAU)
    closed = np.asarray(ir_signal(TI_GRID, 0.8, m0=2.5, efficiency=0.95), dtype=float)
    np.testing.assert_allclose(closed, bloch, rtol=0, atol=2.5e-4)


def test_ir_null_point_is_t1_ln2() -> None:
    # Null at TI = T1 ln 2 for perfect inversion and full recovery: T1 = 1 s ->
    # 0.693147 s (textbook: Bernstein et al. 2004; Haacke et al. 1999).
    t1 = 1.0
    expected = t1 * math.log(2.0)
    assert expected == pytest.approx(0.693147, abs=5e-7)  # transcribed value
    ti_null = brentq(lambda ti: float(np.squeeze(ir_signal(ti, t1))), 0.1, 2.0, xtol=1e-12)
    assert ti_null == pytest.approx(expected, abs=1e-9)
    # the same null from the Bloch simulation; slope at the null is 1/T1, so
    # the ~1e-5 finite-pulse signal error moves it by ~1e-5 s
    ti_null_bloch = brentq(
        lambda ti: float(ir_signal_bloch([ti], Tissue(t1, t1), pulse_duration=TAU)[0]), 0.5, 0.9, xtol=1e-9
    )
    assert ti_null_bloch == pytest.approx(expected, abs=5e-5)


def test_ir_finite_tr_keeps_three_parameter_form() -> None:
    # With a finite TR the signal is still a + b exp(-TI/T1) (common
    # practice: the three-parameter IR form). Derivation for this sequence (crusher after the
    # inversion, readout leaves Mz = 0): a = M0 (1 + k exp(-TR/T1)),
    # b = -(1 + k) M0. Check the Bloch steady state against it, and check that
    # qmap's TR >> T1 form differs from it by exactly the constant k exp(-TR/T1).
    t1, k, tr = 0.8, 0.95, 2.0
    ti = np.array([0.05, 0.2, 0.5, 1.0, 1.5])
    bloch = ir_signal_bloch(ti, Tissue(t1, t1), efficiency=k, tr=tr, pulse_duration=TAU)
    a = 1.0 + k * math.exp(-tr / t1)
    b = -(1.0 + k)
    np.testing.assert_allclose(bloch, a + b * np.exp(-ti / t1), rtol=0, atol=1e-4)
    offset = bloch - np.asarray(ir_signal(ti, t1, efficiency=k), dtype=float)
    # the finite-TR effect (0.078 here) is far above the tolerance, so this
    # could not pass with the TR >> T1 formula alone
    assert k * math.exp(-tr / t1) > 0.05
    np.testing.assert_allclose(offset, k * math.exp(-tr / t1), rtol=0, atol=1e-4)


# ---------------------------------------------------------------- spoiled gradient echo
def _spgr_formula(fa_deg: float, tr: float, t1: float) -> float:
    # S = M0 sin a (1 - E1) / (1 - E1 cos a), E1 = exp(-TR/T1)
    # (Ernst & Anderson, Rev Sci Instrum 1966; Bernstein et al. 2004)
    a = math.radians(fa_deg)
    e1 = math.exp(-tr / t1)
    return math.sin(a) * (1 - e1) / (1 - e1 * math.cos(a))


def test_spgr_worked_values() -> None:
    # Worked values (Ernst & Anderson 1966; Bernstein et al. 2004, spoiled gradient echo):
    # TR 15 ms, T1 1 s -> Ernst angle 9.8991 deg, S(3)/M0 = 0.047985,
    # S(15)/M0 = 0.079524. Transcribed values, so also re-derived here.
    tr, t1 = 0.015, 1.0
    ernst_derived = math.degrees(math.acos(math.exp(-tr / t1)))
    assert ernst_derived == pytest.approx(9.8991, abs=5e-5)
    assert _spgr_formula(3.0, tr, t1) == pytest.approx(0.047985, abs=5e-7)
    assert _spgr_formula(15.0, tr, t1) == pytest.approx(0.079524, abs=5e-7)

    assert float(ernst_angle(tr, t1)) == pytest.approx(ernst_derived, abs=1e-9)
    assert float(ernst_angle(tr, t1)) == pytest.approx(9.8991, abs=5e-5)
    for fa, transcribed in [(3.0, 0.047985), (15.0, 0.079524)]:
        value = float(spgr_signal(fa, tr, t1))
        assert value == pytest.approx(_spgr_formula(fa, tr, t1), abs=1e-12)
        assert value == pytest.approx(transcribed, abs=5e-7)


def test_ernst_angle_maximises_spgr() -> None:
    # Ernst angle = arccos(E1) is the maximum of the SPGR signal (Ernst & Anderson 1966)
    tr, t1 = 0.015, 1.0
    fa = np.linspace(1.0, 30.0, 2901)
    best = fa[np.argmax(np.asarray(spgr_signal(fa, tr, t1), dtype=float))]
    assert best == pytest.approx(float(ernst_angle(tr, t1)), abs=0.011)


@pytest.mark.parametrize(
    ("fa_deg", "tr", "t1"),
    [(3.0, 0.015, 1.0), (9.8991, 0.015, 1.0), (15.0, 0.015, 1.0), (25.0, 0.015, 1.0),
     (8.0, 0.005, 0.3), (20.0, 0.03, 2.0)],
)
def test_spgr_closed_form_matches_repeated_tr_bloch(fa_deg: float, tr: float, t1: float) -> None:
    # Repeated pulses with perfect spoiling to steady state (Ernst & Anderson
    # 1966; Bernstein et al. 2004). Tolerance 1e-6 absolute (M0 = 1); the
    # finite-pulse error here is ~4e-8.
    bloch = spgr_signal_bloch(fa_deg, tr, Tissue(t1, t1), pulse_duration=TAU)
    assert float(spgr_signal(fa_deg, tr, t1)) == pytest.approx(bloch, abs=1e-6)


def test_spgr_steady_state_reached_by_plain_repetition() -> None:
    # The default run accelerates the approach to steady state (Aitken on the
    # affine one-TR map). Plain repetition of 300 pulses (T1/TR = 6.7, so
    # (E1 cos a)^300 ~ 1e-20) must give the same steady state, and both the
    # closed form.
    fa, tr, t1 = 15.0, 0.015, 0.1
    plain = spgr_signal_bloch(fa, tr, Tissue(t1, t1), n_pulses=300, pulse_duration=TAU)
    accelerated = spgr_signal_bloch(fa, tr, Tissue(t1, t1), pulse_duration=TAU)
    assert plain == pytest.approx(accelerated, abs=1e-10)
    assert float(spgr_signal(fa, tr, t1)) == pytest.approx(plain, abs=1e-6)


@pytest.mark.parametrize("b1", [0.75, 1.2])
def test_spgr_b1_scales_the_angle(b1: float) -> None:
    # actual angle = B1 x nominal (Cheng & Wright, Magn Reson Med 2006;55:566):
    # simulate the actual angle, evaluate qmap at the nominal one with b1
    fa, tr, t1 = 12.0, 0.015, 1.2
    bloch = spgr_signal_bloch(b1 * fa, tr, Tissue(t1, t1), pulse_duration=TAU)
    assert float(spgr_signal(fa, tr, t1, b1=b1)) == pytest.approx(bloch, abs=1e-6)
    # and the B1 effect is far larger than the tolerance
    assert abs(float(spgr_signal(fa, tr, t1)) - bloch) > 1e-3


# ---------------------------------------------------------------- actual flip-angle imaging
def test_afi_worked_value() -> None:
    # Yarnykh, Magn Reson Med 2007;57:192: r = (1 + n cos a)/(n + cos a) for
    # TR << T1; a = 60 deg, n = 5 -> r = 0.636364 (transcribed;
    # re-derived: (1 + 5/2)/(5 + 1/2) = 7/11).
    assert 7.0 / 11.0 == pytest.approx(0.636364, abs=5e-7)
    r = float(afi_ratio(60.0, 5.0))
    assert r == pytest.approx(7.0 / 11.0, abs=1e-12)
    assert r == pytest.approx(0.636364, abs=5e-7)
    assert float(afi_angle(r, 5.0)) == pytest.approx(60.0, abs=1e-9)
    # a = arccos((r n - 1)/(n - r)) from the transcribed, rounded r
    assert float(afi_angle(0.636364, 5.0)) == pytest.approx(60.0, abs=1e-4)


def test_afi_angle_inverts_ratio() -> None:
    # round trip over the useful range (Yarnykh 2007)
    fa = np.linspace(5.0, 120.0, 47)
    for n in (3.0, 5.0, 8.0):
        r = np.asarray(afi_ratio(fa, n), dtype=float)
        np.testing.assert_allclose(np.asarray(afi_angle(r, n), dtype=float), fa, rtol=0, atol=1e-8)


def _afi_exact(fa_deg: float, tr1: float, tr2: float, t1: float) -> tuple[float, float]:
    # Finite-T1 AFI steady state with perfect spoiling (Yarnykh 2007, (memory);
    # verified below against the Bloch simulation):
    # S1 = M0 sin a (1 - E2 + (1 - E1) E2 cos a) / (1 - E1 E2 cos^2 a),
    # S2 = M0 sin a (1 - E1 + (1 - E2) E1 cos a) / (1 - E1 E2 cos^2 a)
    a = math.radians(fa_deg)
    e1, e2, c = math.exp(-tr1 / t1), math.exp(-tr2 / t1), math.cos(a)
    den = 1 - e1 * e2 * c * c
    return (math.sin(a) * (1 - e2 + (1 - e1) * e2 * c) / den,
            math.sin(a) * (1 - e1 + (1 - e2) * e1 * c) / den)


@pytest.mark.parametrize("fa_deg", [30.0, 60.0, 90.0])
def test_afi_ratio_against_bloch(fa_deg: float) -> None:
    # TR1 = 20 ms, TR2 = 100 ms (n = 5), T1 = 1.5 s, perfect spoiling (Yarnykh 2007).
    tr1, tr2, t1 = 0.02, 0.10, 1.5
    n = tr2 / tr1
    s1, s2 = afi_signals_bloch(fa_deg, tr1, tr2, Tissue(t1, t1), pulse_duration=TAU)
    # 1) the simulation reproduces the exact finite-T1 steady state
    e1, e2 = _afi_exact(fa_deg, tr1, tr2, t1)
    assert s1 == pytest.approx(e1, abs=1e-6)
    assert s2 == pytest.approx(e2, abs=1e-6)
    # 2) qmap's ratio/angle use the TR << T1 limit, which neglects terms of
    # first order in TR/T1 relative to 1 (TR2/T1 = 0.067 here). The exact
    # expressions give a ratio error of 0.008% / 0.18% / 2.7% at 30/60/90 deg
    # (angle error 0.014 / 0.095 / 0.32 deg). Tolerances: qmap's ratio may
    # differ from the Bloch ratio by at most 1.25x the deviation of the limit
    # formula (evaluated here, not by qmap) from the exact one (absolute bound
    # 1.0e-4 / 1.4e-3 / 6.7e-3), and the angle from the Bloch ratio must be
    # within 0.4 deg of the true angle.
    r_bloch = s2 / s1
    c = math.cos(math.radians(fa_deg))
    r_limit = (1 + n * c) / (n + c)
    allowed = 1.25 * abs(r_limit - e2 / e1) + 1e-6
    assert abs(float(afi_ratio(fa_deg, n)) - r_bloch) <= allowed
    assert float(afi_angle(r_bloch, n)) == pytest.approx(fa_deg, abs=0.4)


def test_afi_approximation_error_vanishes_for_long_t1() -> None:
    # The residual of test_afi_ratio_against_bloch is the TR << T1
    # approximation: with T1 10x longer it shrinks by ~10x (first order in TR/T1).
    fa, tr1, tr2 = 60.0, 0.02, 0.10
    err = []
    for t1 in (1.5, 15.0):
        s1, s2 = afi_signals_bloch(fa, tr1, tr2, Tissue(t1, t1), pulse_duration=TAU)
        err.append(abs(float(afi_angle(s2 / s1, tr2 / tr1)) - fa))
    assert err[0] > 0.05
    assert 7.0 < err[0] / err[1] < 13.0


# ---------------------------------------------------------------- double-angle method
@pytest.mark.parametrize("fa_deg", [20.0, 45.0, 60.0, 80.0])
def test_dam_against_bloch(fa_deg: float) -> None:
    # Insko & Bolinger, J Magn Reson A 1993;103:82: with TR >> T1 (full
    # recovery) S(a) = M0 sin a, so S(2a) / (2 S(a)) = cos a exactly.
    # TR = 30 T1: residual recovery exp(-30) ~ 1e-13. T1 = T2 = 1 s keeps the
    # relaxation during the 1 us blocks (~tau/T1 = 1e-6, times sin a factors)
    # at ~3e-7 in the ratio.
    t1 = 1.0
    tr = 30 * t1
    s1 = spgr_signal_bloch(fa_deg, tr, Tissue(t1, t1), pulse_duration=TAU)
    s2 = spgr_signal_bloch(2 * fa_deg, tr, Tissue(t1, t1), pulse_duration=TAU)
    assert s2 / (2 * s1) == pytest.approx(math.cos(math.radians(fa_deg)), abs=1e-6)
    # arccos amplifies by 1/sin a: 1e-6 -> < 3e-6 rad ~ 2e-4 deg at 20 deg
    assert float(dam_angle(s1, s2)) == pytest.approx(fa_deg, abs=1e-3)


def test_dam_scale_invariant() -> None:
    # only the ratio matters (Insko & Bolinger 1993): M0 cancels
    assert float(dam_angle(3.7 * math.sin(math.radians(50.0)), 3.7 * math.sin(math.radians(100.0)))) == (
        pytest.approx(50.0, abs=1e-9)
    )


# ---------------------------------------------------------------- reference self-check
def test_finite_pulse_residual_scales_with_pulse_duration() -> None:
    # The Bloch-vs-closed-form residual is the finite-pulse effect: ten times
    # shorter RF blocks leave a ten times smaller residual (T2 = 50 ms acting
    # during the block), so the closed form is the hard-pulse limit.
    fa, tr, t1 = 15.0, 0.015, 1.0
    closed = _spgr_formula(fa, tr, t1)
    res = [abs(spgr_signal_bloch(fa, tr, Tissue(t1, 0.05), pulse_duration=tau) - closed) for tau in (1e-5, 1e-6)]
    assert res[0] > 1e-6
    assert 8.0 < res[0] / res[1] < 12.0
