"""Standard errors of the fitted parameters: the covariance conventions and propagated input uncertainty.

Two conventions for the covariance of a least-squares estimate with Jacobian
``J`` (n, P, m) at the solution:

``noise`` (the default whenever the noise level is known)
    The inverse Fisher information of the model at the solution,
    ``sigma^2 (J^T J)^-1`` for Gaussian noise of sd ``sigma`` (the Cramer-Rao
    bound, which an efficient estimator reaches: Kay, *Fundamentals of
    Statistical Signal Processing: Estimation Theory*, 1993, ch. 3). It is
    what ``scipy.optimize.curve_fit(..., sigma=sigma, absolute_sigma=True)``
    returns. Where the fit models the noise floor of magnitude data (the
    Rician expectation ``E|S + noise|``), ``J`` is the Jacobian of that
    expectation and the sample variance is the Rician one,
    ``Var M = nu^2 + 2 N sigma^2 - (E M)^2`` (``N`` coils; Gudbjartsson &
    Patz 1995), in the sandwich ``(J^T J)^-1 J^T V J (J^T J)^-1`` -- the
    covariance of the least-squares estimator when the sample variances
    differ from ``sigma^2``. One convention per map: a voxel whose sigma is
    not known (a noise map that is NaN or not positive there) gets a NaN
    covariance, never the residual one.
``residual``
    ``s^2 (J^T J)^-1`` with the per-voxel residual variance
    ``s^2 = RSS / (m_used - P)`` (``curve_fit`` with ``absolute_sigma=False``).
    With few degrees of freedom ``s^2`` is itself very noisy (2 for a
    4-angle VFA), so ``estimate +/- 1.96 SE`` covers the truth much less
    often than 95 %: the ratio (estimate - truth) / SE follows Student's t
    with ``m - P`` degrees of freedom, not a normal distribution.

Input uncertainty (e.g. the B1 map's own standard error in a VFA fit) is
added to first order: with ``x`` a per-voxel model input held fixed in the
fit, the estimate moves by ``dp/dx = -(J^T J)^-1 J^T ds/dx`` (implicit
function theorem at the least-squares solution), so
``Cov p += (dp/dx)(dp/dx)^T se_x^2``; for a single derived quantity
``q(x)`` this is ``se_q^2 = se_fit^2 + (dq/dx)^2 se_x^2``
(:func:`combine_se`).
"""

from __future__ import annotations

import numpy as np

from ..linalg import chol_solve

__all__ = [
    "CONVENTIONS",
    "CONVENTION_TEXT",
    "add_input_covariance",
    "combine_se",
    "input_sensitivity",
    "rician_sample_variance",
    "sandwich",
]

CONVENTIONS = ("noise", "residual")

#: what each convention means, as recorded in the provenance
CONVENTION_TEXT = {
    "noise": "inverse Fisher information at the solution with the known noise sd: sigma^2 (J^T J)^-1 "
             "(Rician sandwich where the noise floor is modelled)",
    "residual": "per-voxel residual variance: s^2 (J^T J)^-1 with s^2 = RSS/(m_used - P)",
}


def rician_sample_variance(nu: np.ndarray, sigma: np.ndarray, *, coils: int = 1) -> np.ndarray:
    """Variance of the magnitude of ``nu`` plus complex Gaussian noise (sd ``sigma`` per channel and coil).

    ``E[M^2] = nu^2 + 2 N sigma^2`` for a sum of squares over ``N`` coils
    (noncentral chi; Constantinides et al., Magn Reson Med 1997;38:852), so
    ``Var M = nu^2 + 2 N sigma^2 - (E M)^2``; it tends to ``sigma^2`` far
    above the floor and to ``(2 - pi/2) sigma^2`` at ``nu = 0`` (Rayleigh,
    one coil).

    Parameters
    ----------
    nu : ndarray
        Noise-free signal (a.u.), any shape.
    sigma : ndarray
        Noise sd (a.u.), broadcastable to ``nu``.
    coils : int

    Returns
    -------
    ndarray
        Variance (a.u.^2), same shape as ``nu``, at least ``1e-6 sigma^2``.
    """
    from ..noise import rician_mean

    nu = np.asarray(nu, float)
    sigma = np.broadcast_to(np.asarray(sigma, float), nu.shape)
    var = sigma**2  # far above the floor (nu >= 15 sigma) Var M = sigma^2 (1 - O(sigma^2 / nu^2)): within 0.3 %
    low = np.abs(nu) < 15.0 * sigma
    if low.any():
        var = var.copy()
        e = rician_mean(nu[low], sigma[low], coils=coils)
        var[low] = nu[low] ** 2 + 2.0 * coils * sigma[low] ** 2 - e**2
    return np.maximum(var, 1e-6 * sigma**2)


