"""``qmap roi``: statistics of any maps inside the labels of an integer label image.

No reference values are needed (that is ``qmap phantom``, which measures its
ROIs with the same code: :func:`qmap.qa.stats.summarise` and
:func:`qmap.qa.rois.roi_values`). For each label x map one row: the number
of voxels used, mean, median, sd, robust sd (1.4826 x MAD), 5th and 95th
percentiles, in the map's unit (its sidecar ``Units``). The label image is
resampled (nearest neighbour) onto each map's grid when the grids differ.
When qmap's status map lies beside a map (``{prefix}_desc-status_fitmap``),
only fitted voxels (status 0) are used and the others are counted in the row
(``n_excluded``). Names come from a BIDS ``dseg.tsv``-style table (columns
``index``, ``name``) beside the label image or given with ``names``.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from .. import __version__
from ..errors import InputError, OutputExistsError, UsageError, warn
from ..io.writer import AtomicWriter, sha256_file
from ..qa.inputs import MapInput, label_names, labels_on_grid, load_any_map, load_labels, status_beside
from ..qa.results import fmt
from ..qa.rois import roi_masks, roi_values
from ..qa.stats import ValueSummary, summarise

__all__ = ["CSV_COLUMNS", "OUTPUTS", "RoiReport", "RoiStats", "measure_map", "run_roi"]

#: Files written into the output folder.
OUTPUTS = ("roi_stats.csv", "roi_stats.json")

#: Columns of roi_stats.csv, in this order.
CSV_COLUMNS = ["label", "name", "parameter", "unit", "n_voxels", "mean", "median", "sd", "robust_sd", "p5", "p95",
               "n_excluded", "n_nonfinite", "slice", "map"]


@dataclass
class RoiStats(ValueSummary):
    """Statistics of one label x map (or of one slice of it), in the map's unit.

    The statistics of :class:`~qmap.qa.stats.ValueSummary` (``n_voxels`` counts the voxels used,
    ``n_nonfinite`` the ROI voxels whose value is NaN / inf), and which label, map and slice they describe:
    ``n_excluded`` counts the ROI voxels left out because qmap's status map says they were not fitted
    (status != 0; per code in ``excluded_by_status``); ``slice`` is the index along the third array axis for
    per-slice rows, None for the whole ROI.
    """

    label: int
    name: str
    parameter: str
    unit: str
    n_excluded: int
    slice: int | None
    map: str
    excluded_by_status: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        """The row as JSON-ready values, in the order of :data:`CSV_COLUMNS` (NaN as None)."""
        d = asdict(self)
        d["excluded_by_status"] = {str(k): v for k, v in self.excluded_by_status.items()}
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v)
                for k, v in ((k, d[k]) for k in [*CSV_COLUMNS, "excluded_by_status"])}


@dataclass
class RoiReport:
    """What ``qmap roi`` measured and wrote."""

    rows: list
    out_dir: Path
    written: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)

    def table(self) -> str:
        """The rows as an aligned text table (4 significant digits)."""
        head = ["label", "name", "parameter", "unit", "n", "mean", "median", "sd", "robust_sd", "p5", "p95",
                "excluded"]
        if any(r.slice is not None for r in self.rows):
            head.insert(1, "slice")
        body = []
        for r in self.rows:
            cells = [str(r.label), r.name or "-", r.parameter, r.unit or "-", str(r.n_voxels)]
            cells += [fmt(getattr(r, k), 4) or "nan" for k in ("mean", "median", "sd", "robust_sd", "p5", "p95")]
            cells.append(str(r.n_excluded))
            if "slice" in head:
                cells.insert(1, "" if r.slice is None else str(r.slice))
            body.append(cells)
        widths = [max(len(h), *(len(c[i]) for c in body)) if body else len(h) for i, h in enumerate(head)]
        left = {"name", "parameter", "unit"}

        def line(cells):
            return "  ".join(c.ljust(w) if h in left else c.rjust(w) for h, c, w in zip(head, cells, widths))

        text = [line(head)] + [line(cells) for cells in body]
        return "\n".join(text)

    def summary(self) -> str:
        n_maps = len(self.settings.get("maps", []))
        tail = f"{len(self.rows)} rows ({n_maps} map{'s' if n_maps != 1 else ''}); wrote {self.out_dir / 'roi_stats.csv'}"
        return self.table() + "\n" + tail


def measure_map(m: MapInput, labels: np.ndarray, labels_affine: np.ndarray, wanted, names: dict, *,
                erode: int = 0, per_slice: bool = False, use_status: bool = True) -> tuple[list, list, dict]:
    """The rows of one map: every wanted label (and, with ``per_slice``, every slice it covers).

    Returns
    -------
    rows : list of RoiStats
    notes : list of str
        Warnings (status map not usable, a label with no voxel on this grid).
    info : dict
        ``labels_resampled`` (bool) and ``status_map`` (path or None).
    """
    lab_m, resampled = labels_on_grid(labels, labels_affine, m.data.shape, m.affine)
    status, spath, why = status_beside(m.path, m.data.shape, m.affine) if use_status else (None, None, None)
    notes = [why] if why else []
    rois = roi_masks(lab_m, wanted, erode_voxels=erode)
    rows = []
    for k in wanted:
        roi = rois[k]
        parts: list[tuple[int | None, np.ndarray]] = [(None, roi)]
        if per_slice:
            for zi in np.flatnonzero(roi.any(axis=(0, 1))).tolist():
                sl = np.zeros_like(roi)
                sl[:, :, zi] = roi[:, :, zi]
                parts.append((int(zi), sl))
        for z, mask in parts:
            values, excluded = roi_values(m.data, mask, status)
            s = summarise(values)
            rows.append(RoiStats(**vars(s), label=int(k), name=names.get(int(k), ""), parameter=m.param,
                                 unit=m.unit, n_excluded=int(sum(excluded.values())), slice=z, map=m.path.name,
                                 excluded_by_status=excluded))
        if not roi.any():
            notes.append(f"label {k}: no voxel on the grid of {m.path.name}"
                         + (" after erosion" if erode and (lab_m == k).any() else "")
                         + "; its statistics are empty (NaN)")
    return rows, notes, {"labels_resampled": bool(resampled), "status_map": str(spath) if spath else None}


def stats_csv(rows) -> bytes:
    """roi_stats.csv: one line per row, :data:`CSV_COLUMNS`; NaN as an empty cell."""
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(CSV_COLUMNS)
    for r in rows:
        w.writerow([r.label, r.name, r.parameter, r.unit, r.n_voxels] + [fmt(getattr(r, k)) for k in
                   ("mean", "median", "sd", "robust_sd", "p5", "p95")]
                   + [r.n_excluded, r.n_nonfinite, "" if r.slice is None else r.slice, r.map])
    return buf.getvalue().encode()


def run_roi(maps, *, labels, out_dir, params=None, names=None, erode: int = 0, per_slice: bool = False,
            use_status: bool = True, overwrite: bool = False, command_line: list[str] | None = None) -> RoiReport:
    """Statistics of every map inside every label of ``labels``; writes roi_stats.csv / .json.

    Parameters
    ----------
    maps : list of path-like
        3D maps (any parameter; see :func:`qmap.qa.inputs.load_any_map` for how the parameter and unit
        are found).
    labels : path-like
        Integer label image (0 = background); every non-zero label present is measured.
    out_dir : path-like
        Output folder (created if missing).
    params : list of (str or None), optional
        Parameter name of each map (None = from its file name).
    names : path-like, optional
        Label table (tab separated, columns ``index`` and ``name``); default: ``<labels stem>.tsv`` beside
        the label image when it exists.
    erode : int
        Voxel layers removed from each label (6-connected) before measuring; default 0.
    per_slice : bool
        Also one row per label x map x slice (third array axis of the map).
    use_status : bool
        Exclude voxels that qmap's status map (beside a map) marks as not fitted.
    overwrite : bool
        Replace existing roi_stats.* in ``out_dir``.

    Returns
    -------
    RoiReport
    """
    maps = [Path(m) for m in (maps or [])]
    if not maps:
        raise UsageError("maps is empty: give at least one map (e.g. maps=['sub-01_T1map.nii.gz'])")
    params = list(params) if params is not None else [None] * len(maps)
    if len(params) != len(maps):
        raise UsageError("params must have one entry (or None) per map")
    if erode < 0:
        raise UsageError(f"erode={erode}: give 0 or a positive number of voxels")
    out_dir = Path(out_dir)
    if not overwrite:
        found = [n for n in OUTPUTS if (out_dir / n).exists()]
        if found:
            raise OutputExistsError(f"{out_dir / found[0]} exists already; pass overwrite=True to replace it, or "
                                    f"choose another out_dir=")
    lab, lab_aff = load_labels(labels)
    table, table_path = label_names(labels, names)
    wanted = sorted(set(np.unique(lab).tolist()) - {0})
    loaded = [load_any_map(p, par) for p, par in zip(maps, params)]
    rows: list[RoiStats] = []
    notes: list[str] = []
    map_info = []
    for m in loaded:
        r, n, info = measure_map(m, lab, lab_aff, wanted, table, erode=erode, per_slice=per_slice,
                                 use_status=use_status)
        if not any(x.n_voxels for x in r):
            raise InputError(f"{m.path.name}: no finite value inside any label (the label image and the map may not "
                             f"overlap); check that labels= and map= belong to the same scan")
        rows += r
        notes += n
        map_info.append({"path": str(m.path.absolute()), "parameter": m.param, "parameter_source": m.param_source,
                         "unit": m.unit, "unit_source": m.unit_source, **info})
    missing = [k for k in wanted if table and k not in table]
    if missing and table_path is not None:
        notes.append(f"{table_path.name}: no name for label(s) {', '.join(map(str, missing))}")
    for w in notes:
        warn(w)
    settings = {"labels": str(Path(labels).absolute()), "names": str(table_path) if table_path else None,
                "erode_voxels": int(erode), "per_slice": bool(per_slice), "use_status": bool(use_status),
                "maps": map_info}
    report = RoiReport(rows, out_dir, [], notes, settings)
    inputs = [*maps, Path(labels)] + ([table_path] if table_path else [])
    result = {
        "qmap_version": __version__, "command_line": list(command_line or []),
        "inputs": [{"path": str(Path(p).absolute()), "sha256": sha256_file(p)} for p in inputs],
        "settings": settings, "columns": CSV_COLUMNS, "rows": [r.as_dict() for r in rows], "warnings": notes,
        "statistics": ("n_voxels: voxels used (status 0 where qmap's status map lies beside the map, finite "
                       "values); sd with ddof=1; robust_sd = 1.4826 x median absolute deviation; p5/p95: "
                       "percentiles with linear interpolation"),
    }
    with AtomicWriter(out_dir, overwrite=overwrite) as w:
        w.stage_bytes("roi_stats.csv", stats_csv(rows))
        w.stage_json("roi_stats.json", result)
        report.written = w.commit()
    return report
