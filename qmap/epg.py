"""Extended phase graphs (EPG) for CPMG multi-echo spin-echo trains.

The echo train of a multi-echo spin-echo (CPMG) sequence with imperfect
refocusing is computed with the extended-phase-graph formalism (Hennig,
J Magn Reson 1988;78:397; Weigel, J Magn Reson Imaging 2015;41:266): the
magnetisation is a sum of configuration states F (transverse) and Z
(longitudinal); a pulse mixes states of the same order, relaxation scales
them, and the crusher/readout gradient shifts the transverse orders by one
per half echo spacing.

Sequence and conventions
------------------------
* Excitation by ``excite_deg`` about x at t = 0, refocusing pulses by
  ``refocus_deg`` about y at t = (k - 1/2) esp, echoes at TE_k = k esp,
  k = 1..n_echoes (CPMG phase: refocusing axis parallel to the excited
  magnetisation).
* Amplitudes are echo magnitudes for M0 = 1. The CPMG echo is real, but
  it is not always positive: with refocusing below 180 degrees and T2 much
  shorter than T1 the late echoes are dominated by stimulated pathways whose
  sign alternates from echo to echo (T2 20 ms, T1 1 s, 150 degrees: from
  echo 11 on), so the magnitude is returned and the derivatives are
  those of the magnitude.
* ``b1`` scales **both** pulses: refocusing angle = b1 * refocus_deg and
  excitation angle = b1 * excite_deg (a transmit-field error acts on every
  pulse). The common practice of Lebel & Wilman (Magn Reson Med
  2010;64:1005) and Prasloski et al. (Magn Reson Med 2012;67:1803) is to
  scale only the refocusing angle and keep a perfect excitation. The
  excitation angle only multiplies the whole train by sin(excitation)
  (see below), so the two choices give the same T2 and refocusing scale in a
  fit with a free amplitude and differ only in that amplitude; scaling both
  makes the fitted amplitude the actual M0 when the scale is a true B1
  error. ``scale_excitation=False`` gives the other convention.
* T1 enters only through the decay of the stored (Z) states; the regrowth
  of longitudinal magnetisation never contributes at the echo times (below),
  so its influence is small and vanishes for perfect 180 degree pulses.

Reduced real-valued state
-------------------------
With the CPMG phase relation every state that reaches the receiver at an
echo time stays real: F states are real and Z states purely imaginary, so
the recursion runs in real arithmetic. Magnetisation regrowing by T1 (and
what an imperfect excitation leaves along z) lives in the quadrature
subspace, whose transverse orders are odd at every echo time, so it never
appears at the echo (it refocuses at the pulse times instead) and is dropped
exactly. At the refocusing pulses only odd orders are populated; with
``j = 0, 1, ...`` the kept rows are

    P[j] = F(+(2j+1)),   N[j] = F(-(2j+1)),   Z[j] = Im Z(2j+1)

and a pulse of angle a (c2 = cos^2(a/2), s2 = sin^2(a/2)) acts row-wise:

    P' = c2 P + s2 N + sin(a) Z
    N' = c2 N + s2 P - sin(a) Z
    Z' = sin(a)/2 (N - P) + cos(a) Z

The echo k is exp(-esp/(2 T2)) N'[0] after pulse k; between pulses F rows
decay by exp(-esp/T2), Z rows by exp(-esp/T1), and the orders move by two
(N[0] -> P[0], P[j] -> P[j+1], N[j] -> N[j-1]). At pulse m only rows
j < min(m, n_echoes - m + 1) are populated *and* still able to reach a later
echo, so at most (n_echoes + 1) // 2 + 1 rows are stored.

One kernel, in terms of c = cos(a)
----------------------------------
With the stored states carried as Y = sin(a) Z the pulse becomes
(s2 = (1 - c)/2, h = (1 - c^2)/2)

    P' = P + s2 (N - P) + Y
    N' = N - s2 (N - P) - Y
    Y' = h (N - P) + c Y

so the train depends on the refocusing angle only through c, polynomially.
:func:`cpmg_cos` runs this recursion (with derivatives with respect to T2 and
c); the T2 model fits c directly (:mod:`qmap.models.epg_t2`), and
:func:`cpmg_echoes` / :func:`cpmg_echoes_grad` call it with
c = cos(b1 * refocus) and multiply by |sin(excitation)|, applying the chain
rule for the derivative with respect to ``b1``. There is no second EPG
implementation in the package; the tests check this one against an
independent isochromat simulation.

Numerics
--------
Voxels run along the last axis of (rows, voxels) state arrays, processed in
internal blocks that fit the CPU cache, with a Python loop over echoes only.
Every voxel goes through the same element-wise operations whatever the
number or order of voxels in the call (no BLAS, no reductions across
voxels), so results are bit-identical for any chunking. Derivatives with
respect to T2 and c are propagated in forward mode alongside the states.
"""

