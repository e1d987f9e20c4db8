"""The reference table: certified values per vial, possibly at several temperatures.

Format (CSV, comma, semicolon or tab separated, one header row)::

    label,name,temperature_C,T1_ms,T2_ms,T1_tolerance_pct
    1,vial A,18,1989,1426,
    1,vial A,22,2033,1458,
    2,vial B,18,1455,1101,5
    ...

- ``label`` (integer > 0, required): the value of the vial in the label image.
- ``name`` (optional): shown in the outputs.
- ``temperature_C`` (optional): temperature of that row's values in degrees
  Celsius. A label may have several rows at different temperatures; its
  values are then interpolated linearly to ``--temperature`` (never
  extrapolated).
- one column per parameter with its unit in the name: ``T1_ms``, ``T2_s``,
  ``R1_per_s`` (also written ``T1 (ms)`` or ``T1 [ms]``). An empty cell
  means "no reference for this vial". A parameter column without a unit is
  an error.
- optional tolerances in percent: ``T1_tolerance_pct`` (one parameter) and
  ``tolerance_pct`` (every parameter of that vial). They override
  ``--tolerance`` for that vial; with several temperature rows they are
  interpolated like the values.

Other columns (``lot``, ``comment``, ...) are ignored.
"""

from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError, UsageError
from .quantities import UNIT_HELP, canonical_param, column_unit, example_column

__all__ = ["ReferenceEntry", "ReferenceTable", "parse_reference", "read_reference"]

_BRACKET = re.compile(r"^\s*(.+?)\s*[\[(]\s*(.+?)\s*[\])]\s*$")


@dataclass
class ReferenceEntry:
    """The reference of one vial at the scan temperature.

    Attributes
    ----------
    label : int
    name : str
    values : dict
        parameter -> reference value in the column's unit (``units``).
    tolerance_pct : dict
        parameter -> per-vial tolerance in percent, when the table gives one.
    temperature_C : float or None
        Temperature the values refer to (the interpolation target, or the
        single row's temperature).
    interpolated : bool
        True when the values were interpolated between temperature rows.
    """

    label: int
    name: str
    values: dict
    tolerance_pct: dict
    temperature_C: float | None
    interpolated: bool = False


@dataclass
class ReferenceTable:
    """A parsed reference table (see the module docstring for the format)."""

    path: str
    units: dict  # parameter -> canonical unit of its column
    rows: list = field(default_factory=list)  # dicts: label, name, temperature, values, tol, tol_all
    ignored_columns: list = field(default_factory=list)

    @property
    def labels(self) -> list[int]:
        return sorted({r["label"] for r in self.rows})

    def temperatures(self, label: int) -> list[float]:
        return sorted(r["temperature"] for r in self.rows if r["label"] == label and r["temperature"] is not None)

    @property
    def needs_temperature(self) -> bool:
        return any(len(set(self.temperatures(lab))) > 1 for lab in self.labels)

    def at(self, temperature: float | None) -> dict[int, ReferenceEntry]:
        """Reference values of every vial at ``temperature`` (degrees C).

        Raises
        ------
        UsageError
            The table has several temperatures for a vial and ``temperature`` is None.
        InputError
            ``temperature`` lies outside a vial's tabulated range.
        """
        if temperature is None and self.needs_temperature:
            lab = next(lab for lab in self.labels if len(set(self.temperatures(lab))) > 1)
            t = self.temperatures(lab)
            raise UsageError(f"{self.path}: vial {lab} has values at {len(t)} temperatures ({_trange(t)}); give "
                             f"temperature=C (the phantom temperature during the scan) to interpolate between them")
        out = {}
        for lab in self.labels:
            rows = [r for r in self.rows if r["label"] == lab]
            name = next((r["name"] for r in rows if r["name"]), "")
            values, tols = {}, {}
            interpolated = False
            for param in self.units:
                v, used = self._interp(rows, lambda r, p=param: r["values"].get(p, math.nan), temperature, lab, param)
                if math.isfinite(v):
                    values[param] = v
                    interpolated |= used
                    tol, _ = self._interp(rows, lambda r, p=param: _tol_of(r, p), temperature, lab, f"{param} tolerance")
                    if math.isfinite(tol):
                        tols[param] = tol
            temps = [r["temperature"] for r in rows if r["temperature"] is not None]
            t_ref = temperature if interpolated else (temps[0] if len(temps) == 1 else None)
            out[lab] = ReferenceEntry(lab, name, values, tols, t_ref, interpolated)
        return out

    def _interp(self, rows, getter, temperature, lab, what) -> tuple[float, bool]:
        pts = [(r["temperature"], getter(r)) for r in rows]
        pts = [(t, v) for t, v in pts if math.isfinite(v)]
        if not pts:
            return math.nan, False
        if len(pts) == 1:
            return pts[0][1], False
        t = np.array([p[0] for p in pts], float)
        v = np.array([p[1] for p in pts], float)
        if temperature is None:  # several rows, but all agree (checked by needs_temperature otherwise)
            return float(v[0]), False
        lo, hi = float(t.min()), float(t.max())
        if not lo - 1e-9 <= temperature <= hi + 1e-9:
            raise InputError(f"{self.path}: temperature={temperature:g} C lies outside the table's range for vial "
                             f"{lab} ({what}: {_trange(t)}); values are not extrapolated -- check the temperature or "
                             f"extend the table")
        order = np.argsort(t)
        return float(np.interp(temperature, t[order], v[order])), True


