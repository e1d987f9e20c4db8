"""The QA history: one CSV that every session appends to, and drift detection.

Each session adds one row per vial x parameter (columns ``HISTORY_COLUMNS``).
A session is identified by (date, scanner, protocol); running the same
session again replaces its rows instead of adding duplicates.

Trend rule (per scanner, protocol, vial and parameter): take the last
``WINDOW`` sessions (at least ``MIN_SESSIONS``) and fit the percent error
against the date by ordinary least squares (``scipy.stats.linregress``). The
vial is flagged as drifting when

- the slope differs from zero at the 5 % level (two-sided p < 0.05), and
- the fitted line, extended ``HORIZON`` typical session intervals (the median
  spacing of the sessions) beyond the latest one, lies outside the tolerance.

So a vial is flagged before it fails, and random scatter within the
tolerance is not flagged.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats as sps

from ..errors import InputError

__all__ = [
    "HISTORY_COLUMNS",
    "HORIZON",
    "MIN_SESSIONS",
    "WINDOW",
    "Trend",
    "find_trends",
    "history_bytes",
    "merge_session",
    "read_history",
]

HISTORY_COLUMNS = ["date", "scanner", "protocol", "label", "name", "parameter", "unit", "reference", "median",
                   "mean", "error_pct", "tolerance_pct", "pass", "temperature_C", "qmap_version"]
WINDOW = 10
MIN_SESSIONS = 4
HORIZON = 5
ALPHA = 0.05


@dataclass
class Trend:
    """Drift of one vial x parameter over the recent sessions."""

    label: int
    parameter: str
    n_sessions: int
    slope_pct_per_day: float
    p_value: float
    projected_error_pct: float
    projected_date: str
    tolerance_pct: float
    flagged: bool
    intercept: float = math.nan
    x0_date: str = ""

    def as_dict(self) -> dict:
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in self.__dict__.items()}


def parse_date(text: str, *, what: str | None = None) -> dt.date:
    """A date from ``YYYY-MM-DD`` (a time after it is ignored); ``what`` names where it came from in messages
    (default: the argument, ``date='...'``)."""
    try:
        return dt.date.fromisoformat(str(text).strip()[:10])
    except ValueError:
        where = f"date={str(text)!r}" if what is None else f"{what} {text!r}"
        raise InputError(f"{where}: expected a date as YYYY-MM-DD") from None


def read_history(path: str | Path) -> list[dict]:
    """Rows of an existing history file (``[]`` when it does not exist yet)."""
    p = Path(path)
    if not p.exists():
        return []
    try:
        text = p.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"history={p}: cannot be read ({exc}); give a qmap phantom history CSV or a new file name") from None
    if not text.strip():
        return []
    reader = csv.DictReader(io.StringIO(text))
    missing = [c for c in ("date", "scanner", "protocol", "label", "parameter", "error_pct", "tolerance_pct")
               if c not in (reader.fieldnames or [])]
    if missing:
        raise InputError(f"history={p}: not a qmap phantom history (missing column(s) {', '.join(missing)}); "
                         f"give another file name to start a new history")
    rows = []
    for i, rec in enumerate(reader, start=2):
        try:
            parse_date(rec["date"], what=f"history={p} row {i}: column date")
            int(rec["label"])
        except (ValueError, TypeError):
            raise InputError(f"history={p} row {i}: label {rec.get('label')!r} is not an integer") from None
        rows.append({c: rec.get(c, "") or "" for c in HISTORY_COLUMNS})
    return rows


def merge_session(old: list[dict], new: list[dict]) -> tuple[list[dict], bool]:
    """``old`` without the rows of ``new``'s session, plus ``new``, sorted by date; and whether rows were replaced."""
    if not new:
        return list(old), False
    key = (new[0]["date"], new[0]["scanner"], new[0]["protocol"])
    kept = [r for r in old if (r["date"], r["scanner"], r["protocol"]) != key]
    rows = kept + list(new)
    rows.sort(key=lambda r: r["date"])  # stable: sessions of one date keep their order
    return rows, len(kept) != len(old)


def history_bytes(rows: list[dict]) -> bytes:
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=HISTORY_COLUMNS, lineterminator="\n")
    w.writeheader()
    for r in rows:
        w.writerow({c: r.get(c, "") for c in HISTORY_COLUMNS})
    return buf.getvalue().encode()


def _float(text) -> float:
    try:
        return float(text)
    except (TypeError, ValueError):
        return math.nan


def session_series(rows: list[dict], scanner: str, protocol: str, label: int, parameter: str):
    """(dates, error_pct, pass) of one vial x parameter on one scanner and protocol, sorted by date."""
    sel = [r for r in rows if r["scanner"] == scanner and r["protocol"] == protocol
           and int(r["label"]) == label and r["parameter"] == parameter]
    sel.sort(key=lambda r: r["date"])
    dates = [parse_date(r["date"]) for r in sel]
    return dates, np.array([_float(r["error_pct"]) for r in sel]), [r["pass"] == "true" for r in sel]


def find_trends(rows: list[dict], scanner: str, protocol: str, keys, tolerance: dict) -> dict:
    """Trend of every (label, parameter) in ``keys`` (see the module docstring for the rule).

    Parameters
    ----------
    rows : list of dict
        The whole history, this session included.
    keys : iterable of (int, str)
    tolerance : dict
        (label, parameter) -> tolerance in percent.

    Returns
    -------
    dict
        (label, parameter) -> Trend, for series with at least MIN_SESSIONS finite sessions.
    """
    out = {}
    for lab, par in keys:
        dates, err, _ = session_series(rows, scanner, protocol, lab, par)
        ok = np.isfinite(err)
        dates = [d for d, g in zip(dates, ok) if g][-WINDOW:]
        err = err[ok][-WINDOW:]
        if len(dates) < MIN_SESSIONS:
            continue
        x = np.array([(d - dates[0]).days for d in dates], float)
        tol = float(tolerance[(lab, par)])
        if np.ptp(x) == 0:
            continue
        fit = sps.linregress(x, err)
        step = float(np.median(np.diff(x))) or 1.0
        x_proj = x[-1] + HORIZON * step
        proj = float(fit.intercept + fit.slope * x_proj)
        p = float(fit.pvalue) if np.isfinite(fit.pvalue) else (0.0 if fit.slope != 0 else 1.0)
        flagged = bool(p < ALPHA and abs(proj) > tol)
        out[(lab, par)] = Trend(lab, par, len(dates), float(fit.slope), p, proj,
                                (dates[0] + dt.timedelta(days=x_proj)).isoformat(), tol, flagged,
                                float(fit.intercept), dates[0].isoformat())
    return out
