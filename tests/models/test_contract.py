"""One contract every registered signal model fulfils (scikit-learn style estimator checks).

For each model in qmap.models.REGISTRY: the analytic Jacobian matches a numerical
derivative (scipy.optimize.approx_fprime -- general-purpose reference), noise-free
data are recovered exactly, and noisy data within a tolerance set by the
Cramer-Rao bound (Fisher information J^T J / sigma^2; Kay 1993).
"""

import numpy as np
import pytest
from scipy.optimize import approx_fprime

from qmap.fitting.solver import fit_chunk
from qmap.models import REGISTRY, model_class


def _examples():
    """name -> (model, true params [linear..., nonlinear...] (n, P), ctx or None)."""
    out = {}
    te = np.arange(1, 13) * 0.004
    out["monoexp"] = (model_class("monoexp")(te, param="T2star"),
                      np.array([[1000.0, 0.01], [500.0, 0.03], [800.0, 0.06]]), None)
    ti = np.array([0.05, 0.15, 0.3, 0.6, 1.0, 1.6, 2.5, 4.0])
    ir = model_class("ir")(ti, signal="real")
    out["ir"] = (ir, np.array([[1000.0, -1950.0, 0.4], [800.0, -1500.0, 1.2], [500.0, -1000.0, 2.5]]), None)
    vfa = model_class("vfa")([3.0, 8.0, 15.0, 25.0], 0.015)
    out["vfa"] = (vfa, np.array([[3000.0, 0.6], [2500.0, 1.2], [4000.0, 2.0]]),
                  {"b1": np.array([0.8, 1.0, 1.2])})
    epg = model_class("epg_t2")(np.arange(1, 25) * 0.01, refocus_deg=180.0)
    # EpgT2 parametrisation: see its docstring (second non-linear parameter)
    p2 = np.array([[1000.0, 0.05, 0.9], [700.0, 0.1, 0.95], [900.0, 0.15, 0.85]])
    out["epg_t2"] = (epg, _to_model_params(epg, p2), None)
    return out


def _to_model_params(model, p):
    """Map (M0, T2, refocusing scale) to the model's own parameters if it fits a transformed scale."""
    if hasattr(model, "from_scale"):
        p = p.copy()
        p[:, 2] = model.from_scale(p[:, 2])
    return p


EXAMPLES = _examples()


def test_every_registered_model_has_an_example():
    assert set(EXAMPLES) == set(REGISTRY)


@pytest.mark.parametrize("name", sorted(REGISTRY))
def test_jacobian_matches_numerical_derivative(name):
    model, params, ctx = EXAMPLES[name]
    s, J = model.signal_jacobian(params, ctx)
    assert J.shape == (params.shape[0], params.shape[1], model.n_samples)
    for i in range(params.shape[0]):
        ci = None if ctx is None else {k: v[i : i + 1] for k, v in ctx.items()}
        for m in range(model.n_samples):
            f = lambda p, m=m, ci=ci: model.predict(p[None, :], ci)[0, m]
            eps = np.abs(params[i]) * 1e-7 + 1e-10
            num = approx_fprime(params[i], f, eps)
            np.testing.assert_allclose(J[i, :, m], num, rtol=2e-4, atol=1e-6 * np.abs(s[i]).max())


@pytest.mark.parametrize("name", sorted(REGISTRY))
def test_noise_free_recovery(name):
    model, params, ctx = EXAMPLES[name]
    y = model.predict(params, ctx)
    fit = fit_chunk(model, y, ctx=ctx)
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)


@pytest.mark.parametrize("name", sorted(REGISTRY))
def test_noisy_recovery_within_cramer_rao(name):
    model, params, ctx = EXAMPLES[name]
    rng = np.random.default_rng(7)
    reps = 300
    p = np.repeat(params, reps, axis=0)
    c = None if ctx is None else {k: np.repeat(v, reps) for k, v in ctx.items()}
    clean = model.predict(p, c)
    sigma = 0.01 * np.abs(clean).max()
    y = clean + rng.normal(0, sigma, clean.shape)
    fit = fit_chunk(model, y, ctx=c)
    _, J = model.signal_jacobian(params, ctx)
    for i in range(params.shape[0]):
        est = fit.params[i * reps : (i + 1) * reps]
        crlb = np.sqrt(np.diag(np.linalg.inv(J[i] @ J[i].T / sigma**2)))
        # unbiased within 4 CRLB / sqrt(reps), spread within 25 % of the bound (efficient estimator)
        np.testing.assert_array_less(np.abs(np.median(est, 0) - params[i]), 4 * crlb / np.sqrt(reps) * 1.5 + 1e-12)
        assert np.all(np.abs(np.std(est, 0) / crlb - 1) < 0.25), (name, np.std(est, 0) / crlb)
