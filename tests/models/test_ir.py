"""Inversion-recovery T1: the model (qmap.models.ir) and the array API (qmap.workflows.ir.fit_t1_ir).

External references used below:
- signal equation S = M0 (1 - (1 + k) exp(-TI/T1)), null at TI = T1 ln 2 for
  k = 1: Bernstein, King & Zhou, Handbook of MRI Pulse Sequences (2004);
- polarity restoration of magnitude data: Barral et al., Magn Reson Med
  2010;64:1057 (their brute force over every sign-change position is what
  the curve_fit reference below does);
- Cramer-Rao bound from the Fisher information J^T J / sigma^2 for Gaussian
  noise: Kay, Fundamentals of Statistical Signal Processing: Estimation
  Theory (1993), computed here with numerical derivatives of an independently
  written signal function;
- Look-Locker correction T1 = T1* (B/A - 1): Deichmann & Haase, J Magn Reson
  1992;96:608, checked on a pulse-by-pulse simulation of the readout train;
- scipy.optimize.curve_fit and lmfit as independent minimisers.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.optimize import OptimizeWarning, curve_fit

from qmap.fitting import status as st
from qmap.maps import fit_volume
from qmap.models.ir import InversionRecovery, ir_signal
from qmap.workflows.ir import fit_t1_ir, phase_correct

#: protocol: 10 inversion times up to 5 s, s
TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.5, 5.0])
M0 = 1000.0
#: T1 values of the accuracy checks, s (the requirement covers T1 <= 3 s)
T1S = np.array([0.1, 0.3, 0.6, 1.0, 1.5, 2.0, 3.0])
N_PER_T1 = 1500


def robust_sd(x: np.ndarray) -> float:
    """1.4826 x median absolute deviation (a consistent sd estimate for normal data; common practice)."""
    return float(1.4826 * np.median(np.abs(x - np.median(x))))


def signal_mkt(p: np.ndarray, ti: np.ndarray) -> np.ndarray:
    """Reference signal for parameters (M0, k, T1) per row, written independently of qmap (Bernstein 2004)."""
    return p[:, 0:1] * (1.0 - (1.0 + p[:, 1:2]) * np.exp(-ti[None, :] / p[:, 2:3]))


def crlb_t1(t1: np.ndarray, k: np.ndarray, m0: float, sigma: float, ti: np.ndarray = TI) -> np.ndarray:
    """Cramer-Rao bound on the T1 standard deviation, Gaussian noise sigma (Kay 1993), per voxel."""
    p = np.stack([np.full_like(t1, m0), k, t1], axis=1)
    jac = np.empty((t1.size, ti.size, 3))
    for j in range(3):
        d = np.zeros_like(p)
        d[:, j] = 1e-6 * np.abs(p[:, j])
        jac[:, :, j] = (signal_mkt(p + d, ti) - signal_mkt(p - d, ti)) / (2 * d[:, j : j + 1])
    fisher = np.einsum("nmi,nmj->nij", jac, jac) / sigma**2
    return np.sqrt(np.linalg.inv(fisher)[:, 2, 2])


def simulate(snr: float, *, magnitude: bool, seed: int, t1s=T1S, n: int = N_PER_T1):
    """Truth and noisy samples: Rician magnitude (modulus of complex Gaussian noise) or Gaussian real data."""
    rng = np.random.default_rng(seed)
    t1 = np.repeat(np.asarray(t1s, float), n)
    k = rng.uniform(0.9, 1.0, t1.size)
    sigma = M0 / snr
    s = ir_signal(TI, t1[:, None], m0=M0, efficiency=k[:, None])
    if magnitude:
        y = np.abs(s + sigma * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape)))
    else:
        y = s + sigma * rng.standard_normal(s.shape)
    return t1, k, sigma, y


# ------------------------------------------------------------------ the model itself
def test_candidates_flip_around_each_voxels_minimum():
    # Barral et al. 2010: the sign changes once, next to the smallest magnitude;
    # patterns written out by hand for minima at the start, middle and end
    y = np.array([[1.0, 5, 6, 7], [5, 4, 1, 7], [9, 8, 7, 2]])
    before, including = InversionRecovery([0.1, 0.2, 0.3, 0.4]).candidates(y)
    np.testing.assert_array_equal(before, [[1, 5, 6, 7], [-5, -4, 1, 7], [-9, -8, -7, 2]])
    np.testing.assert_array_equal(including, [[-1, 5, 6, 7], [-5, -4, -1, 7], [-9, -8, -7, -2]])
    # real data are fitted as they are
    assert len(InversionRecovery([0.1, 0.2, 0.3, 0.4], signal="real").candidates(y)) == 1


def test_jacobian_matches_central_differences():
    # analytic d s / d (a, b, T1) against central differences (common practice) of the prediction
    model = InversionRecovery(TI)
    p = np.array([[900.0, -1800.0, 0.7], [-50.0, 120.0, 2.5], [1.0, -1.9, 0.05]])
    s, jac = model.signal_jacobian(p)
    np.testing.assert_allclose(s, model.predict(p), rtol=1e-13, atol=1e-12)
    for j in range(3):
        h = 1e-6 * np.abs(p[:, j : j + 1])
        d = np.zeros_like(p)
        d[:, j : j + 1] = h
        num = (model.predict(p + d) - model.predict(p - d)) / (2 * h)
        np.testing.assert_allclose(jac[:, j], num, rtol=1e-7, atol=1e-7 * np.abs(num).max())
    # the specialised Jacobian equals the generic one built from basis/dbasis
    _s_gen, j_gen = super(InversionRecovery, model).signal_jacobian(p)
    np.testing.assert_allclose(jac, j_gen, rtol=1e-14, atol=1e-14)


@pytest.mark.parametrize("signal", ["magnitude", "real"])
def test_noise_free_recovery_over_the_t1_range(signal):
    # exact data -> exact parameters (the fit is least squares with zero residual);
    # covers T1 0.01-15 s and inversion efficiencies 0.5-1 (Bernstein 2004 signal form)
    t1 = np.array([0.01, 0.02, 0.05, 0.1, 0.3, 1.0, 3.0, 6.0, 10.0, 15.0])
    k = np.array([1.0, 0.5, 0.8, 0.9, 1.0, 0.95, 0.7, 1.0, 0.9, 1.0])
    s = signal_mkt(np.stack([np.full(t1.size, M0), k, t1], 1), TI)
    maps = fit_volume(InversionRecovery(TI, signal=signal), np.abs(s) if signal == "magnitude" else s)
    assert np.all(maps.status == st.FITTED)
    np.testing.assert_allclose(maps["T1"], t1, rtol=1e-8)
    np.testing.assert_allclose(maps["R1"], 1 / t1, rtol=1e-8)
    np.testing.assert_allclose(maps["InversionEfficiency"], k, atol=1e-8)
    np.testing.assert_allclose(maps["M0"], M0, rtol=1e-8)


def test_sample_exactly_at_the_null():
    # Null at TI = T1 ln 2 for perfect inversion and full recovery (Bernstein et al. 2004):
    # T1 = 0.8 s -> 0.554518 s. The magnitude there is 0, so both sign patterns tie on
    # that sample; the fit must still be exact.
    t1 = 0.8
    ti_null = t1 * np.log(2.0)
    assert ti_null == pytest.approx(0.554518, abs=5e-7)
    ti = np.sort(np.append(TI, ti_null))
    y = np.abs(ir_signal(ti, t1, m0=M0))
    assert y[np.searchsorted(ti, ti_null)] < 1e-10
    maps = fit_t1_ir(y[None, :], ti)
    assert maps.status[0] == st.FITTED
    assert maps["T1"][0] == pytest.approx(t1, rel=1e-8)
    assert maps["InversionEfficiency"][0] == pytest.approx(1.0, abs=1e-8)
    # and with noise the null sample does not break the fit (median over voxels)
    rng = np.random.default_rng(11)
    s = ir_signal(ti, t1, m0=M0) * np.ones((2000, 1))
    noisy = np.abs(s + 10.0 * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape)))
    est = fit_t1_ir(noisy, ti)["T1"]
    assert abs(np.median(est) / t1 - 1) < 0.005


def test_results_do_not_depend_on_the_chunk_size():
    # the architecture requires bit-identical results whatever the chunking
    _t1, _, _, y = simulate(30, magnitude=True, seed=5, n=60)
    a = fit_volume(InversionRecovery(TI), y, chunk_size=7, n_jobs=1)
    b = fit_volume(InversionRecovery(TI), y, chunk_size=1000, n_jobs=2)
    for name in a.names:
        np.testing.assert_array_equal(a[name], b[name])
        np.testing.assert_array_equal(a.stderr[name], b.stderr[name])


# ------------------------------------------------------------------ accuracy on Rician magnitude data
@pytest.mark.parametrize(("snr", "max_bias"), [(100, 0.005), (30, 0.015)])
def test_magnitude_bias_efficiency_and_calibration(snr, max_bias):
    t1, k, sigma, y = simulate(snr, magnitude=True, seed=7)
    maps = fit_t1_ir(y, TI)
    assert np.all(maps.status == st.FITTED)
    est, se = maps["T1"], maps.stderr["T1"]
    u = (est - t1) / crlb_t1(t1, k, M0, sigma)  # error in units of the Cramer-Rao bound
    z = (est - t1) / se  # error in units of the reported standard error
    for v in T1S:
        sel = t1 == v
        # median signed error (bias): < 0.5% at SNR 100, < 1.5% at SNR 30 (measured, seed 7:
        # at most 0.08% and 0.43%)
        assert abs(np.median(est[sel]) / v - 1) < max_bias, v
        if snr == 100:
            # efficiency: spread within 1.3x the Cramer-Rao bound (Kay 1993) for every T1;
            # measured sd / CRLB 0.99-1.10
            assert np.std(u[sel]) < 1.3, v
    # over the T1 range 0.1-3 s: spread within 1.3x the bound (measured: sd / CRLB 1.02 at
    # SNR 100, 1.11 at SNR 30) and calibrated standard errors (measured robust sd of z: 1.07
    # at SNR 100, 1.10 at SNR 30; about 1.05 is expected because s^2 = RSS/7 makes z a
    # Student t with 7 degrees of freedom). At SNR 30 single T1 values reach 1.32 (T1 = 0.1 s:
    # occasional polarity ambiguity of the one sample before the null) and 1.33 / 1.38
    # (sd, calibration; T1 = 1.5 s, whose null falls on the TI = 1 s sample, where the
    # magnitude keeps only Rician noise): the information that magnitude detection loses.
    assert np.std(u) < 1.3
    assert 0.85 < robust_sd(z) < 1.15
    # the standard errors of the other maps are calibrated too (delta method, full covariance)
    zk = (maps["InversionEfficiency"] - k) / maps.stderr["InversionEfficiency"]
    zm = (maps["M0"] - M0) / maps.stderr["M0"]
    assert 0.85 < robust_sd(zk) < 1.15
    assert 0.85 < robust_sd(zm) < 1.15


def test_real_data_estimator_is_efficient_at_snr_30():
    # With Gaussian noise on phase-corrected real data the bound of Kay (1993) applies exactly:
    # every T1 within 1.3x of it (measured 0.98-1.04), no bias beyond 1.5%.
    t1, k, sigma, y = simulate(30, magnitude=False, seed=8)
    maps = fit_t1_ir(y, TI, signal="real")
    u = (maps["T1"] - t1) / crlb_t1(t1, k, M0, sigma)
    for v in T1S:
        sel = t1 == v
        assert np.std(u[sel]) < 1.3, v
        assert abs(np.median(maps["T1"][sel]) / v - 1) < 0.015, v
    assert 0.85 < robust_sd((maps["T1"] - t1) / maps.stderr["T1"]) < 1.15


# ------------------------------------------------------------------ independent minimisers
def _curve_fit_brute_force(y: np.ndarray):
    """Barral et al. 2010 polarity restoration by brute force: every sign-change position, curve_fit each."""

    def f(t, a, b, t1):
        return a + b * np.exp(-t / t1)

    best = None
    for j in range(TI.size + 1):
        yc = np.where(np.arange(TI.size) < j, -y, y)
        for t1_start in (0.3, 2.0):
            try:
                p, cov = curve_fit(f, TI, yc, p0=(y.max(), -2 * y.max(), t1_start), maxfev=2000)
            except RuntimeError:
                continue
            rss = float(np.sum((yc - f(TI, *p)) ** 2))
            if best is None or rss < best[0]:
                best = (rss, p, cov)
    return best[1][2], np.sqrt(best[2][2, 2])


class _GridStart(InversionRecovery):
    """The same model started from the coarse grid instead of the variable-projection Newton step."""

    def initial_guess(self, y, w, ctx):
        return None


def test_fast_engine_agrees_with_lmfit_and_curve_fit():
    rng = np.random.default_rng(3)
    n = 24
    t1 = rng.uniform(0.1, 3.0, n)
    k = rng.uniform(0.9, 1.0, n)
    sigma = np.where(np.arange(n) % 2, M0 / 100, M0 / 30)[:, None]
    s = ir_signal(TI, t1[:, None], m0=M0, efficiency=k[:, None])
    y = np.abs(s + sigma * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape)))
    fast = fit_volume(InversionRecovery(TI), y)
    ref = fit_volume(_GridStart(TI), y, method="lmfit")
    assert np.all(fast.status == st.FITTED) and np.all(ref.status == st.FITTED)
    np.testing.assert_allclose(fast["T1"], ref["T1"], rtol=1e-4)
    np.testing.assert_allclose(fast.stderr["T1"], ref.stderr["T1"], rtol=1e-3)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        warnings.simplefilter("ignore", RuntimeWarning)  # exp overflow while curve_fit explores
        cf = np.array([_curve_fit_brute_force(v) for v in y])
    # measured on 400 such voxels: T1 within 2.6e-6, stderr within 1.6e-5 (relative)
    np.testing.assert_allclose(fast["T1"], cf[:, 0], rtol=1e-4)
    np.testing.assert_allclose(fast.stderr["T1"], cf[:, 1], rtol=1e-3)


# ------------------------------------------------------------------ Look-Locker
def look_locker_series(t1: float, alpha_deg: float, tau: float, n: int, m0: float = M0):
    """Pulse-by-pulse simulation: perfect inversion at t = 0, readouts of alpha every tau from t = tau.

    Mz relaxes freely between pulses and each readout keeps Mz cos(alpha) (spoiled);
    the signal of readout i is Mz sin(alpha) just before it.
    """
    e1 = np.exp(-tau / t1)
    c, sn = np.cos(np.radians(alpha_deg)), np.sin(np.radians(alpha_deg))
    mz = m0 - 2 * m0 * e1
    out = []
    for _ in range(n):
        out.append(mz * sn)
        mz = m0 + (mz * c - m0) * e1
    return tau * np.arange(1, n + 1), np.array(out)


def test_look_locker_correction_recovers_t1():
    # Deichmann & Haase 1992: T1 = T1* (B/A - 1). Their formula is the continuous-readout
    # limit; for 8 deg pulses every 50 ms it is 0.5% high (measured), while the
    # uncorrected T1* is 9-28% short -- a test that the correction is applied.
    for t1 in (0.5, 1.0, 2.0):
        ti, s = look_locker_series(t1, 8.0, 0.05, 60)
        maps = fit_t1_ir(s[None, :], ti, signal="real", look_locker=True)
        assert maps["T1"][0] == pytest.approx(t1, rel=0.01)
        assert maps["ApparentT1"][0] < 0.92 * t1
        assert "InversionEfficiency" not in maps.names
    # the same on magnitude data (the early readouts are negative)
    maps = fit_t1_ir(np.abs(s)[None, :], ti, look_locker=True)
    assert maps["T1"][0] == pytest.approx(2.0, rel=0.01)


def test_look_locker_standard_error_is_calibrated():
    # delta-method standard error of T1* (B/A - 1) against the spread over noise draws
    rng = np.random.default_rng(21)
    ti, s = look_locker_series(1.2, 6.0, 0.05, 40)
    y = s + 2.0 * rng.standard_normal((3000, ti.size))  # SNR about 50 on the recovered signal
    maps = fit_t1_ir(y, ti, signal="real", look_locker=True)
    truth = float(np.median(fit_t1_ir(s[None, :], ti, signal="real", look_locker=True)["T1"]))
    z = (maps["T1"] - truth) / maps.stderr["T1"]
    assert 0.85 < robust_sd(z) < 1.15


# ------------------------------------------------------------------ complex data
def test_complex_data_phase_corrected_then_fitted():
    rng = np.random.default_rng(4)
    n = 400
    t1 = rng.uniform(0.2, 3.0, n)
    s = ir_signal(TI, t1[:, None], m0=M0, efficiency=0.95)
    phi = rng.uniform(-np.pi, np.pi, (n, 1))  # arbitrary receive phase per voxel
    noise = 10.0 * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape))
    z = (s + noise) * np.exp(1j * phi)
    maps = fit_t1_ir(z, TI, signal="complex")
    # the same as fitting the real part of the noisy data with the true phase removed,
    # up to the small phase error of the reference sample
    real = fit_t1_ir((s + noise).real, TI, signal="real")
    assert np.all(maps.status == st.FITTED)
    assert np.median(np.abs(maps["T1"] / real["T1"] - 1)) < 0.01
    assert abs(np.median(maps["T1"] / t1 - 1)) < 0.005
    # magnitude + phase is the same input
    alt = fit_t1_ir(np.abs(z), TI, signal="complex", phase=np.angle(z))
    np.testing.assert_allclose(alt["T1"], maps["T1"], rtol=1e-9)


def test_complex_series_before_the_null_keeps_m0_positive():
    # every TI before the null (T1 = 10 s, TI <= 5 s): the reference phase is that of a
    # negative signal, so the corrected data are -S; M0 is still reported positive
    s = ir_signal(TI, 10.0, m0=M0, efficiency=0.97)
    z = (s * np.exp(1j * 0.7))[None, :]
    assert np.all(s < 0)
    np.testing.assert_allclose(phase_correct(z)[0], -s, rtol=1e-12)
    maps = fit_t1_ir(z, TI, signal="complex")
    assert maps["T1"][0] == pytest.approx(10.0, rel=1e-6)
    assert maps["M0"][0] == pytest.approx(M0, rel=1e-6)
    assert maps["InversionEfficiency"][0] == pytest.approx(0.97, abs=1e-6)


def test_unsorted_inversion_times_are_sorted_with_the_samples():
    _t1, _, _, y = simulate(100, magnitude=True, seed=9, n=20)
    order = np.random.default_rng(0).permutation(TI.size)
    a = fit_t1_ir(y, TI)
    b = fit_t1_ir(y[:, order], TI[order])
    np.testing.assert_array_equal(a["T1"], b["T1"])


def test_array_api_rejects_inconsistent_input():
    y = np.abs(ir_signal(TI, 1.0, m0=M0))[None, :]
    with pytest.raises(ValueError, match="inversion times"):
        fit_t1_ir(y, TI[:-1])
    with pytest.raises(ValueError, match="signal='real'"):
        fit_t1_ir(-y, TI)
    with pytest.raises(ValueError, match="complex"):
        fit_t1_ir(y, TI, signal="complex")
