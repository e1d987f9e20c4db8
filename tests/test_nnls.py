"""The batched NNLS solvers against scipy.optimize.nnls (Lawson & Hanson's algorithm, a reference library)."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import nnls

from qmap.nnls import nnls_active_set, residual_norm2


def _reference(A, B, mu=None):
    """scipy.optimize.nnls per voxel; a ridge mu as the augmented problem [A; sqrt(mu) I] x = [b; 0]."""
    n = A.shape[1]
    out = []
    for i, b in enumerate(B):
        if mu is None:
            out.append(nnls(A, b)[0])
        else:
            out.append(nnls(np.vstack([A, np.sqrt(mu[i]) * np.eye(n)]), np.r_[b, np.zeros(n)])[0])
    return np.array(out)


@pytest.mark.parametrize("shape", [(32, 40), (20, 10), (12, 30), (40, 24)])
def test_random_problems_match_scipy(shape):
    rng = np.random.default_rng(sum(shape))
    m, n = shape
    A = rng.normal(size=(m, n))
    B = rng.normal(size=(150, m)) * rng.uniform(0.01, 100, (150, 1))  # scales over four decades
    ref = _reference(A, B)
    x, conv = nnls_active_set(A.T @ A, B @ A)
    assert conv.all()
    assert (x >= 0).all()
    scale = np.abs(ref).max(axis=1, keepdims=True)
    if m >= n:  # full column rank: the optimum is unique
        np.testing.assert_allclose(x / scale, ref / scale, atol=1e-9)
    rss = ((x @ A.T - B) ** 2).sum(1)
    rss_ref = ((ref @ A.T - B) ** 2).sum(1)
    np.testing.assert_allclose(rss, rss_ref, rtol=1e-9, atol=1e-12 * (B**2).sum(1).max())


def test_ridge_problems_match_scipy():
    rng = np.random.default_rng(7)
    A = rng.normal(size=(32, 40))
    B = rng.normal(size=(120, 32))
    mu = 10.0 ** rng.uniform(-3, 1, 120)
    ref = _reference(A, B, mu)
    x, conv = nnls_active_set(A.T @ A, B @ A, mu=mu)
    assert conv.all()
    np.testing.assert_allclose(x, ref, atol=1e-10 * np.abs(ref).max())


def test_exponential_basis_same_optimum_as_scipy():
    """The ill-conditioned multi-exponential basis of a T2 spectrum: the same minimum misfit as scipy."""
    rng = np.random.default_rng(3)
    te = np.arange(1, 33) * 0.01
    t2 = np.geomspace(0.01, 2.0, 40)
    A = np.exp(-te[:, None] / t2[None, :])
    truth = np.zeros((300, 40))
    truth[:, 8] = rng.uniform(0, 0.3, 300)
    truth[:, 22] = 1 - truth[:, 8]
    B = 1000 * truth @ A.T + rng.normal(0, 1000 / 300, (300, 32))
    ref = _reference(A, B)
    x, conv = nnls_active_set(A.T @ A, B @ A)
    assert conv.all()
    rss, rss_ref = ((x @ A.T - B) ** 2).sum(1), ((ref @ A.T - B) ** 2).sum(1)
    np.testing.assert_allclose(rss, rss_ref, rtol=1e-6)
    # from the normal equations too
    np.testing.assert_allclose(residual_norm2(x, A.T @ A, B @ A, (B**2).sum(1)), rss, rtol=1e-6)


def test_gram_stack_per_voxel_groups():
    """Voxels with different bases in one call (a stack of Gram matrices) equal separate calls."""
    rng = np.random.default_rng(11)
    As = rng.normal(size=(6, 24, 16))
    g = rng.integers(0, 6, 200)
    B = rng.normal(size=(200, 24))
    d = np.einsum("vm,vmn->vn", B, As[g])
    G = np.einsum("amn,amk->ank", As, As)
    x, conv = nnls_active_set(G, d, group=g)
    assert conv.all()
    ref = np.array([nnls(As[k], b)[0] for k, b in zip(g, B)])
    np.testing.assert_allclose(x, ref, atol=1e-10)
    x2, _ = nnls_active_set(G, d, group=g, mu=0.5)
    ref2 = _reference_stack(As, g, B, 0.5)
    np.testing.assert_allclose(x2, ref2, atol=1e-10)


def _reference_stack(As, g, B, mu):
    n = As.shape[2]
    return np.array([nnls(np.vstack([As[k], np.sqrt(mu) * np.eye(n)]), np.r_[b, np.zeros(n)])[0]
                     for k, b in zip(g, B)])


def test_warm_start_reaches_the_same_optimum():
    rng = np.random.default_rng(5)
    A = rng.normal(size=(32, 40))
    B = rng.normal(size=(100, 32))
    cold, _ = nnls_active_set(A.T @ A, B @ A, mu=0.3)
    warm, conv = nnls_active_set(A.T @ A, B @ A, mu=0.3, passive=rng.random((100, 40)) < 0.5)
    assert conv.all()
    np.testing.assert_allclose(warm, cold, atol=1e-12)


def test_large_batch_blocks_and_warm_start_from_a_point_match_scipy():
    """Batches large enough to be solved in blocks of similar passive-set size (sparse and dense optima mixed,
    several Gram matrices, ridge and no ridge), cold and warm-started from a feasible point (Lawson & Hanson's
    inner loop from a neighbouring problem's solution): the same optimum as scipy.optimize.nnls."""
    rng = np.random.default_rng(21)
    m, n, V = 48, 40, 700
    As = np.abs(rng.normal(size=(3, m, n))) + rng.normal(size=(3, m, n))  # correlated positive-ish columns
    g = rng.integers(0, 3, V)
    truth = np.where(rng.random((V, n)) < rng.uniform(0.02, 0.6, (V, 1)), rng.uniform(0, 1, (V, n)), 0.0)
    B = np.einsum("vmn,vn->vm", As[g], truth) + rng.normal(0, 0.3, (V, m))
    G = np.einsum("amn,amk->ank", As, As)
    d = np.einsum("vm,vmn->vn", B, As[g])
    mu = np.where(np.arange(V) % 2 == 0, 0.0, 10.0 ** rng.uniform(-3, 0, V))
    ref = np.array([nnls(np.vstack([As[k], np.sqrt(u) * np.eye(n)]), np.r_[b, np.zeros(n)])[0]
                    for k, b, u in zip(g, B, mu)])
    x, conv = nnls_active_set(G, d, group=g, mu=mu)
    assert conv.all()
    assert np.ptp((x > 0).sum(axis=1)) > 8  # passive sets of very different sizes: several blocks
    # the optimum is unique (full column rank or ridge): compare solutions
    tol = 1e-8 * np.abs(ref).max()
    np.testing.assert_allclose(x, ref, atol=tol)
    # warm start from the solution of a perturbed problem (a feasible point with a nearby support)
    start, _ = nnls_active_set(G, d * rng.uniform(0.8, 1.2, d.shape), group=g, mu=mu)
    xw, conv = nnls_active_set(G, d, group=g, mu=mu, start=start)
    assert conv.all()
    np.testing.assert_allclose(xw, ref, atol=tol)
    # one voxel's solution does not depend on the batch it is solved in
    sub = np.arange(0, V, 7)
    xs, _ = nnls_active_set(G, d[sub], group=g[sub], mu=mu[sub])
    np.testing.assert_array_equal(xs, x[sub])
