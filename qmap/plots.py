"""Pictures of maps and fits: PNG montages of estimate maps and single-voxel fit plots.

Every figure is drawn on a :class:`matplotlib.figure.Figure` with the Agg
canvas (no display, no pyplot state), at a fixed size in pixels, so the files
are reproducible and their size is known in advance.

Montage layout (our own): up to :data:`MAX_SLICES` axial slices (third array
axis) spread over the slices that hold fitted voxels, in one row, the first
array axis running left to right and the second bottom to top; voxels outside
the mask (or without an estimate) are white inside a grey frame that marks
the field of view, fitted voxels with a perceptually
uniform colour map over a robust range (the 2nd to 98th percentile of the
fitted values; logarithmic for times and rates whose range spans more than a
factor of 8, so that short and long values both show), and a colour bar
labelled with the parameter and its units.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import LogNorm, Normalize
from matplotlib.figure import Figure
from matplotlib.ticker import FormatStrFormatter, LogLocator, NullFormatter

__all__ = [
    "INK",
    "MAX_SLICES",
    "PREVIEW_SIZE_PX",
    "VOXEL_PLOT_SIZE_PX",
    "canvas",
    "colormap_for",
    "montage",
    "pick_slices",
    "plot_voxel_fit",
    "preview_name",
    "robust_range",
    "save_png",
    "stage_previews",
    "style_axes",
]

#: Most slices shown in one montage.
MAX_SLICES = 6
#: Resolution of every figure, dots per inch.
DPI = 100
#: Size of a map preview, (width, height) in pixels.
PREVIEW_SIZE_PX = (1200, 330)
#: Size of a single-voxel fit plot, (width, height) in pixels.
VOXEL_PLOT_SIZE_PX = (1000, 700)
#: Colour of voxels outside the mask / without an estimate.
BACKGROUND = "white"
#: Ratio of the colour range's ends above which time and rate maps get a logarithmic colour scale.
LOG_SPAN = 8.0
#: Percentiles of the fitted values spanned by the colour scale.
ROBUST_PERCENTILES = (2.0, 98.0)

# Perceptually uniform colour maps (matplotlib's), chosen per kind of parameter.
# None of them reaches white, so the white background (inside a grey frame = the field of view) stays distinct.
_CMAPS = {"time": "viridis", "rate": "plasma", "b1": "cividis", "amplitude": "cividis", "other": "viridis"}


# The one figure style of qmap: map previews, voxel plots (``qmap inspect``) and the QA figures
# (qmap.qa.figures) are drawn with canvas(), style_axes() and these colours, and written by save_png().
#: text, ticks and spines
INK = "#2b2f36"
#: grid lines
GRID = "#e9ecf1"
#: measured samples and their residuals
DATA_COLOUR = "#d1495b"
#: the fitted model
MODEL_COLOUR = "#1b6ca8"
#: a second curve (the expected magnitude with its noise floor, a window)
ACCENT_COLOUR = "#e07b00"
#: text boxes
PANEL = "#f4f4f4"


def canvas(width_px: int, height_px: int) -> Figure:
    """A figure of exactly ``width_px`` x ``height_px`` pixels on the Agg canvas (no display, no pyplot state)."""
    fig = Figure(figsize=(width_px / DPI, height_px / DPI), dpi=DPI)
    FigureCanvasAgg(fig)
    return fig


def style_axes(ax) -> None:
    """The axes of every qmap plot: no top and right spines, ink-coloured ticks, a light grid behind the data."""
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=INK, labelsize=9)
    ax.grid(True, color=GRID, linewidth=0.8, zorder=0)


def save_png(fig: Figure, target) -> None:
    """Write ``fig`` as PNG to a path or a binary file object, at its own size (white background)."""
    # no bbox_inches="tight": the file must have exactly the size asked for
    fig.savefig(target if hasattr(target, "write") else str(target), format="png", dpi=DPI, facecolor="white")


def preview_name(prefix: str, param: str) -> str:
    """File name of the preview of parameter ``param``: ``{prefix}_{param}map.png``."""
    return f"{prefix}_{param}map.png"


def robust_range(values: np.ndarray, percentiles: tuple[float, float] = ROBUST_PERCENTILES) -> tuple[float, float]:
    """Colour range from percentiles of the finite ``values``; never empty.

    Parameters
    ----------
    values : ndarray
        Values to span (any shape; non-finite entries are ignored).
    percentiles : (float, float)
        Lower and upper percentile, 0-100.

    Returns
    -------
    (vmin, vmax) : tuple of float
        ``vmin < vmax`` always (a constant image gets a small symmetric span).
    """
    v = np.asarray(values, float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0, 1.0
    lo, hi = (float(x) for x in np.percentile(v, percentiles))
    if not hi > lo:
        span = abs(lo) * 0.05 or 1.0
        lo, hi = lo - span, hi + span
    return lo, hi


def pick_slices(mask: np.ndarray, n: int = MAX_SLICES) -> list[int]:
    """Up to ``n`` slice indices (third axis), evenly spread over the slices holding ``mask`` voxels.

    Parameters
    ----------
    mask : (X, Y, Z) ndarray of bool
    n : int

    Returns
    -------
    list of int
        Sorted, distinct; all slices when there are at most ``n``; the middle
        slices of the volume when the mask is empty.
    """
    mask = np.asarray(mask, bool)
    nz = mask.shape[2]
    occupied = np.flatnonzero(mask.any(axis=(0, 1)))
    if occupied.size == 0:
        occupied = np.arange(nz)
    if occupied.size <= n:
        return [int(k) for k in occupied]
    # centres of n equal parts of the occupied range (avoids the thin end slices)
    pos = (np.arange(n) + 0.5) / n * occupied.size
    return sorted({int(occupied[int(p)]) for p in pos})


def display_name(param: str) -> str:
    """How a parameter is written on a figure: ``T2star`` -> ``T2*`` (file names keep the BIDS spelling)."""
    return param.replace("star", "*")


def colormap_for(param: str, units: str) -> str:
    """Name of the matplotlib colour map used for ``param`` (perceptually uniform)."""
    if param == "TB1" or units == "fraction":
        return _CMAPS["b1"]
    if units in ("s", "ms"):
        return _CMAPS["time"]
    if units == "1/s":
        return _CMAPS["rate"]
    if units == "a.u.":
        return _CMAPS["amplitude"]
    return _CMAPS["other"]


def _units_label(units: str) -> str:
    return {"1": "dimensionless", "a.u.": "a.u.", "fraction": "fraction"}.get(units, units)


def _fmt(v: float) -> str:
    """Four significant digits without exponent noise (1279, 46.00, 0.9693)."""
    if not np.isfinite(v) or v == 0:
        return f"{v:g}"
    d = max(0, 3 - int(np.floor(np.log10(abs(v)))))
    return f"{v:.{d}f}"


def montage(
    path: str | Path,
    volume: np.ndarray,
    *,
    mask: np.ndarray | None,
    param: str,
    units: str,
    title: str,
    description: str = "",
    slices: Sequence[int] | None = None,
    range_mask: np.ndarray | None = None,
) -> tuple[float, float]:
    """Write a PNG montage of a 3D map.

    Parameters
    ----------
    path : path-like
        PNG file to write (:data:`PREVIEW_SIZE_PX` pixels).
    volume : (X, Y, Z) ndarray
        The map, already in the units given (e.g. ms).
    mask : (X, Y, Z) ndarray of bool, optional
        Voxels to colour; the rest is background. Default: finite voxels.
    param, units : str
        Parameter name (``T1``) and units string (``ms``) for the colour bar.
    title : str
        Figure title.
    description : str
        A short line under the title (e.g. the parameter's description).
    slices : sequence of int, optional
        Slices to show (default :func:`pick_slices`).
    range_mask : (X, Y, Z) ndarray of bool, optional
        Voxels whose values set the colour range (default: those shown).

    Returns
    -------
    (vmin, vmax) : tuple of float
        The colour range used.
    """
    vol = np.asarray(volume, float)
    if vol.ndim == 2:
        vol = vol[:, :, None]
    shown = np.isfinite(vol) if mask is None else (np.asarray(mask, bool) & np.isfinite(vol))
    ranged = shown if range_mask is None else (shown & np.asarray(range_mask, bool))
    vmin, vmax = robust_range(vol[ranged])
    if slices is None:
        slices = pick_slices(shown)
    cmap = _colormap(colormap_for(param, units))
    fig = canvas(*PREVIEW_SIZE_PX)
    W, H = PREVIEW_SIZE_PX
    n = max(len(slices), 1)
    # geometry in pixels: panels as large as the height allows (image aspect kept), side by side from the
    # left, the colour bar right after the last one
    top_px, bottom_px, left_px, gap_px = 0.745 * H, 0.03 * H, 0.015 * W, 8.0
    ph_max = top_px - bottom_px
    aspect = vol.shape[0] / vol.shape[1]  # displayed width / height (first axis horizontal)
    aspect = min(max(aspect, 0.2), 5.0)
    pw = min(ph_max * aspect, (0.86 * W - gap_px * (n - 1)) / n)
    ph = pw / aspect  # keep the image's proportions when the width is the limit
    y0 = bottom_px + (ph_max - ph) / 2  # centred vertically
    log = _use_log(units, vmin, vmax)
    norm = LogNorm(vmin=vmin, vmax=vmax) if log else Normalize(vmin=vmin, vmax=vmax)
    im = None
    for i, k in enumerate(slices):
        ax = fig.add_axes(((left_px + i * (pw + gap_px)) / W, y0 / H, pw / W, ph / H))
        ax.set_facecolor(BACKGROUND)
        sl = np.where(shown[:, :, k], vol[:, :, k], np.nan)
        if log:
            sl = np.where(sl > 0, sl, np.nan)
        im = ax.imshow(sl.T, origin="lower", cmap=cmap, norm=norm, interpolation="nearest", aspect="auto")
        ax.set_xticks([])
        ax.set_yticks([])
        for s in ax.spines.values():
            s.set_color("#9a9a9a")
        ax.text(0.03, 0.97, f"slice z = {k}", transform=ax.transAxes, color="white", fontsize=9, va="top", ha="left",
                bbox={"boxstyle": "round,pad=0.15", "fc": "black", "ec": "none", "alpha": 0.55})
    cb_left = left_px + n * (pw + gap_px) + 10.0
    cax = fig.add_axes((cb_left / W, (y0 + 0.08 * ph) / H, 14.0 / W, 0.84 * ph / H))
    if im is not None:
        cb = fig.colorbar(im, cax=cax, extend="both")
        cb.set_label(f"{display_name(param)} [{_units_label(units)}]", fontsize=9)
        if log:  # plain numbers at 1, 2, 5 x 10^k instead of powers of ten
            cb.ax.yaxis.set_major_locator(LogLocator(subs=(1.0, 2.0, 5.0)))
            cb.ax.yaxis.set_major_formatter(FormatStrFormatter("%g"))
            cb.ax.yaxis.set_minor_formatter(NullFormatter())
        cb.ax.tick_params(labelsize=8)
    fig.text(0.015, 0.965, title, fontsize=12, fontweight="bold", va="top", ha="left")
    if description:
        fig.text(0.015, 0.885, textwrap.shorten(description, 190, placeholder=" ..."), fontsize=9, va="top",
                 ha="left", color="#333333")
    fig.text(0.015, 0.825, f"colour range {_fmt(vmin)} to {_fmt(vmax)} {units} (2nd-98th percentile of "
             f"{int(ranged.sum())} fitted voxels{'; logarithmic colour scale' if log else ''}); white = no estimate (not fitted)", fontsize=9, va="top",
             ha="left", color="#333333")
    save_png(fig, path)
    return vmin, vmax


def _use_log(units: str, vmin: float, vmax: float) -> bool:
    """Logarithmic colours for times and rates spanning more than :data:`LOG_SPAN` (e.g. 20-500 ms)."""
    return units in ("s", "ms", "1/s") and vmin > 0 and vmax / vmin > LOG_SPAN


def _colormap(name: str):
    import matplotlib

    return matplotlib.colormaps[name].with_extremes(bad=BACKGROUND)


def stage_previews(writer, maps, prefix: str, *, units: str, mask: np.ndarray) -> list[Path]:
    """Stage a PNG montage of every estimate map of ``maps`` through ``writer``.

    Parameters
    ----------
    writer : qmap.io.writer.AtomicWriter
        The open writer of the run (files appear only when it commits).
    maps : qmap.maps.MapSet
        The fitted maps (seconds for time maps).
    prefix : str
        Output name stem; files are ``{prefix}_{P}map.png``.
    units : {"s", "ms"}
        Units of the written time maps (the previews match them).
    mask : (X, Y, Z) ndarray of bool
        Voxels that were fitted (the rest is drawn as background).

    Returns
    -------
    list of Path
        The final paths of the staged previews.
    """
    out = []
    fitted = np.asarray(mask, bool) & (np.asarray(maps.status) == 0)
    for name in maps.names:
        factor = 1e3 if (units == "ms" and name in maps.time_params) else 1.0
        u = "ms" if factor == 1e3 else maps.units[name]
        vol = np.asarray(maps.estimates[name], float) * factor
        title = f"{display_name(name)} map ({prefix})"
        desc = maps.descriptions.get(name, "")

        def draw(path, vol=vol, name=name, u=u, title=title, desc=desc):
            # every voxel with an estimate is drawn (values at a bound too); the colour range comes from
            # the voxels fitted without remark (status 0)
            montage(path, vol, mask=np.asarray(mask, bool), param=name, units=u, title=title, description=desc,
                    range_mask=fitted)

        out.append(writer.stage_with(preview_name(prefix, name), draw))
    return out


def plot_voxel_fit(
    path: str | Path,
    *,
    x: np.ndarray,
    y: np.ndarray,
    x_fine: np.ndarray,
    curve: np.ndarray,
    fitted_at_x: np.ndarray,
    xlabel: str,
    title: str,
    lines: Sequence[str],
    used: np.ndarray | None = None,
    floor_curve: np.ndarray | None = None,
    floor_label: str = "expected magnitude (noise floor)",
    x_scale: float = 1.0,
    x_unit: str = "",
    curve_label: str = "fitted model",
    noise_sd: float | None = None,
    notes: Sequence[str] = (),
    x_log: bool = False,
    ylabel: str = "signal [a.u.]",
    x_limits: tuple[float, float] | None = None,
) -> None:
    """Write a PNG of one voxel's fit: samples and fitted curve above, residuals below.

    Parameters
    ----------
    path : path-like
        PNG file (:data:`VOXEL_PLOT_SIZE_PX` pixels).
    x : (m,) ndarray
        Sample positions (seconds or degrees), e.g. echo times.
    y : (m,) ndarray
        Measured samples (signal units).
    x_fine : (k,) ndarray
        Fine grid for the fitted curve (same units as ``x``).
    curve : (k,) ndarray
        Fitted model on ``x_fine``.
    fitted_at_x : (m,) ndarray
        What the fit compares the samples with (model, or its noise-floor
        expectation), for the residuals.
    xlabel : str
        Axis label of the sample positions (without units).
    title : str
    lines : sequence of str
        Text shown in a box (parameter values with standard errors).
    used : (m,) ndarray of bool, optional
        Samples the fit used (others are drawn hollow).
    floor_curve : (k,) ndarray, optional
        The expected magnitude including the noise floor, drawn dashed.
    x_scale : float
        Multiply ``x`` by this for display (1e3 for ms).
    x_unit : str
        Display unit of the x axis.
    curve_label : str
        Legend entry of the fitted curve.
    noise_sd : float, optional
        Noise standard deviation (signal units), shaded around zero in the
        residual panel.
    notes : sequence of str
        Further lines (model equation, noise handling) under the values.
    x_log : bool
        Logarithmic x axis (e.g. inversion times spread over decades).
    ylabel : str
        Label of the signal axis (with its units).
    x_limits : (float, float), optional
        Range of the x axis in the units of ``x`` (before ``x_scale``); default: from the samples.
    """
    x = np.asarray(x, float) * x_scale
    xf = np.asarray(x_fine, float) * x_scale
    y = np.asarray(y, float)
    curve = np.asarray(curve, float)
    res = y - np.asarray(fitted_at_x, float)
    used = np.ones(x.shape, bool) if used is None else np.asarray(used, bool)
    has_fit = xf.size > 0 and np.any(np.isfinite(curve))
    fig = canvas(*VOXEL_PLOT_SIZE_PX)
    ax = fig.add_axes((0.085, 0.40, 0.54, 0.52))
    axr = fig.add_axes((0.085, 0.08, 0.54, 0.24), sharex=ax)
    if has_fit:
        ax.plot(xf, curve, color=MODEL_COLOUR, lw=2, label=curve_label, zorder=2)
        if floor_curve is not None:
            floor_curve = np.asarray(floor_curve, float)
            # drawn only where it can be told apart from the model (near the noise floor)
            if np.nanmax(np.abs(floor_curve - curve)) > 0.005 * np.nanmax(np.abs(curve)):
                ax.plot(xf, floor_curve, color=ACCENT_COLOUR, lw=1.4, ls="--", label=floor_label, zorder=2)
    ax.plot(x[used], y[used], "o", color=DATA_COLOUR, ms=7, label="measured", zorder=3)
    if not used.all():
        ax.plot(x[~used], y[~used], "o", mfc="none", mec=DATA_COLOUR, ms=7, label="measured, not used by the fit",
                zorder=3)
    ax.axhline(0, color="#999999", lw=0.8, zorder=1)
    ax.set_ylabel(ylabel)
    ax.set_title(title, fontsize=11, loc="left", color=INK)
    style_axes(ax)
    ax.tick_params(labelbottom=False)
    if x_log:
        ax.set_xscale("log")  # shared with the residual panel
        lo, hi = np.min(x[x > 0]), np.max(x)
        ax.set_xlim(lo / 1.6, hi * 1.6)
    elif x.size and np.min(x) >= 0:
        ax.set_xlim(left=0)
    if x_limits is not None:
        ax.set_xlim(x_limits[0] * x_scale, x_limits[1] * x_scale)
    if has_fit:
        axr.axhline(0, color=MODEL_COLOUR, lw=1)
        if noise_sd is not None and np.isfinite(noise_sd) and noise_sd > 0:
            axr.axhspan(-noise_sd, noise_sd, color=MODEL_COLOUR, alpha=0.12, lw=0, label="+/- noise sd")
        axr.vlines(x, 0, res, color=DATA_COLOUR, lw=1)
        axr.plot(x[used], res[used], "o", color=DATA_COLOUR, ms=5)
        if not used.all():
            axr.plot(x[~used], res[~used], "o", mfc="none", mec=DATA_COLOUR, ms=5)
        lim = np.nanmax(np.abs(res)) if np.any(np.isfinite(res)) else 1.0
        if noise_sd is not None and np.isfinite(noise_sd):
            lim = max(lim, noise_sd)
        lim = lim * 1.25 if lim > 0 else 1.0
        axr.set_ylim(-lim, lim)
    else:
        axr.text(0.5, 0.5, "no fit at this voxel: no residuals", transform=axr.transAxes, ha="center", va="center",
                 color="#555555")
        axr.set_yticks([])
    axr.set_ylabel("residual [a.u.]")
    axr.set_xlabel(f"{xlabel} [{x_unit}]" if x_unit else xlabel)
    style_axes(axr)
    box_x = 0.665
    fig.text(box_x, 0.92, "\n".join(lines), fontsize=8.5, va="top", ha="left", family="monospace",
             bbox={"boxstyle": "round,pad=0.5", "fc": PANEL, "ec": "#bbbbbb"})
    box_y = 0.92 - 0.026 * (len(lines) + 1.5)
    if notes:
        import textwrap

        wrapped = "\n".join(textwrap.fill(t, 52) for t in notes)
        fig.text(box_x, box_y, wrapped, fontsize=8, va="top", ha="left", color=INK)
        box_y -= 0.024 * (wrapped.count("\n") + 2)
    handles, labels = ax.get_legend_handles_labels()
    h2, l2 = axr.get_legend_handles_labels()
    fig.legend(handles + h2, labels + l2, loc="upper left", bbox_to_anchor=(box_x - 0.005, box_y), fontsize=8.5,
               frameon=False)
    save_png(fig, path)

