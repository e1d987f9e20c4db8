"""The special functions a fitting run needs, without ``scipy.special``.

Importing ``scipy.special`` costs a run about 0.1-0.15 s of start-up (it loads large compiled
modules and scipy's array-API layer with the interpreter lock held, which stalls the reading and
imports running beside it). The noise-level estimate and the Rician expectation for one coil need
only a few functions, written here from their published series and continued fractions, to within a
few units of the last place of ``scipy.special`` (tested against it):

* :func:`i0e`, :func:`i1e` -- exponentially scaled modified Bessel functions of the first kind,
  :math:`e^{-z} I_\\nu(z)`, orders 0 and 1: the ascending series (DLMF 10.25.2) up to ``z = 30``,
  Hankel's asymptotic expansion (DLMF 10.40.1) beyond.
* :func:`chi2_cdf`, :func:`chi2_sf`, :func:`chi2_pdf`, :func:`chi2_ppf`, :func:`chi2_isf` -- the
  chi-squared distribution with any real degrees of freedom ``k > 0``, through the regularised
  incomplete gamma functions :math:`P(k/2, x/2)` and :math:`Q(k/2, x/2)`: the series DLMF 8.7.1
  for ``x/2 < k/2 + 1``, the continued fraction DLMF 8.9.2 (evaluated by the modified Lentz
  method) otherwise (Press et al., Numerical Recipes, 3rd ed. 2007, section 6.2). The quantiles
  by Newton's method on the logarithm of the nearer tail from the Wilson-Hilferty start (Wilson &
  Hilferty, PNAS 1931;17:684), kept inside a bracket by bisection.

Other orders and the noncentral chi distribution of several coils still use ``scipy.special``
(imported where used).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

__all__ = ["chi2_cdf", "chi2_isf", "chi2_pdf", "chi2_ppf", "chi2_sf", "i0e", "i01e", "i1e"]

#: largest argument of the ascending Bessel series (Hankel's expansion beyond: its terms fall below 1e-19
#: relative within 25 terms there)
BESSEL_SERIES_MAX = 30.0
_EPS = 1e-16
_TINY = 1e-300
#: iterations of the quantile search at most (Newton's method takes 3-6; bisection steps are the exception)
MAX_STEPS = 200


# ---------------------------------------------------------------------------------------------------------------
# modified Bessel functions of the first kind, exponentially scaled
# ---------------------------------------------------------------------------------------------------------------


def i0e(z: npt.ArrayLike) -> np.ndarray:
    """:math:`e^{-z} I_0(z)` for ``z >= 0`` (as ``scipy.special.i0e``).

    Examples
    --------
    >>> round(float(i0e(1.0)), 12)  # I0(1) = 1.266065877752..., e^-1 I0(1)
    0.465759607594
    """
    return i01e(z)[0]


def i1e(z: npt.ArrayLike) -> np.ndarray:
    """:math:`e^{-z} I_1(z)` for ``z >= 0`` (as ``scipy.special.i1e``).

    Examples
    --------
    >>> round(float(i1e(1.0)), 12)  # I1(1) = 0.565159103992..., e^-1 I1(1)
    0.20791041535
    """
    return i01e(z)[1]


#: (largest z, number of terms) of the ascending series: its omitted terms are below 1e-17 of the sum there
_SERIES_TERMS = ((2.0, 12), (6.0, 19), (12.0, 26), (20.0, 35), (BESSEL_SERIES_MAX, 44))
_BAND_TERMS = frozenset(t for _, t in _SERIES_TERMS)


def i01e(z: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray]:
    """:func:`i0e` and :func:`i1e` together (one pass over ``z``; NaN for ``z < 0`` or NaN)."""
    z = np.asarray(z, dtype=np.float64)
    flat = z.reshape(-1)
    out0 = np.full(flat.shape, np.nan)
    out1 = np.full(flat.shape, np.nan)
    if flat.size <= _FEW:
        series = np.flatnonzero((flat >= 0.0) & (flat <= BESSEL_SERIES_MAX))
        if series.size:
            out0[series], out1[series] = _bessel_series_banded(flat[series])
        large = np.flatnonzero(flat > BESSEL_SERIES_MAX)
        if large.size:
            out0[large], out1[large] = _bessel_asymptotic(flat[large])
        return out0.reshape(z.shape)[()], out1.reshape(z.shape)[()]
    lower = 0.0
    for upper, terms in _SERIES_TERMS:
        band = np.flatnonzero((flat >= lower) & (flat <= upper)) if lower == 0.0 else \
            np.flatnonzero((flat > lower) & (flat <= upper))
        if band.size:
            out0[band], out1[band] = _bessel_series(flat[band], terms)
        lower = upper
    large = np.flatnonzero(flat > BESSEL_SERIES_MAX)
    if large.size:
        out0[large], out1[large] = _bessel_asymptotic(flat[large])
    return out0.reshape(z.shape)[()], out1.reshape(z.shape)[()]


#: at most this many values go through one series loop for every band (:func:`_bessel_series_banded`): numpy's
#: per-call cost, not the arithmetic, decides there (a fit's refinement calls with a median of 12 values)
_FEW = 2048


def _bessel_series_banded(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_bessel_series` of values of every band in one loop, each value's own number of terms.

    The loop runs from the most terms down; a value whose band has fewer keeps its sum at exactly 1 until its
    own first term (its factor is 0 until then: ``1 * 0 * c + 1 = 1``), so each value's steps are those of
    :func:`_bessel_series` with its band's terms: the same value to the bit, whatever else is evaluated
    with it. A third of the numpy calls of one loop per band.
    """
    q = 0.25 * z * z
    terms = np.full(z.shape, _SERIES_TERMS[-1][1])
    for upper, t in reversed(_SERIES_TERMS[:-1]):
        terms[z <= upper] = t
    s = np.ones((2,) + z.shape)
    qk = np.zeros(z.shape)
    for k in range(_SERIES_TERMS[-1][1], 0, -1):
        if k in _BAND_TERMS:
            np.copyto(qk, q, where=terms >= k)  # these values start their sum here
        s *= qk
        s *= _SERIES_FACTORS[k]
        s += 1.0
    return _scaled_orders(s, z)


