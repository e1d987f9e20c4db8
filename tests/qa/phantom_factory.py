"""An invented relaxometry phantom for the phantom-QA tests (no committed binaries).

Eight vials of radius 10 mm in a 64 x 64 x 3 grid of 2 x 2 x 4 mm voxels, at
irregular positions (so a rigid match of the layout is unambiguous). Each
vial has reference T1 / T2 values at 18 and 24 degC; the maps hold the
values linearly interpolated to the scan temperature, times (1 + relative
Gaussian noise), and NaN outside the vials (as a masked fit would write).
"""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np

SHAPE = (64, 64, 3)
VOXEL = (2.0, 2.0, 4.0)
AFFINE = np.array([[2.0, 0, 0, -63.0], [0, 2.0, 0, -63.0], [0, 0, 4.0, -4.0], [0, 0, 0, 1]])
RADIUS_MM = 10.0

# vial centres in the phantom's own frame (mm): irregular on purpose
LAYOUT_XY = np.array([
    [0.0, 0.0], [38.0, 4.0], [22.0, 33.0], [-17.0, 36.0],
    [-40.0, 8.0], [-28.0, -30.0], [6.0, -40.0], [36.0, -26.0],
])
NAMES = ["A", "B", "C", "D", "E", "F", "G", "H"]
# reference values (ms) at 18 and 24 degC -- invented, spanning the usual range
T1_18 = np.array([1800.0, 1400.0, 1000.0, 700.0, 450.0, 300.0, 180.0, 100.0])
T1_24 = np.array([1920.0, 1460.0, 1060.0, 730.0, 470.0, 315.0, 186.0, 104.0])
T2_18 = np.array([900.0, 600.0, 420.0, 260.0, 160.0, 95.0, 55.0, 30.0])
T2_24 = np.array([960.0, 636.0, 444.0, 272.0, 170.0, 101.0, 57.0, 32.0])


def world_xy(shape=SHAPE, affine=AFFINE):
    """World x, y (mm) of every voxel centre: two (X, Y) arrays."""
    i, j = np.meshgrid(np.arange(shape[0]), np.arange(shape[1]), indexing="ij")
    return affine[0, 0] * i + affine[0, 1] * j + affine[0, 3], affine[1, 0] * i + affine[1, 1] * j + affine[1, 3]


def true_labels(*, angle_deg=0.0, shift_mm=(0.0, 0.0), radius_mm=RADIUS_MM, shape=SHAPE, affine=AFFINE):
    """Label image of the vials rotated by ``angle_deg`` about the centre and shifted by ``shift_mm``."""
    a = np.radians(angle_deg)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    centres = LAYOUT_XY @ rot.T + np.asarray(shift_mm)
    x, y = world_xy(shape, affine)
    lab2 = np.zeros(shape[:2], np.int16)
    for k, (cx, cy) in enumerate(centres, start=1):
        lab2[(x - cx) ** 2 + (y - cy) ** 2 <= radius_mm**2] = k
    return np.repeat(lab2[:, :, None], shape[2], axis=2)


def truth_at(temperature):
    """(T1 ms, T2 ms) per vial linearly interpolated between 18 and 24 degC."""
    w = (temperature - 18.0) / 6.0
    return T1_18 + w * (T1_24 - T1_18), T2_18 + w * (T2_24 - T2_18)


def write_nifti(path: Path, data, affine=AFFINE, sidecar=None) -> Path:
    arr = np.asarray(data)
    if arr.dtype == np.float64:
        arr = arr.astype(np.float32)
    nib.save(nib.Nifti1Image(arr, affine), str(path))
    if sidecar is not None:
        Path(str(path).replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return path


def reference_csv(path: Path, *, extra_cols: str = "", rows_extra=None) -> Path:
    """T1 in ms and T2 in s, two temperature rows per vial."""
    lines = [f"label,name,temperature_C,T1_ms,T2_s{extra_cols}"]
    for k in range(8):
        for t, t1, t2 in ((18, T1_18[k], T2_18[k]), (24, T1_24[k], T2_24[k])):
            extra = "" if rows_extra is None else rows_extra(k + 1, t)
            lines.append(f"{k + 1},{NAMES[k]},{t},{t1:g},{t2 / 1000:g}{extra}")
    path.write_text("\n".join(lines) + "\n")
    return path


def make_phantom(folder: Path, *, temperature=21.5, off=None, noise=0.02, seed=1, labels=None,
                 t1_units="s", t2_units="ms"):
    """Write labels, a T1 map (seconds) and a T2 map (ms), and the reference CSV; return their paths.

    ``off``: {label: factor} multiplies that vial's T1 (a deliberately wrong vial).
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    lab = true_labels() if labels is None else labels
    t1, t2 = truth_at(temperature)
    t1map = np.full(SHAPE, np.nan)
    t2map = np.full(SHAPE, np.nan)
    for k in range(1, 9):
        m = lab == k
        f = (off or {}).get(k, 1.0)
        t1map[m] = t1[k - 1] * f * (1 + noise * rng.standard_normal(m.sum()))
        t2map[m] = t2[k - 1] * (1 + noise * rng.standard_normal(m.sum()))
    scale = {"s": 1e-3, "ms": 1.0}
    p = {
        "labels": write_nifti(folder / "phantom_dseg.nii.gz", lab.astype(np.int16)),
        "t1": write_nifti(folder / "sess_T1map.nii.gz", t1map * scale[t1_units], sidecar={"Units": t1_units}),
        "t2": write_nifti(folder / "sess_T2map.nii.gz", t2map * scale[t2_units], sidecar={"Units": t2_units}),
        "ref": reference_csv(folder / "reference.csv"),
    }
    return p
