"""The one-exponential Newton path (qmap.fitting.exponential) against independent references.

* The same least-squares minimum as the general Levenberg-Marquardt iteration over both parameters, and
  as scipy.optimize.curve_fit (a general-purpose solver: same data, same model -> same minimum), within
  the solvers' convergence tolerance (1e-3 of a lower bound of each standard error).
* The Gram matrix it reports equals J^T J of the model's Jacobian at the fit (so the standard errors are
  those of the general path).
* Every unusual voxel (no decay, all zero, negative samples, rising signal) is handed to the general
  iteration and ends exactly as there; results do not depend on how voxels are grouped.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.optimize import OptimizeWarning, curve_fit

from qmap.fitting.exponential import fit_exponential
from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.solver import fit_chunk
from qmap.models.monoexp import MonoExponential

EVEN = np.arange(1, 13) * 0.0035
UNEVEN = np.array([0.002, 0.0045, 0.007, 0.011, 0.016, 0.024, 0.035, 0.05])


class _General(MonoExponential):
    """The same model, fitted by the general iteration."""

    one_exponential = False


def _data(te, n, seed, snr=(3.0, 300.0)):
    rng = np.random.default_rng(seed)
    t2 = rng.uniform(0.003, 0.12, n)
    sigma = 10.0
    m0 = sigma * rng.uniform(*snr, n)
    return m0[:, None] * np.exp(-te / t2[:, None]) + rng.normal(0, sigma, (n, te.size))


@pytest.mark.parametrize("te", [EVEN, UNEVEN])
@pytest.mark.parametrize("noise", ["none", "rician"])
def test_same_minimum_as_the_general_iteration(te, noise):
    y = _data(te, 3000, 21)
    new = fit_chunk(MonoExponential(te), y, noise=NoiseFloor(noise), sigma=10.0)
    old = fit_chunk(_General(te), y, noise=NoiseFloor(noise), sigma=10.0)
    np.testing.assert_array_equal(new.status, old.status)
    ok = new.status == 0
    assert ok.mean() > 0.95
    se = np.sqrt(old.cov[ok][:, [0, 1], [0, 1]])
    # both stop within 1e-3 of a lower bound of the standard errors: together well within 1e-2 of them
    assert np.all(np.abs(new.params[ok] - old.params[ok]) <= 1e-2 * se)
    np.testing.assert_allclose(new.rss[ok], old.rss[ok], rtol=1e-6)
    # the covariances at two points that close: the standard errors and the correlation agree to ~1e-3 where
    # the decay time is determined (not in voxels that hardly decay over the echoes: there a step of 1e-3
    # standard errors changes the curvature more, and the Newton result is the closer to curve_fit's)
    det = se[:, 1] < 0.2 * old.params[ok, 1]
    assert det.mean() > 0.8
    se_new = np.sqrt(new.cov[ok][:, [0, 1], [0, 1]])
    np.testing.assert_allclose(se_new[det], se[det], rtol=1e-3)
    corr = [c[det, 0, 1] / np.sqrt(c[det, 0, 0] * c[det, 1, 1]) for c in (new.cov[ok], old.cov[ok])]
    np.testing.assert_allclose(corr[0], corr[1], atol=1e-3)
    # fewer model evaluations than the general iteration
    assert new.n_iter[ok].mean() < old.n_iter[ok].mean()


def test_same_minimum_as_curve_fit():
    y = _data(EVEN, 150, 22)
    fit = fit_exponential(MonoExponential(EVEN), y)
    done = np.setdiff1d(np.arange(y.shape[0]), fit.hard)
    assert done.size > 0.9 * y.shape[0]
    for i in done:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            ref, _ = curve_fit(lambda t, m, tt: m * np.exp(-t / tt), EVEN, y[i], p0=fit.params[i] * [1.1, 0.9],
                               xtol=1e-13, ftol=1e-13, maxfev=20000)
        rss_ref = np.sum((ref[0] * np.exp(-EVEN / ref[1]) - y[i]) ** 2)
        assert fit.rss[i] <= rss_ref * (1 + 1e-6)
        se_t = np.sqrt(fit.rss[i] / (EVEN.size - 2) / fit.jtj[i, 1, 1])  # a lower bound of se(T)
        assert abs(fit.params[i, 1] - ref[1]) <= 2e-3 * se_t + 1e-9 * ref[1]


def test_reported_gram_matrix_is_jtj_of_the_model():
    model = MonoExponential(UNEVEN)
    y = _data(UNEVEN, 500, 23, snr=(50.0, 300.0))
    fit = fit_exponential(model, y)
    done = np.setdiff1d(np.arange(y.shape[0]), fit.hard)
    _, J = model.signal_jacobian(fit.params[done])
    jtj = np.einsum("npm,nqm->npq", J, J)
    # J^T J at the last evaluated point (the last, negligible step is below 1e-3 standard errors)
    np.testing.assert_allclose(fit.jtj[done], jtj, rtol=1e-4)


def test_unusual_voxels_end_as_in_the_general_iteration():
    te = EVEN
    good = 800.0 * np.exp(-te / 0.03)
    rows = np.array([
        good,
        np.full(te.size, 250.0),  # no decay: the start is at the upper bound
        np.zeros(te.size),  # all zero
        good * np.where(np.arange(te.size) % 2, -1.0, 1.0),  # alternating sign
        good[::-1],  # rising
        good * 1e-30,  # tiny amplitudes
    ])
    new = fit_chunk(MonoExponential(te), rows)
    old = fit_chunk(_General(te), rows)
    hard = fit_exponential(MonoExponential(te), rows / np.max(np.abs(rows), axis=1, initial=1e-300)[:, None]).hard
    assert {1, 2, 3, 4} <= set(hard.tolist())
    for f in ("params", "status", "rss", "cov"):
        np.testing.assert_array_equal(getattr(new, f)[hard], getattr(old, f)[hard])
    np.testing.assert_array_equal(new.status, old.status)


def test_grouping_does_not_change_results():
    y = _data(EVEN, 999, 24)
    model = MonoExponential(EVEN)
    whole = fit_chunk(model, y, sigma=10.0)
    parts = [fit_chunk(model, y[i:i + 37], sigma=10.0) for i in range(0, y.shape[0], 37)]
    for f in ("params", "cov", "rss", "status", "n_iter"):
        np.testing.assert_array_equal(getattr(whole, f), np.concatenate([getattr(p, f) for p in parts]))
