"""ROI placement from a vial layout: detect the vials, match the layout rigidly, draw ROIs.

Layout file (CSV)::

    label,name,x_mm,y_mm,radius_mm
    1,vial A,0,0,6
    2,vial B,40,0,6
    ...

``label`` (the vial's number, as in the reference table), ``x_mm``,
``y_mm`` (vial centre in the phantom's own frame, mm), ``radius_mm`` (radius
of the ROI to draw, mm -- smaller than the vial, to stay clear of its wall;
the drawn ROIs are therefore not eroded unless ``--erode`` asks for it),
optional ``z_mm`` and ``name``.

Geometry:

- **2D** (no ``z_mm``, all ``z_mm`` equal, or a single-slice image): the
  layout is matched in the slice plane of the detection image. The plane's
  x axis is the first voxel axis' direction in world space; y is the second
  voxel axis', sign chosen so the plane is seen from the positive end of the
  world (RAS) axis closest to the slice normal. ROIs are discs of
  ``radius_mm`` on every slice the matched vial occupies (for a vial that
  was not detected: the slices all detected vials share).
- **3D** (``z_mm`` varies): matched in world coordinates; ROIs are spheres.

The layout is matched as written and as its mirror image (x flipped); the
better fit wins, and a mirrored fit is accepted with a warning (the layout
was written as seen from the other side). A pair counts only within
0.15 x the smallest vial spacing (at least 1.5 voxels, at most 0.45 x the
spacing); at least 3 vials and half of the layout must pair up. The label image actually drawn is
written as ``phantom_labels.nii.gz`` so it can be checked, and reused with
``--labels``.
"""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from .detect import find_blobs
from .reference import number_cell, read_text_table
from .register import MatchFailure, RigidMatch, register_points

__all__ = ["Layout", "LayoutResult", "place_rois", "plane_basis", "read_layout"]


@dataclass
class Layout:
    """Vial centres in the phantom's frame (mm) and ROI radii (mm)."""

    labels: np.ndarray  # (n,) int
    names: list
    xyz: np.ndarray  # (n, 3) mm; z = 0 when absent
    radius_mm: np.ndarray  # (n,)
    has_z: bool
    path: str = ""

    @property
    def is_3d(self) -> bool:
        return self.has_z and float(np.ptp(self.xyz[:, 2])) > 1e-6


def _field(rec, cols, key, where, required=True) -> float:
    col = cols.get(key)
    return number_cell(rec.get(col) if col else None, where=where, what=key, required=required)


def read_layout(path: str | Path) -> Layout:
    """Read a layout CSV (see the module docstring)."""
    p = Path(path)
    text = read_text_table(p, what=f"layout={p}", missing_hint="check the path")
    lines = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if not lines:
        raise InputError(f"layout={p}: the file is empty; expected label,x_mm,y_mm,radius_mm columns")
    delim = max((",", ";", "\t"), key=lines[0].count)
    reader = csv.DictReader(io.StringIO("\n".join(lines)), delimiter=delim)
    cols = {c.strip().lower(): c for c in reader.fieldnames or []}
    missing = [c for c in ("label", "x_mm", "y_mm", "radius_mm") if c not in cols]
    if missing:
        raise InputError(f"layout={p}: missing column(s) {', '.join(missing)} (found: "
                         f"{', '.join(c.strip() for c in reader.fieldnames or [])}); expected label, x_mm, y_mm, "
                         f"radius_mm and optionally z_mm, name")
    labels: list[int] = []
    names: list[str] = []
    rows: list[list[float]] = []
    radius: list[float] = []
    for i, rec in enumerate(reader, start=2):
        where = f"layout={p} row {i}"
        lab = _field(rec, cols, "label", where)
        if lab != int(lab) or lab <= 0:
            raise InputError(f"{where}: label {lab:g} is not a positive integer")
        r = _field(rec, cols, "radius_mm", where)
        if r <= 0:
            raise InputError(f"{where}: radius_mm {r:g} must be positive")
        z = _field(rec, cols, "z_mm", where, required=False) if "z_mm" in cols else 0.0
        labels.append(int(lab))
        names.append((rec.get(cols["name"]) or "").strip() if "name" in cols else "")
        rows.append([_field(rec, cols, "x_mm", where), _field(rec, cols, "y_mm", where), 0.0 if math.isnan(z) else z])
        radius.append(r)
    if len(labels) < 3:
        raise InputError(f"layout={p}: {len(labels)} vial(s); at least 3 are needed to place the ROIs rigidly")
    if len(set(labels)) != len(labels):
        raise InputError(f"layout={p}: a label appears twice; give each vial one row")
    xyz = np.array(rows, float)
    if np.min(np.linalg.norm(xyz[:, None] - xyz[None], axis=-1) + np.eye(len(xyz)) * 1e9) < 1e-6:
        raise InputError(f"layout={p}: two vials share one position")
    return Layout(np.array(labels), names, xyz, np.array(radius, float), "z_mm" in cols, str(p))


