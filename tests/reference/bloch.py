"""Independent Bloch-equation reference simulations for qmap's signal equations.

This module shares no code with ``qmap``. It integrates the Bloch equations
numerically with :func:`scipy.integrate.solve_ivp` for one isochromat, on
resonance, in the frame rotating at the Larmor frequency::

    dM/dt = gamma M x B - (Mx / T2, My / T2, (Mz - M0) / T1)

RF pulses are short but finite rectangular blocks with B1 along x (default
duration 10 us, amplitude chosen for the requested flip angle); relaxation acts
during the pulses too. Free periods (B = 0) are integrated by the same solver.
Spoiling (gradient / RF spoiling, crusher gradients) is modelled as setting the
transverse magnetisation to zero, which is the usual idealisation (common
practice).

With B1 along +x and ``dM/dt = gamma M x B``, a pulse rotates (My, Mz) as
``My' = My cos(a) + Mz sin(a)``, ``Mz' = Mz cos(a) - My sin(a)``: a 90 deg
pulse puts the longitudinal magnetisation on +y, so the ``My`` right after a
readout pulse is the signed signal.

Times are in seconds, angles in degrees, magnetisation in units of M0.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy.integrate import solve_ivp

__all__ = [
    "ATOL",
    "GAMMA",
    "RTOL",
    "Tissue",
    "afi_signals_bloch",
    "ir_signal_bloch",
    "relax",
    "rf_pulse",
    "spgr_signal_bloch",
    "spoil",
]

#: Proton gyromagnetic ratio, rad s^-1 T^-1 (CODATA value, common practice).
GAMMA = 2.675221874e8
#: Relative / absolute tolerances for every integration.
RTOL = 1e-10
ATOL = 1e-12
#: Default RF block duration, s.
PULSE_DURATION = 10e-6


@dataclass(frozen=True)
class Tissue:
    """The isochromat every simulation here follows: relaxation times T1, T2 (s) and equilibrium M0."""

    t1: float
    t2: float
    m0: float = 1.0


def _bloch_rhs(b1: float, t1: float, t2: float, m0: float) -> Callable[[float, np.ndarray], np.ndarray]:
    """Right-hand side of the Bloch equations for a constant field B = (b1, 0, 0) (tesla)."""
    w = GAMMA * b1  # rad/s
    r1 = 1.0 / t1
    r2 = 1.0 / t2

    def rhs(_t: float, m: np.ndarray) -> np.ndarray:
        mx, my, mz = m
        # gamma M x B with B = (b1, 0, 0): (0, gamma Mz b1, -gamma My b1)
        return np.array([-mx * r2, w * mz - my * r2, -w * my - (mz - m0) * r1])

    return rhs


def _integrate(m: np.ndarray, duration: float, b1: float, tissue: Tissue) -> np.ndarray:
    """Integrate from state ``m`` (shape (3,)) for ``duration`` seconds; return the end state."""
    if duration < 0:
        raise ValueError(f"negative duration {duration!r} s")
    if duration == 0:
        return np.array(m, dtype=float)
    sol = solve_ivp(
        _bloch_rhs(b1, tissue.t1, tissue.t2, tissue.m0),
        (0.0, duration),
        np.asarray(m, dtype=float),
        method="DOP853",
        rtol=RTOL,
        atol=ATOL,
    )
    if not sol.success:  # pragma: no cover - solver failure is a bug in the setup
        raise RuntimeError(f"solve_ivp failed: {sol.message}")
    return sol.y[:, -1]


def relax(m: ArrayLike, duration: float, tissue: Tissue) -> np.ndarray:
    """Free precession on resonance (B = 0) for ``duration`` s from state ``m`` (shape (3,))."""
    return _integrate(np.asarray(m, dtype=float), duration, 0.0, tissue)


def rf_pulse(m: ArrayLike, angle_deg: float, tissue: Tissue, *, duration: float = PULSE_DURATION) -> np.ndarray:
    """Rectangular RF block along x of ``duration`` s giving ``angle_deg``, relaxation included."""
    b1 = math.radians(angle_deg) / (GAMMA * duration)  # tesla
    return _integrate(np.asarray(m, dtype=float), duration, b1, tissue)


def spoil(m: ArrayLike) -> np.ndarray:
    """Perfect spoiling: transverse magnetisation set to zero."""
    out = np.array(m, dtype=float)
    out[:2] = 0.0
    return out


def ir_signal_bloch(
    ti: ArrayLike,
    tissue: Tissue,
    *,
    efficiency: float = 1.0,
    tr: float | None = None,
    n_rep: int = 3,
    pulse_duration: float = PULSE_DURATION,
) -> np.ndarray:
    """Inversion-recovery signal by Bloch integration.

    Sequence: inversion pulse of angle ``arccos(-efficiency)`` (so that
    Mz(0+) = -efficiency M0 from equilibrium), crusher (transverse set to zero,
    common practice), free relaxation, 90 deg readout pulse. TI is measured
    between the pulse centres.

    Parameters
    ----------
    ti : array_like, shape (n,)
        Inversion times, s (each > ``pulse_duration``).
    tissue : Tissue
    efficiency : float
        Inversion efficiency k in [0, 1].
    tr : float or None
        None: a single shot from equilibrium (TR >> T1). Otherwise the time
        between inversions, s (> every TI): the readout is followed by a spoiler
        and a wait of TR - TI, and the shot is repeated ``n_rep`` times.
    n_rep : int
        Repetitions when ``tr`` is given (the last one is returned; with the
        crusher after the inversion, the 90 deg readout leaves Mz = 0, so the
        state is stationary after the first repetition).
    pulse_duration : float
        Duration of each RF block, s.

    Returns
    -------
    numpy.ndarray, shape (n,)
        Signed signal: My right after the readout (equals Mz just before it).
    """
    ti = np.atleast_1d(np.asarray(ti, dtype=float))
    if not 0.0 <= efficiency <= 1.0:
        raise ValueError(f"efficiency {efficiency!r} outside [0, 1]")
    inv_angle = math.degrees(math.acos(-efficiency))
    out = np.empty_like(ti)
    for i, t in enumerate(ti):
        if t <= pulse_duration:
            raise ValueError(f"TI {t!r} s not longer than the pulse ({pulse_duration} s)")
        m = np.array([0.0, 0.0, tissue.m0])
        reps = 1 if tr is None else n_rep
        if tr is not None and tr <= t + pulse_duration:
            raise ValueError(f"TR {tr!r} s must exceed TI {t!r} s")
        for _ in range(reps):
            m = rf_pulse(m, inv_angle, tissue, duration=pulse_duration)
            m = spoil(m)
            m = relax(m, t - pulse_duration, tissue)
            m = rf_pulse(m, 90.0, tissue, duration=pulse_duration)
            signal = m[1]
            if tr is not None:
                m = spoil(m)
                m = relax(m, tr - t - pulse_duration, tissue)
        out[i] = signal
    return out


def _steady_state(one_period: Callable[[float], tuple[float, tuple[float, ...]]], mz_start: float,
                  n_periods: int | None) -> tuple[float, ...]:
    """Run a spoiled periodic sequence to steady state.

    ``one_period(mz)`` simulates one period starting from the spoiled state
    (0, 0, mz) and returns (mz at the start of the next period, signals).

    With ``n_periods`` given, exactly that many periods are simulated from
    ``mz_start``. Otherwise periods are simulated until the start state is
    stationary; because the Bloch equations are linear and spoiling is a
    projection, one period is an affine map of the scalar mz, so Aitken's
    delta-squared extrapolation of three successive simulated states lands on
    its fixed point; the extrapolated state is then checked by simulating
    further periods (it must not move by more than 1e-11).
    """
    mz = mz_start
    if n_periods is not None:
        signals: tuple[float, ...] = ()
        for _ in range(n_periods):
            mz, signals = one_period(mz)
        return signals
    for _ in range(20):
        x1, _sig = one_period(mz)
        x2, _sig = one_period(x1)
        denom = x2 - 2 * x1 + mz
        mz_new = x2 if denom == 0 else mz - (x1 - mz) ** 2 / denom
        nxt, signals = one_period(mz_new)
        if abs(nxt - mz_new) < 1e-11:
            return signals
        mz = nxt
    raise RuntimeError("steady state not reached")  # pragma: no cover


def _spoiled_period(mz: float, fa_deg: float, period: float, tissue: Tissue, pulse_duration: float) -> tuple[float, float]:
    """One spoiled period from the state (0, 0, ``mz``): pulse (centre at its start), free relaxation.

    Returns the transverse magnitude right after the pulse and Mz at the start of the next period
    (after perfect spoiling; the pulse centres are ``period`` apart).
    """
    m = rf_pulse([0.0, 0.0, mz], fa_deg, tissue, duration=pulse_duration)
    signal = float(np.hypot(m[0], m[1]))
    m = relax(spoil(m), period - pulse_duration, tissue)
    return float(m[2]), signal


def spgr_signal_bloch(
    fa_deg: float,
    tr: float,
    tissue: Tissue,
    *,
    n_pulses: int | None = None,
    pulse_duration: float = PULSE_DURATION,
) -> float:
    """Spoiled gradient-echo steady-state signal by repeated-TR Bloch integration.

    Each period: perfect spoiling, pulse (centre at the start of the period),
    free relaxation; period length ``tr``. Starts from equilibrium.

    Parameters
    ----------
    fa_deg : float
        Flip angle, degrees.
    tr : float
        Repetition time, s.
    tissue : Tissue
        (T2 only acts during the pulse, spoiling removes the rest.)
    n_pulses : int or None
        Number of pulses to simulate (the signal after the last is returned);
        None: simulate until steady state (see ``_steady_state``).
    pulse_duration : float
        RF block duration, s.

    Returns
    -------
    float
        Transverse magnitude right after the (last) pulse.
    """
    def one_period(mz: float) -> tuple[float, tuple[float, ...]]:
        mz, signal = _spoiled_period(mz, fa_deg, tr, tissue, pulse_duration)
        return mz, (signal,)

    return _steady_state(one_period, tissue.m0, n_pulses)[0]


def afi_signals_bloch(
    fa_deg: float,
    tr1: float,
    tr2: float,
    tissue: Tissue,
    *,
    n_cycles: int | None = None,
    pulse_duration: float = PULSE_DURATION,
) -> tuple[float, float]:
    """Actual flip-angle imaging steady-state signals by Bloch integration.

    Sequence (Yarnykh, Magn Reson Med 2007;57:192): pulse, TR1, pulse, TR2,
    repeated, perfect spoiling before each pulse, from equilibrium.

    Parameters
    ----------
    fa_deg : float
        Flip angle, degrees.
    tr1, tr2 : float
        The two interleaved repetition times, s.
    tissue : Tissue
        (T2 acts only during the pulses.)
    n_cycles : int or None
        Number of (TR1, TR2) cycles; None: until steady state.
    pulse_duration : float
        RF block duration, s.

    Returns
    -------
    (float, float)
        S1, S2: transverse magnitudes right after the pulse that starts TR1 and
        the pulse that starts TR2.
    """

    def one_cycle(mz: float) -> tuple[float, tuple[float, ...]]:
        mz, s1 = _spoiled_period(mz, fa_deg, tr1, tissue, pulse_duration)
        mz, s2 = _spoiled_period(mz, fa_deg, tr2, tissue, pulse_duration)
        return mz, (s1, s2)

    s1, s2 = _steady_state(one_cycle, tissue.m0, n_cycles)
    return s1, s2
