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

Numerics
--------
Voxels run along the last axis of (rows, voxels) state arrays, processed in
internal blocks that fit the CPU cache, with a Python loop over echoes only.
Every voxel goes through the same element-wise operations whatever the
number or order of voxels in the call (no BLAS, no reductions across
voxels), so results are bit-identical for any chunking. Derivatives with
respect to T2 and the scale are propagated in forward mode alongside the
states.
"""

from __future__ import annotations

import math
from typing import NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray

from qmap.errors import InputError, UsageError

__all__ = ["cpmg_echoes", "cpmg_echoes_grad", "n_state_rows"]

#: Voxels per internal block (state arrays of a block stay in the CPU cache).
_BLOCK = 4096


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


class _Inputs(NamedTuple):
    t2: NDArray[np.float64]
    b1: NDArray[np.float64]
    t1: NDArray[np.float64]
    esp: float
    n_echoes: int
    refocus_deg: float
    excite_deg: float


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
    t1: ArrayLike,
    esp: float,
    n_echoes: int,
    refocus_deg: float,
    excite_deg: float,
) -> _Inputs:
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
    return _Inputs(t2a, b1a, t1a, esp_f, int(n_echoes), float(refocus_deg), float(excite_deg))


def _coefficients(inp: _Inputs, sl: slice, scale_excitation: bool) -> dict[str, NDArray[np.float64]]:
    """Per-voxel pulse and relaxation factors (and their derivatives) for one block."""
    t2 = inp.t2[sl]
    b1 = inp.b1[sl]
    t1 = inp.t1[sl]
    half_esp = 0.5 * inp.esp
    with np.errstate(over="ignore"):  # T2 so short that esp/T2 overflows: no signal
        x2 = half_esp / t2
    e2h = np.exp(-x2)
    e2 = e2h * e2h
    e1 = np.exp(-inp.esp / t1)
    alpha = inp.refocus_deg * b1  # degrees
    s2 = _sind(0.5 * alpha)
    s2 *= s2
    sa = _sind(alpha)
    ca = _sind(90.0 - alpha)
    hs = 0.5 * sa
    beta = inp.excite_deg * b1 if scale_excitation else np.full_like(b1, inp.excite_deg)
    sb = _sind(beta)
    # d/dT2 of the relaxation factors (0 for T2 = inf and where e2h underflows)
    with np.errstate(over="ignore", invalid="ignore"):
        de2h = np.where(e2h > 0.0, e2h * x2 / t2, 0.0)
    de2 = 2.0 * e2h * de2h
    # d/db1 of the pulse factors (chain rule through alpha = b1 * refocus)
    ar = math.radians(inp.refocus_deg)
    ds2 = hs * ar
    dsa = ca * ar
    dhs = 0.5 * dsa
    dca = -sa * ar
    dsb = _sind(90.0 - beta) * math.radians(inp.excite_deg) if scale_excitation else np.zeros_like(b1)
    return {
        "e2h": e2h, "e2": e2, "e1": e1, "s2": s2, "sa": sa, "ca": ca, "hs": hs, "sb": sb,
        "de2h": de2h, "de2": de2, "ds2": ds2, "dsa": dsa, "dhs": dhs, "dca": dca, "dsb": dsb,
    }  # fmt: skip


class _States:
    """One set of (P, N, Z) state rows plus scratch rows for a block of voxels."""

    def __init__(self, rows: int, nb: int) -> None:
        self.P = np.zeros((rows, nb))
        self.N = np.zeros((rows, nb))
        self.Z = np.zeros((rows, nb))
        self.newP = np.empty((rows, nb))
        self.newN = np.empty((rows, nb))
        self.newZ = np.empty((rows, nb))

    def reset(self) -> None:
        self.P.fill(0.0)
        self.N.fill(0.0)
        self.Z.fill(0.0)


def _pulse(
    st: _States,
    a: int,
    s2: NDArray[np.float64],
    sa: NDArray[np.float64],
    hs: NDArray[np.float64],
    ca: NDArray[np.float64],
    D: NDArray[np.float64],
    U: NDArray[np.float64],
    T: NDArray[np.float64],
) -> None:
    """Refocusing pulse on rows ``[:a]`` of ``st`` (uses c2 = 1 - s2).

    Leaves ``D = N - P`` in the scratch row block ``D[:a]`` for the
    derivative pass. Results go to ``st.newP/newN/newZ``.
    """
    p, q, z = st.P[:a], st.N[:a], st.Z[:a]
    d, u, t = D[:a], U[:a], T[:a]
    np.subtract(q, p, out=d)
    np.multiply(s2, d, out=u)
    np.multiply(sa, z, out=t)
    u += t  # u = s2 (N - P) + sin(a) Z
    np.add(p, u, out=st.newP[:a])
    np.subtract(q, u, out=st.newN[:a])
    nz = st.newZ[:a]
    np.multiply(hs, d, out=nz)
    np.multiply(ca, z, out=t)
    nz += t


def _pulse_b1_extra(
    st: _States,
    dst: _States,
    a: int,
    ds2: NDArray[np.float64],
    dsa: NDArray[np.float64],
    dhs: NDArray[np.float64],
    dca: NDArray[np.float64],
    D: NDArray[np.float64],
    T: NDArray[np.float64],
    U: NDArray[np.float64],
) -> None:
    """Add the terms from d(pulse coefficients)/db1 acting on the value states."""
    d, t, u = D[:a], T[:a], U[:a]
    z = st.Z[:a]
    np.multiply(ds2, d, out=u)
    np.multiply(dsa, z, out=t)
    u += t
    dst.newP[:a] += u
    dst.newN[:a] -= u
    np.multiply(dhs, d, out=u)
    np.multiply(dca, z, out=t)
    u += t
    dst.newZ[:a] += u


def _relax_shift(st: _States, a: int, e2: NDArray[np.float64], e1: NDArray[np.float64]) -> None:
    """Relax over one echo spacing and move the orders by two (new -> current rows)."""
    np.multiply(e2, st.newP[:a], out=st.P[1 : a + 1])
    np.multiply(e2, st.newN[0], out=st.P[0])
    np.multiply(e2, st.newN[1:a], out=st.N[: a - 1])
    st.N[a - 1].fill(0.0)
    np.multiply(e1, st.newZ[:a], out=st.Z[:a])


def _relax_shift_dt2(
    st: _States, dst: _States, a: int, e2: NDArray[np.float64], de2: NDArray[np.float64],
    e1: NDArray[np.float64], T: NDArray[np.float64],
) -> None:  # fmt: skip
    """Derivative of :func:`_relax_shift` with respect to T2 (product rule on e2)."""
    _relax_shift(dst, a, e2, e1)
    t = T[:a]
    np.multiply(de2, st.newP[:a], out=t)
    dst.P[1 : a + 1] += t
    dst.P[0] += de2 * st.newN[0]
    if a > 1:
        np.multiply(de2, st.newN[1:a], out=t[: a - 1])
        dst.N[: a - 1] += t[: a - 1]


def _run(
    inp: _Inputs, *, grad: bool, scale_excitation: bool
) -> tuple[NDArray[np.float64], NDArray[np.float64] | None, NDArray[np.float64] | None]:
    n = inp.t2.size
    E = inp.n_echoes
    rows = n_state_rows(E)
    S = np.empty((n, E))
    dS_t2 = np.empty((n, E)) if grad else None
    dS_b1 = np.empty((n, E)) if grad else None
    nbmax = min(_BLOCK, max(n, 1))
    st = _States(rows, nbmax)
    dt = _States(rows, nbmax) if grad else None
    db = _States(rows, nbmax) if grad else None
    D, V, U, T = (np.empty((rows, nbmax)) for _ in range(4))
    echo = np.empty((E, nbmax))
    echo_t = np.empty((E, nbmax)) if grad else None
    echo_b = np.empty((E, nbmax)) if grad else None

    for i0 in range(0, n, _BLOCK):
        i1 = min(i0 + _BLOCK, n)
        nb = i1 - i0
        if nb != nbmax:  # last, shorter block: fresh contiguous buffers
            nbmax = nb
            st = _States(rows, nb)
            dt = _States(rows, nb) if grad else None
            db = _States(rows, nb) if grad else None
            D, V, U, T = (np.empty((rows, nb)) for _ in range(4))
            echo = np.empty((E, nb))
            echo_t = np.empty((E, nb)) if grad else None
            echo_b = np.empty((E, nb)) if grad else None
        c = _coefficients(inp, slice(i0, i1), scale_excitation)
        e2h, e2, e1 = c["e2h"], c["e2"], c["e1"]
        st.reset()
        # excitation, then half an echo spacing of T2 decay, then a shift by +1
        np.multiply(c["sb"], e2h, out=st.P[0])
        if grad:
            assert dt is not None and db is not None
            dt.reset()
            db.reset()
            np.multiply(c["sb"], c["de2h"], out=dt.P[0])
            np.multiply(c["dsb"], e2h, out=db.P[0])
        for m in range(1, E + 1):
            a = min(m, E - m + 1)
            _pulse(st, a, c["s2"], c["sa"], c["hs"], c["ca"], D, U, T)
            np.multiply(e2h, st.newN[0], out=echo[m - 1])
            if grad:
                assert dt is not None and db is not None and echo_t is not None and echo_b is not None
                # the pulse is linear in the states: the same map acts on the
                # derivative states; D (= N - P of the values) is kept for b1 terms
                _pulse(dt, a, c["s2"], c["sa"], c["hs"], c["ca"], V, U, T)
                _pulse(db, a, c["s2"], c["sa"], c["hs"], c["ca"], V, U, T)
                _pulse_b1_extra(st, db, a, c["ds2"], c["dsa"], c["dhs"], c["dca"], D, T, U)
                np.multiply(e2h, dt.newN[0], out=echo_t[m - 1])
                echo_t[m - 1] += c["de2h"] * st.newN[0]
                np.multiply(e2h, db.newN[0], out=echo_b[m - 1])
            if m == E:
                break
            _relax_shift(st, a, e2, e1)
            if grad:
                assert dt is not None and db is not None
                _relax_shift_dt2(st, dt, a, e2, c["de2"], e1, T)
                _relax_shift(db, a, e2, e1)
        # magnitudes: the real CPMG amplitude can change sign (see module notes)
        if grad:
            assert dS_t2 is not None and dS_b1 is not None and echo_t is not None and echo_b is not None
            neg = echo < 0.0
            np.negative(echo_t, out=echo_t, where=neg)
            np.negative(echo_b, out=echo_b, where=neg)
            dS_t2[i0:i1] = echo_t.T
            dS_b1[i0:i1] = echo_b.T
        np.abs(echo, out=echo)
        S[i0:i1] = echo.T
    return S, dS_t2, dS_b1


def cpmg_echoes(
    t2: ArrayLike,
    b1: ArrayLike,
    *,
    esp: float,
    n_echoes: int,
    t1: ArrayLike = 1.0,
    refocus_deg: float = 180.0,
    excite_deg: float = 90.0,
    scale_excitation: bool = True,
) -> NDArray[np.float64]:
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
    inp = _prepare(t2, b1, t1, esp, n_echoes, refocus_deg, excite_deg)
    S, _, _ = _run(inp, grad=False, scale_excitation=scale_excitation)
    return S


def cpmg_echoes_grad(
    t2: ArrayLike,
    b1: ArrayLike,
    *,
    esp: float,
    n_echoes: int,
    t1: ArrayLike = 1.0,
    refocus_deg: float = 180.0,
    excite_deg: float = 90.0,
    scale_excitation: bool = True,
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
    inp = _prepare(t2, b1, t1, esp, n_echoes, refocus_deg, excite_deg)
    S, dt2, db1 = _run(inp, grad=True, scale_excitation=scale_excitation)
    assert dt2 is not None and db1 is not None
    return S, dt2, db1
