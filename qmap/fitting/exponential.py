"""Least squares of one decaying exponential, ``S = c exp(-x R)``, by Newton's method on the rate alone.

With one amplitude the least-squares ``c`` has a closed form for any rate (variable projection: Golub &
Pereyra, SIAM J Numer Anal 1973;10:413), so the residual sum of squares is a function of the rate only,

.. math:: F(R) = y^T y - (y^T e)^2 / (e^T e), \\qquad e_k = \\exp(-x_k R).

Its first and second derivatives need only the moments :math:`\\sum_k x_k^j y_k e_k` and
:math:`\\sum_k x_k^j e_k^2` (:math:`j = 0, 1, 2`), since :math:`e' = -x e` and :math:`e'' = x^2 e`:
with :math:`a = y^T e`, :math:`b = e^T e` and :math:`c = a / b`,

.. math::

    F' = -2 c a' + c^2 b', \\qquad
    F'' = -2 c' a' - 2 c a'' + 2 c c' b' + c^2 b'', \\qquad c' = (a' - c b') / b,

and Newton's step is :math:`-F'/F''`. From the log-linear start of
:meth:`qmap.models.monoexp.MonoExponential.initial_guess` (next to the minimum) it converges
quadratically: two or three evaluations, each two products of the samples and six row sums, against
about four times that work for the general Levenberg-Marquardt iteration over both parameters.

A voxel leaves this path for the general iteration (:func:`qmap.fitting.optimizer.levenberg_marquardt`,
from the same start) as soon as anything is unusual: a start at a bound, a curvature that is not
positive, a step that leaves the bounds or raises the RSS, or no convergence within
:data:`NEWTON_STEPS` evaluations. The general iteration decides every hard case, bounds and statuses
as before; the voxels fitted here end at the same minimum, within the same tolerance (a step below
``se_tol`` of a lower bound of the rate's standard error, or ``xtol`` relative, is the last one).

Every voxel's arithmetic is element-wise (row sums, no matrix products), so the result does not depend
on how many voxels are fitted together.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["NEWTON_STEPS", "ExponentialFit", "fit_exponential"]

#: evaluations at most before a voxel is handed to the general iteration (two or three are the rule)
NEWTON_STEPS = 8
#: a step may raise the RSS by this much relative to ``y^T y`` (rounding) without counting as uphill
RSS_ROUNDING = 1e-12


@dataclass
class ExponentialFit:
    """Result over the n voxels of a chunk; the rows in ``hard`` are not fitted (their values are the start)."""

    params: np.ndarray  # (n, 2) [c, T]
    rss: np.ndarray  # (n,)
    jtj: np.ndarray  # (n, 2, 2) J^T J of [c, T] at the last evaluated point
    converged: np.ndarray  # (n,) bool
    n_iter: np.ndarray  # (n,) int
    hard: np.ndarray  # (k,) indices left to the general iteration


def fit_exponential(model, y: np.ndarray, *, se_tol: float = 1e-3, xtol: float = 1e-8,
                    max_steps: int = NEWTON_STEPS) -> ExponentialFit:
    """Fit ``c exp(-x / T)`` to every row of ``y`` (n, m), all samples weighted equally.

    ``model`` is a one-exponential model (``model.one_exponential``): its ``x`` (m,), ``bounds()`` of
    ``T``, ``initial_guess(y, None)`` and ``decay(rate)`` = ``exp(-x rate)`` (n, m) are used. Returns the
    fitted parameters ``[c, T]`` with the RSS, ``J^T J`` and convergence of the voxels not in ``hard``.
    """
    n, m = y.shape
    x = np.asarray(model.x, float)
    x2 = x * x
    (t_lo,), (t_hi,) = (np.asarray(b, float) for b in model.bounds())
    r_lo, r_hi = 1.0 / t_hi, 1.0 / t_lo
    t0 = model.initial_guess(y, None)[:, 0]
    params = np.zeros((n, 2))
    params[:, 1] = t0
    rss = np.full(n, np.inf)
    jtj = np.full((n, 2, 2), np.nan)
    converged = np.zeros(n, bool)
    n_iter = np.zeros(n, int)
    hard = np.zeros(n, bool)
    hard[~((t0 > t_lo) & (t0 < t_hi))] = True  # a start at a bound (no decay, or too fast): the general iteration
    yy = np.einsum("nm,nm->n", y, y)
    dof = m - 2
    act = np.flatnonzero(~hard)
    rate = 1.0 / t0[act]
    last = np.full(act.size, np.inf)  # RSS at the previous evaluation of each active voxel
    # the evaluations' (voxels x samples) arrays, allocated once per chunk (the active voxels use their first rows)
    buf_e, buf_ye, buf_ee = np.empty((n, m)), np.empty((n, m)), np.empty((n, m))
    # while most voxels are active (the first two evaluations, as a rule) every row of ``y`` is evaluated, the
    # rows no longer active at a rate of their own (wasted, but cheaper than gathering the active rows' samples)
    rate_all = np.ones(n)
    for _ in range(max_steps):
        if act.size == 0:
            break
        k = act.size
        whole = 2 * k > n
        if whole:
            rate_all[act] = rate
            ya, rows = y, n
        else:
            ya, rows = (y if k == n else y[act]), k
        e = model.decay(rate_all if whole else rate, out=buf_e[:rows])
        ye = np.multiply(ya, e, out=buf_ye[:rows])
        ee = np.multiply(e, e, out=buf_ee[:rows])
        a, a1, a2 = np.einsum("nm->n", ye), -np.einsum("nm,m->n", ye, x), np.einsum("nm,m->n", ye, x2)
        b, b1, b2 = np.einsum("nm->n", ee), -2.0 * np.einsum("nm,m->n", ee, x), 4.0 * np.einsum("nm,m->n", ee, x2)
        if whole and k < n:  # the active rows' sums
            a, a1, a2, b, b1, b2 = a[act], a1[act], a2[act], b[act], b1[act], b2[act]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            c = a / b
            dc = (a1 - c * b1) / b
            g = -2.0 * c * a1 + c * c * b1
            h = -2.0 * dc * a1 - 2.0 * c * a2 + 2.0 * c * dc * b1 + c * c * b2
            step = -g / h
            # the RSS from the sums, y.y - c a: to rounding of y.y (enough to tell uphill steps and for the
            # tolerance below); the RSS reported is summed from the residuals
            f = yy[act] - c * a
            new = rate + step
            # converged: the step is negligible against a lower bound of the rate's standard error
            # (s / sqrt(J_R^T J_R), J_R = -c x e the rate column) or relative to the rate itself
            se_floor = (np.sqrt(np.maximum(f, 0.0) / dof) / (np.abs(c) * np.sqrt(0.25 * b2)) if dof > 0
                        else np.zeros_like(f))
            small = (np.abs(step) <= se_tol * se_floor) | (np.abs(step) <= xtol * (rate + xtol))
        n_iter[act] += 1
        ok = (h > 0) & np.isfinite(step) & np.isfinite(f) & (b > 0) & (f <= last + RSS_ROUNDING * yy[act])
        ok &= (new > r_lo) & (new < r_hi)
        done = ok & small
        kd = act[done]
        if kd.size:
            rd, cd = new[done], c[done] + dc[done] * step[done]  # the last, negligible step taken unevaluated
            params[kd, 0], params[kd, 1] = cd, 1.0 / rd
            # the RSS at the evaluated point (as the general iteration reports), summed from the residuals: in
            # the evaluation's own rows (``ee`` no longer needed) when most of them are done, else gathered
            if 2 * kd.size > rows:
                if whole:
                    c_rows = np.zeros(n)
                    c_rows[act] = c
                else:
                    c_rows = c
                r = np.multiply(e, c_rows[:, None], out=ee)
                np.subtract(ya, r, out=r)
                rss_rows = np.einsum("nm,nm->n", r, r)
                rss[kd] = rss_rows[kd] if whole else rss_rows[done]
            else:
                r = (ya[kd] if whole else ya[done]) - c[done, None] * (e[kd] if whole else e[done])
                rss[kd] = np.einsum("nm,nm->n", r, r)
            # J^T J of [c, T] at the evaluated point: dS/dc = e, dS/dT = c x e R^2 (T = 1/R)
            ra = rate[done]
            cr2 = c[done] * ra * ra
            jtj[kd, 0, 0] = b[done]
            jtj[kd, 0, 1] = jtj[kd, 1, 0] = -0.5 * b1[done] * cr2
            jtj[kd, 1, 1] = 0.25 * b2[done] * cr2 * cr2
            converged[kd] = True
        hard[act[~ok]] = True
        go = ok & ~small
        act, rate, last = act[go], new[go], f[go]
    hard[act] = True  # not converged within max_steps
    return ExponentialFit(params, rss, jtj, converged, n_iter, np.flatnonzero(hard))
