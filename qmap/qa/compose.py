"""Assembling the phantom outputs: figures, report page, results files, label image, history -- atomically."""

from __future__ import annotations

import datetime as dt
import os
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np

from ..errors import OutputError
from ..io.writer import AtomicWriter, sha256_file
from . import figures as F
from .history import HORIZON, MIN_SESSIONS, WINDOW, history_bytes, session_series
from .report import ReportContent, ReportFigure, render_html
from .results import results_csv
from .stats import ERROR_BASIS

__all__ = ["MapView", "write_outputs"]


@dataclass
class MapView:
    """A map with the label image on its grid and the ROIs used (for the figures)."""

    map: object  # MapInput
    labels: np.ndarray
    rois: dict
    factor: float  # map unit -> reference unit
    unit: str
    resampled: bool


def _json_rows(rows):
    return [r.as_dict() for r in rows]


def _figures(report, views, tolerance):
    figs = [
        ("phantom_measured_vs_reference.png", F.measured_vs_reference(report.rows, tolerance),
         "Measured against reference",
         (f"Median of each ROI (error bar: robust SD = 1.4826 x median absolute deviation) against the reference "
         f"value, on logarithmic axes. The black line is perfect agreement; the shaded band is the "
         f"{_tol_word(report)} of \u00b1{tolerance:g}%. Diamonds are out of tolerance; the numbers are the vial "
         f"labels.")),
        ("phantom_error_per_vial.png", F.error_per_vial(report.rows, tolerance), "Percent error per vial",
         ("Error of the ROI median relative to the reference, 100 (median - reference) / reference. Points inside "
         "the shaded band pass; a vial with its own tolerance in the reference table shows it as black ticks.")),
    ]
    for v in views:
        m = v.map
        figs.append((f"phantom_rois_{m.param}{'-' + m.tag if m.tag else ''}.png",
                     F.roi_overlay(m.data * v.factor, m.zooms, v.rois, v.labels, param=m.key, unit=v.unit,
                                   map_name=m.path.name, erode=report.settings["erode_voxels"]),
                     f"ROIs on the {m.key} map",
                     f"{m.path.name} on the slice holding the most ROI voxels (array axes as stored, no reorientation;"
                     f" dark grey = no value). Check that every solid outline sits well inside its vial."
                     + (" The label image was resampled onto this map's grid (nearest neighbour)." if v.resampled
                        else "")))
    return figs


def _tol_word(report) -> str:
    return "default tolerance" if report.settings.get("tolerance_source") == "default" else "tolerance"


def _produced_by(m) -> str:
    p = m.provenance
    if not p:
        return "; no qmap provenance beside it (what produced it is not known)"
    model = f"model {p['model']}" + (f": {p['equation']}" if p.get("equation") else "") if p.get("model") else ""
    return f"; produced by `{p['command']}`" + (f" ({model})" if model else "") + f" -- {Path(p['file']).name}"


def _history_figures(report, history_rows, trends, session):
    out = []
    params = list(dict.fromkeys(r.key for r in report.rows))
    for par in params:
        series = {}
        for r in report.rows:
            if r.key != par:
                continue
            dates, err, ok = session_series(history_rows, session.scanner, session.protocol, r.label, par)
            series[(r.label, r.name)] = (dates, err, ok, r.tolerance_pct)
        if max(len(s[0]) for s in series.values()) < 2:
            continue
        tr = {lab: t for (lab, p), t in trends.items() if p == par}
        fig = F.history_panels(series, tr, param=par)
        out.append((f"phantom_history_{par.replace(' (', '-').rstrip(')')}.png", fig, f"{par} error over time",
                    (f"Sessions of scanner '{session.scanner}', protocol '{session.protocol}'. A trend line is drawn when the "
                    f"slope of the linear fit is significant (p < 0.05). A vial is marked DRIFT "
                    f"(amber) when the linear fit over its last {WINDOW} sessions (at least {MIN_SESSIONS}) has a "
                    f"slope different from zero (p < 0.05) and the fitted line reaches outside the tolerance within "
                    f"{HORIZON} typical session intervals after this one.")))
    return out


def _src(session, key) -> str:
    src = session.sources[key]
    return "" if src in ("none", "today") else f" (from {'the sidecar' if src == 'sidecar' else src})"


def _date_text(session) -> str:
    return "not given" if session.sources["date"] == "today" else f"{session.date}{_src(session, 'date')}"


def _meta(session, version) -> str:
    parts = [f"scan date: {session.date}" if session.sources["date"] != "today" else "scan date: not given"]
    parts += [f"{k}: {getattr(session, k)}" for k in ("scanner", "protocol") if session.sources[k] != "none"]
    parts.append(f"report generated {dt.datetime.now().strftime('%Y-%m-%d %H:%M')} by qmap {version}")
    return " \u00b7 ".join(parts)


