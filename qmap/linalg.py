"""Batched solves of many small symmetric positive (semi-)definite systems.

Written with element-wise numpy operations over the batch so that every
voxel's result depends only on its own numbers: bit-identical whatever the
chunk size or the number of workers (BLAS kernels are not, across batch
sizes). A failed factorisation gives NaN for that voxel, never an exception.
"""

from __future__ import annotations

import numpy as np

__all__ = ["chol_inverse", "chol_solve", "chol_solve_lastaxis", "cholesky"]


def cholesky(a: np.ndarray) -> np.ndarray:
    """Lower Cholesky factors of a batch of SPD matrices (n, p, p); NaN rows where not SPD."""
    _n, p, _ = a.shape
    low = np.zeros_like(a)
    with np.errstate(invalid="ignore", divide="ignore"):
        for j in range(p):
            s = a[:, j, j].copy()
            for k in range(j):
                s -= low[:, j, k] * low[:, j, k]
            s = np.where(s > 0, s, np.nan)
            d = np.sqrt(s)
            low[:, j, j] = d
            for i in range(j + 1, p):
                t = a[:, i, j].copy()
                for k in range(j):
                    t -= low[:, i, k] * low[:, j, k]
                low[:, i, j] = t / d
    return low


def _forward(low: np.ndarray, b: np.ndarray) -> np.ndarray:
    _n, p = b.shape
    z = np.empty_like(b)
    for i in range(p):
        t = b[:, i].copy()
        for k in range(i):
            t -= low[:, i, k] * z[:, k]
        z[:, i] = t / low[:, i, i]
    return z


def _backward(low: np.ndarray, z: np.ndarray) -> np.ndarray:
    _n, p = z.shape
    x = np.empty_like(z)
    for i in range(p - 1, -1, -1):
        t = z[:, i].copy()
        for k in range(i + 1, p):
            t -= low[:, k, i] * x[:, k]
        x[:, i] = t / low[:, i, i]
    return x


def chol_solve(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Solve ``a x = b`` for a batch: a (n, p, p) SPD, b (n, p) -> x (n, p)."""
    low = cholesky(a)
    with np.errstate(invalid="ignore", divide="ignore"):
        return _backward(low, _forward(low, b))


def chol_inverse(a: np.ndarray) -> np.ndarray:
    """Inverse of a batch of SPD matrices (n, p, p); NaN where not SPD.

    The arithmetic of :func:`cholesky` and the two triangular solves against each column of the identity,
    done on contiguous copies of the entries (each a vector over the batch) instead of strided views:
    the same operations in the same order, so the same numbers, in a third of the time for p = 2.
    """
    n, p, _ = a.shape
    ent = [[np.ascontiguousarray(a[:, i, j]) for j in range(p)] for i in range(p)]
    low: list[list[np.ndarray]] = [[None] * p for _ in range(p)]  # type: ignore[list-item]
    out = np.empty_like(a)
    with np.errstate(invalid="ignore", divide="ignore"):
        for j in range(p):  # as cholesky()
            s = ent[j][j].copy()
            for k in range(j):
                s -= low[j][k] * low[j][k]
            s = np.where(s > 0, s, np.nan)
            d = np.sqrt(s)
            low[j][j] = d
            for i in range(j + 1, p):
                t = ent[i][j].copy()
                for k in range(j):
                    t -= low[i][k] * low[j][k]
                low[i][j] = t / d
        for j in range(p):  # column j of the inverse: L z = e_j, then L^T x = z (as _forward, _backward)
            z: list[np.ndarray] = []
            for i in range(p):
                t = np.full(n, 1.0 if i == j else 0.0)
                for k in range(i):
                    t -= low[i][k] * z[k]
                z.append(t / low[i][i])
            x: list[np.ndarray] = [None] * p  # type: ignore[list-item]
            for i in range(p - 1, -1, -1):
                t = z[i].copy()
                for k in range(i + 1, p):
                    t -= low[k][i] * x[k]
                x[i] = t / low[i][i]
                out[:, i, j] = x[i]
    return out


def chol_solve_lastaxis(M: np.ndarray, r: np.ndarray, floor: np.ndarray) -> np.ndarray:
    """Solve M x = r for a batch of SPD systems stored voxels last: M (K, K, V), r (K, V) -> x (K, V).

    For systems of up to a few dozen unknowns (the passive sets of :mod:`qmap.nnls`): O(K)
    numpy operations on whole slices instead of :func:`chol_solve`'s O(K^3). Right-looking Cholesky
    factorisation and column-oriented triangular solves, all element-wise over V, so every voxel's
    numbers go through the same operations in the same order whatever the batch and whatever identity
    rows pad its system at the end (bit-identical results). ``floor`` (V,) is the smallest pivot
    (numerically dependent columns get it instead of failing). ``M`` is overwritten by the factor.
    """
    K = M.shape[0]
    for j in range(K):  # M[j:, j] becomes column j of L
        d = np.sqrt(np.maximum(M[j, j], floor))
        M[j, j] = d
        if j + 1 < K:
            c = M[j + 1:, j] / d
            M[j + 1:, j] = c
            M[j + 1:, j + 1:] -= c[:, None] * c[None, :]
    x = r.copy()
    for i in range(K):  # L z = r
        x[i] /= M[i, i]
        if i + 1 < K:
            x[i + 1:] -= M[i + 1:, i] * x[i]
    for i in range(K - 1, -1, -1):  # L^T x = z
        x[i] /= M[i, i]
        if i:
            x[:i] -= M[i, :i] * x[i]
    return x
