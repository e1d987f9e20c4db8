"""Multi-component T2: a regularised non-negative T2 spectrum with an EPG basis.

The magnitude echo train of a multi-echo spin-echo (CPMG) sequence is modelled
as a non-negative sum of echo trains over a fixed, log-spaced grid of T2 values
(Whittall & MacKay, J Magn Reson 1989;84:134):

.. math:: y_k = \\sum_j s_j \\, E_k(T_{2,j}, \\alpha; \\mathrm{ESP}, T_1),
          \\qquad s_j \\ge 0,

where each basis train ``E`` is computed by extended phase graphs with one
refocusing angle ``alpha`` per voxel (Prasloski et al., Magn Reson Med
2012;67:1803) by :func:`qmap.epg.cpmg_echoes` (ideal 90 degree excitation,
T1 fixed). Per voxel:

1. **Refocusing angle.** The unregularised NNLS residual is computed for a
   coarse grid of angles (``angle_lo`` .. 180 degrees, ``n_angles`` values,
   default 6) on every other T2 of the grid (:data:`SEARCH_STRIDE`; on
   two-pool data with B1 0.55-1.0 at SNR 150 and 300 this gave the same
   median errors of the fraction, the long-pool T2 and the angle as 8 angles
   on the whole grid, at about half the cost), interpolated by a cubic spline over the angle (as Prasloski et al.;
   mirrored about 180 degrees, where the trains are symmetric) and minimised
   on a tabulated 0.5 degree grid. The second derivative of the residual
   there gives a standard error of the angle (var = 2 sigma^2 / RSS'').
   A minimum at the lower end of the searched range is flagged (status 3).
2. **Spectrum.** At that angle the unregularised NNLS gives chi^2_min; the
   regularised spectrum minimises ``||A s - y||^2 + mu ||s||^2`` (s >= 0)
   with ``mu`` chosen per voxel so that ``chi^2 = chi2_factor x chi^2_min``
   (default 1.02, within +-10 % of the allowed increase; common practice
   after Whittall & MacKay), found by a secant on log chi^2 excess against
   log mu started from ``mu ~ RSS_min / signal energy`` (2.3-2.7 NNLS solves
   per voxel at SNR 100-300). Voxels fitted exactly (chi^2_min below 1e-12 of
   the signal energy, i.e. noise-free data) keep the unregularised spectrum.
3. **Summaries.** The short fraction (``MWF``: amplitude with T2 inside the
   window ``[lo, hi]`` over the total), and the geometric-mean T2 inside and
   above the window, ``exp(sum s_j log T2_j / sum s_j)``.

The NNLS problems of many voxels are solved together by
:mod:`qmap.nnls` (Lawson-Hanson active set, each solve warm-started
from the solution at the neighbouring angle or ``mu``).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray
from scipy.interpolate import CubicSpline

from .. import status as st
from ..epg import cpmg_echoes
from ..nnls import nnls_active_set

__all__ = [
    "DEFAULT_CHI2_FACTOR", "DEFAULT_MIN_SNR", "DEFAULT_N_T2", "DEFAULT_T2_RANGE", "DEFAULT_WINDOW",
    "LOW_SNR", "SpectrumBasis", "SpectrumFit", "SpectrumModel", "calibrate_fraction_se", "fitted_trains",
    "fraction_se", "spectrum_basis", "summarise",
]

#: default T2 grid: 40 log-spaced values from 10 ms to 2 s
DEFAULT_N_T2 = 40
DEFAULT_T2_RANGE = (0.010, 2.0)
#: default short-T2 window, s (the myelin-water window of brain studies, common practice)
DEFAULT_WINDOW = (0.010, 0.040)
#: allowed chi^2 increase of the regularised spectrum (common practice)
DEFAULT_CHI2_FACTOR = 1.02
#: voxels whose first-echo SNR is below this get status LOW_SNR (values kept)
DEFAULT_MIN_SNR = 50.0
#: coarse refocusing-angle grid: this many angles from the lower bound to 180 degrees
DEFAULT_N_ANGLES = 6
#: the angle search uses every SEARCH_STRIDE-th T2 of the grid
SEARCH_STRIDE = 2
#: step of the tabulated (fine) angle grid, degrees
FINE_STEP_DEG = 0.5
LOW_SNR = st.LOW_SNR
#: relative accuracy of the chi^2 increase reached by the search for mu
_CHI2_RTOL = 0.1
#: iterations of the search for mu
_MU_ITER = 14
#: first log10(mu / mean squared column norm) tried: log10(RSS_min / signal energy) + this
_MU_OFFSET = -0.8
#: assumed slope d ln(chi^2 excess) / d ln(mu) for the steps before the target is bracketed, and the largest
#: such step (decades)
_MU_SLOPE = 0.7
_MU_MAX_STEP = 1.5


@dataclass(frozen=True)
class SpectrumBasis:
    """EPG basis trains of one protocol on the T2 and angle grids (cached per protocol).

    Attributes
    ----------
    t2 : (n,) ndarray
        T2 grid, s.
    angles, fine_angles : (a,), (f,) ndarray
        Coarse search grid and tabulated grid of refocusing angles, degrees.
    A, A_fine : (a, m, n), (f, m, n) ndarray
        Echo trains (columns) for M0 = 1 at each angle.
    G, G_fine : (a, n, n), (f, n, n) ndarray
        Their Gram matrices ``A^T A``.
    """

    esp: float
    n_echoes: int
    t1: float
    refocus_deg: float
    t2: NDArray[np.float64]
    angles: NDArray[np.float64]
    fine_angles: NDArray[np.float64]
    A: NDArray[np.float64] = field(repr=False)
    G: NDArray[np.float64] = field(repr=False)
    A_fine: NDArray[np.float64] = field(repr=False)
    G_fine: NDArray[np.float64] = field(repr=False)

    @property
    def angle_lo(self) -> float:
        return float(self.angles[0])


def _trains(t2: NDArray[np.float64], angles: NDArray[np.float64], esp: float, n_echoes: int, t1: float):
    tt, aa = np.meshgrid(t2, angles)  # (a, n)
    E = cpmg_echoes(tt.ravel(), aa.ravel() / 180.0, esp=esp, n_echoes=n_echoes, t1=t1, refocus_deg=180.0,
                    scale_excitation=False)
    A = E.reshape(angles.size, t2.size, n_echoes).transpose(0, 2, 1).copy()
    return A, np.einsum("amn,amk->ank", A, A)


@functools.lru_cache(maxsize=8)
def spectrum_basis(
    esp: float,
    n_echoes: int,
    *,
    t1: float = 1.0,
    refocus_deg: float = 180.0,
    t2_range: tuple[float, float] = DEFAULT_T2_RANGE,
    n_t2: int = DEFAULT_N_T2,
    n_angles: int = DEFAULT_N_ANGLES,
) -> SpectrumBasis:
    """The basis of a protocol (cached: one computation per protocol and process).

    Parameters
    ----------
    esp : float
        Echo spacing, s.
    n_echoes : int
        Echoes in the train.
    t1 : float
        Fixed T1, s.
    refocus_deg : float
        Nominal refocusing angle, degrees; the searched angles run from half
        of it (at least 60 degrees) to 180 degrees.
    t2_range : (float, float)
        Smallest and largest T2 of the grid, s.
    n_t2 : int
        Number of log-spaced T2 values.
    n_angles : int
        Angles of the coarse search grid (>= 3).
    """
    t2 = np.geomspace(t2_range[0], t2_range[1], int(n_t2))
    lo = max(60.0, 0.5 * float(refocus_deg))
    angles = np.linspace(lo, 180.0, int(n_angles))
    fine = np.arange(lo, 180.0 + 1e-9, FINE_STEP_DEG)
    fine[-1] = 180.0
    A, G = _trains(t2, angles, esp, n_echoes, t1)
    Af, Gf = _trains(t2, fine, esp, n_echoes, t1)
    for arr in (A, G, Af, Gf):
        arr.setflags(write=False)
    return SpectrumBasis(float(esp), int(n_echoes), float(t1), float(refocus_deg), t2, angles, fine, A, G, Af, Gf)


def summarise(s: NDArray[np.float64], t2: NDArray[np.float64], window: tuple[float, float]):
    """Short fraction and geometric-mean T2 inside and above the window.

    Parameters
    ----------
    s : (V, n) ndarray
        Spectra (amplitudes >= 0).
    t2 : (n,) ndarray
        T2 grid, s.
    window : (float, float)
        Short-T2 window ``[lo, hi]``, s (inclusive).

    Returns
    -------
    fraction, t2_short, t2_long : (V,) ndarray
        Fraction of the amplitude in the window (NaN for an empty spectrum),
        geometric-mean T2 in the window and above it, s (NaN where the part
        holds no amplitude).
    """
    inside = (t2 >= window[0]) & (t2 <= window[1])
    above = t2 > window[1]
    logt = np.log(t2)
    total = s.sum(axis=1)
    a_in = s[:, inside].sum(axis=1)
    a_up = s[:, above].sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        frac = np.where(total > 0, a_in / total, np.nan)
        t_in = np.exp(np.einsum("vn,n->v", s[:, inside], logt[inside]) / a_in)
        t_up = np.exp(np.einsum("vn,n->v", s[:, above], logt[above]) / a_up)
    return frac, np.where(a_in > 0, t_in, np.nan), np.where(a_up > 0, t_up, np.nan)


@dataclass
class SpectrumFit:
    """Per-voxel results of one chunk (all arrays (V,) unless noted)."""

    spectrum: NDArray[np.float64]  # (V, n), signal units
    angle: NDArray[np.float64]
    angle_se: NDArray[np.float64]
    fraction: NDArray[np.float64]
    t2_short: NDArray[np.float64]
    t2_long: NDArray[np.float64]
    chi2: NDArray[np.float64]  # RSS / sigma^2 of the regularised spectrum
    chi2_min: NDArray[np.float64]
    mu: NDArray[np.float64]  # regularisation weight relative to the mean squared norm of the basis columns
    rmse: NDArray[np.float64]
    rsquared: NDArray[np.float64]
    snr: NDArray[np.float64]
    sigma: NDArray[np.float64]
    status: NDArray[np.uint8]
    dof: NDArray[np.float64]  # degrees of freedom of the unregularised residual: echoes - non-zero amplitudes


def _rss(A: NDArray[np.float64], group: NDArray[np.intp], x, y) -> NDArray[np.float64]:
    """||A[group] x - y||^2 per voxel, computed directly (accurate for small residuals)."""
    out = np.empty(y.shape[0])
    for g in np.unique(group):
        sel = group == g
        r = np.einsum("vn,mn->vm", x[sel], A[g]) - y[sel]
        out[sel] = np.einsum("vm,vm->v", r, r)
    return out


def _atb(A: NDArray[np.float64], group: NDArray[np.intp], y) -> NDArray[np.float64]:
    out = np.empty((y.shape[0], A.shape[2]))
    for g in np.unique(group):
        sel = group == g
        out[sel] = np.einsum("vm,mn->vn", y[sel], A[g])
    return out


class SpectrumModel:
    """The T2-spectrum fit of a protocol, callable on chunks of voxels by the engine.

    Parameters
    ----------
    basis : SpectrumBasis
    window : (float, float)
        Short-T2 window, s.
    chi2_factor : float
        Allowed chi^2 increase of the regularised spectrum (>= 1; 1 = none).
    min_snr : float
        First-echo SNR below which a voxel gets status LOW_SNR.
    """

    name = "t2spectrum"

    def __init__(self, basis: SpectrumBasis, *, window=DEFAULT_WINDOW, chi2_factor: float = DEFAULT_CHI2_FACTOR,
                 min_snr: float = DEFAULT_MIN_SNR):
        self.basis = basis
        self.window = (float(window[0]), float(window[1]))
        self.chi2_factor = float(chi2_factor)
        self.min_snr = float(min_snr)
        self.n_samples = basis.n_echoes
        self.param_names = ("MWF", "RefocusAngle")

    # -- the steps ------------------------------------------------------------------------
    def search_angle(self, y: NDArray[np.float64]):
        """Angle per voxel (deg), the residual's second derivative there (1/deg^2), the lower-bound flag, and the
        support of the spectrum at the nearest grid angle (a warm start)."""
        b = self.basis
        V = y.shape[0]
        na = b.angles.size
        rss = np.empty((na, V))
        zero = np.zeros(V, np.intp)
        x = None
        sols = np.zeros((na, V, b.t2.size))
        S = SEARCH_STRIDE
        for a in range(na - 1, -1, -1):  # from 180 degrees down, each warm-started from its neighbour's solution
            A = b.A[a][:, ::S]
            x, _ = nnls_active_set(b.G[a][::S, ::S], np.einsum("vm,mn->vn", y, A), start=x)
            sols[a][:, ::S] = x
            rss[a] = _rss(A[None], zero, x, y)
        # cubic spline of the residual over the angle (Prasloski et al. 2012), mirrored about 180 degrees (the
        # trains are symmetric there), minimised on the tabulated 0.5-degree grid
        h = b.angles[1] - b.angles[0]
        mirror = 180.0 + h * np.arange(1, 3)
        xs = np.concatenate([b.angles, mirror])
        fs = np.concatenate([rss, rss[[-2, -3]]], axis=0)
        spline = CubicSpline(xs, fs, axis=0, bc_type="not-a-knot")
        fine = b.fine_angles
        k = np.argmin(spline(fine), axis=0)
        angle = fine[k]
        curv = spline(fine, 2)[k, np.arange(V)]  # second derivative at the minimum, per voxel
        at_lo = angle <= b.angles[0] + 0.5 * FINE_STEP_DEG
        nearest = np.argmin(np.abs(angle[:, None] - b.angles[None, :]), axis=1)
        return angle, curv, at_lo, sols[nearest, np.arange(V)] > 0

    def fit_chunk(self, y, ctx=None, sigma=None) -> SpectrumFit:
        """Fit the spectra of a chunk of voxels (V, m); ``sigma`` (V,) noise sd in signal units."""
        b = self.basis
        y = np.asarray(y, float)
        V, m = y.shape
        scale = np.max(np.abs(y), axis=1)
        scale = np.where(scale > 0, scale, 1.0)
        yn = y / scale[:, None]
        angle, curv, at_lo, support = self.search_angle(yn)
        fine = np.rint((angle - b.fine_angles[0]) / FINE_STEP_DEG).astype(np.intp)
        fine = np.clip(fine, 0, b.fine_angles.size - 1)
        angle = b.fine_angles[fine]
        d = _atb(b.A_fine, fine, yn)
        x0, ok0 = nnls_active_set(b.G_fine, d, group=fine, passive=support)
        rss0 = _rss(b.A_fine, fine, x0, yn)
        x, mu_rel, rss, ok1 = self._regularise(yn, d, fine, x0, rss0)
        # noise level: given, or from the unregularised residuals (degrees of freedom: echoes - peaks)
        dof = np.maximum(m - np.count_nonzero(x0, axis=1), 1).astype(float)
        if sigma is None:
            sig_n = np.sqrt(rss0 / dof)
        else:
            sig_n = np.asarray(sigma, float) / scale
        with np.errstate(divide="ignore", invalid="ignore"):
            fitted0 = np.einsum("vn,vn->v", x, b.A_fine[fine, 0, :])
            snr = fitted0 / sig_n
            angle_se = np.where(curv > 0, np.sqrt(2.0 * sig_n**2 / curv), np.inf)
            chi2 = rss / sig_n**2
            chi2_min = rss0 / sig_n**2
        frac, t_in, t_up = summarise(x, b.t2, self.window)
        yc = yn - yn.mean(axis=1, keepdims=True)
        sst = np.einsum("vm,vm->v", yc, yc)
        with np.errstate(divide="ignore", invalid="ignore"):
            r2 = np.where(sst > 0, 1.0 - rss / sst, np.nan)
        status = np.zeros(V, np.uint8)
        status[snr < self.min_snr] = LOW_SNR
        status[at_lo] = st.AT_BOUND
        status[~(ok0 & ok1)] = st.NOT_CONVERGED
        status[np.ptp(y, axis=1) == 0] = st.ILL_CONDITIONED  # no decay at all (e.g. zero-filled): nothing to fit
        return SpectrumFit(
            spectrum=x * scale[:, None], angle=angle, angle_se=angle_se, fraction=frac, t2_short=t_in, t2_long=t_up,
            chi2=chi2, chi2_min=chi2_min, mu=mu_rel, rmse=np.sqrt(rss / m) * scale, rsquared=r2, snr=snr,
            sigma=sig_n * scale, status=status, dof=dof,
        )

    def _regularise(self, y, d, group, x0, rss0):
        """Regularised spectra with chi^2 = chi2_factor x chi^2_min (bracketed secant on log mu)."""
        b = self.basis
        V = y.shape[0]
        energy = np.einsum("vm,vm->v", y, y)
        colscale = np.mean(np.diagonal(b.G_fine, axis1=1, axis2=2), axis=1)[group]  # mean squared column norm
        x = x0.copy()
        rss = rss0.copy()
        mu_rel = np.zeros(V)
        ok = np.ones(V, bool)
        excess = self.chi2_factor - 1.0
        todo = (rss0 > 1e-12 * energy) & (excess > 0)
        if not todo.any():
            return x, mu_rel, rss, ok
        target = np.log(excess)
        # log10(mu_rel) bracket and the log of the chi^2 excess at its ends (NaN = not evaluated)
        lo, hi = np.full(V, -8.0), np.full(V, 3.0)
        flo, fhi = np.full(V, -np.inf), np.full(V, np.nan)
        # first guess from the voxel's own misfit: mu scales with the noise variance relative to the signal
        with np.errstate(divide="ignore", invalid="ignore"):
            cur = np.clip(np.nan_to_num(np.log10(rss0 / energy), nan=-5.0) + _MU_OFFSET, -7.5, 2.5)
        best_x, best_rss, best_mu, best_err = x0.copy(), rss0.copy(), np.zeros(V), np.full(V, np.inf)
        warm = x0.copy()
        prev_c, prev_f = np.full(V, np.nan), np.full(V, np.nan)  # the previous point of the secant
        reached = np.zeros(V, bool)  # a mu with chi^2 within the tolerance of the target was found
        active = todo.copy()
        for _ in range(_MU_ITER):
            a = np.flatnonzero(active)
            if a.size == 0:
                break
            mu = 10.0 ** cur[a] * colscale[a]
            xa, conv = nnls_active_set(b.G_fine, d[a], group=group[a], mu=mu, start=warm[a])
            ra = _rss(b.A_fine, group[a], xa, y[a])
            warm[a] = xa
            with np.errstate(divide="ignore", invalid="ignore"):
                f = np.log(np.maximum(ra / rss0[a] - 1.0, 1e-300))
            err = np.abs(f - target)
            better = err < best_err[a]
            sel = a[better]
            best_x[sel], best_rss[sel], best_mu[sel], best_err[sel] = xa[better], ra[better], 10.0 ** cur[sel], err[better]
            ok[a] &= conv
            done = np.abs(np.exp(f) - excess) <= _CHI2_RTOL * excess
            reached[a] |= done
            below = f < target
            lo[a] = np.where(below, cur[a], lo[a])
            flo[a] = np.where(below, f, flo[a])
            hi[a] = np.where(below, hi[a], cur[a])
            fhi[a] = np.where(below, fhi[a], f)
            # next point: the log-log secant through the last two points (before that, a step with the assumed
            # slope), kept inside the bracket once the target is bracketed
            pc, pf = prev_c[a], prev_f[a]
            with np.errstate(divide="ignore", invalid="ignore"):
                slope = (f - pf) / (cur[a] - pc) / np.log(10.0)
            slope = np.where(np.isfinite(slope) & (slope > 0.05), slope, _MU_SLOPE)
            step = np.clip((target - f) / (slope * np.log(10.0)), -_MU_MAX_STEP, _MU_MAX_STEP)
            prev_c[a], prev_f[a] = cur[a], f
            nxt = cur[a] + step
            both = np.isfinite(flo[a]) & np.isfinite(fhi[a])
            margin = 0.05 * (hi[a] - lo[a])
            nxt = np.where(both, np.clip(nxt, lo[a] + margin, hi[a] - margin), np.clip(nxt, -8.0, 3.0))
            stuck = (hi[a] - lo[a]) < 1e-3
            cur[a] = nxt
            active[a[done | stuck]] = False
        # no mu reached the target and none above the lower end of the bracket kept chi^2 within the allowed
        # increase (data fitted nearly exactly): the unregularised spectrum is the answer (mu = 0)
        use = todo & (reached | np.isfinite(flo))
        x[use], rss[use], mu_rel[use] = best_x[use], best_rss[use], best_mu[use]
        return x, mu_rel, rss, ok


def fitted_trains(basis: SpectrumBasis, spectrum: NDArray[np.float64], angle: NDArray[np.float64]):
    """The noise-free echo trains (V, m) of spectra (V, n) at refocusing angles (V,) on the tabulated grid."""
    fine = np.clip(np.rint((np.asarray(angle, float) - basis.fine_angles[0]) / FINE_STEP_DEG).astype(np.intp),
                   0, basis.fine_angles.size - 1)
    return np.einsum("vmn,vn->vm", basis.A_fine[fine], spectrum)


def calibrate_fraction_se(
    model: SpectrumModel,
    spectrum: NDArray[np.float64],
    angle: NDArray[np.float64],
    sigma: NDArray[np.float64],
    *,
    replicates: int = 16,
    seed: int = 0,
) -> dict:
    """Parametric (residual-level) bootstrap of the short fraction on a subsample of voxels.

    Each voxel's fitted train is re-fitted ``replicates`` times with Rician
    noise of its own sigma (the magnitude of the train plus complex Gaussian
    noise). The spread of the fraction times the voxel's first-echo SNR is
    nearly constant for a given fraction, so the per-voxel formula

    .. math:: \\mathrm{SE}(f) = (k_0 + k_1 f) / \\mathrm{SNR}

    is fitted (least squares) to ``sd_i x SNR_i`` of the subsample and then
    applied to every voxel.

    Parameters
    ----------
    model : SpectrumModel
    spectrum : (N, n) ndarray
        Fitted spectra of the subsample (signal units).
    angle : (N,) ndarray
        Their refocusing angles, degrees.
    sigma : (N,) ndarray
        Their noise sd, signal units.
    replicates : int
        Noisy replicates per voxel.
    seed : int
        Seed of ``numpy.random.default_rng`` (results are reproducible).

    Returns
    -------
    dict
        ``k0``, ``k1`` and, for the record, ``n_voxels``, ``replicates``, the
        median spread ``median_sd`` and the median bootstrap bias of the
        fraction ``median_bias``.
    """
    spectrum = np.asarray(spectrum, float)
    sigma = np.asarray(sigma, float)
    N = spectrum.shape[0]
    if N == 0:
        return {"k0": float("nan"), "k1": 0.0, "n_voxels": 0, "replicates": int(replicates)}
    rng = np.random.default_rng(seed)
    clean = fitted_trains(model.basis, spectrum, angle)
    base, _, _ = summarise(spectrum, model.basis.t2, model.window)
    Y = np.repeat(clean, replicates, axis=0)
    s = np.repeat(sigma, replicates)[:, None]
    Y = np.hypot(Y + s * rng.standard_normal(Y.shape), s * rng.standard_normal(Y.shape))
    fit = model.fit_chunk(Y, sigma=s[:, 0])
    frac = np.nan_to_num(fit.fraction, nan=0.0).reshape(N, replicates)
    sd = frac.std(axis=1, ddof=1)
    snr = clean[:, 0] / sigma
    kk = sd * snr
    X = np.column_stack([np.ones(N), base])
    if N >= 4 and np.ptp(base) > 0.02:
        (k0, k1), *_ = np.linalg.lstsq(X, kk, rcond=None)
    else:
        k0, k1 = float(np.mean(kk)), 0.0
    return {"k0": float(k0), "k1": float(k1), "n_voxels": int(N), "replicates": int(replicates),
            "median_sd": float(np.median(sd)), "median_bias": float(np.median(frac.mean(axis=1) - base))}


def fraction_se(calibration: dict, fraction: NDArray[np.floating], snr: NDArray[np.floating]) -> NDArray[np.float64]:
    """Per-voxel standard error of the short fraction from a calibration (see :func:`calibrate_fraction_se`).

    The slope term is limited so that the predicted ``k`` stays at least a
    quarter of its value at the subsample's mean, and the SE is NaN where
    the SNR is not positive.
    """
    k0, k1 = calibration["k0"], calibration["k1"]
    f = np.nan_to_num(np.asarray(fraction, float), nan=0.0)
    k = k0 + k1 * f
    floor = 0.25 * max(k0 + k1 * 0.15, 1e-12)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(snr > 0, np.maximum(k, floor) / snr, np.nan)