def plane_basis(affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit vectors (u, v) of the slice plane in world space (see the module docstring)."""
    a = np.asarray(affine, float)[:3, :3]
    u = a[:, 0] / np.linalg.norm(a[:, 0])
    v = a[:, 1] - (a[:, 1] @ u) * u
    v /= np.linalg.norm(v)
    n = np.cross(u, v)
    if n[np.argmax(np.abs(n))] < 0:
        v = -v
    return u, v


def _world(ijk: np.ndarray, affine: np.ndarray) -> np.ndarray:
    return ijk @ affine[:3, :3].T + affine[:3, 3]


@dataclass
class LayoutResult:
    """What layout-based placement did."""

    labels: np.ndarray  # (X, Y, Z) int32 on the detection image's grid
    affine: np.ndarray
    match: RigidMatch
    geometry: str  # "2D" or "3D"
    n_detected: int
    threshold: str
    mirrored: bool
    residual_mm: dict  # label -> distance between matched layout vial and detection (mm)
    not_detected: list  # labels whose ROI was placed from the layout alone
    rotation_deg: float  # angle of the rotation layout -> image (of its proper part when mirrored)
    warnings: list = field(default_factory=list)

    def summary(self) -> dict:
        return {
            "geometry": self.geometry, "detected_components": self.n_detected, "threshold": self.threshold,
            "matched_vials": len(self.match.pairs), "rms_residual_mm": self.match.rms_mm,
            "max_residual_mm": self.match.max_mm, "rotation_deg": self.rotation_deg,
            "mirrored": self.mirrored, "residual_mm": {str(k): v for k, v in self.residual_mm.items()},
            "not_detected": self.not_detected,
        }


def _accept_mm(pts: np.ndarray, zooms) -> float:
    d = np.linalg.norm(pts[:, None] - pts[None], axis=-1) + np.eye(len(pts)) * 1e12
    nn = float(d.min())
    return min(max(0.15 * nn, 1.5 * float(max(zooms[:2]))), 0.45 * nn)


def place_rois(image: np.ndarray, affine: np.ndarray, layout: Layout, *, source: str = "the detection image"
               ) -> LayoutResult:
    """Detect the vials on ``image``, match ``layout`` to them and draw the ROIs.

    Parameters
    ----------
    image : (X, Y, Z) ndarray
        Detection image (vials bright, NaN = background).
    affine : (4, 4) ndarray
    layout : Layout

    Raises
    ------
    InputError
        The vials cannot be matched (too few detected, no consistent transform, or ambiguous).
    """
    affine = np.asarray(affine, float)
    zooms = np.sqrt((affine[:3, :3] ** 2).sum(axis=0))
    warnings = []
    three_d = layout.is_3d and image.shape[2] > 1
    if layout.is_3d and not three_d:
        warnings.append("the layout has z_mm values but the detection image is a single slice; matched in 2D")
    blobs, thr = find_blobs(image, zooms, min_radius_mm=0.7 * float(layout.radius_mm.min()),
                            max_radius_mm=6.0 * float(layout.radius_mm.max()), expected=len(layout.labels))
    n = len(layout.labels)
    min_pairs = min(n, max(3, math.ceil(n / 2)))
    cent = np.array([b.centroid for b in blobs]).reshape(-1, 3)
    if three_d:
        u = v = None
        det, lay = _world(cent, affine), layout.xyz
    else:
        u, v = plane_basis(affine)
        w = _world(cent, affine)
        det, lay = np.stack([w @ u, w @ v], axis=1), layout.xyz[:, :2]
    accept = _accept_mm(lay, zooms)
    distinct = max(0.5, 0.5 * float(max(zooms[:2])))
    flip = np.ones(lay.shape[1])
    flip[0] = -1
    found, errors = {}, {}
    for mirrored, pts in ((False, lay), (True, lay * flip)):
        try:
            found[mirrored] = register_points(pts, det, accept_mm=accept, min_pairs=min_pairs, distinct_mm=distinct)
        except MatchFailure as exc:
            errors[mirrored] = exc
    if not found:
        raise InputError(f"layout={layout.path}: the vials on {source} cannot be matched to the layout: "
                         f"{errors[False]} ({len(blobs)} vial-like components found by {thr}); check the layout, "
                         f"give a layout_image=FILE where the vials are bright and separate (e.g. an M0 map when the "
                         f"vials sit in a darker fill), or pass labels=FILE")
    mirrored = min(found, key=lambda k: (-len(found[k].pairs), found[k].rms_mm))
    match, other = found[mirrored], found.get(not mirrored)
    if other is not None and len(other.pairs) == len(match.pairs) and \
            other.rms_mm <= max(2.0 * match.rms_mm, match.rms_mm + distinct):
        mirrored, match = False, found[False]  # as good either way: keep the documented handedness
        warnings.append(f"the layout {layout.path} is mirror-symmetric: it fits the image as written and mirrored, "
                        f"with different vial numbers; the documented handedness was assumed -- check "
                        f"phantom_labels.nii.gz")
    elif mirrored:
        warnings.append(f"the layout {layout.path} matches the image only as its mirror image (x flipped); check "
                        f"phantom_labels.nii.gz, and flip x_mm in the layout if it was written from the other side")
    rotation_deg = match.angle_deg  # of the proper rotation, before folding the mirror into the matrix
    if mirrored:
        match.rotation = match.rotation @ np.diag(flip)
    centres = match.apply(lay)
    matched = {int(i): int(j) for i, j in match.pairs}
    residual = {int(layout.labels[i]): float(r) for (i, _), r in zip(match.pairs, match.residuals_mm)}
    not_detected = [int(layout.labels[i]) for i in range(n) if i not in matched]
    if not_detected:
        warnings.append(f"vial(s) {', '.join(map(str, not_detected))} were not detected on {source}; their ROIs "
                        f"were placed from the layout alone -- check them in the ROI figure")
    k_ranges = {i: blobs[j].k_range for i, j in matched.items()}
    lo = max(k[0] for k in k_ranges.values())
    hi = min(k[1] for k in k_ranges.values())
    common = (lo, hi) if lo <= hi else (min(k[0] for k in k_ranges.values()), max(k[1] for k in k_ranges.values()))
    labels, overlap = _draw(image.shape, affine, centres, layout, k_ranges, common, u, v)
    if overlap:
        warnings.append(f"{overlap} voxels lie within the radius of two ROIs; each went to the nearer vial "
                        f"(radius_mm in the layout may be too large)")
    return LayoutResult(labels, affine, match, "3D" if three_d else "2D", len(blobs), thr, mirrored, residual,
                        not_detected, rotation_deg, warnings)


def _draw(shape, affine, centres, layout: Layout, k_ranges, common, u, v) -> tuple[np.ndarray, int]:
    labels = np.zeros(shape, np.int32)
    best = np.full(shape, np.inf)
    hits = np.zeros(shape, np.int16)
    ii, jj = np.meshgrid(np.arange(shape[0]), np.arange(shape[1]), indexing="ij")
    for k in range(shape[2]):
        w = _world(np.stack([ii, jj, np.full_like(ii, k)], axis=-1).reshape(-1, 3).astype(float), affine)
        coords = w if u is None else np.stack([w @ u, w @ v], axis=1)
        for idx, c in enumerate(centres):
            if u is not None:
                k0, k1 = k_ranges.get(idx, common)
                if not k0 <= k <= k1:
                    continue
            d = np.linalg.norm(coords - c, axis=1).reshape(shape[:2])
            inside = d <= layout.radius_mm[idx]
            hits[:, :, k] += inside
            take = inside & (d < best[:, :, k])
            best[:, :, k][take] = d[take]
            labels[:, :, k][take] = layout.labels[idx]
    return labels, int((hits > 1).sum())