def sandwich(J: np.ndarray, inv: np.ndarray, var: np.ndarray, w: np.ndarray | None = None) -> np.ndarray:
    """``inv (J^T W V J) inv`` per voxel: the covariance of least squares with sample variances ``var``.

    Parameters
    ----------
    J : (n, P, m) ndarray
        Jacobian at the solution.
    inv : (n, P, P) ndarray
        ``(J^T W J)^-1``.
    var : (n, m) ndarray
        Variance of each sample.
    w : (n, m) ndarray, optional
        0/1 sample weights (None: all used).
    """
    n, P, _ = J.shape
    Jv = J * (var if w is None else var * w)[:, None, :]
    mid = np.empty((n, P, P))
    for i in range(P):
        for j in range(i, P):
            mid[:, i, j] = np.einsum("nm,nm->n", Jv[:, i], J[:, j])
            mid[:, j, i] = mid[:, i, j]
    left = np.einsum("nij,njk->nik", inv, mid)
    return np.einsum("nik,nkl->nil", left, inv)


def input_sensitivity(model, params: np.ndarray, ctx: dict, name: str, *, step: float = 1e-4) -> np.ndarray:
    """How the fitted parameters move with a per-voxel model input: ``dp/dx``, (n, P).

    ``dp/dx = -(J^T J)^-1 J^T ds/dx`` at the least-squares solution (first
    order; the residual's own curvature term is neglected, as in the
    Gauss-Newton covariance). ``ds/dx`` is a central difference of the
    model's signal with relative step ``step``.

    Parameters
    ----------
    model : SeparableModel
        The fitted model (with ``name`` among its ``voxel_inputs``).
    params : (n, P) ndarray
        Fitted parameters ``[c..., theta...]``.
    ctx : dict
        Per-voxel model inputs, each (n,).
    name : str
        The input to differentiate by (e.g. ``"b1"``).
    step : float
        Relative finite-difference step.
    """
    x = np.asarray(ctx[name], float)
    h = step * np.maximum(np.abs(x), 1e-3)
    up = dict(ctx, **{name: x + h})
    dn = dict(ctx, **{name: x - h})
    ds = (model.predict(params, up) - model.predict(params, dn)) / (2.0 * h)[:, None]  # (n, m)
    _, J = model.signal_jacobian(params, ctx)  # (n, P, m)
    P = J.shape[1]
    JTJ = np.empty((J.shape[0], P, P))
    for i in range(P):
        for j in range(i, P):
            JTJ[:, i, j] = np.einsum("nm,nm->n", J[:, i], J[:, j])
            JTJ[:, j, i] = JTJ[:, i, j]
    return -chol_solve(JTJ, np.einsum("npm,nm->np", J, ds))


def add_input_covariance(cov: np.ndarray, sensitivity: np.ndarray, input_se: np.ndarray) -> np.ndarray:
    """``cov + g g^T se^2`` per voxel: an independent input error of sd ``input_se`` propagated to first order.

    Parameters
    ----------
    cov : (n, P, P) ndarray
        Covariance of the fit with the input held fixed.
    sensitivity : (n, P) ndarray
        ``dp/dx`` (:func:`input_sensitivity`).
    input_se : (n,) ndarray
        Standard error of the input; non-finite values count as 0 (nothing
        known to add).
    """
    se = np.where(np.isfinite(input_se), np.asarray(input_se, float), 0.0)
    g = np.where(np.isfinite(sensitivity), sensitivity, 0.0)
    return cov + np.einsum("np,nq->npq", g, g) * (se**2)[:, None, None]


def combine_se(se: np.ndarray, derivative: np.ndarray, input_se: np.ndarray) -> np.ndarray:
    """``sqrt(se^2 + (dq/dx)^2 se_x^2)``: a derived quantity's standard error with an input's error added.

    For a quantity ``q`` computed from data (standard error ``se``) and an
    independent input ``x`` (e.g. a B1 map with standard error
    ``input_se``), to first order. Non-finite ``input_se`` counts as 0.

    Parameters
    ----------
    se, derivative, input_se : array_like
        Broadcastable arrays: the fit's standard error of ``q``, ``dq/dx``
        and the standard error of ``x``.

    Examples
    --------
    >>> float(combine_se(0.03, 2.0, 0.02))
    0.05
    """
    se = np.asarray(se, float)
    xs = np.asarray(input_se, float)
    xs = np.where(np.isfinite(xs), xs, 0.0)
    return np.sqrt(se**2 + (np.asarray(derivative, float) * xs) ** 2)
