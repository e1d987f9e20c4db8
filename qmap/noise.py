"""Magnitude-noise statistics: the Rician / noncentral-chi expectation of a noisy magnitude.

The magnitude of a signal of true amplitude :math:`\\nu` with complex Gaussian
noise (standard deviation :math:`\\sigma` per real channel) is Rician; the
root-sum-of-squares magnitude of :math:`N` such coils is noncentral chi with
:math:`2N` degrees of freedom. Where the signal has decayed into the noise, a
fit of the plain model to the magnitude is biased upwards; fitting the
expectation of the magnitude instead (``--noise-floor rician``) removes that
bias. This module provides that expectation and its derivative (for the
solver's Jacobian). The noise level :math:`\\sigma` itself and the automatic
object mask are estimated in :mod:`qmap.noise_level`.

References
----------
Rice SO. Mathematical analysis of random noise. Bell Syst Tech J
1944;23:282. doi:10.1002/j.1538-7305.1944.tb00874.x

Gudbjartsson H, Patz S. The Rician distribution of noisy MRI data. Magn Reson
Med 1995;34:910. doi:10.1002/mrm.1910340618

Constantinides CD, Atalar E, McVeigh ER. Signal-to-noise measurements in
magnitude images from NMR phased arrays. Magn Reson Med 1997;38:852.
doi:10.1002/mrm.1910380524

(DOIs from memory.)
"""

from __future__ import annotations

import functools
import math

import numpy as np
import numpy.typing as npt

from .special import i01e

__all__ = ["rician_mean", "rician_mean_grad"]

#: Number of terms of the large-SNR asymptotic series (powers t^0 .. t^7).
_N_TERMS = 8
#: Target size of the first omitted term of the series (relative), which sets
#: the switch-over from the exact (Bessel / hypergeometric) form.
_SERIES_TOL = 1e-12
#: Elements per block: keeps the temporaries of the series in the CPU cache
#: (measured: about 2x faster than whole-array passes on 1e6 elements).
_BLOCK = 16384


# ---------------------------------------------------------------------------
# Expectation of the magnitude
# ---------------------------------------------------------------------------


@functools.lru_cache(maxsize=64)
def _series(coils: int) -> tuple[np.ndarray, np.ndarray, float]:
    """Coefficients of the large-SNR series and the switch-over point.

    With :math:`t = \\sigma^2/\\nu^2 = 1/(2x)` the large-``x`` expansion of
    Kummer's function (DLMF §13.7(i); the exponentially small part, of relative
    size :math:`e^{-x}`, is dropped),

    .. math::

        {}_1F_1(-\\tfrac12; N; -x) \\sim \\frac{\\Gamma(N)}{\\Gamma(N+\\frac12)}
        x^{1/2} \\sum_s \\frac{(-\\frac12)_s (\\frac12-N)_s}{s!} x^{-s},

    turns :math:`E = \\sigma\\sqrt2\\,\\Gamma(N+\\frac12)/\\Gamma(N)\\,{}_1F_1`
    into :math:`E = |\\nu| \\sum_s c_s t^s` with
    :math:`c_s = (-\\frac12)_s (\\frac12-N)_s 2^s / s!` (for one coil
    :math:`1 + t/2 + t^2/8 + 3t^3/16 + \\dots`). Its derivative is
    :math:`dE/d\\nu = \\operatorname{sign}(\\nu) \\sum_s (1-2s) c_s t^s`.

    Returns
    -------
    c, d : (_N_TERMS,) ndarray
        Coefficients of the value and of the derivative.
    t_switch : float
        Largest ``t`` where the series is used: the first omitted term of
        either series is below ``_SERIES_TOL`` (relative) there.
    """
    coef = [1.0]
    for s in range(1, _N_TERMS + 1):
        coef.append(coef[-1] * (s - 1.5) * (s - 0.5 - coils) * 2.0 / s)
    c = np.array(coef[:_N_TERMS])
    d = c * (1.0 - 2.0 * np.arange(_N_TERMS))
    k = _N_TERMS
    first_omitted = max(abs(coef[k]), abs(coef[k] * (1 - 2 * k)))
    t_switch = (_SERIES_TOL / first_omitted) ** (1.0 / k)
    return c, d, t_switch


def _horner(coef: np.ndarray, t: np.ndarray, out: np.ndarray) -> np.ndarray:
    """Evaluate ``sum_s coef[s] t**s`` into ``out`` in place."""
    np.multiply(t, coef[-1], out=out)
    out += coef[-2]
    for ck in coef[-3::-1]:
        out *= t
        out += ck
    return out


