"""The optimiser: batched, bounded Levenberg-Marquardt over many voxels at once.

It knows nothing of models or noise: it minimises ``sum w (y - s(p))^2`` per voxel for any
``evaluate(p, idx) -> (s, J)``. The solver (:mod:`qmap.fitting.solver`) calls it for the Gaussian
objective and :class:`~qmap.fitting.noise_floor.NoiseFloor` for the Rician one, so neither
imports the other's module for it. Every voxel's arithmetic is element-wise (row-wise sums and
the element-wise Cholesky of :mod:`qmap.linalg`): results do not depend on how many
voxels are fitted together.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from ..linalg import chol_solve

__all__ = ["gram", "levenberg_marquardt", "normal_equations", "row_all", "row_any", "row_max", "row_min"]

#: ``evaluate(p, idx) -> (s, J)``: signal (k, m) and Jacobian (k, P, m) of the voxels ``idx`` at ``p`` (k, P)
Evaluate = Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]


def normal_equations(J: np.ndarray, w: np.ndarray | None, r: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """J^T W J (n, P, P) and J^T W r (n, P) for J (n, P, m); row-wise sums only. ``w`` None = all ones."""
    n, P, _m = J.shape
    Jw = J if w is None else J * w[:, None, :]
    JTJ = np.empty((n, P, P))
    g = np.empty((n, P))
    for i in range(P):
        g[:, i] = np.einsum("nm,nm->n", Jw[:, i], r)
        for j in range(i, P):
            JTJ[:, i, j] = np.einsum("nm,nm->n", Jw[:, i], J[:, j])
            JTJ[:, j, i] = JTJ[:, i, j]
    return JTJ, g


def _rows(op, a: np.ndarray, empty=None) -> np.ndarray:
    if a.shape[1] == 0 and empty is not None:
        return np.full(a.shape[0], empty)
    out = a[:, 0].copy()
    for k in range(1, a.shape[1]):
        op(out, a[:, k], out=out)
    return out


# numpy's reductions along a short last axis run a loop per row (~20x slower than a few column operations
# for two parameters, ~3x for 12 samples); these give the same values (exact operations), (n, k) -> (n,)
def row_all(a: np.ndarray) -> np.ndarray:
    """``np.all(a, axis=1)`` of an (n, k) boolean array, by column operations."""
    return _rows(np.logical_and, a, True)


def row_any(a: np.ndarray) -> np.ndarray:
    """``np.any(a, axis=1)`` of an (n, k) boolean array, by column operations."""
    return _rows(np.logical_or, a, False)


def row_min(a: np.ndarray) -> np.ndarray:
    """``np.min(a, axis=1)`` of an (n, k) array, k >= 1 (NaN propagates), by column operations."""
    return _rows(np.minimum, a)


def row_max(a: np.ndarray) -> np.ndarray:
    """``np.max(a, axis=1)`` of an (n, k) array, k >= 1 (NaN propagates), by column operations."""
    return _rows(np.maximum, a)


#: undamped Gauss-Newton steps tried before the damped iteration (unweighted problems)
GAUSS_NEWTON_STEPS = 3


def _solve_normal(JTJ: np.ndarray, g: np.ndarray) -> np.ndarray:
    """``JTJ x = g`` per voxel: closed form for 2 x 2 (Cramer's rule), Cholesky otherwise; NaN where singular."""
    if g.shape[1] == 2:
        a, b, c = JTJ[:, 0, 0], JTJ[:, 0, 1], JTJ[:, 1, 1]
        with np.errstate(divide="ignore", invalid="ignore"):
            inv_det = 1.0 / (a * c - b * b)
            inv_det[~(inv_det > 0)] = np.nan  # not positive definite
            return np.stack([(c * g[:, 0] - b * g[:, 1]) * inv_det, (a * g[:, 1] - b * g[:, 0]) * inv_det], axis=1)
    return chol_solve(JTJ, g)


def _negligible_step(step: np.ndarray, p: np.ndarray, rss: np.ndarray, H: np.ndarray, m_dof: int, xtol: float,
                     se_tol: float) -> np.ndarray:
    """Rows (n,) whose proposed step ``|dp|`` (n, P) from ``p`` is negligible.

    Every component is below ``xtol`` relative (``xtol (|p| + xtol)``), or, with residual degrees of freedom
    ``m_dof > 0``, below ``se_tol`` of ``s / sqrt(H_ii)`` (``s^2 = RSS / m_dof``, ``H`` the undamped
    ``J^T J``): a lower bound of each parameter's standard error, so the step is negligible against the
    statistical uncertainty.
    """
    small = row_all(step <= xtol * (np.abs(p) + xtol))
    if m_dof > 0:
        with np.errstate(divide="ignore", invalid="ignore"):
            se_floor = np.sqrt(rss / m_dof)[:, None] / np.sqrt(np.einsum("npp->np", H))
        small |= row_all(step <= se_tol * se_floor)
    return small


def _gauss_newton(evaluate: Evaluate, y, p, r, rss, J, converged, n_iter, lo, hi, *, steps: int, xtol: float,
                  ftol: float, se_tol: float) -> tuple:
    """Undamped Gauss-Newton steps for the unweighted voxels (see :func:`levenberg_marquardt`).

    Returns the updated ``p, r, rss, J, converged, n_iter`` (full length; the arrays given may have been
    updated in place). A voxel stays in this phase while each step stays inside the bounds, is finite and
    lowers the RSS; it has converged on a negligible step (taken without evaluating it, as in the damped
    loop) or a negligible drop of the RSS.
    """
    n, P = p.shape
    m_dof = y.shape[1] - P
    act = np.flatnonzero(np.isfinite(rss) & ~converged)
    for _ in range(steps):
        if act.size == 0:
            break
        # most of the chunk still stepping: work on whole arrays (no gathering), the others masked out
        dense = act.size > n // 2
        if dense:
            pa, rssa, Ja, ra = p, rss, J, r
            live = np.zeros(n, bool)
            live[act] = True
        else:
            pa, rssa, Ja, ra = p[act], rss[act], J[act], r[act]
            live = None
        JTJ, g = normal_equations(Ja, None, ra)
        pn = pa + _solve_normal(JTJ, g)
        inside = row_all((pn >= lo) & (pn <= hi) & np.isfinite(pn))
        if live is not None:
            inside &= live
        small = _negligible_step(np.abs(pn - pa), pa, rssa, JTJ, m_dof, xtol, se_tol)
        small &= inside
        rows = np.flatnonzero(small)  # positions in the (gathered or whole) arrays
        done = rows if dense else act[rows]
        p[done] = pn[rows]
        converged[done] = True
        n_iter[done] += 1
        go = np.flatnonzero(inside & ~small)
        if go.size == 0:
            break
        k = go if dense else act[go]
        all_go = go.size == n
        sn, Jn = evaluate(pn if all_go else pn[go], k)
        rn = (y if all_go else y[k]) - sn
        rssn = np.einsum("nm,nm->n", rn, rn)
        rss_go = rssa if all_go else rssa[go]
        ok = np.isfinite(rssn) & (rssn <= rss_go)
        n_iter[k] += 1
        if all_go:  # the whole chunk moved: the new arrays replace the old (the few rejected steps undone)
            rej = np.flatnonzero(~ok)
            if rej.size:
                pn[rej], rn[rej], Jn[rej], rssn[rej] = p[rej], r[rej], J[rej], rss[rej]
            flat = ok & ((rss - rssn <= ftol * rss) | (rssn == 0))
            p, r, J, rss = pn, rn, Jn, rssn
            acc = k[ok]
            flat = flat[ok]
        else:
            acc = k[ok]
            p[acc], r[acc], J[acc], rss[acc] = pn[go[ok]], rn[ok], Jn[ok], rssn[ok]
            flat = (rss_go[ok] - rssn[ok] <= ftol * rss_go[ok]) | (rssn[ok] == 0)
        converged[acc[flat]] = True
        act = acc[~flat]
    return p, r, rss, J, converged, n_iter


def gram(J: np.ndarray, w: np.ndarray | None) -> np.ndarray:
    """J^T W J (n, P, P) for J (n, P, m) (:func:`normal_equations` without the gradient)."""
    n, P, _m = J.shape
    Jw = J if w is None else J * w[:, None, :]
    JTJ = np.empty((n, P, P))
    for i in range(P):
        for j in range(i, P):
            JTJ[:, i, j] = np.einsum("nm,nm->n", Jw[:, i], J[:, j])
            JTJ[:, j, i] = JTJ[:, i, j]
    return JTJ


def levenberg_marquardt(
    evaluate: Evaluate,
    y: np.ndarray,
    w: np.ndarray | None,
    p0: np.ndarray,
    lo: np.ndarray,
    hi: np.ndarray,
    *,
    max_iter: int = 60,
    xtol: float = 1e-8,
    ftol: float = 1e-13,
    se_tol: float = 1e-3,
    gauss_newton: int = GAUSS_NEWTON_STEPS,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Batched, bounded Levenberg-Marquardt.

    Parameters
    ----------
    evaluate : callable
        ``evaluate(p, idx) -> (s, J)``: signal (k, m) and Jacobian (k, P, m)
        of the voxels ``idx`` at parameters ``p`` (k, P).
    y, w : (n, m) ndarray
        Data and sample weights (0/1); ``w`` None means all ones.
    p0 : (n, P) ndarray
        Start.
    lo, hi : (P,) ndarray
        Bounds (``-inf``/``inf`` for none); steps are projected onto them.
    gauss_newton : int
        Undamped Gauss-Newton steps tried first (unweighted problems only; see Notes).

    Returns
    -------
    p, rss, J, converged, n_iter

    Notes
    -----
    A voxel has converged when its proposed step is negligible (below
    ``xtol`` relative, or below ``se_tol`` times a lower bound of each
    parameter's standard error) while the damping is moderate; it is then
    not evaluated again, so the answer is within that
    tolerance of the minimum and costs one model evaluation less than
    confirming the step: the step is taken, and the RSS and Jacobian
    returned for it are those of the point before. It has also converged when an accepted step lowers
    the RSS by less than ``ftol`` relative, or when no downhill step exists.

    From a start next to the minimum (a model's closed-form start) the
    damping only costs work: with ``w`` None, up to ``gauss_newton`` plain
    Gauss-Newton steps are taken first (the same step with no damping, the
    same convergence test). A voxel leaves that phase for the damped loop as
    soon as its step would leave the bounds, is not finite or does not lower
    the RSS, so the damped iteration still decides every hard case; the
    answer is the same to within the convergence tolerance.
    """
    n, P = p0.shape
    m_dof = y.shape[1] - P
    p = p0.copy()
    s, J = evaluate(p, np.arange(n))
    r = y - s
    rss = np.einsum("nm,nm->n", r if w is None else w * r, r)
    rss[~np.isfinite(rss)] = np.inf
    converged = rss == 0
    n_iter = np.zeros(n, int)
    if w is None and gauss_newton > 0:
        p, r, rss, J, converged, n_iter = _gauss_newton(evaluate, y, p, r, rss, J, converged, n_iter, lo, hi,
                                                        steps=gauss_newton, xtol=xtol, ftol=ftol, se_tol=se_tol)
    # the working set: compacted copies of the voxels still iterating, written
    # back whenever it is compacted (avoids fancy indexing on every step)
    idx = np.flatnonzero(np.isfinite(rss) & ~converged)
    wp, wy, wr, wJ, wrss = p[idx], y[idx], r[idx], J[idx], rss[idx]
    ww = None if w is None else w[idx]
    lam = np.full(idx.size, 1e-3)
    nu = np.full(idx.size, 2.0)
    live = np.ones(idx.size, bool)
    wit = np.zeros(idx.size, int)

    def write_back():
        p[idx], rss[idx], J[idx], n_iter[idx] = wp, wrss, wJ, wit

    for _ in range(max_iter):
        if not live.any():
            break
        if live.sum() < 0.7 * live.size:  # compact
            write_back()
            converged[idx[~live]] = converged[idx[~live]]
            keep = live
            idx, wp, wy, wr, wJ, wrss, lam, nu, wit = (
                idx[keep], wp[keep], wy[keep], wr[keep], wJ[keep], wrss[keep], lam[keep], nu[keep], wit[keep])
            ww = None if ww is None else ww[keep]
            live = np.ones(idx.size, bool)
        JTJ, g = normal_equations(wJ, ww, wr)
        # active-set handling of bounds: a parameter sitting on a bound with the
        # gradient pointing outwards is frozen for this step
        frozen = ((wp <= lo) & (g < 0)) | ((wp >= hi) & (g > 0))
        if frozen.any():
            for i in range(P):
                f = frozen[:, i]
                JTJ[f, i, :] = 0.0
                JTJ[f, :, i] = 0.0
                JTJ[f, i, i] = 1.0
                g[f, i] = 0.0
        d = np.einsum("npp->np", JTJ).copy()
        d = np.maximum(d, 1e-12 * row_max(d)[:, None] + 1e-300)
        H = JTJ.copy()
        for i in range(P):
            JTJ[:, i, i] += lam * d[:, i]
        delta = chol_solve(JTJ, g)
        pn = np.clip(wp + delta, lo, hi)
        # predicted RSS decrease of the (projected) step from the linear model: dc^T (2 g - H dc)
        dc = pn - wp
        pred = np.einsum("np,np->n", dc, 2 * g - np.einsum("npq,nq->np", H, dc))
        small_step = _negligible_step(np.abs(pn - wp), wp, wrss, H, m_dof, xtol, se_tol)
        # a small step only means convergence when it was not made small by heavy damping
        small_step &= lam <= 1.0
        # a voxel whose proposed step is already negligible has converged where it is: it is not evaluated
        # again (nor are the voxels that finished earlier and still sit in the working set)
        need = live & ~small_step
        # evaluate only the voxels that need it (no full-size scratch arrays); ``ok`` and the new RSS are
        # gathered back to the working set's length
        rssn = np.full(idx.size, np.inf)
        ok = np.zeros(idx.size, bool)
        k = None if need.all() else np.flatnonzero(need)
        if k is None or k.size:
            pk = pn if k is None else pn[k]
            sn, Jn = evaluate(pk, idx if k is None else idx[k])
            rn = (wy if k is None else wy[k]) - sn
            wk = None if ww is None else (ww if k is None else ww[k])
            rk = np.einsum("nm,nm->n", rn if wk is None else wk * rn, rn)
            okk = np.isfinite(rk) & (rk <= (wrss if k is None else wrss[k])) & row_all(np.isfinite(pk))
            if k is None:
                rssn, ok = rk, okk
            else:
                rssn[k] = rk
                ok[k] = okk
            if okk.all() and k is None:  # every voxel's step accepted: take the new arrays as they are
                wr, wJ = rn, Jn
            elif okk.any():
                a = np.flatnonzero(okk)
                dest = a if k is None else k[a]
                wr[dest] = rn[a]
                wJ[dest] = Jn[a]
        wit += live
        small_drop = (wrss - rssn) <= ftol * wrss
        # damping after Nielsen (1999; Madsen, Nielsen & Tingleff, "Methods for non-linear least
        # squares problems", 2004): shrink by how well the linear model predicted the decrease
        with np.errstate(divide="ignore", invalid="ignore"):
            rho = np.where(pred > 0, (wrss - rssn) / pred, 0.0)
        shrink = np.maximum(1.0 / 3.0, 1.0 - (2.0 * np.clip(rho, 0.0, 1.0) - 1.0) ** 3)
        np.copyto(wp, pn, where=ok[:, None])
        np.copyto(wrss, rssn, where=ok)
        # the negligible steps are taken without evaluating them (RSS and Jacobian stay those of the point
        # before: they differ by second order in a step far below the standard error)
        np.copyto(wp, pn, where=(live & small_step & row_all(np.isfinite(pn)))[:, None])
        lam = np.where(ok, np.maximum(lam * shrink, 1e-12), lam * nu)
        nu = np.where(ok, 2.0, nu * 2.0)
        # converged: the proposed step is negligible (accepted or not: at the minimum, rounding can
        # make a negligible step look uphill), or the RSS no longer drops, or no downhill step exists
        done = small_step | np.where(ok, small_drop | (rssn == 0), lam > 1e12)
        done &= live
        converged[idx[done]] = True
        live &= ~done
    write_back()
    return p, rss, J, converged, n_iter
