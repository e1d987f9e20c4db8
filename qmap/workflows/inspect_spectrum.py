"""``qmap inspect`` for a ``t2-spectrum`` fit: one voxel's echo train, fitted train and T2 spectrum.

Nothing is re-fitted: the spectrum and the refocusing angle are read from the
written maps, the EPG basis is rebuilt from the provenance (echo spacing,
number of echoes, T1, nominal angle, T2 grid), and the fitted train is the
basis at the voxel's angle times its spectrum.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from ..errors import InputError
from ..io.nifti import load_image

__all__ = ["plot_voxel_spectrum", "spectrum_voxel"]


def spectrum_voxel(prov: dict, out_dir: Path, ijk, y: NDArray[np.float64]) -> dict:
    """The voxel's spectrum, T2 grid, angle and fitted train (from the maps and the provenance).

    Parameters
    ----------
    prov : dict
        The fit's provenance.
    out_dir : Path
        Folder of the maps.
    ijk : (3,) tuple of int
    y : (m,) ndarray
        The voxel's measured echo train.

    Returns
    -------
    dict
        ``t2`` (s), ``spectrum`` (signal units), ``angle`` (deg), ``fitted`` (m,), ``window`` (s).
    """
    from ..models.t2_spectrum import fitted_trains, spectrum_basis

    model = prov.get("model", {})
    opts = prov.get("options", {})
    outputs = prov.get("outputs", {})
    spec_name = next((n for n, o in outputs.items() if o.get("parameter") == "T2spectrum"), None)
    angle_name = next((n for n, o in outputs.items() if o.get("parameter") == "RefocusAngle"
                       and o.get("kind") == "estimate"), None)
    if spec_name is None or angle_name is None or not (out_dir / spec_name).exists():
        raise InputError(f"{out_dir}: the spectrum or refocusing-angle map of this fit is missing; rerun t2-spectrum")
    img = load_image(out_dir / spec_name)
    s = np.asarray(img.dataobj[ijk[0], ijk[1], ijk[2], :], float)
    angle = float(np.asarray(load_image(out_dir / angle_name).dataobj[ijk[0], ijk[1], ijk[2]], float))
    t2 = np.asarray(model["t2_grid_s"], float)
    rng = opts.get("t2_range_s", [t2[0], t2[-1]])
    basis = spectrum_basis(round(float(model["echo_spacing_s"]), 9), int(y.size), t1=float(opts.get("t1_s", 1.0)),
                           refocus_deg=float(opts.get("refocus_deg", 180.0)), t2_range=(float(rng[0]), float(rng[1])),
                           n_t2=int(t2.size))
    fitted = np.full(y.size, np.nan)
    if np.all(np.isfinite(s)) and np.isfinite(angle):
        fitted = fitted_trains(basis, s[None, :], np.array([angle]))[0]
    return {"t2": t2, "spectrum": s, "angle": angle, "fitted": fitted,
            "window": tuple(float(v) for v in opts.get("window_s", (0.01, 0.04)))}


def plot_voxel_spectrum(path, *, te, y, fitted, t2, spectrum, window, title: str, lines) -> None:
    """PNG: the echo train with the fitted train and residuals (left), the T2 spectrum (right)."""
    from ..plots import ACCENT_COLOUR, DATA_COLOUR, INK, MODEL_COLOUR, PANEL, canvas, save_png, style_axes

    fig = canvas(1100, 520)
    gs = fig.add_gridspec(2, 2, height_ratios=(3, 1), width_ratios=(1, 1), hspace=0.08, wspace=0.25)
    ax = fig.add_subplot(gs[0, 0])
    axr = fig.add_subplot(gs[1, 0], sharex=ax)
    axs = fig.add_subplot(gs[:, 1])
    ms = np.asarray(te) * 1e3
    for a in (ax, axr, axs):
        style_axes(a)
    ax.plot(ms, y, "o", ms=4, color=DATA_COLOUR, label="measured echoes")
    if np.all(np.isfinite(fitted)):
        ax.plot(ms, fitted, "-", color=MODEL_COLOUR, label="fitted train (spectrum x EPG basis)")
        axr.axhline(0, color="0.6", lw=0.8)
        axr.plot(ms, y - fitted, "o-", ms=3, color=DATA_COLOUR)
    ax.set_ylabel("signal [a.u.]")
    ax.legend(loc="upper right", fontsize=8)
    ax.tick_params(labelbottom=False)
    axr.set_xlabel("echo time [ms]")
    axr.set_ylabel("residual")
    t2ms = np.asarray(t2) * 1e3
    ok = np.isfinite(spectrum)
    if ok.any():
        axs.vlines(t2ms[ok], 0, spectrum[ok], color=MODEL_COLOUR, lw=3)
    axs.axvspan(window[0] * 1e3, window[1] * 1e3, color=ACCENT_COLOUR, alpha=0.15, label="short-T2 window")
    axs.set_xscale("log")
    axs.set_xlabel("T2 [ms]")
    axs.set_ylabel("amplitude [a.u.]")
    axs.legend(loc="upper right", fontsize=8)
    ax.text(0.38, 0.72, "\n".join(lines), transform=ax.transAxes, va="top", fontsize=8, family="monospace",
            color=INK, bbox={"boxstyle": "round,pad=0.4", "fc": PANEL, "ec": "#bbbbbb", "alpha": 0.9}, zorder=5)
    fig.suptitle(title, fontsize=10, color=INK)
    save_png(fig, path)