def _exact(nu: np.ndarray, sigma, coils: int, grad: bool) -> tuple[np.ndarray, np.ndarray | None]:
    """Closed form (Bessel functions for one coil, Kummer's function for more).

    ``nu`` may be negative (the mean is even in it); ``sigma`` a scalar or an
    array of the same shape as ``nu``.
    """
    a = np.abs(nu)
    with np.errstate(divide="ignore", invalid="ignore"):
        snr = a / sigma
        x = 0.5 * snr * snr
        if coils == 1:
            h = 0.5 * x
            i0, i1 = i01e(h)
            e = sigma * math.sqrt(math.pi / 2) * ((1.0 + x) * i0 + x * i1)
            de = math.sqrt(math.pi / 2) * 0.5 * (nu / sigma) * (i0 + i1) if grad else None
        else:
            from scipy import special  # imported on use (its import costs ~0.1 s of start-up; one coil needs none)

            k = math.sqrt(2.0) * math.exp(math.lgamma(coils + 0.5) - math.lgamma(coils))
            e = sigma * k * special.hyp1f1(-0.5, coils, -x)
            de = k * (nu / sigma) / (2.0 * coils) * special.hyp1f1(0.5, coils + 1, -x) if grad else None
    # sigma == 0 (noise-free limit): E = |nu|, dE/dnu = sign(nu).
    zero = np.asarray(sigma == 0)
    if zero.any():
        zero = np.broadcast_to(zero, a.shape)
        e = np.where(zero, a, e)
        if grad:
            de = np.where(zero, np.sign(nu), de)
    return e, de


def _block(nu: np.ndarray, sigma, coils: int, out_e: np.ndarray, out_d: np.ndarray | None,
           low_out: np.ndarray | None = None) -> None:
    """Evaluate one block: series everywhere, exact form where the SNR is low.

    ``sigma`` is a float or an array (possibly a broadcast view) of the shape
    of ``nu``; results go into ``out_e`` / ``out_d`` (same shape). With
    ``low_out`` (bool, same shape) the low-SNR elements are only marked there,
    for one exact evaluation of all of them afterwards (:func:`_evaluate`).
    """
    c, d, t_switch = _series(coils)
    a = np.abs(nu)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        t = np.divide(sigma, a)
        t *= t  # may overflow to inf for |nu| << sigma: the exact form takes those
    high = t <= t_switch  # NaN compares False: handled by the exact form
    np.minimum(t, t_switch, out=t)  # keeps the (discarded) series finite
    _horner(c, t, out_e)
    out_e *= a
    if out_d is not None:
        _horner(d, t, out_d)
        np.copysign(out_d, nu, out=out_d)
    if low_out is not None:
        np.logical_not(high, out=low_out)
    elif not high.all():
        low = ~high
        s_low = sigma if isinstance(sigma, float) else sigma[low]
        e, de = _exact(nu[low], s_low, coils, out_d is not None)
        out_e[low] = e
        if out_d is not None:
            out_d[low] = de


def _check_coils(coils: int) -> int:
    if isinstance(coils, bool) or not isinstance(coils, (int, np.integer)) or coils < 1:
        raise ValueError(f"coils must be a positive integer, got {coils!r}")
    return int(coils)


