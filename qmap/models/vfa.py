"""Spoiled gradient echo (variable flip angle, VFA) T1 model.

.. math::

    S(\\alpha) = M_0 \\sin\\alpha_e \\frac{1 - E_1}{1 - E_1 \\cos\\alpha_e},
    \\qquad E_1 = e^{-TR/T_1}, \\qquad \\alpha_e = B_1 \\alpha

(steady state with perfect spoiling: Ernst & Anderson, Rev Sci Instrum 1966;
Bernstein, King & Zhou 2004), where ``alpha`` is the nominal flip angle and
``B1`` the relative transmit field (actual / nominal angle; Cheng & Wright,
Magn Reson Med 2006;55:566).

The linearised form (DESPOT1; Deoni, Rutt & Peters, Magn Reson Med
2003;49:515)

.. math:: \\frac{S}{\\sin\\alpha_e} = E_1 \\frac{S}{\\tan\\alpha_e} + M_0 (1 - E_1)

is a straight line in ``(S/tan a, S/sin a)`` with slope ``E1``: it gives the
closed-form start of the non-linear fit and, iteratively reweighted, the
``linear`` method (:func:`despot1`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..fitting import status as st
from .base import Derived, SeparableModel, delta_se_inverse

__all__ = [
    "ERNST_FRACTION",
    "LINEAR_PASSES",
    "LinearFit",
    "SpoiledGRE",
    "despot1",
    "ernst_angle",
    "optimal_angle_pair",
    "spgr_signal",
    "t1_crlb",
]

#: signal fraction of the Ernst signal at the two angles of the optimal two-angle protocol, ~0.71
#: (Deoni, Rutt & Peters 2003; 1/sqrt(2): Schabel & Morrell, Phys Med Biol 2009;54:N1)
ERNST_FRACTION = 1.0 / np.sqrt(2.0)

#: reweighting passes of the linear (DESPOT1) regression after the unweighted one
LINEAR_PASSES = 4


def spgr_signal(fa_deg, tr, t1, *, m0=1.0, b1=1.0):
    """Steady-state spoiled gradient-echo signal (module docstring equation).

    Parameters
    ----------
    fa_deg : array_like
        Nominal flip angle(s), degrees.
    tr : float or array_like
        Repetition time, seconds.
    t1 : float or array_like
        Longitudinal relaxation time, seconds.
    m0 : float or array_like
        Equilibrium signal (a.u.).
    b1 : float or array_like
        Relative transmit field: the actual angle is ``b1 * fa_deg``.

    Returns
    -------
    ndarray
        Signal, broadcast over the inputs (a.u.).

    Examples
    --------
    >>> round(float(spgr_signal(15.0, 0.015, 1.0)), 6)
    0.079524
    """
    a = np.deg2rad(np.asarray(b1, float) * np.asarray(fa_deg, float))
    e1 = np.exp(-np.asarray(tr, float) / np.asarray(t1, float))
    return np.asarray(m0, float) * np.sin(a) * (1.0 - e1) / (1.0 - e1 * np.cos(a))


def ernst_angle(tr, t1):
    """Flip angle of maximum spoiled-GRE signal, ``arccos(exp(-TR/T1))``, degrees.

    Examples
    --------
    >>> round(float(ernst_angle(0.015, 1.0)), 4)
    9.8991
    """
    return np.degrees(np.arccos(np.exp(-np.asarray(tr, float) / np.asarray(t1, float))))


def optimal_angle_pair(tr: float, t1: float, *, fraction: float = ERNST_FRACTION) -> tuple[float, float]:
    """The two flip angles whose signal is ``fraction`` of the Ernst signal, degrees (low, high).

    With ``fraction = 1/sqrt(2)`` (about 0.71) this is the two-angle protocol
    that minimises the variance of T1 for the given T1 (Deoni, Rutt & Peters
    2003; Schabel & Morrell 2009). Solving ``S(a) = f S_Ernst`` for
    ``c = cos a`` gives the closed form

    .. math:: c = \\frac{f^2 E_1 \\pm (1 - E_1^2)\\sqrt{1 - f^2}}{1 - E_1^2 (1 - f^2)}.
    """
    e = float(np.exp(-tr / t1))
    f2 = fraction**2
    den = 1.0 - e * e * (1.0 - f2)
    root = (1.0 - e * e) * np.sqrt(1.0 - f2)
    c_hi, c_lo = (f2 * e + root) / den, (f2 * e - root) / den
    return float(np.degrees(np.arccos(min(c_hi, 1.0)))), float(np.degrees(np.arccos(max(c_lo, -1.0))))


def t1_crlb(fa_deg, tr: float, t1: float, *, m0: float = 1.0, sigma: float = 1.0) -> float:
    """Cramer-Rao lower bound on the standard deviation of T1 (s), M0 unknown, Gaussian noise ``sigma``.

    ``sqrt([F^-1]_{T1,T1})`` with ``F = J^T J / sigma^2`` (Kay 1993), J the
    derivatives of the signals at ``fa_deg`` with respect to (M0, T1).
    """
    model = SpoiledGRE(fa_deg, tr)
    _, jac = model.signal_jacobian(np.array([[m0, t1]]))
    f = jac[0] @ jac[0].T / sigma**2
    try:
        return float(np.sqrt(np.linalg.inv(f)[1, 1]))
    except np.linalg.LinAlgError:
        return float("inf")


def _ctx_b1(ctx):
    if ctx and ctx.get("b1") is not None:
        return np.asarray(ctx["b1"], float)
    return None


class SpoiledGRE(SeparableModel):
    """Variable-flip-angle spoiled gradient echo: linear M0, non-linear T1, per-voxel B1.

    Parameters
    ----------
    fa_deg : (m,) array_like
        Nominal flip angles, degrees.
    tr : float
        Repetition time, seconds.
    t1_bounds : (float, float), optional
        Allowed T1 range, seconds (default ``[max(TR/10, 0.1 ms), 20 s]``;
        beyond ~20 s the signals only determine M0/T1, not T1, and the voxel
        gets the "hit a bound" status).

    Notes
    -----
    The per-voxel input ``ctx["b1"]`` (n,) scales the nominal angles (actual
    = B1 x nominal); without it B1 = 1. The closed-form start is the
    DESPOT1 regression of :func:`despot1` (no grid search needed).

    Examples
    --------
    >>> import numpy as np
    >>> m = SpoiledGRE([3.0, 15.0], 0.015)
    >>> m.predict(np.array([[1.0, 1.0]])).round(6).tolist()
    [[0.047985, 0.079524]]
    """

    name = "spgr"
    linear = ("M0",)
    nonlinear = ("T1",)
    voxel_inputs = ("b1",)

    def __init__(self, fa_deg, tr: float, *, t1_bounds: tuple[float, float] | None = None):
        self.x = np.asarray(fa_deg, dtype=float).ravel()
        self.tr = float(tr)
        if t1_bounds is None:
            t1_bounds = (max(self.tr / 10.0, 1e-4), 20.0)
        self.t1_bounds = (float(t1_bounds[0]), float(t1_bounds[1]))
        a = np.deg2rad(self.x)[None, :]
        self._sin, self._cos = np.sin(a), np.cos(a)

    def _trig(self, ctx):
        b1 = _ctx_b1(ctx)
        if b1 is None:
            return self._sin, self._cos
        a = np.deg2rad(self.x)[None, :] * b1[:, None]
        return np.sin(a), np.cos(a)

    def basis(self, theta, ctx=None):
        s, c = self._trig(ctx)
        e = np.exp(-self.tr / theta[:, 0:1])
        return (s * (1.0 - e) / (1.0 - e * c))[:, :, None]

    def dbasis(self, theta, ctx=None):
        s, c = self._trig(ctx)
        t = theta[:, 0:1]
        e = np.exp(-self.tr / t)
        den = 1.0 - e * c
        return (s * (c - 1.0) / den**2 * e * self.tr / t**2)[:, :, None, None]

    def signal_jacobian(self, params, ctx=None):
        # specialised for speed: one exponential per voxel, trig shared unless B1 varies
        s, c = self._trig(ctx)
        m0 = params[:, 0:1]
        t = params[:, 1:2]
        e = np.exp(-self.tr / t)
        den = 1.0 - e * c
        phi = s * (1.0 - e) / den
        J = np.empty((params.shape[0], 2, self.n_samples))
        J[:, 0] = phi
        J[:, 1] = m0 * s * (c - 1.0) / den**2 * (e * self.tr / t**2)
        return m0 * phi, J

    def bounds(self):
        return np.array([self.t1_bounds[0]]), np.array([self.t1_bounds[1]])

    def grid(self):
        lo, hi = self.bounds()
        return np.geomspace(lo[0] * 1.05, hi[0] / 1.05, 48)[:, None]

    def initial_guess(self, y, w, ctx):
        fit = despot1(y, self.x, self.tr, b1=_ctx_b1(ctx), w=w, passes=1, t1_bounds=self.t1_bounds)
        return fit.params[:, 1:2]

    def report(self, params, cov):
        t1 = params[:, 1]
        se_t1 = np.sqrt(cov[:, 1, 1])
        return [
            Derived("T1", t1, se_t1, "s", "longitudinal relaxation time T1 (variable flip angle)", is_time=True),
            Derived("R1", 1.0 / t1, delta_se_inverse(t1, se_t1), "1/s", "longitudinal relaxation rate R1 = 1/T1"),
            Derived("M0", params[:, 0], np.sqrt(cov[:, 0, 0]), "a.u.",
                    "equilibrium signal M0 (proton density x receive gain)"),
        ]


@dataclass
class LinearFit:
    """Result of :func:`despot1` over n voxels (the fields of the solver's ChunkFit)."""

    params: np.ndarray  # (n, 2) [M0, T1]
    cov: np.ndarray  # (n, 2, 2)
    rss: np.ndarray  # (n,)
    r2: np.ndarray  # (n,)
    rmse: np.ndarray  # (n,)
    n_used: np.ndarray  # (n,) int
    status: np.ndarray  # (n,) uint8
    n_iter: np.ndarray  # (n,) int


def despot1(
    y: np.ndarray,
    fa_deg,
    tr: float,
    *,
    b1: np.ndarray | None = None,
    w: np.ndarray | None = None,
    passes: int = LINEAR_PASSES,
    t1_bounds: tuple[float, float] | None = None,
    sigma: np.ndarray | None = None,
    stderr: str = "noise",
) -> LinearFit:
    """Linearised VFA regression (DESPOT1), iteratively reweighted, for n voxels at once.

    Parameters
    ----------
    y : (n, m) ndarray
        Signals at the nominal flip angles ``fa_deg`` (m,), degrees.
    tr : float
        Repetition time, seconds.
    b1 : (n,) ndarray, optional
        Relative B1 per voxel (actual angle = b1 x nominal).
    w : (n, m) ndarray, optional
        Sample weights (0/1) from the solver.
    passes : int
        Reweighted passes after the first, unweighted one (0: Deoni et al.'s
        plain regression).
    t1_bounds : (float, float), optional
        T1 range, seconds; estimates outside it are set to the bound (status 3).
    sigma : float or (n,) ndarray, optional
        Noise sd (signal units): with ``stderr="noise"`` the standard errors
        use it (``s = sigma``); otherwise only when no residual degrees of
        freedom remain (two angles), as the solver does.
    stderr : {"noise", "residual"}
        Covariance convention when ``sigma`` is given.

    Returns
    -------
    LinearFit
        ``params`` (n, 2) as ``[M0, T1]``; ``cov`` (n, 2, 2); ``rss``, ``r2``,
        ``rmse`` in signal space; ``status`` (0, 3 at a bound, 5 singular).

    Notes
    -----
    Regression of ``Y = S/sin a`` on ``X = S/tan a`` (a the actual angle):
    slope ``E1``, intercept ``c = M0 (1 - E1)``. The residual of the line,
    ``r = Y - E1 X - c``, carries the signal noise scaled by
    ``(1 - E1 cos a)/sin a``, so the weights ``u = (sin a / (1 - E1 cos a))^2``
    (recomputed from the current E1 at every pass) make every point count
    with the inverse variance of its residual -- and ``sqrt(u) r`` is exactly
    the signal-domain residual ``S - S_model``. The first pass is unweighted.

    Standard errors by error propagation: to first order in the noise the
    estimator's covariance is ``s^2 (X^T U X)^-1`` for ``(E1, c)`` with
    ``s^2 = RSS / (m - 2)`` (the signal-domain residual variance; with two
    angles ``sigma^2`` when given, else NaN), then the delta method to ``T1 = -TR / ln E1`` and
    ``M0 = c / (1 - E1)``.
    """
    y = np.asarray(y, float)
    n, _m = y.shape
    fa = np.asarray(fa_deg, float).ravel()
    a = np.deg2rad(fa)[None, :] * (np.ones((n, 1)) if b1 is None else np.asarray(b1, float)[:, None])
    s, c = np.sin(a), np.cos(a)
    with np.errstate(divide="ignore", invalid="ignore"):
        X = y * c / s
        Y = y / s
    w = np.ones_like(y) if w is None else np.asarray(w, float)
    u = w.copy()
    e1 = icpt = None
    for k in range(passes + 1):
        if k:
            ee = np.clip(np.where(np.isfinite(e1), e1, 0.5), 1e-6, 1.0 - 1e-12)[:, None]
            u = w * (s / (1.0 - ee * c)) ** 2
        e1, icpt, det = _line(X, Y, u)
    lo, hi = t1_bounds if t1_bounds is not None else (0.0, np.inf)
    with np.errstate(divide="ignore", invalid="ignore"):
        t1 = -tr / np.log(e1)
        t1 = np.where((e1 > 0) & (e1 < 1), t1, np.where(e1 >= 1, np.inf, 0.0))
        m0 = icpt / (1.0 - e1)
    status = np.zeros(n, np.uint8)
    singular = ~(np.isfinite(det) & (det > 0) & np.isfinite(e1) & np.isfinite(icpt))
    out = (t1 < lo) | (t1 > hi)
    out &= ~singular
    t1c = np.clip(t1, lo, hi)
    if out.any():
        # value at the bound, M0 by least squares there
        e1b = np.exp(-tr / t1c[out])[:, None]
        phi = s[out] * (1.0 - e1b) / (1.0 - e1b * c[out])
        with np.errstate(divide="ignore", invalid="ignore"):
            m0[out] = np.sum(w[out] * phi * y[out], axis=1) / np.sum(w[out] * phi * phi, axis=1)
        status[out] = st.AT_BOUND
    t1 = np.where(singular, np.nan, t1c)
    m0 = np.where(singular, np.nan, m0)
    status[singular] = st.ILL_CONDITIONED
    e1 = np.exp(-tr / t1)
    # signal-domain residuals and quality
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
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
            sig2 = np.asarray(sigma, float) ** 2 * np.ones(n)
            usable = np.isfinite(sig2) & (sig2 > 0)
            s2 = np.where(usable, sig2, s2) if stderr == "noise" else np.where(dof > 0, s2, sig2)
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
    return LinearFit(params, cov, rss, r2, rmse, n_used, status, np.full(n, passes + 1))


def _line(X, Y, u):
    """Weighted straight-line fit per voxel (element-wise sums): slope, intercept, determinant."""
    sw = np.sum(u, axis=1)
    sx, sy = np.sum(u * X, axis=1), np.sum(u * Y, axis=1)
    sxx, sxy = np.sum(u * X * X, axis=1), np.sum(u * X * Y, axis=1)
    det = sw * sxx - sx * sx
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = (sw * sxy - sx * sy) / det
        icpt = (sxx * sy - sx * sxy) / det
    return slope, icpt, det