from __future__ import annotations

import math
from typing import NamedTuple, NotRequired, TypedDict, Unpack

import numpy as np
from numpy.typing import ArrayLike, NDArray

from qmap.errors import InputError, UsageError

__all__ = ["Train", "cpmg_cos", "cpmg_echoes", "cpmg_echoes_grad", "n_state_rows"]

#: Voxels per internal block (state arrays of a block stay in the CPU cache).
_BLOCK = 2048


def n_state_rows(n_echoes: int) -> int:
    """Number of rows kept per state array for a train of ``n_echoes`` echoes.

    Parameters
    ----------
    n_echoes : int
        Echoes in the train.

    Returns
    -------
    int
        ``(n_echoes + 1) // 2 + 1`` (the largest set of states that is both
        populated and able to reach a later echo, plus one row of headroom
        for the gradient shift).
    """
    return (n_echoes + 1) // 2 + 1


def _sind(deg: NDArray[np.float64]) -> NDArray[np.float64]:
    """sin of an angle in degrees, exactly 0 at multiples of 180 and +-1 at odd multiples of 90.

    The angle is folded into [-90, 90] degrees before conversion (the folds
    are exact in floating point), so that a nominal 180 degree refocusing
    pulse leaves no rounding residue (sin(pi) = 1.2e-16 would otherwise feed
    the stored states and, over a long train with short T2, disturb the pure
    exponential at the 1e-6 relative level).
    """
    r = np.remainder(deg, 360.0)
    r = np.where(r > 270.0, r - 360.0, np.where(r > 90.0, 180.0 - r, r))
    return np.sin(np.deg2rad(r))


class Train(TypedDict):
    """Keyword parameters of a CPMG train (:func:`cpmg_echoes`, :func:`cpmg_echoes_grad`); see there."""

    esp: float
    n_echoes: int
    t1: NotRequired[ArrayLike]
    refocus_deg: NotRequired[float]
    excite_deg: NotRequired[float]
    scale_excitation: NotRequired[bool]


class _Inputs(NamedTuple):
    t2: NDArray[np.float64]
    b1: NDArray[np.float64]
    t1: NDArray[np.float64]
    esp: float
    n_echoes: int
    refocus_deg: float
    excite_deg: float
    scale_excitation: bool


def _as_vector(name: str, value: ArrayLike) -> NDArray[np.float64]:
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"EPG: {name} could not be read as numbers ({exc}); pass a float or a 1-D array") from exc
    if arr.ndim > 1:
        raise InputError(f"EPG: {name} has shape {arr.shape}, expected a scalar or a 1-D array (n,); ravel it first")
    return arr


def _prepare(
    t2: ArrayLike,
    b1: ArrayLike,
    *,
    esp: float,
    n_echoes: int,
    t1: ArrayLike = 1.0,
    refocus_deg: float = 180.0,
    excite_deg: float = 90.0,
    scale_excitation: bool = True,
) -> _Inputs:
    """Checked inputs of :func:`cpmg_echoes` / :func:`cpmg_echoes_grad` (the defaults of :class:`Train` live here)."""
    t2a = _as_vector("t2", t2)
    b1a = _as_vector("b1", b1)
    t1a = _as_vector("t1", t1)
    try:
        t2a, b1a, t1a = np.broadcast_arrays(t2a, b1a, t1a)
    except ValueError as exc:
        raise InputError(
            f"EPG: t2 {t2a.shape}, b1 {b1a.shape} and t1 {t1a.shape} do not match; give arrays of one length n"
        ) from exc
    t2a = np.ascontiguousarray(np.atleast_1d(t2a), dtype=np.float64)
    b1a = np.ascontiguousarray(np.atleast_1d(b1a), dtype=np.float64)
    t1a = np.ascontiguousarray(np.atleast_1d(t1a), dtype=np.float64)
    if np.isnan(t2a).any() or (t2a <= 0).any():
        raise InputError(
            f"EPG: t2 must be > 0 s (inf allowed), found min {np.nanmin(t2a) if t2a.size else 'n/a'} or NaN; "
            "mask such voxels before simulating"
        )
    if np.isnan(t1a).any() or (t1a <= 0).any():
        raise InputError("EPG: t1 must be > 0 s (inf allowed), found a value <= 0 or NaN; pass e.g. t1=1.0")
    if not np.isfinite(b1a).all() or (b1a < 0).any():
        raise InputError("EPG: b1 (refocusing scale) must be finite and >= 0, found a negative or non-finite value")
    if isinstance(n_echoes, bool) or int(n_echoes) != n_echoes or n_echoes < 1:
        raise UsageError(f"EPG: n_echoes must be a positive integer, got {n_echoes!r}")
    esp_f = float(esp)
    if not math.isfinite(esp_f) or esp_f <= 0:
        raise InputError(f"EPG: echo spacing esp must be a finite number of seconds > 0, got {esp!r}")
    for name, val in (("refocus_deg", refocus_deg), ("excite_deg", excite_deg)):
        if not math.isfinite(float(val)):
            raise InputError(f"EPG: {name} must be a finite angle in degrees, got {val!r}")
    return _Inputs(t2a, b1a, t1a, esp_f, int(n_echoes), float(refocus_deg), float(excite_deg), bool(scale_excitation))


