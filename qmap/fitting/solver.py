"""The vectorised fitter: variable-projection start + batched Levenberg-Marquardt.

For a chunk of voxels ``y`` (n, m) and a :class:`~qmap.models.base.SeparableModel`:

1. **Start.** The model's closed-form start if it has one, otherwise a grid
   search over the non-linear parameters with the linear amplitudes solved in
   closed form for every candidate (variable projection; with a basis shared
   by all voxels this is one matrix product per grid block).
2. **Refine.** Levenberg-Marquardt on all parameters at once for every voxel,
   with the normal equations of each voxel solved by an element-wise batched
   Cholesky (:mod:`qmap.linalg`). Non-linear parameters are kept in
   their bounds by projection.
3. **Noise floor.** :mod:`qmap.fitting.noise_floor` changes the objective
   (offset column, truncation weights, or the Rician expectation of the
   magnitude) for any model.
4. **Uncertainty.** Covariance ``s^2 (J^T W J)^-1`` at the solution
   (:mod:`qmap.fitting.uncertainty`): with the noise sigma known ``s = sigma``
   (the inverse Fisher information, ``curve_fit`` with ``absolute_sigma=True``;
   a Rician sandwich where the noise floor is modelled), otherwise -- or with
   ``stderr="residual"`` -- ``s^2 = RSS / (m_used - P)`` (``absolute_sigma=False``).
   Voxels with an estimate at a bound get an infinite covariance: the
   linearised interval means nothing there.

A model may offer a cheap stand-in with the same parameters (``model.surrogate()``,
the interpolated EPG table of :class:`qmap.models.epg_t2.EpgT2Table`): steps 1-3
then run on the stand-in and every fit is finished by Levenberg-Marquardt on the
exact model from there, so the minimum and RSS are the exact model's (the
stand-in only saves exact evaluations). The model may name the model of that
finish (``model.finisher()``; default the exact model itself): the EPG model
finishes on the exact trains with the stand-in's derivatives
(:class:`qmap.models.epg_t2.EpgT2Finish`), whose error moves the minimum by far
less than the finish's tolerance. When the Rician
objective follows, the stand-in's plain fit stops at ``GUIDE_SE_TOL`` (it only
selects and starts the Rician fit) and both Rician fits (stand-in, then exact)
at ``FINISH_SE_TOL`` (tested: within 0.02 standard errors of the exact-only fit).

Every voxel's arithmetic after the grid search is element-wise, so results do
not depend on the chunk size or on how many workers ran.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .. import status as st
from ..linalg import chol_inverse, chol_solve
from ..models.base import SeparableModel
from .exponential import fit_exponential
from .noise_floor import RICIAN_SWITCH, NoiseFloor
from .optimizer import gram as _normal
from .optimizer import levenberg_marquardt, row_all, row_any, row_max, row_min

__all__ = ["ChunkFit", "fit_chunk", "grid_start", "levenberg_marquardt", "linear_amplitudes", "voxel_scale"]

#: columns of the grid handled per matrix product (bounds memory for 2D grids)
GRID_BLOCK = 256
#: convergence of the Rician fits of a fit guided by the model's stand-in (on the stand-in, then the exact model
#: from there), in units of a lower bound of each parameter's standard error: the exact model's first step from
#: the stand-in's minimum is below it for almost every voxel and is taken, leaving an error of second order in it
#: (measured on 32-echo EPG trains at SNR 125: result within 5e-3 standard errors of the exact-only fit)
FINISH_SE_TOL = 1e-2
#: the same for the stand-in's plain least-squares fit when a Rician fit follows it (it then only chooses the
#: voxels near the noise floor and starts their fit)
GUIDE_SE_TOL = 0.2


@dataclass
class ChunkFit:
    """Fit of a chunk of voxels (arrays over the n voxels of the chunk)."""

    params: np.ndarray  # (n, P)  [linear..., nonlinear...]
    cov: np.ndarray  # (n, P, P)
    rss: np.ndarray  # (n,)
    r2: np.ndarray  # (n,)
    rmse: np.ndarray  # (n,)
    n_used: np.ndarray  # (n,) int
    status: np.ndarray  # (n,) uint8
    n_iter: np.ndarray  # (n,) int


def _basis_grid(model: SeparableModel, grid: np.ndarray) -> np.ndarray:
    return model.basis(grid, None)  # (G, m, L)


def grid_start(model: SeparableModel, y: np.ndarray, w: np.ndarray, ctx: dict | None) -> np.ndarray:
    """Best grid point of the non-linear parameters per voxel (variable projection).

    Returns (n, Q). Only the *index* of the best grid point comes from the
    (BLAS) matrix products; the returned values are the exact grid values.
    """
    grid = np.asarray(model.grid(), float)
    n = y.shape[0]
    best = np.full(n, -np.inf)
    best_idx = np.zeros(n, dtype=np.intp)
    uniform = bool(np.all(w == 1.0))
    yw = y if uniform else y * w
    shared = not model.voxel_inputs
    L = len(model.linear)
    if shared and uniform and L == 1:
        return grid[_dictionary_match(model.basis(grid, None)[:, :, 0], y)].copy()
    for g0 in range(0, grid.shape[0], GRID_BLOCK):
        g = grid[g0 : g0 + GRID_BLOCK]
        if shared:
            phi = _basis_grid(model, g)  # (G, m, L)
            b = np.stack([yw @ phi[:, :, k].T for k in range(L)], axis=-1)  # (n, G, L)
            if uniform:  # the Gram matrices are the same for every voxel
                a = np.broadcast_to(np.einsum("gmk,gml->gkl", phi, phi), (n, g.shape[0], L, L))
            else:
                a = np.empty((n, g.shape[0], L, L))
                for k in range(L):
                    for j in range(k, L):
                        a[:, :, k, j] = w @ (phi[:, :, k] * phi[:, :, j]).T
                        a[:, :, j, k] = a[:, :, k, j]
        else:
            b = np.empty((n, g.shape[0], L))
            a = np.empty((n, g.shape[0], L, L))
            for i in range(g.shape[0]):
                phi = model.basis(np.broadcast_to(g[i], (n, g.shape[1])), ctx)  # (n, m, L)
                b[:, i] = np.einsum("nml,nm->nl", phi, yw)
                a[:, i] = np.einsum("nmk,nml,nm->nkl", phi, phi, w)
        score = _projection_score(a, b)
        score = np.where(np.isfinite(score), score, -np.inf)
        i = np.argmax(score, axis=1)
        s = score[np.arange(n), i]
        better = s > best
        best[better] = s[better]
        best_idx[better] = i[better] + g0
    return grid[best_idx].copy()


#: grid columns per block of the dictionary match (a float32 (n, block) score array per block)
MATCH_BLOCK = 512


def _dictionary_match(phi: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Index of the best atom per voxel for one linear amplitude: argmax_g |<y, phi_g>| / ||phi_g||, (n,).

    With a single amplitude the projection score ``b^2 / a`` of the grid search
    is the squared normalised inner product, so the atoms are normalised once
    and the match is one single-precision matrix product per block of atoms
    (atoms of zero norm never win).

    The product's rounding depends on how many voxels are multiplied at once (BLAS blocks the rows
    differently; measured: the same row gives other float32 scores in another block), and a grid of
    nearly identical trains (short T2: only the first echo; long T2: flat) puts several atoms within
    that rounding of a voxel's best. So the product only nominates: every atom whose single-precision
    score is within :func:`_match_margin` (an upper bound of twice its rounding error) of the voxel's
    best is scored again exactly, voxel by voxel in double precision, and the exact best wins (the
    lowest index among equals). The choice is then the voxel's own, for any chunk size, number of
    workers or BLAS (measured on the sample data: 2.8 candidates a voxel, 88 % of voxels more than one).
    """
    norm = np.sqrt(np.einsum("gm,gm->g", phi, phi))
    with np.errstate(divide="ignore", invalid="ignore"):
        atoms64 = np.where((norm > 0)[:, None] & np.isfinite(phi), phi / norm[:, None], 0.0)
    atoms = atoms64.astype(np.float32)
    y64 = np.asarray(y, dtype=np.float64)
    y32 = np.ascontiguousarray(y64, dtype=np.float32)
    n = y.shape[0]
    margin = _match_margin(y64)
    best = np.full(n, -1.0, np.float32)
    best_idx = np.zeros(n, np.intp)
    rows = np.arange(n)
    cand_rows: list[np.ndarray] = []
    cand_atoms: list[np.ndarray] = []
    cand_scores: list[np.ndarray] = []
    for g0 in range(0, atoms.shape[0], MATCH_BLOCK):
        score = y32 @ atoms[g0 : g0 + MATCH_BLOCK].T  # (n, block)
        np.abs(score, out=score)
        i = np.argmax(score, axis=1)
        s = score[rows, i]
        better = s > best
        best[better] = s[better]
        best_idx[better] = i[better] + g0
        # the atoms within the margin of the best so far (a superset of those within it of the final best)
        flat = np.flatnonzero(score >= (best - margin)[:, None])  # (10x faster than a 2-D np.nonzero here)
        r, a = np.divmod(flat, score.shape[1])
        cand_rows.append(r)
        cand_atoms.append(a + g0)
        cand_scores.append(score.reshape(-1)[flat])
    r, a, sc = (np.concatenate(c) for c in (cand_rows, cand_atoms, cand_scores))
    keep = sc >= best[r] - margin[r]
    r, a = r[keep], a[keep]
    several = np.bincount(r, minlength=n) > 1
    pick = several[r]
    if pick.any():
        r, a = r[pick], a[pick]
        exact = np.abs(np.einsum("km,km->k", y64[r], atoms64[a]))  # per voxel and atom: no BLAS blocking
        order = np.lexsort((a, -exact, r))  # by voxel, then the best exact score, then the lowest index
        r, a = r[order], a[order]
        first = np.ones(r.size, bool)
        first[1:] = r[1:] != r[:-1]
        best_idx[r[first]] = a[first]
    return best_idx