def _evaluate(nu: npt.ArrayLike, sigma: npt.ArrayLike, coils: int, grad: bool):
    coils = _check_coils(coils)
    nu = np.asarray(nu, dtype=np.float64)
    sigma = np.asarray(sigma, dtype=np.float64)
    if np.any(sigma < 0):
        raise ValueError("sigma must be >= 0 (the noise standard deviation per real channel)")
    shape = np.broadcast_shapes(nu.shape, sigma.shape)
    work = shape or (1,)
    # Broadcast views (no copies); blocks of whole rows of the first axis.
    nu_b = np.broadcast_to(nu, work)
    s_b = float(sigma) if sigma.ndim == 0 else np.broadcast_to(sigma, work)
    out_e = np.empty(work)
    out_d = np.empty(work) if grad else None
    # the series block by block (in cache); the low-SNR elements of all blocks marked, then their exact form in
    # one call: its Bessel series is many numpy steps, which on the few low elements of one block were short
    # enough to hold Python's interpreter lock throughout (two fit workers then took turns: t2 --epg, 32 echoes
    # mostly at the floor, was no faster on two threads than on one). Each element's value is the same.
    low = np.empty(work, bool)
    step = max(1, _BLOCK // max(1, math.prod(work[1:])))
    for start in range(0, work[0], step):
        sl = slice(start, start + step)
        _block(
            nu_b[sl],
            s_b if isinstance(s_b, float) else s_b[sl],
            coils,
            out_e[sl],
            None if out_d is None else out_d[sl],
            low[sl],
        )
    if low.any():
        e, de = _exact(nu_b[low], s_b if isinstance(s_b, float) else s_b[low], coils, grad)
        out_e[low] = e
        if out_d is not None:
            out_d[low] = de
    e = out_e.reshape(shape)[()]
    if out_d is None:
        return e
    return e, out_d.reshape(shape)[()]


def rician_mean(nu: npt.ArrayLike, sigma: npt.ArrayLike, *, coils: int = 1) -> np.ndarray:
    """Expectation of the magnitude of a noisy signal (Rician / noncentral chi).

    Parameters
    ----------
    nu : array_like of float
        True signal amplitude (a.u.). Negative values (intermediate solver
        steps) are treated as ``|nu|``: the expectation is even in ``nu``.
    sigma : array_like of float
        Noise standard deviation per real channel (a.u.), ``>= 0``; broadcast
        against ``nu``. ``sigma = 0`` gives ``|nu|``.
    coils : int, optional
        Number of coils combined by root sum of squares (1 = Rician).

    Returns
    -------
    ndarray of float64
        :math:`E[M]`, shape ``broadcast(nu, sigma)`` (a numpy scalar for
        scalar inputs).

    Notes
    -----
    With :math:`x = \\nu^2/(2\\sigma^2)`, for one coil (Rice 1944;
    Gudbjartsson & Patz 1995)

    .. math::

        E = \\sigma\\sqrt{\\pi/2}\\, L_{1/2}(-x)
          = \\sigma\\sqrt{\\pi/2}\\,[(1+x)\\,\\tilde I_0(x/2) + x\\,\\tilde I_1(x/2)],

    with the exponentially scaled Bessel functions :math:`\\tilde I_k(z) =
    e^{-z} I_k(z)` (:func:`qmap.special.i0e` / :func:`~qmap.special.i1e`: no overflow). For :math:`N`
    coils (Constantinides et al. 1997; the mean of the noncentral chi
    distribution with :math:`2N` degrees of freedom)

    .. math::

        E = \\sigma\\sqrt{\\pi/2}\\, L^{(N-1)}_{1/2}(-x)
          = \\sigma\\sqrt2\\,\\frac{\\Gamma(N+\\frac12)}{\\Gamma(N)}\\,
            {}_1F_1(-\\tfrac12; N; -x),

    where :math:`\\sqrt2\\,\\Gamma(N+\\frac12)/\\Gamma(N)\\,/\\sqrt{\\pi/2} =
    (2N-1)!!/(2^{N-1}(N-1)!)`. At high SNR (:math:`t = \\sigma^2/\\nu^2`
    below a switch-over: SNR :math:`\\nu/\\sigma` above about 10.6 for one
    coil, 9 to 38 for 2 to 32 coils) an 8-term asymptotic series
    :math:`E = |\\nu|\\sum_s c_s t^s` is used instead: it differs from the
    closed form by less than 1e-13 (relative; its derivative by about 1e-12)
    from the switch-over up, and costs a few ns per element instead of the
    tens to hundreds of the Bessel / hypergeometric functions.

    Examples
    --------
    >>> round(float(rician_mean(0.0, 1.0)), 6)  # Rayleigh mean, sqrt(pi/2)
    1.253314
    >>> round(float(rician_mean(3.0, 1.0)), 6)
    3.172577
    """
    return _evaluate(nu, sigma, coils, grad=False)


def rician_mean_grad(nu: npt.ArrayLike, sigma: npt.ArrayLike, *, coils: int = 1) -> tuple[np.ndarray, np.ndarray]:
    """Expectation of the magnitude and its derivative with respect to ``nu``.

    Parameters
    ----------
    nu, sigma, coils
        As for :func:`rician_mean`.

    Returns
    -------
    e : ndarray of float64
        :math:`E[M]`, as :func:`rician_mean`.
    de_dnu : ndarray of float64
        :math:`dE/d\\nu` (dimensionless), odd in ``nu`` (0 at ``nu = 0``),
        between 0 and 1 in magnitude.

    Notes
    -----
    With :math:`x = \\nu^2/(2\\sigma^2)` and
    :math:`d\\,{}_1F_1(a;b;z)/dz = (a/b)\\,{}_1F_1(a+1;b+1;z)`:

    .. math::

        \\frac{dE}{d\\nu} = \\sqrt{\\pi/2}\\,\\frac{\\nu}{2\\sigma}
            [\\tilde I_0(x/2) + \\tilde I_1(x/2)] \\quad (N = 1),\\qquad
        \\frac{dE}{d\\nu} = \\sqrt2\\,\\frac{\\Gamma(N+\\frac12)}{\\Gamma(N)}
            \\frac{\\nu}{2N\\sigma}\\,{}_1F_1(\\tfrac12; N+1; -x).

    At high SNR the derivative of the asymptotic series is used.
    """
    return _evaluate(nu, sigma, coils, grad=True)