def _tol_of(row, param) -> float:
    v = row["tol"].get(param, math.nan)
    return v if math.isfinite(v) else row["tol_all"]


def _trange(t) -> str:
    t = sorted(float(x) for x in t)
    return f"{t[0]:g}-{t[-1]:g} C"


def read_reference(path: str | Path) -> ReferenceTable:
    """Read and validate a reference CSV (see the module docstring)."""
    p = Path(path)
    text = read_text_table(p, what=f"reference={p}", missing_hint="check the path")
    return parse_reference(text, where=str(p))


def read_text_table(p: Path, *, what: str, missing_hint: str) -> str:
    """The text of a small CSV table (BOM tolerated), with one-line errors naming ``what``."""
    if not p.is_file():
        raise InputError(f"{what}: no such file; {missing_hint}")
    try:
        return p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{what}: cannot be read as UTF-8 text ({exc}); save it as CSV") from None


def _delimiter(header: str) -> str:
    counts = {d: header.count(d) for d in (",", ";", "\t")}
    best = max(counts, key=lambda d: counts[d])
    return best if counts[best] else ","


def _classify(
    columns: list[str], where: str
) -> tuple[dict[str, str], dict[str, tuple[str, str]], dict[str, str], list[str]]:
    """Split the header into label/name/temperature, parameter, tolerance and ignored columns."""
    special: dict[str, str] = {}
    params: dict[str, tuple[str, str]] = {}
    tols: dict[str, str] = {}
    ignored: list[str] = []
    for col in columns:
        key = col.strip()
        low = key.lower()
        if low in ("label", "name", "temperature_c"):
            special[low] = col
            continue
        if low in ("tolerance_pct", "tolerance_percent"):
            tols["*"] = col
            continue
        m = _BRACKET.match(key)
        stem, unit = (m.group(1), m.group(2)) if m else (key.split("_", 1) + [""])[:2]
        param = canonical_param(stem)
        if param is None:
            param = canonical_param(key)
            if param is None:
                ignored.append(col)
                continue
            unit = ""
        if unit.lower() in ("tolerance_pct", "tolerance_percent"):
            tols[param] = col
            continue
        if not unit:
            raise InputError(f"{where}: column {key!r} has no unit; name it like {example_column(param)} "
                             f"(units: {UNIT_HELP})")
        unit = column_unit(param, unit, where=f"{where}: column {key!r}")
        if param in params:
            raise InputError(f"{where}: parameter {param} appears in two columns ({params[param][0]!r} and {key!r}); "
                             f"keep one")
        params[param] = (col, unit)
    if "label" not in special:
        raise InputError(f"{where}: no 'label' column (found: {', '.join(c.strip() for c in columns)}); the first "
                         f"row must name the columns, including label (the vial's value in the label image)")
    if not params:
        raise InputError(f"{where}: no parameter column such as T1_ms or T2_s (found: "
                         f"{', '.join(c.strip() for c in columns)})")
    return special, params, tols, ignored