def _scaled_orders(s: np.ndarray, z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The two orders' Horner sums ``s`` (2, ...) made into :math:`e^{-z} I_0(z)` and :math:`e^{-z} I_1(z)`
    (the order-1 sum carries the factor :math:`z/2`), in place."""
    s *= np.exp(-z)
    s[1] *= 0.5 * z
    return s[0], s[1]


def _bessel_series(z: np.ndarray, terms: int) -> tuple[np.ndarray, np.ndarray]:
    """DLMF 10.25.2: :math:`I_\\nu(z) = (z/2)^\\nu \\sum_k (z^2/4)^k / (k! \\Gamma(k+\\nu+1))`, times :math:`e^{-z}`.

    Summed by Horner's rule from the ``terms``-th term down (all terms are positive: no cancellation;
    for ``z <= 30`` the largest is below 1e13).
    """
    q = 0.25 * z * z
    # both orders in one array (the same operations on each, half the numpy calls: a fit's worker threads
    # take Python's interpreter lock once per call)
    s = np.ones((2,) + z.shape)
    for k in range(terms, 0, -1):
        s *= q
        s *= _SERIES_FACTORS[k]
        s += 1.0
    return _scaled_orders(s, z)


#: the factors of the k-th Horner step of :func:`_bessel_series` for orders 0 and 1: 1/k^2, 1/(k(k+1)), (2, 1)
_SERIES_FACTORS = [np.array([[1.0 / max(k * k, 1)], [1.0 / max(k * (k + 1), 1)]]) for k in range(64)]  # ([0] unused)


def _bessel_asymptotic(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """DLMF 10.40.1: :math:`e^{-z} I_\\nu(z) \\sim (2\\pi z)^{-1/2} \\sum_k (-1)^k a_k(\\nu) z^{-k}`,
    :math:`a_k(\\nu) = \\prod_{j=1}^k (4\\nu^2 - (2j-1)^2) / (k!\\, 8^k)`, for ``z > 30`` (25 terms: the omitted
    ones are below 1e-19 of the sum there)."""
    out = []
    front = 1.0 / np.sqrt(2.0 * np.pi * z)
    for order in (0, 1):
        mu = 4.0 * order * order
        term = np.ones_like(z)
        total = term.copy()
        for k in range(1, 26):
            term = term * (-(mu - (2 * k - 1) ** 2) / (8.0 * k * z))
            total += term
        out.append(total * front)
    return out[0], out[1]


# ---------------------------------------------------------------------------------------------------------------
# chi-squared distribution (real degrees of freedom)
# ---------------------------------------------------------------------------------------------------------------

_lgamma = np.frompyfunc(math.lgamma, 1, 1)


def _lgam(a: np.ndarray) -> np.ndarray:
    """``log Gamma(a)`` element-wise for ``a > 0`` (NaN elsewhere)."""
    a = np.asarray(a, dtype=np.float64)
    ok = a > 0
    if ok.all():
        return np.asarray(_lgamma(a), dtype=np.float64)
    out = np.full(a.shape, np.nan)
    out[ok] = np.asarray(_lgamma(a[ok]), dtype=np.float64)
    return out


def _incomplete_gamma(a: np.ndarray, x: np.ndarray, lgam_a: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Regularised incomplete gamma functions ``P(a, x)`` and ``Q(a, x) = 1 - P`` (a > 0, x >= 0, same shape).

    Each is computed directly where it is the smaller one (no cancellation in ``1 - P``). ``lgam_a``:
    ``log Gamma(a)``, when the caller has it.
    """
    p = np.zeros(a.shape)
    q = np.ones(a.shape)
    pos = x > 0
    lg = _lgam(a) if lgam_a is None else lgam_a
    with np.errstate(divide="ignore"):
        log_front = np.where(pos, a * np.log(np.where(pos, x, 1.0)) - x - lg, -np.inf)
    ser = np.flatnonzero(pos & (x < a + 1.0))
    if ser.size:
        aa, xx = a[ser], x[ser]
        # DLMF 8.7.1 (the series of gamma*): P = x^a e^-x / Gamma(a + 1) sum_n x^n / ((a + 1)...(a + n))
        term = np.ones_like(aa)
        total = term.copy()
        for n in range(1, 10_000):
            term *= xx / (aa + n)
            total += term
            if n % 8 == 0 and not np.any(term > _EPS * total):
                break
        pv = np.exp(log_front[ser] + np.log(total / aa))  # 1/Gamma(a + 1) = 1/(a Gamma(a))
        p[ser], q[ser] = pv, 1.0 - pv
    cf = np.flatnonzero(pos & (x >= a + 1.0))
    if cf.size:
        aa, xx = a[cf], x[cf]
        # DLMF 8.9.2, Q = x^a e^-x / Gamma(a) * 1/(x + 1 - a - 1(1 - a)/(x + 3 - a - 2(2 - a)/(x + 5 - a - ...))),
        # by the modified Lentz method
        b = xx + 1.0 - aa
        c = np.full_like(aa, 1.0 / _TINY)
        d = 1.0 / b
        h = d.copy()
        for i in range(1, 10_000):
            an = -i * (i - aa)
            b = b + 2.0
            d = an * d + b
            d = np.where(np.abs(d) < _TINY, _TINY, d)
            c = b + an / c
            c = np.where(np.abs(c) < _TINY, _TINY, c)
            d = 1.0 / d
            delta = d * c
            h *= delta
            if not np.any(np.abs(delta - 1.0) > 4 * _EPS):  # (within two units of the last place of 1)
                break
        qv = np.exp(log_front[cf]) * h
        p[cf], q[cf] = 1.0 - qv, qv
    return p, q


