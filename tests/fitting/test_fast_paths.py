"""The shortcuts of the solver against independent references.

* The mono-exponential start: the weighted log-linear regression of ``ln S`` on TE (common practice; a
  straight line through ``ln S = ln M0 - TE / T``) is exact for noise-free decays.
* The evenly spaced echo train: ``exp(-TE_k / T)`` by repeated multiplication equals numpy's ``exp``
  to rounding.
* The undamped Gauss-Newton steps before the damped iteration reach the same least-squares minimum as
  scipy.optimize.curve_fit (a general-purpose least-squares solver: same data, same model -> same
  minimum), down to low SNR, and the damped iteration alone (``gauss_newton=0``) to within the
  solver's convergence tolerance (1e-3 of a lower bound of each standard error).
"""

import warnings

import numpy as np
import pytest
from scipy.optimize import OptimizeWarning, curve_fit

from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.optimizer import levenberg_marquardt
from qmap.fitting.solver import fit_chunk, linear_amplitudes
from qmap.models.monoexp import MonoExponential

EVEN = np.arange(1, 13) * 0.0035
UNEVEN = np.array([0.002, 0.0045, 0.007, 0.011, 0.016, 0.024, 0.035, 0.05])


@pytest.mark.parametrize("te", [EVEN, UNEVEN])
def test_log_linear_start_is_exact_without_noise(te):
    t2 = np.geomspace(0.003, 0.3, 50)
    y = 700.0 * np.exp(-te / t2[:, None])
    start = MonoExponential(te).initial_guess(y, None, None)[:, 0]
    np.testing.assert_allclose(start, t2, rtol=1e-10)


def test_log_linear_start_ignores_non_positive_samples_and_clips():
    model = MonoExponential(EVEN)
    y = 500.0 * np.exp(-EVEN / 0.02) * np.ones((3, 1))
    y[0, 6:] = 0.0  # zero-filled tail: no weight
    y[1] = 100.0  # no decay: the upper bound
    y[2] = -1.0  # nothing positive: the upper bound
    start = model.initial_guess(y, None, None)[:, 0]
    assert start[0] == pytest.approx(0.02, rel=1e-10)
    lo, hi = model.bounds()
    assert start[1] == hi[0] and start[2] == hi[0]
    assert np.all(start >= lo[0])


@pytest.mark.parametrize("te", [EVEN, UNEVEN])
def test_decay_of_even_train_matches_exp(te):
    model = MonoExponential(te)
    rate = np.geomspace(1.0, 2000.0, 300)
    np.testing.assert_allclose(model.decay(rate), np.exp(-np.outer(rate, te)), rtol=1e-13, atol=0)
    assert (model._step is not None) == (te is EVEN)


def _curve_fit(te, y, p0):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", OptimizeWarning)
        popt, _ = curve_fit(lambda t, m, tt: m * np.exp(-t / tt), te, y, p0=p0, xtol=1e-13, ftol=1e-13,
                            maxfev=20000)
    return popt


@pytest.mark.parametrize("te", [EVEN, UNEVEN])
def test_fast_fit_reaches_curve_fit_minimum_down_to_low_snr(te):
    rng = np.random.default_rng(11)
    n = 120
    t2 = rng.uniform(0.004, 0.1, n)
    sigma = 10.0
    m0 = sigma * rng.choice([3.0, 8.0, 30.0, 200.0], n)  # SNR at TE = 0
    y = m0[:, None] * np.exp(-te / t2[:, None]) + rng.normal(0, sigma, (n, te.size))
    model = MonoExponential(te)
    fit = fit_chunk(model, y)
    lo, hi = model.bounds()
    checked = 0
    for i in range(n):
        if fit.status[i] != 0:
            continue
        ref = _curve_fit(te, y[i], [fit.params[i, 0] * 1.1, fit.params[i, 1] * 0.9])
        if not (lo[0] < ref[1] < hi[0]):
            continue
        rss_ref = np.sum((ref[0] * np.exp(-te / ref[1]) - y[i]) ** 2)
        # the same minimum: the RSS within what a last step below 1e-3 standard errors leaves (the solver
        # reports the RSS before that step), the decay time within 1e-3 of its standard error
        assert fit.rss[i] <= rss_ref * (1 + 1e-6)
        assert abs(fit.params[i, 1] - ref[1]) <= 1e-3 * np.sqrt(fit.cov[i, 1, 1]) + 1e-9 * ref[1]
        checked += 1
    assert checked > 0.8 * n