def _match_margin(y64: np.ndarray) -> np.ndarray:
    """Twice an upper bound of the error of a single-precision score ``|<y, atom>|`` of a unit atom, (n,).

    Summing m products in float32 errs by at most ``gamma_m sum|y_k a_k| <= gamma_m ||y||`` (Higham,
    Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, section 3.1; ``gamma_m = m u / (1 - m u)``,
    ``u = 2^-24``), and rounding ``y`` and the atom to float32 adds ``2 u ||y||``; two scores compared
    differ by at most twice that; one more factor 2 of margin.
    """
    u = 2.0**-24
    m = y64.shape[1]
    gamma = m * u / (1.0 - m * u)
    return (4.0 * (gamma + 2.0 * u) * np.sqrt(np.einsum("nm,nm->n", y64, y64))).astype(np.float32)


def _projection_score(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """b^T a^-1 b for (n, G, L, L), (n, G, L): the part of ||y||^2 the basis explains."""
    L = b.shape[-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        if L == 1:
            return b[..., 0] ** 2 / a[..., 0, 0]
        if L == 2:
            det = a[..., 0, 0] * a[..., 1, 1] - a[..., 0, 1] ** 2
            return (a[..., 1, 1] * b[..., 0] ** 2 - 2 * a[..., 0, 1] * b[..., 0] * b[..., 1]
                    + a[..., 0, 0] * b[..., 1] ** 2) / det
        x = np.linalg.solve(a, b[..., None])[..., 0]
        return np.einsum("...l,...l->...", b, x)


def refine_grid_1d(model: SeparableModel, y, w, ctx, theta0) -> np.ndarray:
    """Parabolic interpolation of the projection score around the best grid point (one non-linear parameter).

    The scores at the grid point and its two neighbours are recomputed
    element-wise (not by BLAS), so the refined start is bit-identical for any
    chunk size; the parabola is fitted in log(theta) (grids are log-spaced).
    """
    grid = np.asarray(model.grid(), float)[:, 0]
    i = np.clip(np.searchsorted(grid, theta0[:, 0]), 1, grid.size - 2)
    scores = []
    for k in (-1, 0, 1):
        th = grid[i + k][:, None]
        phi = model.basis(th, ctx)
        b = np.einsum("nml,nm->nl", phi, y * w)
        a = np.einsum("nmk,nml,nm->nkl", phi, phi, w)
        scores.append(_projection_score(a[:, None], b[:, None])[:, 0])
    s0, s1, s2 = scores
    den = s0 - 2 * s1 + s2
    with np.errstate(divide="ignore", invalid="ignore"):
        delta = np.where(den < 0, 0.5 * (s0 - s2) / den, 0.0)
    delta = np.clip(np.nan_to_num(delta), -1.0, 1.0)
    lg = np.log(grid)
    step = np.where(delta >= 0, lg[i + 1] - lg[i], lg[i] - lg[i - 1])
    better = np.isfinite(s1) & (s1 >= np.maximum(s0, s2))  # only inside a bracketed maximum
    return np.where(better, np.exp(lg[i] + delta * step), grid[i])[:, None]


def linear_amplitudes(model: SeparableModel, y, w, theta, ctx) -> np.ndarray:
    """Least-squares linear amplitudes (n, L) for fixed non-linear parameters (``w`` None: all samples)."""
    phi = model.basis(theta, ctx)
    L = phi.shape[2]
    if L == 1:
        f = phi[:, :, 0]
        fw = f if w is None else f * w
        with np.errstate(divide="ignore", invalid="ignore"):
            return (np.einsum("nm,nm->n", fw, y) / np.einsum("nm,nm->n", fw, f))[:, None]
    if w is None:
        w = np.ones(y.shape)
    a = np.einsum("nmk,nml,nm->nkl", phi, phi, w)
    b = np.einsum("nml,nm->nl", phi, y * w)
    return chol_solve(a, b)


def voxel_scale(y: np.ndarray) -> np.ndarray:
    """Per-voxel intensity scale used to normalise the data before fitting, (n,).

    The largest absolute sample of each voxel (1 where that is 0 or not
    finite). Dividing the data (and sigma) by it makes every fit independent of
    the intensity scale of the input: amplitudes come out in units of this
    scale and are multiplied back afterwards, while the non-linear parameters,
    R-squared and the status are those of the normalised problem.
    """
    s = row_max(np.abs(y)) if y.shape[1] else np.ones(y.shape[0])
    return np.where(np.isfinite(s) & (s > 0), s, 1.0)


def fit_chunk(
    model: SeparableModel,
    y: np.ndarray,
    *,
    ctx: dict | None = None,
    noise: NoiseFloor | None = None,
    sigma: np.ndarray | None = None,
    max_iter: int = 60,
    stderr: str = "noise",
    normalise: bool = True,
) -> ChunkFit:
    """Fit ``model`` to the voxels ``y`` (n, m); see the module docstring.

    Parameters
    ----------
    model : SeparableModel
    y : (n, m) ndarray
        Finite samples (the engine screens out non-finite voxels).
    ctx : dict, optional
        Per-voxel model inputs, each (n,).
    noise : qmap.fitting.noise_floor.NoiseFloor, optional
        Noise-floor handling; None means plain least squares.
    sigma : (n,) ndarray, optional
        Noise standard deviation per voxel (needed by ``truncate`` and ``rician``).
    max_iter : int
        Levenberg-Marquardt iterations at most.
    stderr : {"noise", "residual"}
        Covariance convention when ``sigma`` is given: the inverse Fisher
        information with the known noise sd (default), or the per-voxel
        residual variance RSS/(m_used - P). Without ``sigma`` the residual
        variance is used (and sigma nowhere). One convention per voxel set:
        under ``"noise"`` a voxel whose sigma is not a positive number gets a
        NaN covariance (no standard error), never the residual variance.
    normalise : bool
        Divide each voxel by its :func:`voxel_scale` (and ``sigma`` with it)
        before fitting, and scale the amplitudes, their covariances, the RSS
        and the RMS residual back (default): the answer is the same (to
        rounding) for data multiplied by any positive factor. Without this,
        the damping of the Levenberg-Marquardt step (relative to the largest
        curvature over parameters with different units) froze the decay
        times of voxels with large amplitudes (data x 1e6 moved T2* by 1.6 %,
        EPG T2 by 3.8 %). False fits the data as given.
    """
    y = np.asarray(y, dtype=np.float64)
    if not normalise:
        return _fit_unit(model, y, ctx, noise or NoiseFloor("none"), sigma, max_iter, stderr)
    scale = voxel_scale(y)
    sig = None if sigma is None else np.broadcast_to(np.asarray(sigma, float), y.shape[:1]) / scale
    noise = noise or NoiseFloor("none")
    fit = _fit_unit(model, y / scale[:, None], ctx, noise, sig, max_iter, stderr)
    L = len(noise.wrap(model).linear)
    f = np.ones(fit.params.shape)
    f[:, :L] = scale[:, None]
    fit.params *= f
    fit.cov *= f[:, :, None] * f[:, None, :]
    fit.rss *= scale**2
    fit.rmse *= scale
    return fit


def _fit_unit(model: SeparableModel, y: np.ndarray, ctx: dict | None, noise: NoiseFloor, sigma: np.ndarray | None,
              max_iter: int, stderr: str) -> ChunkFit:
    """:func:`fit_chunk` of the samples ``y`` as given (``normalise=False``)."""
    n, _m = y.shape
    fit_model = noise.wrap(model)
    # all-ones weights are skipped in the hot loop (and only made for the grid search, which takes them)
    wl = noise.weights(y, sigma) if noise.weighted else None
    n_used = np.full(n, y.shape[1]) if wl is None else wl.sum(axis=1).astype(int)
    L = len(fit_model.linear)
    lo_nl, hi_nl = (np.asarray(b, float) for b in model.bounds())
    lo = np.concatenate([noise.linear_lower(fit_model), lo_nl])
    hi = np.concatenate([np.full(L, np.inf), hi_nl])

    # a model may offer a cheap stand-in with the same parameters (the EPG table): it does the start and the
    # bulk of the iterations, and every fit is then finished by Levenberg-Marquardt on the exact model
    make_guide = getattr(model, "surrogate", None)
    guide = None if make_guide is None else noise.wrap(make_guide())
    run_model = fit_model if guide is None else guide
    # ... and the model of that finish: the exact one, or one with its values and cheaper derivatives (EPG)
    make_finish = getattr(model, "finisher", None)
    finish_model = fit_model if guide is None or make_finish is None else noise.wrap(make_finish())

    # with the Rician objective to follow, the stand-in's plain least-squares fit only chooses the voxels that
    # need it and starts it: it stops at a looser tolerance (and goes on for the voxels that keep it)
    loose = guide is not None and noise.rician

    def evaluate(p, idx):
        return run_model.signal_jacobian(p, _take(ctx, idx))

    JTJ = None
    if _one_exponential(model, fit_model, wl, guide, ctx):
        p, rss, JTJ, conv, nit = _fit_one_exponential(model, y, lo, hi, lo_nl, hi_nl, max_iter)
        J = None
        yfit = y
    else:
        p, rss, J, conv, nit, yfit = _fit_general(model, run_model, y, wl, ctx, lo, hi, lo_nl, hi_nl, evaluate,
                                                  max_iter, loose)
    # with the one-exponential path ``J`` is None and ``JTJ`` (its J^T J) is given instead
    P = len(fit_model.param_names)
    sel = noise.rician_select(run_model, p, sigma, ctx) if noise.rician else np.zeros(0, np.intp)
    if loose and sel.size < n:
        p, rss, J, conv, nit = _refine_rows(run_model, np.setdiff1d(np.arange(n), sel), yfit, wl, (p, rss, J, conv, nit),
                                            ctx, lo, hi, max_iter)
    if sel.size and J is None:  # the one-exponential path: the Jacobian of the selected voxels only
        assert JTJ is not None and guide is None and not ctx, "the one-exponential path gives J^T J"
        assert sigma is not None, "a Rician fit has a noise level"
        sig_sel = sigma if np.ndim(sigma) == 0 else np.asarray(sigma)[sel]
        p_s, rss_s, J_s, conv_s, nit_s = noise.rician_refine(
            run_model, yfit[sel], None, p[sel], rss[sel], run_model.signal_jacobian(p[sel], None)[1], conv[sel],
            nit[sel], sig_sel, None, lo, hi, max_iter=max_iter, select=np.arange(sel.size), se_tol=1e-3)
        p[sel], rss[sel], conv[sel], nit[sel] = p_s, rss_s, conv_s, nit_s
        JTJ[sel] = _normal(J_s, None)
        J = np.empty((n, P, y.shape[1]))  # only the selected rows are read (the Rician covariance below)
        J[sel] = J_s
    elif sel.size:
        p, rss, J, conv, nit = noise.rician_refine(run_model, yfit, wl, p, rss, J, conv, nit, sigma, ctx, lo, hi,
                                                   max_iter=max_iter, select=sel,
                                                   se_tol=1e-3 if guide is None else FINISH_SE_TOL)
    if guide is not None:
        # finish on the exact model from the stand-in's minimum (plain least squares, or the Rician objective
        # for the near-floor voxels): the minimum and RSS are the exact model's
        p, rss, J, conv, nit = _refine_rows(finish_model, np.setdiff1d(np.arange(n), sel), yfit, wl,
                                            (p, rss, J, conv, nit), ctx, lo, hi, max_iter)
        if sel.size:
            p, rss, J, conv, nit = noise.rician_refine(finish_model, yfit, wl, p, rss, J, conv, nit, sigma, ctx, lo,
                                                       hi, max_iter=max_iter, select=sel, se_tol=FINISH_SE_TOL)

    # covariance (see qmap.fitting.uncertainty for the two conventions)
    if JTJ is None:
        assert J is not None, "the general path gives the Jacobian"
        JTJ = _normal(J, wl)
    inv = chol_inverse(JTJ)
    dof = n_used - P
    with np.errstate(divide="ignore", invalid="ignore"):
        s2 = np.where(dof > 0, rss / np.maximum(dof, 1), np.nan)
    if sigma is not None:
        sig = np.broadcast_to(np.asarray(sigma, float), (n,))
        sig2 = sig**2
        if stderr == "noise":  # one convention per map: no usable sigma (a noise map's hole) -> no standard error
            s2 = np.where(np.isfinite(sig) & (sig > 0), sig2, np.nan)
        # "residual": a voxel without residual degrees of freedom has no standard error (NaN, as s2 is);
        # an exactly determined fit as a whole is given the noise convention by the caller (fit_volume)
    cov = inv * s2[:, None, None]
    if sigma is not None and stderr == "noise":
        if noise.rician:
            # without a stand-in the voxels not refined by the Rician fit kept the parameters whose lowest
            # sample was found above the floor: only the refined ones can be near it
            cov = _rician_covariance(fit_model, p, J, inv, cov, wl, sigma, ctx, noise.coils,
                                     rows=sel if guide is None else None)
        if getattr(model, "sign_ambiguous", False):
            cov = _widen_near_null(fit_model, p, J, cov, wl, s2, ctx)
    # quality
    ybar = np.einsum("nm->n", yfit if wl is None else wl * yfit) / np.maximum(n_used, 1)
    dev = yfit - ybar[:, None]
    tss = np.einsum("nm,nm->n", dev if wl is None else wl * dev, dev)
    with np.errstate(divide="ignore", invalid="ignore"):  # exactly determined (dof 0): no quality (NaN)
        r2 = np.where((tss > 0) & (dof > 0), 1.0 - rss / tss, np.nan)
        rmse = np.where(dof > 0, np.sqrt(rss / np.maximum(n_used, 1)), np.nan)
    status = np.zeros(n, np.uint8)
    status[~conv] = st.NOT_CONVERGED
    theta = p[:, L:]
    span = hi_nl - lo_nl
    at_bound = row_any((theta <= lo_nl + 1e-9 * span) | (theta >= hi_nl - 1e-9 * span))
    status[at_bound] = st.AT_BOUND
    cov[at_bound] = np.inf  # never a small standard error for an estimate pinned at a bound
    diag = np.einsum("npp->np", inv)
    ill = ~row_all(np.isfinite(diag) & (diag >= 0))
    status[ill & (status == 0)] = st.ILL_CONDITIONED
    # all samples equal: the non-linear parameters are not determined by the data at all
    status[(tss == 0) & (status == 0)] = st.ILL_CONDITIONED
    cov[ill] = np.inf
    too_few = n_used < P
    status[too_few] = st.TOO_FEW_SAMPLES
    return ChunkFit(params=p, cov=cov, rss=rss, r2=r2, rmse=rmse, n_used=n_used, status=status, n_iter=nit)



def _one_exponential(model, fit_model, wl, guide, ctx) -> bool:
    """The fit takes the one-exponential Newton path (:mod:`qmap.fitting.exponential`): a model that is one
    decaying exponential, fitted as it is (no offset column, no stand-in), every sample weighted equally."""
    return (getattr(model, "one_exponential", False) and fit_model is model and wl is None and guide is None
            and not ctx and not getattr(model, "sign_ambiguous", False))


def _fit_one_exponential(model, y, lo, hi, lo_nl, hi_nl, max_iter) -> tuple:
    """:func:`~qmap.fitting.exponential.fit_exponential`, with the voxels it leaves fitted by the general
    path (:func:`_fit_general`: the same start, Levenberg-Marquardt); returns ``p, rss, J^T J, converged, n_iter``."""
    fast = fit_exponential(model, y)
    p, rss, JTJ, conv, nit = fast.params, fast.rss, fast.jtj, fast.converged, fast.n_iter
    hard = fast.hard
    if hard.size:
        def evaluate(pp, idx):
            return model.signal_jacobian(pp, None)

        ph, rssh, Jh, convh, nith, _ = _fit_general(model, model, y[hard], None, None, lo, hi, lo_nl, hi_nl, evaluate,
                                                   max_iter, loose=False)
        p[hard], rss[hard], conv[hard], nit[hard] = ph, rssh, convh, nith
        JTJ[hard] = _normal(Jh, None)
    return p, rss, JTJ, conv, nit


def _fit_general(model, run_model, y, wl, ctx, lo, hi, lo_nl, hi_nl, evaluate, max_iter, loose) -> tuple:
    """Start (closed form or grid search) and Levenberg-Marquardt of every start candidate; the best per voxel.

    Returns ``p, rss, J, converged, n_iter`` and the data variant each voxel was fitted to.
    """
    n = y.shape[0]
    L = len(run_model.linear)
    starts = []
    for yc in model.candidates(y):
        theta0 = model.initial_guess(yc, wl, ctx)
        exact = theta0 is not None and model.exact_start
        if theta0 is None:
            w = np.ones_like(y) if wl is None else wl
            theta0 = grid_start(run_model, yc, w, ctx)
            if theta0.shape[1] == 1:
                theta0 = refine_grid_1d(run_model, yc, w, ctx, theta0)
        theta0 = np.clip(theta0, lo_nl, hi_nl)
        c0 = linear_amplitudes(run_model, yc, wl, theta0, ctx)
        c0 = np.where(np.isfinite(c0), c0, 0.0)
        c0 = np.maximum(c0, lo[:L])
        starts.append((yc, np.concatenate([c0, theta0], 1), exact))
    if len(starts) > 1 and all(exact for _, _, exact in starts):
        # the starts are least-squares optima already (the refinement only confirms them): each voxel keeps the
        # candidate of lowest start RSS, and only that one is refined
        ys, p0s = starts[0][0].copy(), starts[0][1].copy()
        low = None
        for yc, p0, _ in starts:
            r0 = yc - run_model.predict(p0, ctx)
            rss0 = np.einsum("nm,nm->n", r0 if wl is None else wl * r0, r0)
            rss0[~np.isfinite(rss0)] = np.inf
            take = np.ones(n, bool) if low is None else rss0 < low
            ys[take], p0s[take] = yc[take], p0[take]
            low = rss0 if low is None else np.where(take, rss0, low)
        starts = [(ys, p0s, True)]
    best: list[np.ndarray] | None = None
    for yc, p0, _ in starts:
        p, rss, J, conv, nit = levenberg_marquardt(evaluate, yc, wl, p0, lo, hi,
                                                   max_iter=max_iter, se_tol=GUIDE_SE_TOL if loose else 1e-3)
        if best is None:
            best = [p, rss, J, conv, nit, yc.copy()]
        else:
            take = rss < best[1]
            for k, v in enumerate((p, rss, J, conv, nit, yc)):
                best[k][take] = v[take]
    assert best is not None, "a model offers at least one start candidate"
    p, rss, J, conv, nit, yfit = best
    return p, rss, J, conv, nit, yfit


def _refine_rows(model, rows: np.ndarray, y: np.ndarray, w: np.ndarray | None, state: tuple, ctx: dict | None,
                 lo: np.ndarray, hi: np.ndarray, max_iter: int) -> tuple:
    """Plain least squares of ``model`` for the voxels ``rows``, from the fit ``state`` = (p, rss, J, conv, nit).

    Returns updated copies of the five arrays (the other voxels unchanged; iterations added up).
    """
    p, rss, J, conv, nit = (a.copy() for a in state)

    def evaluate(pp, idx):
        return model.signal_jacobian(pp, _take(ctx, rows[idx]))

    out = levenberg_marquardt(evaluate, y[rows], None if w is None else w[rows], p[rows], lo, hi, max_iter=max_iter)
    p[rows], rss[rows], J[rows], conv[rows] = out[:4]
    nit[rows] += out[4]
    return p, rss, J, conv, nit


def _rician_covariance(fit_model, p, J, inv, cov, w, sigma, ctx, coils, rows=None):
    """Sandwich covariance with the Rician sample variances, for the voxels near the noise floor.

    ``J`` there is already the Jacobian of the Rician expectation (the fit's
    own model); far from the floor (lowest sample above ``RICIAN_SWITCH``
    sigma) the variance is sigma^2 to better than 0.25 % and ``cov`` is kept.
    ``rows`` (indices), when given, are the only voxels that can be near the floor.
    """
    from .uncertainty import rician_sample_variance, sandwich

    n = p.shape[0]
    sig = np.broadcast_to(np.asarray(sigma, float), (n,))
    rows = np.arange(n) if rows is None else np.asarray(rows, np.intp)
    if rows.size == 0:
        return cov
    s = fit_model.predict(p[rows], _take(ctx, rows))
    near = np.flatnonzero(row_min(s) < RICIAN_SWITCH * sig[rows])
    if near.size == 0:
        return cov
    sel = rows[near]
    s = s[near]
    var = rician_sample_variance(s, sig[sel, None], coils=coils)
    cov = cov.copy()
    cov[sel] = sandwich(J[sel], inv[sel], var, None if w is None else w[sel])
    return cov


#: magnitude samples whose fitted signal is below this many sigma carry no information in the standard errors
NEAR_NULL_SIGMA = 2.0


def _widen_near_null(fit_model, p, J, cov, w, s2, ctx):
    """Covariance without the samples near the null of a sign-restored magnitude fit (a wider interval).

    Below about 2 sigma a magnitude sample's sign is a guess and its error is
    Rician, not Gaussian, so the linearised interval that counts it is too
    narrow (measured for magnitude inversion recovery: 92 % instead of 95 %
    coverage among the voxels with such a sample at SNR 30, 90 % at SNR 8).
    The rule: those samples are left out of the Fisher information, which
    gives 95 % (SNR 30 and 15) and 93 % (SNR 8) coverage over all voxels.
    Voxels whose remaining samples do not determine the parameters get an
    infinite covariance.
    """
    s = fit_model.predict(p, ctx)
    near = np.abs(s) < NEAR_NULL_SIGMA * np.sqrt(s2)[:, None]
    sel = np.flatnonzero(near.any(axis=1) & np.isfinite(s2))
    if sel.size == 0:
        return cov
    keep = (~near[sel]).astype(float)
    if w is not None:
        keep = keep * w[sel]
    JTJ = _normal(J[sel], keep)
    inv = chol_inverse(JTJ)
    bad = ~np.all(np.isfinite(np.einsum("npp->np", inv)) & (np.einsum("npp->np", inv) >= 0), axis=1)
    cov = cov.copy()
    cov[sel] = inv * s2[sel, None, None]
    cov[sel[bad]] = np.inf
    return cov


def _take(ctx: dict | None, idx) -> dict | None:
    if not ctx:
        return ctx
    return {k: v[idx] for k, v in ctx.items()}
