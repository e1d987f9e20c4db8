"""Figures of the phantom report (matplotlib, Agg canvas, no pyplot state).

Colours: within tolerance = teal, out of tolerance = rust, drift = amber,
the tolerance band a pale slate; markers differ too (circle / diamond), so
the figures also read in grey scale. Maps use matplotlib's perceptually
uniform colour maps (viridis for times, plasma for rates).
"""

from __future__ import annotations

import datetime as dt
import io

import matplotlib
import numpy as np
from matplotlib import dates as mdates
from matplotlib import patheffects, ticker
from matplotlib.collections import LineCollection
from matplotlib.colors import LogNorm, Normalize
from matplotlib.figure import Figure

from ..plots import DPI, INK, canvas, save_png, style_axes
from .history import ALPHA
from .quantities import RATE_PARAMS

__all__ = [
    "BAND",
    "DRIFT",
    "FAIL",
    "PASS",
    "error_per_vial",
    "history_panels",
    "measured_vs_reference",
    "png_bytes",
    "roi_overlay",
]

PASS = "#1d7a6a"
FAIL = "#b4462b"
DRIFT = "#c98a0b"
BAND = "#dfe5ee"


def _margins(fig: Figure, *, left, right, bottom, top, nrows=1, ncols=1, hgap=0, wgap=0) -> None:
    """Fixed margins and gaps in pixels (a layout engine costs a second draw per figure)."""
    w, h = fig.get_size_inches() * DPI
    aw = (w - left - right - wgap * (ncols - 1)) / ncols
    ah = (h - top - bottom - hgap * (nrows - 1)) / nrows
    fig.subplots_adjust(left=left / w, right=1 - right / w, bottom=bottom / h, top=1 - top / h,
                        wspace=wgap / aw if ncols > 1 else 0.2, hspace=hgap / ah if nrows > 1 else 0.2)


def png_bytes(fig: Figure) -> bytes:
    """The figure as PNG bytes."""
    buf = io.BytesIO()
    save_png(fig, buf)
    return buf.getvalue()




