"""Parsing of times and angles given on the command line or in sidecars.

Internally every time is in seconds and every angle in degrees (the BIDS
convention). A time on the command line may carry a unit (``12ms``,
``0.012s``, ``12000us``); a bare number means seconds. Bare numbers that are
implausible as seconds for the quantity at hand (an echo time of ``10``) are
rejected with a message suggesting the ``ms`` suffix -- never silently
reinterpreted.
"""

from __future__ import annotations

import math
import re

import numpy as np

from .errors import InputError

__all__ = [
    "PLAUSIBLE_MAX_S",
    "check_angles",
    "check_times",
    "parse_angle_list",
    "parse_time",
    "parse_time_list",
]

#: Largest plausible value, in seconds, of each BIDS timing key. A bare number
#: above it is almost certainly milliseconds (common practice for the
#: protocols qmap fits: echo times of spin- and gradient-echo trains stay below
#: one second, inversion times below 20 s, spoiled-GRE TRs below 1 s).
PLAUSIBLE_MAX_S = {
    "EchoTime": 1.0,
    "InversionTime": 20.0,
    "RepetitionTime": 30.0,
    "RepetitionTimeSpoiled": 1.0,
}

_UNIT = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6}
_TOKEN = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*(s|ms|us|µs)?\s*$")


def parse_time(text: str, *, key: str = "EchoTime", what: str | None = None) -> float:
    """Parse one time such as ``"12ms"``, ``"0.012s"`` or ``"0.012"`` to seconds.

    Parameters
    ----------
    text : str
        The token. A bare number means seconds.
    key : str
        BIDS key the value is for (``EchoTime``, ``InversionTime``,
        ``RepetitionTime`` or ``RepetitionTimeSpoiled``); sets the plausible
        range of bare numbers.
    what : str, optional
        Name of the option, used in messages (e.g. ``--te``).

    Returns
    -------
    float
        The time in seconds.
    """
    values = parse_time_list(text, key=key, what=what)
    if values.size != 1:
        raise InputError(f"{what or key}: expected one time, got the list {text!r}")
    return float(values[0])


def parse_time_list(text: str, *, key: str = "EchoTime", what: str | None = None) -> np.ndarray:
    """Parse a comma separated list of times to a float array in seconds.

    Bare numbers are seconds; a bare number larger than the plausible maximum
    for ``key`` (see :data:`PLAUSIBLE_MAX_S`) is rejected, suggesting ``ms``.

    Examples
    --------
    >>> parse_time_list("10ms,20ms,30ms").tolist()
    [0.01, 0.02, 0.03]
    >>> parse_time_list("0.5,1,2", key="InversionTime").tolist()
    [0.5, 1.0, 2.0]
    """
    name = what or key
    tokens = [t for t in str(text).split(",")]
    if not tokens or any(not t.strip() for t in tokens):
        raise InputError(f"{name}: empty value in {text!r}; give a comma separated list such as 10ms,20ms,30ms")
    values = []
    bare_values = []
    for tok in tokens:
        m = _TOKEN.match(tok)
        if not m:
            raise InputError(
                f"{name}: cannot read {tok.strip()!r} as a time; write a number of seconds (0.012) "
                f"or add a unit (12ms, 0.012s)"
            )
        value = float(m.group(1))
        unit = m.group(2)
        if unit is None:
            bare_values.append(value)
            values.append(value)
        else:
            values.append(value * _UNIT[unit])
    arr = np.asarray(values, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name}: non-finite time in {text!r}")
    limit = PLAUSIBLE_MAX_S.get(key, math.inf)
    if bare_values and max(bare_values) > limit:
        shown = ",".join(f"{v:g}ms" for v in bare_values)
        raise InputError(
            f"{name}: {max(bare_values):g} s is implausible for {key}; bare numbers are seconds -- "
            f"if you meant milliseconds write {shown}"
        )
    check_times(arr, key=key, where=name)
    return arr


def check_times(values: np.ndarray, *, key: str, where: str) -> np.ndarray:
    """Validate times already in seconds (e.g. from a sidecar); return them as floats."""
    arr = np.atleast_1d(np.asarray(values, dtype=float))
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{where}: {key} contains a non-finite value")
    if key != "InversionTime" and np.any(arr <= 0):
        raise InputError(f"{where}: {key} must be positive seconds, got {arr.tolist()}")
    if key == "InversionTime" and np.any(arr < 0):
        raise InputError(f"{where}: InversionTime must not be negative, got {arr.tolist()}")
    limit = PLAUSIBLE_MAX_S.get(key, math.inf)
    if np.max(arr) > limit:
        raise InputError(
            f"{where}: {key} value {np.max(arr):g} s is implausible (BIDS stores seconds); "
            f"if the values are milliseconds, divide them by 1000 or give them with a unit, e.g. 12ms"
        )
    return arr


def parse_angle_list(text: str, *, what: str = "--fa") -> np.ndarray:
    """Parse a comma separated list of flip angles in degrees (``deg`` suffix optional)."""
    out = []
    for tok in str(text).split(","):
        t = tok.strip().removesuffix("deg").strip()
        try:
            out.append(float(t))
        except ValueError:
            raise InputError(f"{what}: cannot read {tok.strip()!r} as an angle in degrees (e.g. 3,8,15)") from None
    return check_angles(np.asarray(out), where=what)


def check_angles(values: np.ndarray, *, where: str) -> np.ndarray:
    """Validate flip angles in degrees."""
    arr = np.atleast_1d(np.asarray(values, dtype=float))
    if not np.all(np.isfinite(arr)) or np.any(arr <= 0) or np.any(arr > 180):
        raise InputError(f"{where}: flip angles must be degrees in (0, 180], got {arr.tolist()}")
    if np.max(arr) < 0.5:
        raise InputError(
            f"{where}: flip angles {arr.tolist()} look like radians; qmap expects degrees (BIDS FlipAngle)"
        )
    return arr
