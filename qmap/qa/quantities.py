"""Parameter names and units understood by the phantom check.

Reference columns carry their unit in the name (``T1_ms``); maps carry it in
the sidecar ``Units``. Values are compared in the reference column's unit:
times convert among s / ms / us, rates among 1/s and 1/ms; dimensionless or
arbitrary-unit parameters (M0, PD, TB1) are compared only in the very same
unit (fraction and percent convert).
"""

from __future__ import annotations

from ..errors import InputError

__all__ = [
    "PARAMETERS",
    "RATE_PARAMS",
    "TIME_PARAMS",
    "UNIT_HELP",
    "canonical_param",
    "column_unit",
    "conversion",
    "default_unit",
    "example_column",
    "family",
    "sidecar_unit",
]

TIME_PARAMS = ("T1", "T2", "T2star")
RATE_PARAMS = ("R1", "R2", "R2star")
OTHER_PARAMS = ("M0", "PD", "TB1")
PARAMETERS = TIME_PARAMS + RATE_PARAMS + OTHER_PARAMS

_ALIASES = {p.lower(): p for p in PARAMETERS}
_ALIASES.update({"t2*": "T2star", "r2*": "R2star", "b1": "TB1"})

# unit -> factor to the family's base unit (seconds, 1/s, fraction, a.u.)
_FAMILY_UNITS = {
    "time": {"s": 1.0, "ms": 1e-3, "us": 1e-6},
    "rate": {"1/s": 1.0, "1/ms": 1e3},
    "fraction": {"fraction": 1.0, "percent": 1e-2},
    "au": {"a.u.": 1.0},
}
# spellings accepted in column names and sidecars -> canonical unit
_UNIT_SPELLINGS = {
    "s": "s", "sec": "s", "second": "s", "seconds": "s",
    "ms": "ms", "msec": "ms", "millisecond": "ms", "milliseconds": "ms",
    "us": "us", "µs": "us", "microseconds": "us",
    "1/s": "1/s", "per_s": "1/s", "s-1": "1/s", "s^-1": "1/s", "/s": "1/s",
    "1/ms": "1/ms", "per_ms": "1/ms", "ms-1": "1/ms", "ms^-1": "1/ms",
    "fraction": "fraction", "percent": "percent", "%": "percent",
    "au": "a.u.", "a.u.": "a.u.", "arb": "a.u.",
}

UNIT_HELP = "s, ms or us for times; 1/s (or per_s) or 1/ms for rates; au, fraction or percent otherwise"


def canonical_param(text: str) -> str | None:
    """``"t1"`` -> ``"T1"``, ``"T2*"`` -> ``"T2star"``; ``None`` when not a known parameter."""
    return _ALIASES.get(str(text).strip().lower())


def family(param: str) -> str:
    """``"time"``, ``"rate"``, ``"fraction"`` (TB1) or ``"au"`` (M0, PD)."""
    if param in TIME_PARAMS:
        return "time"
    if param in RATE_PARAMS:
        return "rate"
    return "fraction" if param == "TB1" else "au"


def _canonical_unit(text: str) -> str | None:
    return _UNIT_SPELLINGS.get(str(text).strip().lower().replace(" ", ""))


def column_unit(param: str, unit_text: str, *, where: str) -> str:
    """The canonical unit of a reference column, checked against the parameter's family."""
    unit = _canonical_unit(unit_text)
    if unit is None or unit not in _FAMILY_UNITS[family(param)]:
        allowed = ", ".join(_FAMILY_UNITS[family(param)])
        raise InputError(f"{where}: unit {unit_text!r} is not a unit of {param}; use one of {allowed} "
                         f"(e.g. {param}_{next(iter(_FAMILY_UNITS[family(param)])).replace('1/', 'per_')})")
    return unit


def example_column(param: str) -> str:
    """A reference column name with a sensible unit for ``param``: ``T1_ms``, ``R1_per_s``, ``TB1_fraction``, ``M0_au``."""
    return param + {"time": "_ms", "rate": "_per_s", "fraction": "_fraction", "au": "_au"}[family(param)]


def default_unit(param: str) -> str:
    """Unit assumed for a map without a sidecar ``Units``: seconds for times (the BIDS convention)."""
    return {"time": "s", "rate": "1/s", "fraction": "fraction", "au": "a.u."}[family(param)]


def sidecar_unit(param: str, units, *, where: str) -> str:
    """The canonical unit of a map from its sidecar ``Units`` value."""
    unit = _canonical_unit(units) if isinstance(units, str) else None
    if unit is None or unit not in _FAMILY_UNITS[family(param)]:
        allowed = ", ".join(_FAMILY_UNITS[family(param)])
        raise InputError(f"{where}: sidecar Units {units!r} is not a unit of {param} (expected one of {allowed}); "
                         f"fix the sidecar or pass the right param=NAME")
    return unit


def conversion(param: str, from_unit: str, to_unit: str) -> float:
    """Factor that converts a value of ``param`` from ``from_unit`` to ``to_unit``."""
    units = _FAMILY_UNITS[family(param)]
    return units[from_unit] / units[to_unit]