def _chi2_args(x: npt.ArrayLike, k: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray, tuple]:
    x_, k_ = np.broadcast_arrays(np.asarray(x, np.float64), np.asarray(k, np.float64))
    return np.array(x_, dtype=np.float64).reshape(-1), np.array(k_, dtype=np.float64).reshape(-1), x_.shape


def chi2_cdf(x: npt.ArrayLike, k: npt.ArrayLike) -> np.ndarray:
    """Distribution function of chi-squared with ``k > 0`` degrees of freedom: ``P(k/2, x/2)``.

    Examples
    --------
    >>> round(float(chi2_cdf(2.0, 2.0)), 12)  # two degrees of freedom: 1 - exp(-x/2)
    0.632120558829
    """
    xf, kf, shape = _chi2_args(x, k)
    p, _ = _incomplete_gamma(0.5 * kf, 0.5 * np.maximum(xf, 0.0))
    return p.reshape(shape)[()]


def chi2_sf(x: npt.ArrayLike, k: npt.ArrayLike) -> np.ndarray:
    """Survival function ``1 - chi2_cdf`` (computed directly: accurate far into the upper tail)."""
    xf, kf, shape = _chi2_args(x, k)
    _, q = _incomplete_gamma(0.5 * kf, 0.5 * np.maximum(xf, 0.0))
    return q.reshape(shape)[()]


def chi2_pdf(x: npt.ArrayLike, k: npt.ArrayLike) -> np.ndarray:
    """Density of chi-squared with ``k`` degrees of freedom at ``x > 0``."""
    xf, kf, shape = _chi2_args(x, k)
    with np.errstate(divide="ignore"):
        out = np.exp(_log_chi2_pdf(xf, kf))
    return out.reshape(shape)[()]


def _log_chi2_pdf(x: np.ndarray, k: np.ndarray) -> np.ndarray:
    return (0.5 * k - 1.0) * np.log(x) - 0.5 * x - 0.5 * k * math.log(2.0) - _lgam(0.5 * k)


