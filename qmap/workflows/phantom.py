"""``qmap phantom``: ROI statistics of parameter maps against a phantom's reference values.

One public function, :func:`run_phantom`: files in (maps, a label image or a
layout, the reference table), outputs out (results CSV / JSON, an HTML report
with PNG figures, optionally the label image drawn from the layout and a
history row per vial). Everything is validated before anything is written;
the outputs are written atomically.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import InputError, OutputExistsError, UsageError, warn
from ..io.nifti import image_data, load_image
from ..qa.compose import MapView, write_outputs
from ..qa.history import find_trends, merge_session, read_history
from ..qa.inputs import MapInput, labels_on_grid, load_labels, load_map, map_provenance, status_beside
from ..qa.layout import place_rois, read_layout
from ..qa.quantities import conversion, example_column
from ..qa.reference import read_reference
from ..qa.results import fmt
from ..qa.rois import roi_masks, roi_values
from ..qa.session import session_info
from ..qa.stats import ERROR_BASIS, RoiResult, roi_statistics

__all__ = ["DEFAULT_TOLERANCE", "FIXED_OUTPUTS", "PhantomReport", "run_phantom"]

#: Allowed |error| of the ROI median in percent of the reference when --tolerance is not given.
DEFAULT_TOLERANCE = 10.0

#: Files every run writes into the output folder.
FIXED_OUTPUTS = ("phantom_results.csv", "phantom_results.json", "phantom_report.html")


@dataclass
class PhantomReport:
    """What a phantom check found and wrote.

    Attributes
    ----------
    rows : list of RoiResult
        One per vial x parameter, in the reference column's unit.
    passed : bool
        Every row within tolerance (and large enough).
    out_dir : Path
    written : list of Path
    warnings : list of str
    registration : dict or None
        Layout matching summary (residuals in mm) when ``layout`` was used.
    trends : list of dict
        Drift analysis per vial x parameter (with ``history``).
    """

    rows: list
    passed: bool
    out_dir: Path
    written: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    registration: dict | None = None
    trends: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)

    @property
    def failed(self) -> list:
        return [r for r in self.rows if not r.pass_]

    @property
    def exit_code(self) -> int:
        """0 when every ROI is within tolerance, 3 otherwise (the documented exit codes)."""
        return 0 if self.passed else 3

    def summary(self) -> str:
        n, nf = len(self.rows), len(self.failed)
        tol = self.settings.get("tolerance_pct")
        which = "default tolerance" if self.settings.get("tolerance_source") == "default" else "tolerance"
        head = (f"phantom: {'PASSED' if self.passed else 'NOT PASSED'} -- {n - nf} of {n} ROI values within "
                f"tolerance (error of the ROI {ERROR_BASIS} vs reference; {which} {tol:g}%)")
        lines = [head]
        for r in self.failed:
            lines.append("  " + describe_failure(r))
        if self.registration:
            g = self.registration
            lines.append(f"  layout matched: {g['matched_vials']} vials, residual rms {g['rms_residual_mm']:.2f} mm "
                         f"(max {g['max_residual_mm']:.2f} mm)")
        for t in self.trends:
            if t["flagged"]:
                lines.append(f"  drift: vial {t['label']} {t['parameter']} projected at "
                             f"{t['projected_error_pct']:+.1f}% by {t['projected_date']}")
        lines.append(f"report: {self.out_dir / 'phantom_report.html'}")
        return "\n".join(lines)


def describe_failure(r: RoiResult) -> str:
    who = f"vial {r.label}" + (f" ({r.name})" if r.name else "") + f" {r.key}"
    if r.n_voxels == 0:
        return f"{who}: no usable voxels in the ROI"
    if r.too_small:
        return f"{who}: ROI too small to judge ({r.n_voxels} voxels, minimum set by min_voxels=)"
    return (f"{who}: median {r.median:.4g} {r.unit} vs reference {r.reference:.4g} {r.unit}, "
            f"{r.error_pct:+.1f}% (tolerance \u00b1{r.tolerance_pct:g}%)")


def _check_options(maps, params, labels, layout, layout_image, tolerance, erode, min_voxels, temperature):
    if not maps:
        raise UsageError("maps is empty: give at least one parameter map (e.g. maps=['sub-01_T1map.nii.gz'])")
    if len(params) != len(maps):
        raise UsageError("params must have one entry (or None) per map")
    if (labels is None) == (layout is None):
        raise UsageError("give either labels=FILE (a label image) or layout=FILE (vial positions), not both or "
                         "neither")
    if layout_image is not None and layout is None:
        raise UsageError("layout_image=FILE only applies with layout=FILE")
    if tolerance is not None and not (isinstance(tolerance, (int, float)) and math.isfinite(tolerance)
                                      and tolerance > 0):
        raise UsageError(f"tolerance={tolerance}: give a positive percentage, e.g. 10")
    if erode is not None and erode < 0:
        raise UsageError(f"erode={erode}: give 0 or a positive number of voxels")
    if min_voxels < 1:
        raise UsageError(f"min_voxels={min_voxels}: give a positive number of voxels")
    if temperature is not None and not (math.isfinite(temperature) and -50 < temperature < 100):
        raise UsageError(f"temperature={temperature}: give the phantom temperature in degrees Celsius")


def _check_outputs_free(out_dir: Path, overwrite: bool, layout: bool) -> None:
    if overwrite or not out_dir.is_dir():
        return
    names = list(FIXED_OUTPUTS) + (["phantom_labels.nii.gz"] if layout else [])
    found = [n for n in names if (out_dir / n).exists()]
    if found:
        raise OutputExistsError(f"{out_dir / found[0]} exists already; pass overwrite=True to replace the phantom "
                                f"outputs, or choose another out_dir=")


def _check_maps(maps: list[MapInput], table) -> None:
    seen: dict[str, Path] = {}
    for m in maps:
        if m.key in seen:
            raise InputError(f"map={m.path} and map={seen[m.key]} both hold {m.key}; give each map its tag=TAG to "
                             f"tell them apart (e.g. tag='ir' and tag='vfa'), or its param=NAME to say what it "
                             f"holds")
        seen[m.key] = m.path
        if m.param not in table.units:
            cols = ", ".join(table.units)
            raise InputError(f"map={m.path} holds {m.param} but {table.path} has no {m.param} column (parameter "
                             f"columns found: {cols}); add a column such as {example_column(m.param)}, or leave "
                             f"this map out")


def _label_image(labels, layout, layout_image, maps, table):
    """(labels, affine, LayoutResult or None, source text)."""
    if labels is not None:
        lab, aff = load_labels(labels)
        present = set(np.unique(lab).tolist()) - {0}
        missing = [k for k in table.labels if k not in present]
        if missing:
            raise InputError(f"{table.path}: label(s) {', '.join(map(str, missing))} do not occur in the label image "
                             f"{labels} (it holds {_list(sorted(present))}); check the numbering or remove those rows")
        return lab, aff, None, str(labels)
    lay = read_layout(layout)
    missing = [k for k in table.labels if k not in set(lay.labels.tolist())]
    if missing:
        raise InputError(f"{table.path}: label(s) {', '.join(map(str, missing))} are not in the layout {layout} "
                         f"(it has {_list(sorted(lay.labels.tolist()))}); add them to the layout or remove those rows")
    if layout_image is not None:
        img = load_image(layout_image, what="layout_image=")
        data = image_data(img, layout_image)
        if data.ndim == 4 and data.shape[3] == 1:
            data = data[..., 0]
        if data.ndim == 2:
            data = data[..., None]
        if data.ndim != 3:
            raise InputError(f"layout_image={layout_image}: has shape {data.shape}; expected one 3D volume")
        aff, source = np.asarray(img.affine, float), str(layout_image)
    else:
        data, aff, source = maps[0].data, maps[0].affine, str(maps[0].path)
    placed = place_rois(data, aff, lay, source=source)
    return placed.labels, aff, placed, f"layout {layout} matched on {source}"


def _list(xs) -> str:
    return ", ".join(map(str, xs[:12])) + (" ..." if len(xs) > 12 else "") if xs else "no labels"


def run_phantom(
    maps,
    *,
    reference,
    out_dir,
    labels=None,
    layout=None,
    layout_image=None,
    params=None,
    tags=None,
    temperature: float | None = None,
    tolerance: float | None = None,
    erode: int | None = None,
    min_voxels: int = 10,
    history=None,
    scanner: str | None = None,
    protocol: str | None = None,
    date: str | None = None,
    overwrite: bool = False,
    command_line: list[str] | None = None,
) -> PhantomReport:
    """Compare ROI statistics of parameter maps with a phantom's reference values.

    Parameters
    ----------
    maps : list of path-like
        Parameter maps (3D NIfTI). The parameter comes from ``params``, else
        the file name (``..._T1map.nii.gz``), else the sidecar ``Parameter``;
        the unit from the sidecar ``Units`` (default: seconds for times, 1/s
        for rates).
    reference : path-like
        Reference CSV (see :mod:`qmap.qa.reference`).
    out_dir : path-like
        Output folder (created if missing).
    labels : path-like, optional
        Integer label image (0 = background); resampled nearest-neighbour
        onto each map's grid when the grids differ. Exactly one of
        ``labels`` and ``layout``.
    layout : path-like, optional
        Vial layout CSV (see :mod:`qmap.qa.layout`); the ROIs are drawn where
        the matched vials are, on the grid of ``layout_image`` (default: the
        first map) and saved as ``phantom_labels.nii.gz``.
    params : list of str or None, optional
        Parameter of each map (None = from the file name).
    tags : list of str or None, optional
        A short label of each map (None = none), e.g. ``"ir"`` and ``"vfa"`` for two T1 maps: rows,
        figures and the history then name the parameter ``T1 (ir)``.
    temperature : float, optional
        Phantom temperature, degrees C; required when the table has several
        temperatures for a vial.
    tolerance : float, optional
        Allowed |error| in percent of the reference (default
        :data:`DEFAULT_TOLERANCE`; per-vial columns of the table override it).
    erode : int, optional
        Voxel layers removed from each ROI against partial volume. Default:
        1 with ``labels`` (label images usually cover whole vials), 0 with
        ``layout`` (``radius_mm`` already is the ROI's radius).
    min_voxels : int
        An ROI with fewer finite voxels fails (with a warning).
    history : path-like, optional
        History CSV to append this session to; the report then shows drift.
    scanner, protocol, date : str, optional
        Session labels (default: from the first map's sidecar; date: today).
    overwrite : bool
        Replace existing phantom outputs in ``out_dir``.

    Returns
    -------
    PhantomReport
        ``exit_code`` is 0 when every ROI is within tolerance, else 3.
    """
    maps = [Path(m) for m in (maps or [])]
    params = list(params) if params is not None else [None] * len(maps)
    tags = list(tags) if tags is not None else [None] * len(maps)
    if len(tags) != len(maps):
        raise UsageError("tags must have one entry (or None) per map")
    tolerance_source = "default" if tolerance is None else "--tolerance"
    _check_options(maps, params, labels, layout, layout_image, tolerance, erode, min_voxels, temperature)
    if erode is None:
        erode = 1 if labels is not None else 0
    tolerance = DEFAULT_TOLERANCE if tolerance is None else float(tolerance)
    out_dir = Path(out_dir)
    _check_outputs_free(out_dir, overwrite, layout is not None)
    table = read_reference(reference)
    entries = table.at(temperature)
    loaded = [load_map(p, par) for p, par in zip(maps, params)]
    for m, tag in zip(loaded, tags):
        m.tag = str(tag or "").strip()
        m.provenance = map_provenance(m.path)
    _check_maps(loaded, table)
    session = session_info(loaded[0].sidecar, date=date, scanner=scanner, protocol=protocol)
    if history is not None and not Path(history).absolute().parent.is_dir():
        raise InputError(f"history={history}: the folder {Path(history).absolute().parent} does not exist; create "
                         f"it or give another path")
    old_history = read_history(history) if history is not None else None
    lab, lab_aff, placed, roi_source = _label_image(labels, layout, layout_image, loaded, table)

    notes: list[str] = list(placed.warnings) if placed else []
    present = set(np.unique(lab).tolist()) - {0}
    extra = sorted(present - set(table.labels))
    if extra:
        notes.append(f"label(s) {_list(extra)} of the label image are not in the reference table; they were ignored")
    if temperature is not None:
        off = [e.label for e in entries.values() if not e.interpolated and e.temperature_C is not None
               and abs(e.temperature_C - temperature) > 0.5]
        if off:
            notes.append(f"vial(s) {_list(off)} have reference values at one temperature only, which differs from "
                         f"temperature={temperature:g} C; they were used without temperature correction")
    rows, views = _measure(loaded, lab, lab_aff, table, entries, tolerance=tolerance, erode=erode,
                           min_voxels=min_voxels, notes=notes)
    passed = all(r.pass_ for r in rows)

    history_rows, trends = (_update_history(history, old_history, rows, session, entries, notes)
                            if history is not None else (None, {}))
    for w in notes:
        warn(w)

    settings = {
        "temperature_C": temperature, "tolerance_pct": float(tolerance), "tolerance_source": tolerance_source,
        "erode_voxels": int(erode),
        "min_voxels": int(min_voxels), "error_basis": ERROR_BASIS, "roi_source": roi_source,
        "reference": str(Path(reference)), "reference_units": dict(table.units),
        "interpolated_vials": [e.label for e in entries.values() if e.interpolated],
        "maps": [{"path": str(v.map.path), "parameter": v.map.param, "tag": v.map.tag, "unit": v.map.unit,
                  "produced_by": v.map.provenance,
                  "unit_source": v.map.unit_source, "parameter_source": v.map.param_source,
                  "labels_resampled": v.resampled} for v in views],
    }
    report = PhantomReport(rows, passed, out_dir, [], notes, placed.summary() if placed else None,
                           [t.as_dict() for t in trends.values()], settings)
    report.written = write_outputs(
        out_dir, overwrite=overwrite, report=report, views=views, session=session, placed=placed,
        label_affine=lab_aff, history_path=history, history_rows=history_rows, trends=trends,
        inputs=[*maps, reference] + [p for p in (labels, layout, layout_image) if p is not None],
        version=__version__, command_line=command_line, describe_failure=describe_failure,
    )
    return report


def _fov(shape, affine) -> str:
    """World-coordinate bounding box of a grid, for messages."""
    corners = np.array([[i, j, k, 1] for i in (0, shape[0] - 1) for j in (0, shape[1] - 1)
                        for k in (0, (shape[2] if len(shape) > 2 else 1) - 1)], float)
    w = corners @ np.asarray(affine, float).T
    lo, hi = w[:, :3].min(0), w[:, :3].max(0)
    return f"x {lo[0]:.0f}..{hi[0]:.0f}, y {lo[1]:.0f}..{hi[1]:.0f}, z {lo[2]:.0f}..{hi[2]:.0f} mm"


def _measure(loaded, lab, lab_aff, table, entries, *, tolerance, erode, min_voxels, notes):
    """ROI statistics of every map x vial with a reference; appends warnings to ``notes``."""
    rows, views = [], []
    for m in loaded:
        lab_m, resampled = labels_on_grid(lab, lab_aff, m.data.shape, m.affine)
        unit = table.units[m.param]
        factor = conversion(m.param, m.unit, unit)
        wanted = [k for k in table.labels if m.param in entries[k].values]
        rois = roi_masks(lab_m, wanted, erode_voxels=erode)
        labelled = np.isin(lab_m, wanted)
        if not np.any(labelled & np.isfinite(m.data)):
            why = ("the label image and the map do not overlap" if not labelled.any()
                   else "the map has no finite value inside any labelled vial")
            raise InputError(
                f"{m.path.name}: {why} (map field of view {_fov(m.data.shape, m.affine)}, labels "
                f"{_fov(lab.shape, lab_aff)}); check that labels= and map= belong to the same scan"
            )
        se_map = _stderr_map(m)
        status, _, status_note = status_beside(m.path, m.data.shape, m.affine)
        if status_note:
            notes.append(status_note)
        for k in wanted:
            e = entries[k]
            values, excluded = roi_values(m.data, rois[k], status)  # the same ROI values as `qmap roi`
            r = roi_statistics(values * factor, label=k, name=e.name, parameter=m.param, unit=unit,
                               reference=e.values[m.param], tolerance_pct=e.tolerance_pct.get(m.param, tolerance),
                               min_voxels=min_voxels, map_name=m.path.name,
                               stderr_values=None if se_map is None else roi_values(se_map, rois[k], status)[0] * factor)
            r.n_excluded = int(sum(excluded.values()))
            r.source = m.tag
            rows.append(r)
            if r.too_small:
                notes.append(f"vial {k} {m.key}: {r.n_voxels} usable voxels in the ROI, fewer than the minimum "
                             f"{min_voxels}; counted as not passed -- check the ROI figure, the label image or erode=")
            elif r.n_nonfinite + r.n_excluded > 0.1 * (r.n_voxels + r.n_nonfinite + r.n_excluded):
                notes.append(f"vial {k} {m.key}: {r.n_nonfinite + r.n_excluded} of "
                             f"{r.n_voxels + r.n_nonfinite + r.n_excluded} ROI voxels have no value in {m.path.name} "
                             f"or were not fitted (status map); statistics use the rest")
        notes.extend(_unit_sanity(m, [r for r in rows if r.key == m.key]))
        views.append(MapView(m, lab_m, rois, factor, unit, resampled))
    return rows, views


def _stderr_map(m: MapInput) -> np.ndarray | None:
    """The standard-error map a fit wrote beside ``m`` (same grid), for the ROI table's mean SE; else None."""
    from ..io.writer import stderr_map_beside

    path = stderr_map_beside(m.path)
    if path is None:
        return None
    img = load_image(path, what="standard-error map")
    if tuple(img.shape[:3]) != tuple(m.data.shape) or not np.allclose(img.affine, m.affine, atol=1e-3):
        return None
    return np.abs(image_data(img, path).reshape(m.data.shape))


def _update_history(history, old_history, rows, session, entries, notes):
    """The history with this session merged in, and the trends of this session's vials."""
    new = [_history_row(r, session, entries[r.label].temperature_C) for r in rows]
    history_rows, replaced = merge_session(old_history, new)
    if replaced:
        notes.append(f"the history {history} already held this session ({session.date}, {session.scanner}, "
                     f"{session.protocol}); its rows were replaced")
    if session.sources["date"] == "today":
        notes.append(f"no date= and no acquisition date in the sidecar: the history records today's date "
                     f"{session.date}")
    trends = find_trends(history_rows, session.scanner, session.protocol,
                         [(r.label, r.key) for r in rows],
                         {(r.label, r.key): r.tolerance_pct for r in rows})
    return history_rows, trends


def _unit_sanity(m: MapInput, rows) -> list[str]:
    ratio = [r.median / r.reference for r in rows if r.n_voxels and r.median > 0]
    if not ratio:
        return []
    q = float(np.median(ratio))
    if 300 < q < 3000 or 1 / 3000 < q < 1 / 300:
        return [(f"{m.path.name}: the measured {m.param} values are about {q:.3g} times the reference; the map's unit "
                f"({m.unit}, from {'its sidecar' if m.unit_source == 'sidecar' else 'the default'}) is probably "
                f"wrong -- set Units in its JSON sidecar")]
    return []


def _history_row(r: RoiResult, session, temperature) -> dict:
    return {"date": session.date, "scanner": session.scanner, "protocol": session.protocol, "label": r.label,
            "name": r.name, "parameter": r.key, "unit": r.unit, "reference": fmt(r.reference),
            "median": fmt(r.median), "mean": fmt(r.mean), "error_pct": fmt(r.error_pct),
            "tolerance_pct": fmt(r.tolerance_pct), "pass": "true" if r.pass_ else "false",
            "temperature_C": fmt(temperature), "qmap_version": __version__}