def test_gauss_newton_phase_agrees_with_damped_iteration():
    rng = np.random.default_rng(12)
    n = 3000
    t2 = rng.uniform(0.003, 0.12, n)
    sigma = 10.0
    m0 = sigma * rng.uniform(2.0, 300.0, n)
    y = m0[:, None] * np.exp(-EVEN / t2[:, None]) + rng.normal(0, sigma, (n, EVEN.size))
    model = MonoExponential(EVEN)
    scale = np.max(np.abs(y), axis=1)
    yn = y / scale[:, None]
    theta0 = model.initial_guess(yn, None, None)
    p0 = np.concatenate([linear_amplitudes(model, yn, None, theta0, None), theta0], axis=1)
    lo_nl, hi_nl = model.bounds()
    lo, hi = np.concatenate([[-np.inf], lo_nl]), np.concatenate([[np.inf], hi_nl])

    def evaluate(p, idx):
        return model.signal_jacobian(p, None)

    fast = levenberg_marquardt(evaluate, yn, None, p0, lo, hi)
    slow = levenberg_marquardt(evaluate, yn, None, p0, lo, hi, gauss_newton=0)
    conv = fast[3] & slow[3]  # (a voxel at SNR 2 runs to its iteration limit in both)
    assert conv.mean() > 0.99
    # both stopped within 1e-3 of a lower bound of the standard error (s / sqrt(H_ii)) of the minimum
    _, J = model.signal_jacobian(slow[0])
    se_floor = np.sqrt(slow[1] / (EVEN.size - 2))[:, None] / np.sqrt(np.einsum("npm,npm->np", J, J))
    inner = conv & np.all((slow[0][:, 1:] > lo_nl * 1.01) & (slow[0][:, 1:] < hi_nl * 0.99), axis=1)
    assert inner.mean() > 0.9
    assert np.all(np.abs(fast[0] - slow[0])[inner] <= 2.5e-3 * se_floor[inner])
    # the RSS reported is that before the last, negligible step: the same to second order in it
    np.testing.assert_allclose(fast[1][inner], slow[1][inner], rtol=1e-6)
    # fewer iterations on average from the closed-form start
    assert fast[4].mean() <= slow[4].mean()


def test_rician_fit_through_the_fast_path_stays_unbiased():
    # the Rician refinement runs the same optimiser (start, Gauss-Newton phase) on the near-floor voxels
    rng = np.random.default_rng(13)
    n = 400
    sigma = 10.0
    t2 = rng.uniform(0.005, 0.03, n)
    nu = 150.0 * np.exp(-EVEN / t2[:, None])
    y = np.abs(nu + rng.normal(0, sigma, nu.shape) + 1j * rng.normal(0, sigma, nu.shape))
    model = MonoExponential(EVEN)
    fit = fit_chunk(model, y, noise=NoiseFloor("rician"), sigma=sigma)
    ok = fit.status == 0
    assert ok.mean() > 0.9
    # unbiased on average (the Gaussian fit of the same data is biased upwards: the floor lengthens T2*)
    plain = fit_chunk(model, y)
    err_r = np.median(fit.params[ok, 1] / t2[ok] - 1)
    err_p = np.median(plain.params[ok, 1] / t2[ok] - 1)
    assert abs(err_r) < 0.03 < err_p