def cpmg_cos(t2: ArrayLike, c: ArrayLike, *, esp: float, n_echoes: int, t1: ArrayLike = 1.0, grad: bool = False,
             signed: bool = False):
    """CPMG echo magnitudes (ideal 90 degree excitation) as a function of c = cos(refocusing angle).

    Parameters
    ----------
    t2 : (n,) ndarray
        T2 in seconds (> 0).
    c : (n,) ndarray
        Cosine of the refocusing angle; values below -1 continue the train
        analytically (see the module notes).
    esp : float
        Echo spacing, s; echo k at k * esp.
    n_echoes : int
        Echoes in the train.
    t1 : float or (n,) ndarray
        T1, s (``inf`` allowed): one value or one per voxel.
    grad : bool
        Also return the derivatives with respect to T2 (1/s) and c.
    signed : bool
        Return the real CPMG amplitudes (and their derivatives) instead of
        the magnitudes: smooth (polynomial in c) where the magnitude has a
        kink at a sign change.

    Returns
    -------
    S : (n, n_echoes) ndarray
        Echo magnitudes (amplitudes with ``signed``) for M0 = 1.
    dS_dT2, dS_dc : (n, n_echoes) ndarray
        Only with ``grad``.

    Notes
    -----
    Voxels run along the last axis of (rows, voxels) state arrays, in blocks
    of ``_BLOCK`` voxels, with a Python loop over the echoes only; every voxel
    sees the same element-wise operations whatever the call's size, so the
    results do not depend on chunking.
    """
    t2 = np.ascontiguousarray(t2, dtype=np.float64).ravel()
    c = np.ascontiguousarray(np.broadcast_to(np.asarray(c, np.float64), t2.shape))
    n, E = t2.size, int(n_echoes)
    S = np.empty((n, E))
    dT = np.empty((n, E)) if grad else None
    dC = np.empty((n, E)) if grad else None
    with np.errstate(divide="ignore"):
        e1_all = np.exp(-esp / np.asarray(t1, np.float64))
    block = _BLOCK
    work = _Work(n_state_rows(E), E, min(block, max(n, 1)), grad)
    for i0 in range(0, n, block):
        sl = slice(i0, min(i0 + block, n))
        e1 = float(e1_all) if e1_all.ndim == 0 else np.ascontiguousarray(np.broadcast_to(e1_all, (n,))[sl])
        _train_block(work, t2[sl], c[sl], 0.5 * esp, E, e1, grad, S[sl], None if dT is None else dT[sl],
                     None if dC is None else dC[sl], signed)
    return (S, dT, dC) if grad else S


class _Work:
    """State and scratch arrays of one block (allocated once per call)."""

    def __init__(self, rows: int, E: int, nb: int, grad: bool):
        self.nb = nb
        k = 3 + 3 * 2 * grad  # state sets: values (+ d/dT2, d/dc)
        self.states = np.zeros((k, rows, nb))
        self.new = np.empty((k, rows, nb))
        self.scratch = np.empty((4, rows, nb))
        self.echo = np.empty((3 if grad else 1, E, nb))

    def view(self, nb: int):
        if nb == self.nb:
            return self.states, self.new, self.scratch, self.echo
        return self.states[..., :nb], self.new[..., :nb], self.scratch[..., :nb], self.echo[..., :nb]