def chi2_ppf(p: npt.ArrayLike, k: npt.ArrayLike) -> np.ndarray:
    """Quantile: the ``x`` with ``chi2_cdf(x, k) = p`` (0 < p < 1).

    Examples
    --------
    >>> round(float(chi2_ppf(0.5, 2.0)), 12)  # the median for two degrees of freedom: 2 ln 2
    1.38629436112
    """
    return _quantile(p, k, upper=False)


def chi2_isf(p: npt.ArrayLike, k: npt.ArrayLike) -> np.ndarray:
    """Upper quantile: the ``x`` with ``chi2_sf(x, k) = p`` (0 < p < 1)."""
    return _quantile(p, k, upper=True)


def _normal_quantile(p: np.ndarray) -> np.ndarray:
    """Standard normal quantile to about 4.5e-4 (Abramowitz & Stegun 26.2.23; coefficients recalled from memory):
    only the start of the quantile search, which Newton's method then makes exact."""
    tail = np.minimum(p, 1.0 - p)
    t = np.sqrt(-2.0 * np.log(tail))
    z = t - (2.515517 + 0.802853 * t + 0.010328 * t * t) / (1.0 + 1.432788 * t + 0.189269 * t * t + 0.001308 * t**3)
    return np.where(p < 0.5, -z, z)


def _quantile(p: npt.ArrayLike, k: npt.ArrayLike, *, upper: bool) -> np.ndarray:
    pf, kf, shape = _chi2_args(p, k)
    lower_p = 1.0 - pf if upper else pf  # the distribution function's value at the quantile
    # the nearer tail is solved for (its logarithm: no loss of a small probability to rounding), by Newton's
    # method in log x (the tails behave as powers of x near 0 and as exp(-x/2) far out)
    use_upper = lower_p > 0.5
    with np.errstate(divide="ignore"):
        target = np.log(np.where(use_upper, (pf if upper else 1.0 - pf), lower_p))
    # Wilson-Hilferty start: (X/k)^(1/3) is nearly normal with mean 1 - 2/(9k) and variance 2/(9k)
    z = _normal_quantile(np.clip(lower_p, 1e-300, 1.0 - 1e-16))
    with np.errstate(divide="ignore", invalid="ignore"):
        v = 2.0 / (9.0 * kf)
        t = np.log(kf) + 3.0 * np.log(np.maximum(1.0 - v + z * np.sqrt(v), 1e-3))  # log x
    a = 0.5 * kf
    lg = _lgam(a)
    lo = np.full_like(t, -np.inf)
    hi = np.full_like(t, np.inf)
    out = np.full(t.shape, np.nan)
    valid = kf > 0
    out[valid & (pf == 0)] = np.inf if upper else 0.0
    out[valid & (pf == 1)] = 0.0 if upper else np.inf
    todo = np.flatnonzero(valid & (pf > 0) & (pf < 1))
    sign = np.where(use_upper, -1.0, 1.0)  # the lower tail rises with x, the upper falls
    for _ in range(MAX_STEPS):
        if todo.size == 0:
            break
        tt = t[todo]
        xt = np.exp(tt)
        pl, pu = _incomplete_gamma(a[todo], 0.5 * xt, lg[todo])
        up = use_upper[todo]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            tail = np.where(up, pu, pl)
            g = (np.log(tail) - target[todo]) * sign[todo]  # rises with log x
            # d log(tail) / d log x = x pdf(x) / tail, with log pdf = (k/2 - 1) log x - x/2 - (k/2) log 2 - lgamma(k/2)
            slope = np.exp(a[todo] * tt - 0.5 * xt - a[todo] * math.log(2.0) - lg[todo]) / tail
            hi[todo] = np.where(g > 0, np.minimum(hi[todo], tt), hi[todo])
            lo[todo] = np.where(g > 0, lo[todo], np.maximum(lo[todo], tt))
            new = tt - g / slope
        # a negligible Newton step ends the search (quadratic convergence: the point reached is closer still)
        done = np.isfinite(new) & (np.abs(new - tt) <= 1e-12 * np.maximum(1.0, np.abs(new)))
        done |= (new < -745.0) & (tt < -745.0)  # the quantile is below the smallest double: 0
        # a step that leaves the bracket of the root is replaced by bisection (a factor e outwards while one side
        # of the bracket is still open)
        bad = ~done & (~np.isfinite(new) | (new < lo[todo]) | (new > hi[todo]))
        mid = np.where(np.isfinite(lo[todo]) & np.isfinite(hi[todo]), 0.5 * (lo[todo] + hi[todo]),
                       np.where(np.isfinite(hi[todo]), tt - 1.0, tt + 1.0))
        new = np.where(bad, mid, new)
        t[todo] = new
        out[todo[done]] = np.exp(new[done])
        todo = todo[~done]
    out[todo] = np.exp(t[todo])
    return out.reshape(shape)[()]
