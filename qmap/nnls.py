"""Batched non-negative least squares for many voxels at once.

Solves, for every voxel v independently,

.. math:: \\min_{x \\ge 0} \\; \\lVert A_v x - b_v \\rVert^2 + \\mu_v \\lVert x \\rVert^2

from the normal-equation data only: the Gram matrix ``C = A^T A`` (shared by
all voxels, or one of a small stack selected per voxel by ``group``) and
``d = A^T b`` per voxel. With ``mu > 0`` this is the Tikhonov ("minimum
energy") regularised NNLS of Whittall & MacKay (J Magn Reson 1989;84:134).

The algorithm is Lawson & Hanson's active-set method (Solving Least Squares
Problems, 1974, ch. 23; the algorithm behind ``scipy.optimize.nnls``),
:func:`nnls_active_set`: one variable entering per outer iteration, for all
voxels in lock step, optionally warm-started from a guessed support or a
feasible point. It is efficient when solutions are sparse or a close support
is known (the T2 spectrum uses it throughout). Block principal pivoting (Kim &
Park, SIAM J Sci Comput 2011;33:3261), which exchanges every infeasible
variable at once, was tried and dropped: on the unregularised, ill-conditioned
problems of the refocusing-angle search it fell back to single exchanges.

The passive-set systems are gathered from the Gram stack (padded with one
decoupled extra variable) and solved by
:func:`qmap.linalg.chol_solve_lastaxis`, a Cholesky factorisation
written with element-wise operations over the voxels, in blocks of voxels with
passive sets of similar size: every voxel's solution depends only on its own
numbers (bit-identical whatever the batch; tested). The dual (gradient) uses
one matrix product per Gram matrix of the stack (BLAS, whose rounding depends
on the batch; the dual only chooses which variable enters, never a value). It reaches the optimum
that ``scipy.optimize.nnls`` reaches (the tests compare them on random
problems).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from .linalg import chol_solve_lastaxis

__all__ = ["nnls_active_set", "residual_norm2"]

#: relative size of the dual (gradient) below which a variable does not enter
DUAL_RTOL = 1e-11
#: relative pivot floor of the Cholesky factorisation (numerically dependent columns)
PIVOT_RTOL = 1e-13
#: passive-set systems are solved in blocks of voxels whose passive sets differ by at most this many variables
BUCKET_WIDTH = 3
#: ... of at least this many voxels (fewer: one block; the per-call cost of numpy dominates)
BUCKET_MIN = 256


class _Problem:
    """Normal-equation data of a batch: Gram stack, per-voxel group, d = A^T b, ridge mu."""

    def __init__(self, gram, atb, group, mu):
        gram = np.asarray(gram, float)
        self.G = gram[None] if gram.ndim == 2 else gram
        self.d = np.asarray(atb, float)
        V, n = self.d.shape
        if self.G.shape[1:] != (n, n):
            raise ValueError(f"Gram matrices {self.G.shape[1:]} do not match A^T b with {n} columns")
        self.group = np.zeros(V, np.intp) if group is None else np.asarray(group, np.intp)
        self.mu = np.zeros(V) if mu is None else np.broadcast_to(np.asarray(mu, float), (V,))
        self.groups = np.unique(self.group)
        self.has_mu = bool(np.any(self.mu))
        # the Gram matrices and A^T b with one more variable, decoupled from the others (G[n, n] = 1,
        # d[n] = 0): the padding of the passive-set systems points there, so a padded system is the
        # voxel's own system plus identity rows
        Gx = np.zeros((self.G.shape[0], n + 1, n + 1))
        Gx[:, :n, :n] = self.G
        Gx[:, n, n] = 1.0
        self.G_flat = Gx.reshape(-1)
        dx = np.zeros((V, n + 1))
        dx[:, :n] = self.d
        self.d_flat = dx.reshape(-1)
        scale = np.abs(self.d).max(axis=1) if n else np.zeros(V)
        self.dual_tol = DUAL_RTOL * np.maximum(scale, np.finfo(float).tiny)

    def dual(self, rows: NDArray[np.intp], x: NDArray[np.float64]) -> NDArray[np.float64]:
        """w = d - (C + mu I) x for the voxels ``rows`` (x given for those rows)."""
        w = self.d[rows] - self.mu[rows, None] * x
        if self.groups.size == 1:
            w -= x @ self.G[self.groups[0]]
            return w
        # voxels sorted by their Gram matrix: one matrix product per matrix present
        g = self.group[rows]
        order = np.argsort(g, kind="stable")
        gs = g[order]
        cut = np.flatnonzero(gs[1:] != gs[:-1]) + 1
        for s0, s1 in zip(np.r_[0, cut], np.r_[cut, gs.size]):
            sel = order[s0:s1]
            w[sel] -= x[sel] @ self.G[gs[s0]]
        return w

    def solve(self, rows: NDArray[np.intp], P: NDArray[np.bool_]) -> NDArray[np.float64]:
        """Unconstrained solution on the passive set ``P`` (zero elsewhere) for the voxels ``rows``.

        Voxels are solved in groups of similar passive-set size (the systems are padded to the largest
        of their group only); each voxel's solution does not depend on the grouping.
        """
        nv, n = P.shape
        z = np.zeros((nv, n))
        cnt = P.sum(axis=1)
        K = int(cnt.max()) if nv else 0
        if K == 0:
            return z
        if nv < 2 * BUCKET_MIN or K <= BUCKET_WIDTH:
            self._solve_block(rows, P, cnt, K, z, None)
            return z
        order = np.argsort(cnt, kind="stable")
        sc = cnt[order]
        start = 0
        while start < nv:
            # the block: voxels up to BUCKET_WIDTH more passive variables than the block's smallest, at least
            # BUCKET_MIN voxels (or all that are left)
            stop = int(np.searchsorted(sc, sc[start] + BUCKET_WIDTH, side="right"))
            stop = max(stop, min(start + BUCKET_MIN, nv))
            if nv - stop < BUCKET_MIN:
                stop = nv
            sel = order[start:stop]
            kb = int(sc[stop - 1])
            if kb:
                self._solve_block(rows[sel], P[sel], cnt[sel], kb, z, sel)
            start = stop
        return z

    def _solve_block(self, rows, P, cnt, K, z, sel) -> None:
        """The passive-set systems of ``rows`` (largest passive set K) into ``z`` (rows ``sel``, or all)."""
        nv, n = P.shape
        n1 = n + 1
        rr, cc = np.nonzero(P)  # row-major: each voxel's passive indices in increasing order
        idx = np.full((nv, K), n, np.intp)  # padding: the decoupled extra variable n
        idx[rr, np.arange(rr.size) - np.repeat(np.cumsum(cnt) - cnt, cnt)] = cc
        idxT = np.ascontiguousarray(idx.T)  # (K, nv): voxels last for the factorisation
        first = idxT * n1 + (self.group[rows] * (n1 * n1))[None, :]
        M = np.take(self.G_flat, first[:, None, :] + idxT[None, :, :])  # (K, K, nv)
        if self.has_mu:
            ii = np.arange(K)
            M[ii, ii] += np.where(idxT < n, self.mu[rows][None, :], 0.0)
        r = np.take(self.d_flat, idxT + (rows * n1)[None, :])
        ii = np.arange(K)
        floor = PIVOT_RTOL * np.maximum(np.max(np.where(idxT < n, M[ii, ii], 0.0), axis=0), np.finfo(float).tiny)
        sol = chol_solve_lastaxis(M, r, floor).T
        out = np.zeros((nv, n1))
        out[np.arange(nv)[:, None], idx] = sol
        if sel is None:
            z[:] = out[:, :n]
        else:
            z[sel] = out[:, :n]


def nnls_active_set(
    gram: NDArray[np.float64],
    atb: NDArray[np.float64],
    *,
    group: NDArray[np.intp] | None = None,
    mu: NDArray[np.float64] | float | None = None,
    passive: NDArray[np.bool_] | None = None,
    start: NDArray[np.float64] | None = None,
    max_iter: int | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Lawson-Hanson active-set NNLS for a batch of voxels.

    Parameters
    ----------
    gram : (n, n) or (G, n, n) ndarray
        ``A^T A`` (one basis) or a stack of them.
    atb : (V, n) ndarray
        ``A_v^T b_v`` per voxel.
    group : (V,) int ndarray, optional
        Which Gram matrix of the stack each voxel uses (default 0).
    mu : float or (V,) ndarray, optional
        Ridge weight (regularisation) per voxel, signal units squared; default 0.
    passive : (V, n) bool ndarray, optional
        Warm start: a guess of the support (e.g. the solution's at a
        neighbouring ``mu``). It is first reduced to a feasible start (the
        unconstrained solution on it, dropping variables that come out
        non-positive until none does); the iteration then proceeds as usual.
    start : (V, n) ndarray, optional
        Warm start from a non-negative point (e.g. the solution of a
        neighbouring problem): its support is the first passive set, and the
        iteration moves from it towards the unconstrained solution on that set
        as in Lawson & Hanson's inner loop, dropping only the variables that
        reach zero on the way. Usually fewer variables leave (and have to
        re-enter) than with ``passive``. Overrides ``passive``.
    max_iter : int, optional
        Outer iterations (default 3 n).

    Returns
    -------
    x : (V, n) ndarray
        The non-negative solutions.
    converged : (V,) bool ndarray
        False where the iteration limit was reached.
    """
    pb = _Problem(gram, atb, group, mu)
    V, n = pb.d.shape
    max_iter = 3 * n if max_iter is None else int(max_iter)
    x = np.zeros((V, n))
    P = np.zeros((V, n), bool)
    active = np.ones(V, bool)

    def settle(sub: NDArray[np.intp], jsub: NDArray[np.intp] | None) -> None:
        """Lawson & Hanson's inner loop for the voxels ``sub`` (x feasible, supported on P); ``jsub`` the
        variables that have just entered (None: a warm start)."""
        first = jsub is not None
        while sub.size:
            z = pb.solve(sub, P[sub])
            if first and jsub is not None:  # the entering variable must come out positive; if rounding says otherwise, stop there
                bad_entry = z[np.arange(sub.size), jsub] <= 0
                if bad_entry.any():
                    P[sub[bad_entry], jsub[bad_entry]] = False
                    active[sub[bad_entry]] = False
                    keep = ~bad_entry
                    sub, z = sub[keep], z[keep]
                first = False
            Ps = P[sub]
            neg = Ps & (z <= 0)
            bad = neg.any(axis=1)
            good = ~bad
            x[sub[good]] = z[good]
            if not bad.any():
                break
            s, zb, nb = sub[bad], z[bad], neg[bad]
            xb = x[s]
            with np.errstate(divide="ignore", invalid="ignore"):
                ratio = np.where(nb, xb / (xb - zb), np.inf)
            k = np.argmin(ratio, axis=1)
            alpha = ratio[np.arange(s.size), k]
            xb = xb + alpha[:, None] * (zb - xb)
            xb[np.arange(s.size), k] = 0.0
            Pb = P[s] & (xb > 0)
            P[s] = Pb
            x[s] = np.where(Pb, xb, 0.0)
            sub = s

    if start is not None:
        x[:] = np.maximum(start, 0.0)
        P[:] = x > 0
        settle(np.flatnonzero(P.any(axis=1)), None)
    elif passive is not None:
        P[:] = passive
        sub = np.flatnonzero(P.any(axis=1))
        while sub.size:  # a feasible start: the solution on the guessed support, shrunk until it is positive
            z = pb.solve(sub, P[sub])
            pos = P[sub] & (z > 0)
            ok = (pos == P[sub]).all(axis=1)
            x[sub[ok]] = z[ok]
            P[sub[~ok]] = pos[~ok]
            sub = sub[~ok]
    for _ in range(max_iter):
        a = np.flatnonzero(active)
        if a.size == 0:
            break
        w = pb.dual(a, x[a])
        w[P[a]] = -np.inf
        j = np.argmax(w, axis=1)
        enter = w[np.arange(a.size), j] > pb.dual_tol[a]
        active[a[~enter]] = False
        a, j = a[enter], j[enter]
        if a.size == 0:
            break
        P[a, j] = True
        settle(a, j)
    return x, ~active


def residual_norm2(
    x: NDArray[np.float64], gram: NDArray[np.float64], atb: NDArray[np.float64], btb: NDArray[np.float64],
    group: NDArray[np.intp] | None = None,
) -> NDArray[np.float64]:
    """||A x - b||^2 per voxel from the normal-equation data (b^T b given), clipped at 0."""
    pb = _Problem(gram, atb, group, None)
    rows = np.arange(x.shape[0])
    Cx = pb.d - pb.dual(rows, x)  # = C x
    return np.maximum(btb - 2.0 * np.einsum("vn,vn->v", x, pb.d) + np.einsum("vn,vn->v", x, Cx), 0.0)