def _pulse(P, N, Y, a, s2, h, c, D, U, nP, nN, nY):
    """Refocusing pulse on rows [:a]: D = N - P, U = s2 D + Y; P' = P + U, N' = N - U, Y' = h D + c Y."""
    d, u = D[:a], U[:a]
    np.subtract(N[:a], P[:a], out=d)
    np.multiply(s2, d, out=u)
    u += Y[:a]
    np.add(P[:a], u, out=nP[:a])
    np.subtract(N[:a], u, out=nN[:a])
    np.multiply(h, d, out=nY[:a])
    np.multiply(c, Y[:a], out=u)
    nY[:a] += u


def _shift(P, N, Y, a, e2, e1, nP, nN, nY):
    """Relax over one echo spacing and move the transverse orders by two."""
    np.multiply(e2, nP[:a], out=P[1 : a + 1])
    np.multiply(e2, nN[0], out=P[0])
    np.multiply(e2, nN[1:a], out=N[: a - 1])
    N[a - 1].fill(0.0)
    np.multiply(e1, nY[:a], out=Y[:a])


def _train_block(work, t2, c, half_esp, E, e1, grad, S, dT, dC, signed=False):
    states, new, scratch, echoes = work.view(t2.size)
    states.fill(0.0)
    P, N, Y = states[0], states[1], states[2]
    nP, nN, nY = new[0], new[1], new[2]
    D, U, V, W = scratch
    echo = echoes[0]
    with np.errstate(over="ignore"):
        x = half_esp / t2
    e2h = np.exp(-x)
    e2 = e2h * e2h
    s2 = 0.5 * (1.0 - c)
    h = 0.5 * (1.0 - c * c)
    P[0] = e2h
    if grad:
        Pt, Nt, Yt, Pc, Nc, Yc = states[3:]
        nPt, nNt, nYt, nPc, nNc, nYc = new[3:]
        echo_t, echo_c = echoes[1], echoes[2]
        with np.errstate(over="ignore", invalid="ignore"):
            de2h = np.where(e2h > 0.0, e2h * x / t2, 0.0)
        de2 = 2.0 * e2h * de2h
        Pt[0] = de2h
    for m in range(1, E + 1):
        a = min(m, E - m + 1)
        _pulse(P, N, Y, a, s2, h, c, D, U, nP, nN, nY)
        np.multiply(e2h, nN[0], out=echo[m - 1])
        if grad:
            # the pulse is linear in the states: the same map acts on the derivative states
            _pulse(Pt, Nt, Yt, a, s2, h, c, V, W, nPt, nNt, nYt)
            _pulse(Pc, Nc, Yc, a, s2, h, c, V, W, nPc, nNc, nYc)
            # plus d(coefficients)/dc on the value states: ds2/dc = -1/2, dh/dc = -c, d(c)/dc = 1,
            # with D = N - P of the values from the pulse above
            d, w = D[:a], W[:a]
            np.multiply(0.5, d, out=w)
            nPc[:a] -= w
            nNc[:a] += w
            nYc[:a] += Y[:a]
            np.multiply(c, d, out=w)
            nYc[:a] -= w
            np.multiply(e2h, nNt[0], out=echo_t[m - 1])
            np.multiply(de2h, nN[0], out=W[0])
            echo_t[m - 1] += W[0]
            np.multiply(e2h, nNc[0], out=echo_c[m - 1])
        if m == E:
            break
        _shift(P, N, Y, a, e2, e1, nP, nN, nY)
        if grad:
            _shift(Pt, Nt, Yt, a, e2, e1, nPt, nNt, nYt)
            w = W[:a]
            np.multiply(de2, nP[:a], out=w)  # product rule on e2
            Pt[1 : a + 1] += w
            np.multiply(de2, nN[:a], out=w)
            Pt[0] += w[0]
            Nt[: a - 1] += w[1:a]
            _shift(Pc, Nc, Yc, a, e2, e1, nPc, nNc, nYc)
    # magnitudes: the real CPMG amplitude can change sign from echo to echo
    if grad:
        if not signed:
            neg = echo < 0.0
            np.negative(echo_t, out=echo_t, where=neg)
            np.negative(echo_c, out=echo_c, where=neg)
        dT[...] = echo_t.T
        dC[...] = echo_c.T
    if not signed:
        np.abs(echo, out=echo)
    S[...] = echo.T