def _settings_pairs(report, session, placed, views):
    s = report.settings
    pairs = [
        ("session", "; ".join([f"scan date {_date_text(session)}"]
                              + [f"{k} {getattr(session, k)}{_src(session, k)}" for k in ("scanner", "protocol")])),
        ("phantom temperature", f"{s['temperature_C']:g} \u00b0C" if s["temperature_C"] is not None
         else "not given"),
        ("reference table", s["reference"] + (f" (values interpolated to {s['temperature_C']:g} \u00b0C for "
                                              f"{len(s['interpolated_vials'])} vial(s))" if s["interpolated_vials"]
                                              else "")),
        ("verdict rule", (f"|error of the ROI {ERROR_BASIS}| <= tolerance ({_tol_word(report)} "
                          f"\u00b1{s['tolerance_pct']:g}%, "
                         f"per-vial values from the table where given) and at least {s['min_voxels']} voxels "
                         f"with a value")),
        ("ROIs", f"{s['roi_source']}; " + (
            f"eroded by {s['erode_voxels']} voxel{'s' if s['erode_voxels'] > 1 else ''} (face neighbours) against "
            f"partial volume at the vial walls" if s["erode_voxels"] else "used as drawn (not eroded)")),
    ]
    for v in views:
        m = v.map
        pairs.append((f"{m.key} map", (f"{m.path} (unit {m.unit} from "
                      f"{'sidecar' if m.unit_source == 'sidecar' else 'default, no sidecar Units'}; compared in "
                      f"{v.unit}){_produced_by(m)}")))
    if placed is not None:
        g = placed.summary()
        pairs.append(("layout registration",
                      (f"{g['geometry']} rigid fit of {g['matched_vials']} matched vials: residual rms "
                      f"{g['rms_residual_mm']:.2f} mm, max {g['max_residual_mm']:.2f} mm, rotation "
                      f"{g['rotation_deg']:.1f}\u00b0{', mirrored' if g['mirrored'] else ''}; "
                      f"{g['detected_components']} vial-like components found ({g['threshold']}); labels saved as "
                      f"phantom_labels.nii.gz")))
    return pairs


def write_outputs(out_dir: Path, *, overwrite, report, views, session, placed, label_affine, history_path,
                  history_rows, trends, inputs, version, command_line, describe_failure) -> list[Path]:
    """Stage every output, commit them together, then replace the history file."""
    tol = report.settings["tolerance_pct"]
    figs = _figures(report, views, tol)
    hist_figs = _history_figures(report, history_rows, trends, session) if history_rows else []
    n, nf = len(report.rows), len(report.failed)
    flagged = [t for t in trends.values() if t.flagged]
    small = sum(r.too_small for r in report.failed)
    parts = ([f"{nf - small} out of tolerance"] if nf - small else []) + \
        ([f"{small} with too few voxels to judge"] if small else [])
    headline = (f"All {n} ROI values (vial x parameter) are within tolerance." if report.passed else
                f"{nf} of {n} ROI values (vial x parameter) did not pass: {', '.join(parts)}.")
    if flagged:
        which = ", ".join(f"vial {t.label} {t.parameter}" for t in flagged)
        headline += f" Drifting towards the tolerance limit: {which} (see Drift below)."
    content = ReportContent(
        title="Relaxometry phantom check", meta=_meta(session, version),
        passed=report.passed, headline=headline, failures=[describe_failure(r) for r in report.failed],
        drift_lines=[f"vial {t.label} {t.parameter}: error changing by {t.slope_pct_per_day * 30:+.2f} percentage "
                     f"points per 30 days over the last "
                     f"{t.n_sessions} sessions (p = {t.p_value:.2g}); projected {t.projected_error_pct:+.1f}% by "
                     f"{t.projected_date} (tolerance \u00b1{t.tolerance_pct:g}%)" for t in flagged],
        settings=_settings_pairs(report, session, placed, views), rows=report.rows, warnings=report.warnings,
        figures=[ReportFigure(name, title, cap) for name, _, title, cap in figs],
        history_figures=[ReportFigure(name, title, cap) for name, _, title, cap in hist_figs],
        history_text=(f"This session was added to {history_path}." if history_rows is not None else "")
        + ("" if hist_figs or history_rows is None else " The history holds only this session so far."),
        footer="command line: " + " ".join(command_line or []),
    )
    result = {
        "verdict": "pass" if report.passed else "fail", "n_rois": n, "n_failed": nf, "error_basis": ERROR_BASIS,
        "rows": _json_rows(report.rows), "settings": report.settings, "session": session.as_dict(),
        "registration": report.registration, "trends": report.trends, "warnings": report.warnings,
        "inputs": [{"path": str(Path(p).absolute()), "sha256": sha256_file(p)} for p in inputs],
        "qmap_version": version, "command_line": list(command_line or []),
    }
    tmp_hist = None
    try:
        with AtomicWriter(out_dir, overwrite=overwrite) as w:
            for name, fig, _, _ in figs + hist_figs:
                w.stage_bytes(name, F.png_bytes(fig))
            if placed is not None:
                img = nib.Nifti1Image(placed.labels.astype(np.int16 if placed.labels.max() < 32767 else np.int32),
                                      label_affine)
                img.set_qform(label_affine, code=1)
                img.set_sform(label_affine, code=1)
                w.stage_with("phantom_labels.nii.gz", lambda p: nib.save(img, str(p)))
                w.stage_json("phantom_labels.json", {"Description": "vial ROIs drawn from the layout (0 = background)",
                                                     "Registration": report.registration})
            w.stage_bytes("phantom_results.csv", results_csv(report.rows))
            w.stage_json("phantom_results.json", result)
            w.stage_bytes("phantom_report.html", render_html(content))
            if history_rows is not None:
                hp = Path(history_path)
                tmp_hist = hp.with_name(f".{hp.name}.qmap-tmp-{os.getpid()}")
                _write(tmp_hist, history_bytes(history_rows), hp)
            written = w.commit()
        if tmp_hist is not None:
            os.replace(tmp_hist, history_path)
            tmp_hist = None
            written.append(Path(history_path))
    finally:
        if tmp_hist is not None and tmp_hist.exists():
            tmp_hist.unlink()
    return written


def _write(tmp: Path, payload: bytes, final: Path) -> None:
    try:
        tmp.write_bytes(payload)
    except OSError as exc:
        raise OutputError(f"cannot write the history {final} ({exc.strerror}); check the folder and permissions") from None