def number_cell(text: str | None, *, where: str, what: str, required: bool = False) -> float:
    """The number in a table cell (reference or layout CSV); an empty cell is NaN, or an error if ``required``."""
    s = (text or "").strip()
    if not s:
        if required:
            raise InputError(f"{where}: {what} is empty")
        return math.nan
    try:
        v = float(s)
    except ValueError:
        raise InputError(f"{where}: {what} {s!r} is not a number") from None
    if not math.isfinite(v):
        hint = "" if required else "; leave the cell empty for 'no value'"
        raise InputError(f"{where}: {what} {s!r} is not a finite number{hint}")
    return v


def parse_reference(text: str, *, where: str = "reference table") -> ReferenceTable:
    """Parse the text of a reference CSV (see the module docstring)."""
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"{where}: the file is empty; expected a header row (label, T1_ms, ...) and one row per vial")
    reader = csv.DictReader(io.StringIO("\n".join(lines)), delimiter=_delimiter(lines[0]))
    columns = list(reader.fieldnames or [])
    special, params, tols, ignored = _classify(columns, where)
    table = ReferenceTable(where, {p: u for p, (_, u) in params.items()}, [], ignored)
    for i, rec in enumerate(reader, start=2):
        at = f"{where} row {i}"
        lab_text = (rec.get(special["label"]) or "").strip()
        lab = number_cell(lab_text, where=at, what="label")
        if not math.isfinite(lab) or lab != int(lab) or lab <= 0:
            raise InputError(f"{at}: label {lab_text!r} is not a positive integer (0 is the background)")
        temp = None
        if "temperature_c" in special:
            temp = number_cell(rec.get(special["temperature_c"]), where=at, what="temperature_C")
            temp = None if math.isnan(temp) else temp
        values = {}
        for param, (col, _) in params.items():
            v = number_cell(rec.get(col), where=at, what=col.strip())
            if math.isfinite(v) and v <= 0:
                raise InputError(f"{at}: {col.strip()} = {v:g}; reference values must be positive")
            values[param] = v
        tol = {p: number_cell(rec.get(c), where=at, what=c.strip()) for p, c in tols.items() if p != "*"}
        tol_all = number_cell(rec.get(tols["*"]), where=at, what=tols["*"].strip()) if "*" in tols else math.nan
        for v in list(tol.values()) + [tol_all]:
            if math.isfinite(v) and v <= 0:
                raise InputError(f"{at}: a tolerance of {v:g}% is not positive")
        name = (rec.get(special["name"]) or "").strip() if "name" in special else ""
        table.rows.append({"label": int(lab), "name": name, "temperature": temp, "values": values, "tol": tol,
                           "tol_all": tol_all})
    if not table.rows:
        raise InputError(f"{where}: no data rows below the header")
    _check_rows(table, where)
    return table


def _check_rows(table: ReferenceTable, where: str) -> None:
    for lab in table.labels:
        rows = [r for r in table.rows if r["label"] == lab]
        if len(rows) == 1:
            continue
        temps = [r["temperature"] for r in rows]
        if any(t is None for t in temps):
            raise InputError(f"{where}: vial {lab} has {len(rows)} rows but not every one has a temperature_C; "
                             f"give each row's temperature, or keep one row per vial")
        if len(set(temps)) != len(temps):
            raise InputError(f"{where}: vial {lab} has two rows at the same temperature_C; keep one")
