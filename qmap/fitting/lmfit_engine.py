"""Per-voxel reference engine on lmfit.

Slow (about a thousand voxels per second) but independent of qmap's own
solver: it fits the same model (through :meth:`SeparableModel.predict`) with
lmfit's Levenberg-Marquardt (MINPACK) for each voxel. Selectable with
``--engine lmfit`` for small jobs and used by the tests as the cross-check of
the vectorised engine. Covariances are lmfit's (scaled by the reduced
chi-square, as ``scipy.optimize.curve_fit``).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from . import status as st
from .solver import ChunkFit, grid_start, linear_amplitudes

__all__ = ["fit_chunk_lmfit"]


def fit_chunk_lmfit(model, y, *, ctx=None, noise=None, sigma=None, max_iter: int = 60,
                    stderr: str = "noise") -> ChunkFit:
    """Fit each voxel of ``y`` (n, m) with lmfit; same outputs as :func:`qmap.fitting.solver.fit_chunk`.

    With ``sigma`` given and ``stderr="noise"`` the covariance is lmfit's
    divided by its reduced chi-square and multiplied by sigma^2 (the inverse
    Fisher information; Gaussian noise model).
    """
    import lmfit

    from .noise_floor import NoiseFloor

    noise = noise or NoiseFloor("none")
    fit_model = noise.wrap(model)
    y = np.asarray(y, float)
    n, _m = y.shape
    w = noise.weights(y, sigma)
    names = fit_model.param_names
    P = len(names)
    L = len(fit_model.linear)
    lo_nl, hi_nl = model.bounds()
    lo = np.concatenate([noise.linear_lower(fit_model), lo_nl])
    hi = np.concatenate([np.full(L, np.inf), hi_nl])
    sig = None if sigma is None else np.broadcast_to(np.asarray(sigma, float), (n,))

    out = ChunkFit(
        params=np.full((n, P), np.nan), cov=np.full((n, P, P), np.nan), rss=np.full(n, np.nan),
        r2=np.full(n, np.nan), rmse=np.full(n, np.nan), n_used=w.sum(axis=1).astype(int),
        status=np.zeros(n, np.uint8), n_iter=np.zeros(n, int),
    )
    for i in range(n):
        ci = None if not ctx else {k: v[i : i + 1] for k, v in ctx.items()}
        best: tuple[float, Any, np.ndarray] | None = None
        for yc in model.candidates(y[i : i + 1]):
            theta0 = model.initial_guess(yc, w[i : i + 1], ci)
            if theta0 is None:
                theta0 = grid_start(fit_model, yc, w[i : i + 1], ci)
            theta0 = np.clip(theta0, lo_nl, hi_nl)
            c0 = np.maximum(np.nan_to_num(linear_amplitudes(fit_model, yc, w[i : i + 1], theta0, ci)), lo[:L])
            pars = lmfit.Parameters()
            for k, (nm, v) in enumerate(zip(names, np.concatenate([c0, theta0], 1)[0])):
                pars.add(nm, value=float(v), min=float(lo[k]), max=float(hi[k]))
            keep = w[i] > 0

            def resid(pp, yc=yc, ci=ci, keep=keep, sig_i=None if sig is None else sig[i]):
                vec = np.array([[pp[nm].value for nm in names]])
                s = fit_model.predict(vec, ci)
                if noise.rician:
                    s = noise.expectation(s, sig_i)
                return (yc[0] - s[0])[keep]

            res = lmfit.minimize(resid, pars, method="leastsq", max_nfev=200 * (P + 1))
            rss = float(np.sum(res.residual**2))
            if best is None or rss < best[0]:
                best = (rss, res, yc)
        assert best is not None, "a model offers at least one start candidate"
        rss, res, yc = best
        vec = np.array([res.params[nm].value for nm in names])
        out.params[i] = vec
        out.rss[i] = rss
        out.n_iter[i] = res.nfev
        if res.covar is not None and res.covar.shape == (P, P):
            out.cov[i] = res.covar
            if sig is not None and stderr == "noise":
                nfree = int(np.sum(w[i] > 0)) - P
                redchi = rss / nfree if nfree > 0 else np.nan
                usable = np.isfinite(sig[i]) and sig[i] > 0  # no usable sigma: no standard error (one convention)
                out.cov[i] = res.covar / redchi * sig[i] ** 2 if redchi > 0 and usable else np.nan
        else:
            out.status[i] = st.ILL_CONDITIONED
        if not res.success:
            out.status[i] = st.NOT_CONVERGED
        keep = w[i] > 0
        yk = yc[0][keep]
        tss = float(np.sum((yk - yk.mean()) ** 2))
        determined = keep.sum() > P  # exactly determined: the residuals are zero by construction, no quality
        out.r2[i] = 1 - rss / tss if tss > 0 and determined else np.nan
        out.rmse[i] = np.sqrt(rss / max(keep.sum(), 1)) if determined else np.nan
        theta = vec[L:]
        span = hi_nl - lo_nl
        if np.any((theta <= lo_nl + 1e-9 * span) | (theta >= hi_nl - 1e-9 * span)):
            out.status[i] = st.AT_BOUND
            out.cov[i] = np.inf
    return out
