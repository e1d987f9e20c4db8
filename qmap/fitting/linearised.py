"""The linearised variable-flip-angle estimator as a solver method (``method="linear"``).

:func:`fit_chunk_linear` fits a chunk of voxels with the iteratively reweighted linearised regression
of the spoiled gradient-echo signal (Deoni, Rutt & Peters, Magn Reson Med 2003;49:515;
:func:`qmap.models.vfa.vfa_regression`) and returns the same :class:`~qmap.fitting.solver.ChunkFit`
as the least-squares solver, so that the engine, :func:`qmap.maps.fit_volume`, the outputs and the
provenance are shared with every other fit.
"""

from __future__ import annotations

import numpy as np

from ..errors import UsageError
from ..models.vfa import LINEAR_PASSES, SpoiledGRE, actual_trig, vfa_regression
from . import status as st
from .solver import ChunkFit

__all__ = ["fit_chunk_linear"]


def fit_chunk_linear(
    model,
    y: np.ndarray,
    *,
    ctx: dict | None = None,
    sigma: np.ndarray | float | None = None,
    stderr: str = "noise",
    passes: int = LINEAR_PASSES,
) -> ChunkFit:
    """Fit ``y`` (n, m) with the linearised regression of a :class:`~qmap.models.vfa.SpoiledGRE` model.

    Parameters
    ----------
    model : SpoiledGRE
        Flip angles, TR and the T1 bounds (estimates outside are set to the bound, status 3).
    y : (n, m) ndarray
        Signals at the model's flip angles.
    ctx : dict, optional
        ``{"b1": (n,) ndarray}``: relative B1 per voxel.
    sigma : float or (n,) ndarray, optional
        Noise sd (signal units): with ``stderr="noise"`` the standard errors use it (``s = sigma``
        where it is finite and positive); otherwise only when no residual degrees of freedom remain
        (two angles), as the least-squares solver does.
    stderr : {"noise", "residual"}
        Covariance convention when ``sigma`` is given.
    passes : int
        Reweighted passes after the first, unweighted one.

    Returns
    -------
    ChunkFit
        ``params`` (n, 2) as ``[M0, T1]``; ``cov`` (n, 2, 2); ``rss``, ``r2``, ``rmse`` in signal
        space; ``status`` 0, 3 (T1 at a bound; covariance NaN) or 5 (singular regression).

    Notes
    -----
    Standard errors by error propagation: to first order in the noise the estimator's covariance is
    ``s^2 (X^T U X)^-1`` for ``(E1, c)`` (slope and intercept of the line, ``U`` the final weights)
    with ``s^2 = sigma^2`` (``stderr="noise"``) or ``RSS / (m - 2)`` (the signal-domain residual
    variance; with two angles ``sigma^2`` when given, else NaN), then the delta method to ``T1 = -TR / ln E1`` and ``M0 = c / (1 - E1)``.

    Examples
    --------
    >>> import numpy as np
    >>> from qmap.models.vfa import spgr_signal
    >>> fa = np.array([3.0, 8.0, 15.0])
    >>> fit = fit_chunk_linear(SpoiledGRE(fa, 0.015), spgr_signal(fa, 0.015, 1.2, m0=50.0)[None])
    >>> fit.params.round(9).tolist(), fit.status.tolist()
    ([[50.0, 1.2]], [0])
    """
    if not isinstance(model, SpoiledGRE):
        raise UsageError(f"the linear method applies to the variable-flip-angle model only, not {model.name!r}")
    y = np.asarray(y, float)
    n = y.shape[0]
    b1 = None if not ctx else ctx.get("b1")
    tr = model.tr
    m0, t1, at_bound, singular = vfa_regression(y, model.x, tr, b1=b1, passes=passes, t1_bounds=model.t1_bounds)
    status = np.zeros(n, np.uint8)
    status[at_bound] = st.AT_BOUND
    status[singular] = st.ILL_CONDITIONED
    s, c = actual_trig(model.x, n, b1)
    w = np.ones_like(y)
    e1 = np.exp(-tr / t1)
    # signal-domain residuals and quality
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        X = y * c / s
        den = 1.0 - e1[:, None] * c
        phi = s * (1.0 - e1[:, None]) / den
        r = y - m0[:, None] * phi
        rss = np.sum(w * r * r, axis=1)
        n_used = w.sum(axis=1).astype(int)
        ybar = np.sum(w * y, axis=1) / np.maximum(n_used, 1)
        tss = np.sum(w * (y - ybar[:, None]) ** 2, axis=1)
        # two angles determine M0 and T1 exactly: the residuals are zero by construction, no quality (NaN)
        r2 = np.where((tss > 0) & (n_used > 2), 1.0 - rss / tss, np.nan)
        rmse = np.where(n_used > 2, np.sqrt(rss / np.maximum(n_used, 1)), np.nan)
        # covariance of (E1, c) and the delta method to (M0, T1)
        uu = w * (s / den) ** 2
        sw, sx, sxx = np.sum(uu, 1), np.sum(uu * X, 1), np.sum(uu * X * X, 1)
        dd = sw * sxx - sx * sx
        dof = n_used - 2
        s2 = np.where(dof > 0, rss / np.maximum(dof, 1), np.nan)
        if sigma is not None:
            sig = np.asarray(sigma, float) * np.ones(n)
            sig2 = sig**2
            usable = np.isfinite(sig) & (sig > 0)
            # one convention per map: under "noise" a voxel without a usable sigma has no standard error
            if stderr == "noise":  # "residual": s2 as it is (NaN without residual degrees of freedom)
                s2 = np.where(usable, sig2, np.nan)
        v_e, v_c, c_ec = s2 * sw / dd, s2 * sxx / dd, -s2 * sx / dd
        icpt = m0 * (1.0 - e1)
        lg = np.log(e1)
        dt_de = tr / (e1 * lg * lg)
        dm_de, dm_dc = icpt / (1.0 - e1) ** 2, 1.0 / (1.0 - e1)
        cov = np.empty((n, 2, 2))
        cov[:, 1, 1] = dt_de**2 * v_e
        cov[:, 0, 0] = dm_de**2 * v_e + 2 * dm_de * dm_dc * c_ec + dm_dc**2 * v_c
        cov[:, 0, 1] = cov[:, 1, 0] = dt_de * (dm_de * v_e + dm_dc * c_ec)
    cov[status == st.AT_BOUND] = np.nan
    params = np.stack([m0, t1], axis=1)
    return ChunkFit(params, cov, rss, r2, rmse, n_used, status, np.full(n, passes + 1))