def _plain_log_ticks(ax):
    """Label log axes with plain numbers (200, 500, 1000) rather than powers of ten."""
    plain = ticker.FuncFormatter(lambda v, _: f"{v:g}")
    for axis in (ax.xaxis, ax.yaxis):
        axis.set_major_locator(ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
        axis.set_major_formatter(plain)
        axis.set_minor_locator(ticker.LogLocator(subs=(3.0, 4.0, 6.0, 7.0, 8.0, 9.0)))
        axis.set_minor_formatter(ticker.NullFormatter())


def _log_minor_label(v, _pos=None) -> str:
    """Label the 2x and 5x minor ticks of a log colour bar."""
    mant = round(v / 10 ** np.floor(np.log10(v)), 3) if v > 0 else 0
    return f"{v:g}" if mant in (2.0, 5.0) else ""


def voxel_outline(mask2d: np.ndarray) -> list:
    """Segments along the voxel edges between ``mask2d`` and its outside, for ``imshow(mask.T, origin="lower")``.

    Returns a list of ((x0, y0), (x1, y1)) in image coordinates (voxel centres at integers), so the outline
    shows exactly which voxels belong to the ROI.
    """
    m = np.pad(np.asarray(mask2d, bool), 1)
    segs = []
    # edges between columns i-1 and i (vertical lines at x = i - 0.5 in unpadded coordinates)
    di = np.argwhere(m[1:, :] != m[:-1, :])
    segs += [((i - 0.5, j - 1.5), (i - 0.5, j - 0.5)) for i, j in di]
    dj = np.argwhere(m[:, 1:] != m[:, :-1])
    segs += [((i - 1.5, j - 0.5), (i - 0.5, j - 0.5)) for i, j in dj]
    return segs


def _by_param(rows) -> dict[str, list]:
    """The ROI results (:class:`qmap.qa.stats.RoiResult`) grouped by ``key``, in first-seen order."""
    out: dict[str, list] = {}
    for r in rows:
        out.setdefault(r.key, []).append(r)
    return out


def _pct(x: float) -> str:
    """Signed percentage with one decimal, without a negative zero."""
    return "0.0%" if abs(x) < 0.05 else f"{x:+.1f}%"


def _vial_text(r) -> str:
    return f"{r.label}" + (f" {r.name}" if r.name else "")


def measured_vs_reference(rows, tolerance_pct: float) -> Figure:
    """Median ROI value vs reference on log-log axes, one panel per parameter."""
    groups = _by_param(rows)
    n = len(groups)
    fig = canvas(450 * n + 30, 460)
    _margins(fig, left=80, right=20, bottom=55, top=35, ncols=n, wgap=95)
    axes = fig.subplots(1, n, squeeze=False)[0]
    for ax, (par, rs) in zip(axes, groups.items()):
        style_axes(ax)
        ref = np.array([r.reference for r in rs])
        med = np.array([r.median for r in rs])
        err = np.array([r.robust_sd for r in rs])
        vals = np.concatenate([ref, med[np.isfinite(med) & (med > 0)]])
        lo, hi = vals.min() / 1.6, vals.max() * 1.6
        xx = np.geomspace(lo, hi, 50)
        f = tolerance_pct / 100
        ax.fill_between(xx, xx * (1 - f), xx * (1 + f), color=BAND, zorder=1, label=f"\u00b1{tolerance_pct:g}% band")
        ax.plot(xx, xx, color=INK, lw=1, zorder=2, label="identity (measured = reference)")
        for r, x, y, e in zip(rs, ref, med, err):
            if not np.isfinite(y) or y <= 0:
                continue
            c, m = (PASS, "o") if r.pass_ else (FAIL, "D")
            ax.errorbar(x, y, yerr=e if np.isfinite(e) else None, fmt=m, ms=6, color=c, mec="white", mew=0.6,
                        ecolor=c, elinewidth=1, capsize=2, zorder=3)
            ax.annotate(str(r.label), (x, y), xytext=(5, -11), textcoords="offset points", fontsize=8, color=INK)
        ax.plot([], [], "o", color=PASS, label="within tolerance")
        ax.plot([], [], "D", color=FAIL, label="out of tolerance")
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        _plain_log_ticks(ax)
        ax.set_aspect("equal")
        unit = rs[0].unit
        ax.set_xlabel(f"reference {par} ({unit})", color=INK)
        ax.set_ylabel(f"measured {par}, ROI median \u00b1 robust SD ({unit})", color=INK)
        ax.set_title(f"{par}: measured vs reference", color=INK, fontsize=11, loc="left")
        ax.legend(loc="upper left", fontsize=8, frameon=False)
    return fig


def error_per_vial(rows, tolerance_pct: float) -> Figure:
    """Percent error of each vial's median, one panel per parameter, with the tolerance band."""
    groups = _by_param(rows)
    n = len(groups)
    nv = max(len(rs) for rs in groups.values())
    fig = canvas(max(760, 80 * nv + 200), 300 * n + 60)
    _margins(fig, left=75, right=20, bottom=60, top=35, nrows=n, hgap=70)
    axes = fig.subplots(n, 1, squeeze=False)[:, 0]
    for ax, (par, rs) in zip(axes, groups.items()):
        style_axes(ax)
        x = np.arange(len(rs))
        e = np.array([r.error_pct for r in rs])
        bars = np.array([100 * r.robust_sd / r.reference for r in rs])
        tols = np.array([r.tolerance_pct for r in rs])
        ax.axhspan(-tolerance_pct, tolerance_pct, color=BAND, zorder=1)
        ax.axhline(0, color=INK, lw=0.8, zorder=2)
        if np.any(tols != tolerance_pct):
            ax.scatter(x, tols, marker="_", s=300, color=INK, zorder=2, label="per-vial tolerance")
            ax.scatter(x, -tols, marker="_", s=300, color=INK, zorder=2)
        for xi, r, ei, bi in zip(x, rs, e, bars):
            if not np.isfinite(ei):
                ax.annotate("no data", (xi, 0), ha="center", va="bottom", fontsize=8, color=FAIL)
                continue
            c, m = (PASS, "o") if r.pass_ else (FAIL, "D")
            ax.errorbar(xi, ei, yerr=bi if np.isfinite(bi) else None, fmt=m, ms=7, color=c, mec="white",
                        ecolor=c, capsize=3, zorder=3)
            top = ei + (bi if np.isfinite(bi) else 0)
            ax.annotate(_pct(ei), (xi, top), xytext=(0, 4), textcoords="offset points", ha="center", fontsize=8,
                        color=c)
        lim = max(1.6 * tolerance_pct, 1.6 * float(np.max(tols)),
                  1.15 * float(np.nanmax(np.abs(e) + np.nan_to_num(bars))) if np.isfinite(e).any() else 0)
        ax.set_ylim(-lim, lim)
        ax.set_xlim(-0.6, len(rs) - 0.4)
        ax.set_xticks(x, [_vial_text(r) for r in rs], fontsize=9)
        ax.set_ylabel("error of median (%)", color=INK)
        ax.set_title(f"{par}: percent error per vial (shaded: \u00b1{tolerance_pct:g}% tolerance; "
                     f"bars: robust SD of the ROI)", color=INK, fontsize=11, loc="left")
        if np.any(tols != tolerance_pct):
            ax.legend(loc="upper right", fontsize=8, frameon=False)
    axes[-1].set_xlabel("vial (label and name)", color=INK)
    return fig


def roi_overlay(data: np.ndarray, zooms, rois_used: dict, labels: np.ndarray, *, param: str, unit: str,
                map_name: str, erode: int) -> Figure:
    """The map on the slice holding most ROI voxels, with the ROIs used (solid) and the label outlines (dashed).

    Parameters
    ----------
    data : (X, Y, Z) ndarray
        The map, already in ``unit``.
    rois_used : dict
        label -> (X, Y, Z) bool mask actually used (after erosion).
    labels : (X, Y, Z) ndarray of int
        The label image on the map's grid (before erosion).
    """
    counts = sum(m.sum(axis=(0, 1)) for m in rois_used.values()) if rois_used else np.zeros(data.shape[2])
    k = int(np.argmax(counts)) if np.any(counts) else data.shape[2] // 2
    sl = data[:, :, k].T
    inside = np.zeros(data.shape[:2], bool)
    for m in rois_used.values():
        inside |= m[:, :, k]
    vals = data[:, :, k][inside & np.isfinite(data[:, :, k])]
    if vals.size == 0:
        vals = sl[np.isfinite(sl)]
    vmin, vmax = (np.percentile(vals, [1, 99]) if vals.size else (0.0, 1.0))
    if vmin > 0 and vmax / vmin > 10:  # vials spanning decades: a log scale keeps each one distinguishable
        norm: Normalize = LogNorm(vmin / 1.1, vmax * 1.1)
        scale = "log scale"
    else:
        pad = 0.05 * (vmax - vmin or abs(vmax) or 1)
        norm, scale = Normalize(vmin - pad, vmax + pad), "linear scale"
    ratio = data.shape[1] * zooms[1] / (data.shape[0] * zooms[0])
    w = 720
    fig = canvas(w, int(np.clip((w - 170) * ratio, 320, 900)) + 100)
    _margins(fig, left=65, right=75, bottom=55, top=50)
    ax = fig.add_subplot()
    cmap = matplotlib.colormaps["plasma" if param in RATE_PARAMS else "viridis"].with_extremes(bad="#3a3d42")
    im = ax.imshow(np.ma.masked_invalid(sl), origin="lower", cmap=cmap, norm=norm,
                   aspect=float(zooms[1] / zooms[0]), interpolation="nearest")
    halo = [patheffects.withStroke(linewidth=2.5, foreground="black")]
    outer = [seg for lab in np.unique(labels[:, :, k]) if lab for seg in voxel_outline(labels[:, :, k] == lab)]
    ax.add_collection(LineCollection(outer, colors="white", linewidths=0.7, linestyles=(0, (2, 2))))
    for lab, m in rois_used.items():
        msl = m[:, :, k]
        if not msl.any():
            continue
        ax.add_collection(LineCollection(voxel_outline(msl), colors="white", linewidths=1.5, path_effects=halo))
        ii, jj = np.nonzero(msl)
        ax.text(ii.mean(), jj.mean(), str(lab), color="white", ha="center", va="center", fontsize=10,
                fontweight="bold", path_effects=halo)
    cb = fig.colorbar(im, ax=ax, fraction=0.05, pad=0.02)
    cb.set_label(f"{param} ({unit}, {scale})")
    if scale == "log scale":
        cb.ax.yaxis.set_major_formatter(ticker.FuncFormatter(lambda v, _: f"{v:g}"))
        cb.ax.yaxis.set_minor_formatter(ticker.FuncFormatter(_log_minor_label))
    ax.set_xlabel("voxel index i (first array axis)")
    ax.set_ylabel("voxel index j (second array axis)")
    er = f"eroded by {erode} voxel{'s' if erode != 1 else ''}" if erode else "not eroded"
    ax.set_title(f"{map_name}: slice k = {k} (slices 0-{data.shape[2] - 1})\nsolid: ROI used ({er}); "
                 f"dashed: label outline",
                 fontsize=10, loc="left", color=INK)
    return fig


def history_panels(series: dict, trends: dict, *, param: str, unit_note: str = "") -> Figure:
    """Percent error over time, one panel per vial.

    Parameters
    ----------
    series : dict
        (label, name) -> (dates list, error_pct array, pass list, tolerance_pct)
    trends : dict
        label -> Trend (this parameter), for the fitted line and the flag.
    """
    n = len(series)
    ncol = min(4, n)
    nrow = int(np.ceil(n / ncol))
    fig = canvas(265 * ncol + 60, 215 * nrow + 75)
    _margins(fig, left=65, right=15, bottom=45, top=60, nrows=nrow, ncols=ncol, hgap=75, wgap=22)
    axes = fig.subplots(nrow, ncol, squeeze=False, sharex=True, sharey=True)
    lim = 0.0
    for idx, ax in enumerate(axes.ravel()):
        if idx >= n:
            ax.set_visible(False)
            axes.ravel()[idx - ncol].xaxis.set_tick_params(labelbottom=True)
    x_lo: dt.date | None = None
    x_hi: dt.date | None = None
    for ax, ((lab, name), (dates, err, ok, tol)) in zip(axes.ravel(), series.items()):
        style_axes(ax)
        lim = max(lim, 1.6 * tol, 1.15 * float(np.nanmax(np.abs(err))) if np.isfinite(err).any() else 0)
        ax.axhspan(-tol, tol, color=BAND, zorder=1)
        ax.axhline(0, color=INK, lw=0.6, zorder=2)
        ax.plot(dates, err, color="#8a93a3", lw=0.8, zorder=2)
        for d, e, good in zip(dates, err, ok):
            ax.plot([d], [e], "o" if good else "D", color=PASS if good else FAIL, ms=5, zorder=3)
        if dates:
            ax.plot([dates[-1]], [err[-1]], "o", ms=11, mfc="none", mec=INK, mew=1.2, zorder=4)
            x_lo = min(x_lo or dates[0], dates[0])
            x_hi = max(x_hi or dates[-1], dates[-1])
        tr = trends.get(lab)
        title = f"vial {lab}" + (f" {name}" if name else "")
        if tr is not None and not (tr.p_value < ALPHA):
            tr = None  # no significant slope: no trend line to show
        if tr is not None:
            lim = max(lim, 1.1 * abs(tr.projected_error_pct))
            x0 = dt.date.fromisoformat(tr.x0_date)
            xe = dt.date.fromisoformat(tr.projected_date)
            xs = [x0, dates[-1], xe]
            x_hi = xe if x_hi is None else max(x_hi, xe)
            ys = [tr.intercept + tr.slope_pct_per_day * (d - x0).days for d in xs]
            color = DRIFT if tr.flagged else "#8a93a3"
            ax.plot(xs[:2], ys[:2], color=color, lw=1.4, zorder=2)
            ax.plot(xs[1:], ys[1:], color=color, lw=1.4, ls=":", zorder=2)
            if tr.flagged:
                title += f"  DRIFT: {_pct(tr.projected_error_pct)} by {xe:%d %b}"
                for s in ax.spines.values():
                    s.set_color(DRIFT)
                    s.set_linewidth(2)
                    s.set_visible(True)
        ax.set_title(title, fontsize=9, loc="left", color=DRIFT if (tr is not None and tr.flagged) else INK)
        loc = mdates.AutoDateLocator(maxticks=4)
        ax.xaxis.set_major_locator(loc)
        ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(
            loc, offset_formats=["", "%Y", "%Y", "%Y", "%Y", "%Y-%m-%d"]))
    axes[0, 0].set_ylim(-lim, lim)
    if x_lo is not None and x_hi is not None:
        pad = dt.timedelta(days=max(1.0, 0.04 * (x_hi - x_lo).days))
        axes[0, 0].set_xlim(x_lo - pad, x_hi + pad)  # one time axis for every vial
    for r in range(nrow):
        axes[r, 0].set_ylabel(f"{param} error (%)")
    fig.suptitle(f"{param}: error of the ROI median per session (shaded: tolerance; ringed: this session; "
                 f"line: significant trend, dotted: its projection){unit_note}", fontsize=10, color=INK)
    return fig
