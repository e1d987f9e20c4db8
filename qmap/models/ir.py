"""Inversion recovery: T1 from a series of inversion times.

.. math:: S(TI) = a + b \\exp(-TI / T_1)

With full recovery between inversions (TR >> T1) and an inversion pulse of
efficiency ``k`` (1 = perfect inversion, 0 = none), ``a = M0`` and
``b = -(1 + k) M0``, i.e. ``S = M0 (1 - (1 + k) exp(-TI/T1))``. A finite TR
keeps the three-parameter form (only ``a`` and ``b`` change), so T1 stays
unbiased; the reported M0 and inversion efficiency are then apparent values.

Magnitude images lose the sign of the samples acquired before the null.
The sign is restored per voxel by trying the two sign patterns around the
voxel's smallest sample (flip every sample before it; flip it as well) and
keeping the better fit (Barral et al. 2010). Phase-corrected real data (and
complex data, phase-corrected by the workflow) are fitted directly.

``look_locker=True`` reads the fitted time constant as the apparent T1* of a
Look-Locker (continuously sampled) acquisition, ``S = A - B exp(-t/T1*)``,
and reports ``T1 = T1* (B/A - 1)`` (Deichmann & Haase 1992).

References
----------
Bernstein MA, King KF, Zhou XJ. Handbook of MRI Pulse Sequences. Elsevier, 2004.
Barral JK, Gudmundson E, Stikov N, et al. A robust methodology for in vivo T1
mapping. Magn Reson Med 2010;64:1057-1067. doi:10.1002/mrm.22497
Deichmann R, Haase A. Quantification of T1 values by SNAPSHOT-FLASH NMR
imaging. J Magn Reson 1992;96:608-612. doi:10.1016/0022-2364(92)90347-A
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from ..defaults import IR_SIGNALS as SIGNALS
from .base import Derived, SeparableModel, delta_se_inverse

__all__ = ["SIGNALS", "InversionRecovery", "ir_signal", "t1_bounds"]

#: start-grid points per decade of T1
GRID_PER_DECADE = 6


def ir_signal(ti: ArrayLike, t1: ArrayLike, *, m0: ArrayLike = 1.0, efficiency: ArrayLike = 1.0) -> np.ndarray:
    """Longitudinal magnetisation after an inversion, with full recovery before it.

    Parameters
    ----------
    ti : array_like
        Inversion times in seconds.
    t1 : array_like
        Longitudinal relaxation time in seconds (broadcast against ``ti``).
    m0 : array_like
        Equilibrium signal (signal units).
    efficiency : array_like
        Inversion efficiency ``k``: 1 = perfect inversion, 0 = no inversion.

    Returns
    -------
    ndarray
        ``M0 (1 - (1 + k) exp(-TI/T1))``.

    Notes
    -----
    The null of a perfect inversion is at ``TI = T1 ln 2`` (Bernstein et al. 2004).

    Examples
    --------
    >>> round(float(ir_signal(np.log(2.0), 1.0)), 12)
    0.0
    """
    ti = np.asarray(ti, float)
    t1 = np.asarray(t1, float)
    m0 = np.asarray(m0, float)
    k = np.asarray(efficiency, float)
    return m0 * (1.0 - (1.0 + k) * np.exp(-ti / t1))


def t1_bounds(ti: ArrayLike) -> tuple[float, float]:
    """Allowed range of T1 (seconds) for a set of inversion times.

    At least 0.005-20 s (so T1 of 0.01-10 s never sits on a bound), widened
    to half the shortest positive TI and four times the longest TI.
    """
    ti = np.asarray(ti, float)
    pos = ti[ti > 0]
    shortest = float(pos.min()) if pos.size else 0.01
    return min(0.005, 0.5 * shortest), max(20.0, 4.0 * float(ti.max()))


class InversionRecovery(SeparableModel):
    """Three-parameter inversion recovery ``S = a + b exp(-TI/T1)``.

    Parameters
    ----------
    ti : (m,) array_like
        Inversion times in seconds.
    signal : {"magnitude", "real", "complex"}
        ``magnitude``: polarity restoration before fitting (see the module
        docstring). ``real`` / ``complex``: signed, phase-corrected samples.
    look_locker : bool
        Report the Look-Locker corrected T1 ``T1* (B/A - 1)`` and the
        apparent ``ApparentT1`` instead of T1 and the inversion efficiency.

    Notes
    -----
    Fitted parameters, in order: ``a`` (fully recovered signal), ``b``
    (``-(1 + k) M0``), and ``T1`` (``ApparentT1`` with ``look_locker``).
    Reported maps: ``T1`` (s), ``R1`` (1/s), ``M0`` (= ``|a|``; the overall
    sign of phase-corrected data is arbitrary) and ``InversionEfficiency``
    (``k = -b/a - 1``); with ``look_locker``: ``T1``, ``R1``, ``M0`` (``B - A``,
    the signal the inversion starts from) and ``ApparentT1``. Standard errors
    by the delta method with the full covariance.

    Examples
    --------
    >>> ti = np.array([0.05, 0.2, 0.5, 1.0, 2.0, 4.0])
    >>> model = InversionRecovery(ti)
    >>> model.predict(np.array([[100.0, -195.0, 1.0]])).round(2).tolist()
    [[-85.49, -59.65, -18.27, 28.26, 73.61, 96.43]]
    """

    name = "ir"
    varied = "InversionTime"
    axis_label = "inversion time"
    linear = ("a", "b")
    exact_start = True  # initial_guess is the variable-projection optimum (vp_t1)

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x) -> InversionRecovery:
        return cls(x, signal=model.get("signal", "magnitude"), look_locker=bool(model.get("look_locker", False)))

    def __init__(self, ti: ArrayLike, *, signal: str = "magnitude", look_locker: bool = False):
        if signal not in SIGNALS:
            raise ValueError(f"signal {signal!r}; expected one of {', '.join(SIGNALS)}")
        self.x = np.asarray(ti, dtype=float).ravel()
        self.signal = signal
        self.sign_ambiguous = signal == "magnitude"
        self.look_locker = bool(look_locker)
        self.nonlinear = ("ApparentT1",) if self.look_locker else ("T1",)

    # ------------------------------------------------------------------ physics
    def _exp(self, t1: np.ndarray) -> np.ndarray:
        return np.exp(-self.x[None, :] / t1)

    def basis(self, theta, ctx=None):
        # stored basis-major, (2, n, m), and returned as an (n, m, 2) view: numpy's einsum over
        # the samples (the solver's amplitude step) runs several times faster on this layout
        e = self._exp(theta[:, 0:1])
        out = np.empty((2,) + e.shape)
        out[0] = 1.0
        out[1] = e
        return np.moveaxis(out, 0, 2)

    def dbasis(self, theta, ctx=None):
        t1 = theta[:, 0:1]
        e = self._exp(t1)
        out = np.zeros(e.shape + (2, 1))
        out[:, :, 1, 0] = e * self.x[None, :] / t1**2
        return out

    def signal_jacobian(self, params, ctx=None):
        # one exponential per sample; d s / d T1 = b e TI / T1^2
        a = params[:, 0:1]
        b = params[:, 1:2]
        t1 = params[:, 2:3]
        e = self._exp(t1)
        be = b * e
        J = np.empty((e.shape[0], 3, e.shape[1]))
        J[:, 0] = 1.0
        J[:, 1] = e
        J[:, 2] = be * (self.x[None, :] / t1**2)
        return a + be, J

    def bounds(self):
        lo, hi = t1_bounds(self.x)
        return np.array([lo]), np.array([hi])

    def grid(self):
        lo, hi = self.bounds()
        lo, hi = lo[0] * 1.05, hi[0] / 1.05
        n = int(np.ceil(GRID_PER_DECADE * np.log10(hi / lo))) + 1
        return np.geomspace(lo, hi, n)[:, None]

    def initial_guess(self, y, w, ctx):
        """Start: best T1 on the grid, then the exact variable-projection optimum by safeguarded Newton.

        The linear amplitudes are eliminated in closed form, so the residual
        is a function of T1 alone; its maximiser is bracketed by the grid
        neighbours of the best grid point and found by Newton steps on the
        log projection score (bisection when a step leaves the bracket).
        The result is the least-squares T1 to ~1e-12, so the solver's
        Levenberg-Marquardt only confirms it and supplies the covariance.
        Returns None (plain grid start) for weighted fits.
        """
        if w is not None and not np.all(w == 1):
            return None
        return vp_t1(self.x, y, self.grid()[:, 0], self.bounds())[:, None]

    def candidates(self, y):
        """Sign patterns to try (magnitude data): flip the samples before each voxel's minimum, and it too.

        The true signed signal is monotonic in TI, so its sign changes once,
        next to the smallest magnitude; both neighbours of the change are
        tried and the better fit wins (Barral et al. 2010).
        """
        if self.signal != "magnitude":
            return [y]
        k = np.arange(y.shape[1])[None, :]
        i = np.argmin(y, axis=1)[:, None]
        return [np.where(k < i, -y, y), np.where(k <= i, -y, y)]

    # ------------------------------------------------------------------ outputs
    def report(self, params, cov):
        a, b, t = params[:, 0], params[:, 1], params[:, 2]
        se_t = np.sqrt(cov[:, 2, 2])
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.look_locker:
                return self._report_look_locker(a, b, t, se_t, cov)
            k = -b / a - 1.0
            se_k = _delta_se(cov, np.stack([b / a**2, -1.0 / a, np.zeros_like(a)], axis=1))
            return [
                Derived("T1", t, se_t, "s", "longitudinal relaxation time T1 (inversion recovery)", is_time=True),
                Derived("R1", 1.0 / t, delta_se_inverse(t, se_t), "1/s", "longitudinal relaxation rate R1 = 1/T1"),
                Derived("M0", np.abs(a), np.sqrt(cov[:, 0, 0]), "a.u.",
                        "fully recovered signal (a in S = a + b exp(-TI/T1))"),
                Derived("InversionEfficiency", k, se_k, "fraction",
                        "inversion efficiency k = -b/a - 1 (1 = perfect inversion, 0 = none)"),
            ]

    def _report_look_locker(self, a, b, tstar, se_tstar, cov):
        # S = A - B exp(-t/T1*) with A = a, B = -b; T1 = T1* (B/A - 1) = -T1* (a + b) / a
        t1 = -tstar * (a + b) / a
        grad = np.stack([tstar * b / a**2, -tstar / a, -(a + b) / a], axis=1)
        se_t1 = _delta_se(cov, grad)
        m0 = -(a + b)  # B - A: the signal the inversion starts from, sign-free
        se_m0 = _delta_se(cov, np.stack([-np.ones_like(a), -np.ones_like(a), np.zeros_like(a)], axis=1))
        return [
            Derived("T1", t1, se_t1, "s", "longitudinal relaxation time T1 = T1* (B/A - 1) (Look-Locker corrected)",
                    is_time=True),
            Derived("R1", 1.0 / t1, delta_se_inverse(t1, se_t1), "1/s", "longitudinal relaxation rate R1 = 1/T1"),
            Derived("M0", np.abs(m0), se_m0, "a.u.", "signal amplitude B - A of S = A - B exp(-t/T1*)"),
            Derived("ApparentT1", tstar, se_tstar, "s", "apparent recovery time T1* of the Look-Locker readout",
                    is_time=True),
        ]


def vp_t1(ti: np.ndarray, y: np.ndarray, grid: np.ndarray, bounds, *, max_iter: int = 40,
          rtol: float = 1e-12) -> np.ndarray:
    """Least-squares T1 of ``y = a + b exp(-TI/T1)`` per voxel, a and b eliminated (variable projection).

    Parameters
    ----------
    ti : (m,) ndarray
        Inversion times, s.
    y : (n, m) ndarray
        Signed samples.
    grid : (G,) ndarray
        Increasing candidate T1 values, s (the start search).
    bounds : tuple of (1,) ndarrays
        Allowed T1 range, s.

    Returns
    -------
    (n,) ndarray
        T1 in seconds (the grid value where the refinement is undefined).

    Notes
    -----
    With centred basis ``c = e - mean(e)``, ``e_j = exp(-r TI_j)`` and
    ``r = 1/T1``, the residual is ``|y - ybar|^2 - (c.y)^2 / |c|^2``; the
    Newton iteration maximises ``g(r) = ln (c.y)^2 - ln |c|^2``. Only the
    index of the best grid point comes from a matrix product; everything
    after it is element-wise per voxel (results do not depend on which
    voxels share a chunk). Each voxel stops once its own Newton step is
    below ``sqrt(rtol)`` relative (the error after it is of order the step
    squared) or its bracket is below ``rtol``.
    """
    m = ti.size
    t = ti[:, None]
    # grid search: |c_g . y| / |c_g| is the part of the centred data the basis explains
    e = np.exp(-ti[None, :] / grid[:, None])
    c = e - e.mean(axis=1, keepdims=True)
    c /= np.sqrt(np.sum(c * c, axis=1, keepdims=True))
    best = np.argmax(np.abs(c @ y.T), axis=0)
    G = grid.size
    below, above = np.maximum(best - 1, 0), np.minimum(best + 1, G - 1)
    rgrid = 1.0 / grid
    lo = np.where(best + 1 < G, rgrid[above], 1.0 / bounds[1][0])
    hi = np.where(best > 0, rgrid[below], 1.0 / bounds[0][0])
    yt = y.T.copy()
    yt -= _colsum(yt) / m
    # start: vertex of the parabola through the scores (c.y)^2 at the best grid point and its
    # neighbours (grid uniform in log T1), recomputed element-wise
    ct = c.T
    f0, f1, f2 = (_colsum(ct[:, j] * yt) ** 2 for j in (below, best, above))
    den = f0 - 2.0 * f1 + f2
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.where((den < 0) & (below != best) & (above != best), 0.5 * (f0 - f2) / den, 0.0)
    r = rgrid[best] * (grid[0] / grid[1]) ** np.clip(d, -0.5, 0.5)
    # working set: compacted copies of the voxels still iterating (compacted when half are done)
    idx = np.arange(r.size)
    wr, wlo, whi, wy = r.copy(), lo, hi, yt
    live = np.ones(r.size, bool)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for _ in range(max_iter):
            if live.sum() < 0.5 * live.size:
                r[idx] = wr
                idx, wr, wlo, whi, wy, live = idx[live], wr[live], wlo[live], whi[live], wy[:, live], live[live]
            # moments sum_j TI_j^p x_j (p = 0, 1, 2) of x = e*y, e, e^2, summed in a fixed order
            q = np.empty((9, m, wr.size))
            np.exp(-t * wr, out=q[1])
            np.multiply(q[1], wy, out=q[0])
            np.multiply(q[1], q[1], out=q[2])
            np.multiply(t, q[0:3], out=q[3:6])
            np.multiply(t, q[3:6], out=q[6:9])
            sy, se, see, sty, ste, stee, st2y, st2e, st2ee = _colsum(q.transpose(1, 0, 2))
            sxx = see - se * se / m
            dxx = -2.0 * stee + 2.0 * se * ste / m
            d2xx = 4.0 * st2ee - 2.0 * ste * ste / m - 2.0 * se * st2e / m
            q1, q2 = -sty / sy, st2y / sy
            g1 = 2.0 * q1 - dxx / sxx
            g2 = 2.0 * (q2 - q1 * q1) - (d2xx / sxx - (dxx / sxx) ** 2)
            # the maximum lies above r where g rises, below where it falls
            wlo = np.where(live & (g1 > 0), wr, wlo)
            whi = np.where(live & (g1 < 0), wr, whi)
            step = -g1 / g2
            newton = (g2 < 0) & np.isfinite(step)
            rn = wr + step
            rn = np.where(newton & (rn >= wlo) & (rn <= whi), rn, 0.5 * (wlo + whi))
            ok = np.isfinite(rn) & np.isfinite(g1)
            # a Newton step below sqrt(rtol) leaves an error of order step^2: accept it and stop
            done = ~ok | (newton & (np.abs(step) <= np.sqrt(rtol) * wr)) | (g1 == 0) | (whi - wlo <= rtol * wr)
            wr = np.where(live & ok, rn, wr)
            live &= ~done
            if not live.any():
                break
    r[idx] = wr
    return 1.0 / r


def _colsum(x: np.ndarray) -> np.ndarray:
    """Sums over the first axis of (m, ...) in a fixed order (numpy's reductions change order with the layout)."""
    acc = x[0].copy()
    for row in x[1:]:
        acc += row
    return acc


def _delta_se(cov: np.ndarray, grad: np.ndarray) -> np.ndarray:
    """sqrt(g^T C g) per voxel for gradients (n, P) and covariances (n, P, P), element-wise."""
    P = grad.shape[1]
    var = np.zeros(grad.shape[0])
    for i in range(P):
        for j in range(P):
            var += grad[:, i] * cov[:, i, j] * grad[:, j]
    return np.sqrt(np.where(var >= 0, var, np.nan))
