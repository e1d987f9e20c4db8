"""``qmap plan``: design or evaluate a protocol, write ``plan.json`` and ``plan.png``."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .. import __version__
from ..io.writer import AtomicWriter
from ..planning import PlanResult

__all__ = ["plan_figure", "write_plan"]

#: figure size in pixels and resolution
FIGURE_PX = (900, 560)
DPI = 100


def _num(v: float) -> str:
    """A number for labels without exponent notation (4000, 646, 23.6, 4.11, 0.5)."""
    return f"{v:.0f}" if abs(v) >= 100 else f"{v:.3g}"


def plan_figure(result: PlanResult, path: str | Path) -> None:
    """Predicted CV against the relaxation time, for the protocol and the evenly spread one (log axes)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(FIGURE_PX[0] / DPI, FIGURE_PX[1] / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    ax = fig.add_axes((0.1, 0.11, 0.86, 0.8))
    lo, hi = result.settings["range_s"]
    span = np.geomspace(min(lo, result.predicted[0]["value_s"]), max(hi, result.predicted[-1]["value_s"]), 120)
    from ..planning import predicted_cv

    samples = result.samples
    tr = result.settings["tr_s"]
    snr = result.settings["snr"]
    cv_d = predicted_cv(result.method, samples, span, snr=snr, tr=tr)
    cv_e = predicted_cv(result.method, result.reference["samples"], span, snr=snr, tr=tr)
    label = "evaluated protocol" if result.settings["evaluated"] else "designed protocol"
    ax.plot(span * 1e3, 100 * cv_d, color="#1b6ca8", lw=2.2, label=f"{label} (worst {100 * result.objective:.3g} %)")
    ax.plot(span * 1e3, 100 * cv_e, color="#888888", lw=1.6, ls="--",
            label=f"evenly spread, same sample count (worst {100 * result.reference['objective']:.3g} %)")
    if result.simulation:
        ax.plot([r["value_s"] * 1e3 for r in result.simulation], [100 * r["cv_simulated"] for r in result.simulation],
                "o", color="#d1495b", ms=6, label="spread of qmap's fits on simulated data")
    if hi > lo:
        ax.axvspan(lo * 1e3, hi * 1e3, color="#1b6ca8", alpha=0.08, lw=0, label="range the protocol must serve")
    else:
        ax.axvline(lo * 1e3, color="#1b6ca8", alpha=0.4, lw=1, label="value the protocol must serve")
    ax.set_xscale("log")
    from matplotlib.ticker import FuncFormatter

    plain = FuncFormatter(lambda v, _pos: _num(v))
    ax.xaxis.set_major_formatter(plain)
    ax.xaxis.set_minor_formatter(FuncFormatter(lambda v, _pos: _num(v) if str(_num(v))[0] in "235" else ""))
    finite = np.concatenate([cv_d[np.isfinite(cv_d)], cv_e[np.isfinite(cv_e)]])
    if finite.size and finite.max() / max(finite.min(), 1e-12) > 8:
        ax.set_yscale("log")
        ax.yaxis.set_major_formatter(plain)
    param = {"ir": "T1", "vfa": "T1", "t2": "T2", "t2star": "T2*"}[result.method]
    ax.set_xlabel(f"{param} [ms]")
    ax.set_ylabel(f"predicted CV of {param} [%]  (Cramer-Rao bound)")
    key = next(iter(result.protocol))
    unit = "deg" if key == "FlipAngle" else "ms"
    f = 1.0 if unit == "deg" else 1e3
    vals = ", ".join(_num(v * f) for v in samples)
    if len(vals) > 110:
        vals = vals[:107] + "..."
    ax.set_title(f"qmap plan {result.method}: {key} = {vals} {unit}   (SNR {snr:g})", fontsize=10, loc="left")
    ax.grid(alpha=0.3, which="both")
    ax.legend(fontsize=8.5, loc="upper center", frameon=False)
    fig.savefig(str(path), format="png", dpi=DPI, facecolor="white")


def write_plan(result: PlanResult, out_dir, *, overwrite: bool = False, command_line: list[str] | None = None) -> None:
    """Write a protocol design or evaluation (:func:`qmap.planning.plan`) as ``plan.json`` and ``plan.png``.

    The JSON holds ``method``, ``protocol`` (BIDS key -> values in seconds or
    degrees), ``objective`` (the worst predicted CV over the range),
    ``predicted`` (rows ``{"value_s", "cv", ...}``), the evenly spread
    comparison, the settings, the command line and qmap's version.
    """
    content = result.as_dict()
    content["qmap_version"] = __version__
    if command_line is not None:
        content["command_line"] = list(command_line)
    with AtomicWriter(out_dir, overwrite=overwrite) as w:
        w.stage_json("plan.json", content)
        w.stage_with("plan.png", lambda p: plan_figure(result, p))
        w.commit()
