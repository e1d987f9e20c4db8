"""The machine-readable results: ``phantom_results.csv`` and ``phantom_results.json``."""

from __future__ import annotations

import csv
import io
import math

__all__ = ["CSV_COLUMNS", "fmt", "results_csv"]

#: Columns of phantom_results.csv, in this order (the documented file layout, README).
CSV_COLUMNS = ["label", "name", "parameter", "unit", "reference", "mean", "median", "sd", "n_voxels", "error_pct",
               "pass"]


def fmt(v, digits: int = 6) -> str:
    """A number for CSV / HTML: ``digits`` significant digits, empty for NaN / None."""
    if v is None:
        return ""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    v = float(v)
    if not math.isfinite(v):
        return ""
    return format(v, f".{digits}g")


def results_csv(rows) -> bytes:
    """One line per vial x parameter; values in the reference column's unit; ``pass`` is ``true``/``false``.

    When a map has a ``--tag``, a last column ``source`` holds it (``T1`` rows from ``ir`` and ``vfa``).
    """
    rows = list(rows)
    tagged = any(r.source for r in rows)
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS + (["source"] if tagged else []))
    for r in rows:
        w.writerow([r.label, r.name, r.parameter, r.unit, fmt(r.reference), fmt(r.mean), fmt(r.median), fmt(r.sd),
                    r.n_voxels, fmt(r.error_pct), "true" if r.pass_ else "false"] + ([r.source] if tagged else []))
    return buf.getvalue().encode()
