"""The batched small-matrix solves of :mod:`qmap.linalg` against numpy's LAPACK-backed ``numpy.linalg``
(a general-purpose reference library), and their batch independence (every voxel's numbers its own)."""

from __future__ import annotations

import numpy as np
import pytest

from qmap.linalg import chol_inverse, chol_solve


def _spd_batch(rng, n: int, p: int) -> np.ndarray:
    """J^T J of random 12 x p Jacobians with columns scaled over six decades (conditioning as in fits)."""
    J = rng.normal(size=(n, 12, p)) * rng.lognormal(0.0, 3.0, size=(n, 1, p))
    return np.einsum("nmp,nmq->npq", J, J)


@pytest.mark.parametrize("p", [1, 2, 3, 4, 6])
def test_chol_inverse_matches_numpy_inv(p):
    rng = np.random.default_rng(100 + p)
    a = _spd_batch(rng, 500, p)
    got = chol_inverse(a)
    ref = np.linalg.inv(a)
    # forward error of an inverse ~ cond(a) * eps (Higham, Accuracy and Stability of Numerical Algorithms,
    # 2nd ed. 2002, ch. 14): compare in the norm of the reference, with the condition number's allowance
    cond = np.linalg.cond(a)
    err = np.linalg.norm(got - ref, axis=(1, 2)) / np.linalg.norm(ref, axis=(1, 2))
    assert np.all(err <= 1e-13 * np.maximum(cond, 1.0)), np.max(err / cond)
    assert np.allclose(np.einsum("npq,nqr->npr", a, got), np.eye(p), atol=1e-8 * np.max(cond))


def test_chol_inverse_nan_where_not_positive_definite():
    rng = np.random.default_rng(7)
    a = _spd_batch(rng, 6, 3)
    a[1] = -np.eye(3)  # negative definite
    a[2] = 0.0  # singular
    a[3, 0, 0] = np.nan
    a[4] = np.diag([1.0, -1.0, 1.0])  # indefinite
    got = chol_inverse(a)
    assert np.all(np.isnan(got[1:5]))
    assert np.all(np.isfinite(got[[0, 5]]))
    assert np.allclose(got[[0, 5]], np.linalg.inv(a[[0, 5]]), rtol=1e-8)


@pytest.mark.parametrize("p", [2, 3, 5])
def test_batched_solves_do_not_depend_on_the_batch(p):
    # each matrix alone gives the same bits as inside any batch (what makes the maps independent of -j and
    # the chunk size)
    rng = np.random.default_rng(11 + p)
    a = _spd_batch(rng, 64, p)
    b = rng.normal(size=(64, p))
    inv, sol = chol_inverse(a), chol_solve(a, b)
    for k in (0, 17, 63):
        assert np.array_equal(chol_inverse(a[k:k + 1])[0], inv[k])
        assert np.array_equal(chol_solve(a[k:k + 1], b[k:k + 1])[0], sol[k])
    assert np.array_equal(chol_inverse(a[::-1])[::-1], inv)