def _by_angle(inp: _Inputs, *, grad: bool) -> tuple[NDArray[np.float64], NDArray[np.float64] | None,
                                                    NDArray[np.float64] | None]:
    """Echo magnitudes (and d/dT2, d/db1) for refocusing ``b1 * refocus_deg`` through :func:`cpmg_cos`.

    The train depends on the refocusing angle only through its cosine, and
    the excitation only multiplies it by ``|sin(excitation)|`` (module notes).
    """
    alpha = inp.refocus_deg * inp.b1  # degrees
    c = _sind(90.0 - alpha)  # cos(alpha), exactly -1 at 180 degrees
    beta = inp.excite_deg * inp.b1 if inp.scale_excitation else np.full_like(inp.b1, inp.excite_deg)
    sb = _sind(beta)
    t1 = inp.t1[0] if inp.t1.size and np.all(inp.t1 == inp.t1[0]) else inp.t1
    out = cpmg_cos(inp.t2, c, esp=inp.esp, n_echoes=inp.n_echoes, t1=t1, grad=grad)
    amp = np.abs(sb)[:, None]
    if not grad:
        return amp * out, None, None
    S, dT, dC = out
    # chain rule: dc/db1 = -sin(alpha) * refocus (rad); d|sin(beta)|/db1 = sign * cos(beta) * excite (rad)
    dB = dC * (amp * (-_sind(alpha) * math.radians(inp.refocus_deg))[:, None])
    if inp.scale_excitation:
        sign = np.where(sb < 0.0, -1.0, 1.0)
        dB += S * (sign * _sind(90.0 - beta) * math.radians(inp.excite_deg))[:, None]
    return amp * S, amp * dT, dB


def cpmg_echoes(t2: ArrayLike, b1: ArrayLike, **train: Unpack[Train]) -> NDArray[np.float64]:
    """CPMG echo amplitudes by extended phase graphs.

    Parameters
    ----------
    t2 : array_like, shape (n,) or scalar
        Transverse relaxation time, s (> 0; ``inf`` allowed).
    b1 : array_like, shape (n,) or scalar
        Transmit scale (fraction, >= 0): refocusing angle = ``b1 * refocus_deg``
        and, with ``scale_excitation`` (default), excitation angle =
        ``b1 * excite_deg``.
    esp : float
        Echo spacing, s. Echo k is at TE_k = k * esp, k = 1..n_echoes.
    n_echoes : int
        Number of echoes.
    t1 : array_like, shape (n,) or scalar, optional
        Longitudinal relaxation time, s (default 1 s). Only stored (Z)
        states feel it; with 180 degree pulses it has no effect.
    refocus_deg : float, optional
        Nominal refocusing angle, degrees (default 180).
    excite_deg : float, optional
        Nominal excitation angle, degrees (default 90).
    scale_excitation : bool, optional
        Scale the excitation by ``b1`` too (default True). With False only the
        refocusing angle is scaled (Lebel & Wilman 2010; Prasloski et al.
        2012); the trains then differ by the factor
        sin(excite) / sin(b1 * excite) only.

    Returns
    -------
    ndarray, shape (n, n_echoes)
        Echo magnitudes for M0 = 1.

    Raises
    ------
    InputError
        Non-positive or NaN T2/T1, negative or non-finite ``b1``, bad ``esp``
        or angles, or arrays of different lengths.
    UsageError
        ``n_echoes`` not a positive integer.
    """
    S, _, _ = _by_angle(_prepare(t2, b1, **train), grad=False)
    return S


def cpmg_echoes_grad(
    t2: ArrayLike, b1: ArrayLike, **train: Unpack[Train]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """CPMG echo amplitudes and their analytic derivatives.

    Same parameters and conventions as :func:`cpmg_echoes`. The derivatives
    are carried through the recursion in forward mode (derivative states
    alongside the states), so they are exact up to rounding.

    Returns
    -------
    S : ndarray, shape (n, n_echoes)
        Echo amplitudes for M0 = 1 (identical to :func:`cpmg_echoes`).
    dS_dT2 : ndarray, shape (n, n_echoes)
        Derivative of the magnitude with respect to T2, 1/s.
    dS_db1 : ndarray, shape (n, n_echoes)
        Derivative of the magnitude with respect to the scale ``b1`` (per
        unit of scale). Where the real amplitude is exactly zero the
        magnitude has a kink; the derivative of the real amplitude is
        returned there.
    """
    S, dt2, db1 = _by_angle(_prepare(t2, b1, **train), grad=True)
    assert dt2 is not None and db1 is not None
    return S, dt2, db1
