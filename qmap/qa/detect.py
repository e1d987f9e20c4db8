"""Finding vials on an image: compact bright connected components of plausible size.

A few foreground thresholds are tried -- "any positive value" when most of
the image is zero / NaN (a fitted map whose background was masked out),
Otsu's threshold of the values and of their logarithm (vials spanning a
decade of T1 are then still foreground), and half of Otsu's -- and the one
giving the most plausible vials (up to the number expected) wins. Holes are
filled slice by slice (a failed fit inside a vial is not an edge). A
component is a plausible vial when, on the slice where it is largest,

- its equivalent radius sqrt(area / pi) lies between ``min_radius_mm`` and
  ``max_radius_mm``, and
- it is compact: area / (pi r_max^2) >= 0.45, r_max being the largest
  distance of its voxels from their centroid (about 0.7 for a digitised
  disc of 4 voxels radius, 0.25 or less for rings, bars and crescents).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from ..noise_level import otsu_threshold

__all__ = ["MIN_COMPACTNESS", "Blob", "find_blobs"]

MIN_COMPACTNESS = 0.45
_CROSS = ndimage.generate_binary_structure(3, 1)


@dataclass
class Blob:
    """One detected component.

    Attributes
    ----------
    centroid : (3,) ndarray
        Centroid in voxel coordinates (i, j, k) of the image.
    n_voxels : int
    k_range : (int, int)
        First and last slice (third voxel axis) it occupies.
    radius_mm : float
        Equivalent in-plane radius on its largest slice.
    compactness : float
        area / (pi r_max^2) on its largest slice (1 for a perfect disc).
    """

    centroid: np.ndarray
    n_voxels: int
    k_range: tuple
    radius_mm: float
    compactness: float


def _thresholds(img: np.ndarray) -> list[tuple[str, float]]:
    finite = np.isfinite(img)
    vals = img[finite]
    out = []
    empty = (~finite).sum() + (vals == 0).sum()
    if empty >= 0.1 * img.size and (vals > 0).any():
        out.append(("positive values", 0.0))
    if vals.size and np.ptp(vals) > 0:
        t = otsu_threshold(vals)
        out.append(("Otsu threshold", t))
        pos = vals[vals > 0]
        if pos.size and np.ptp(pos) > 0:
            out.append(("Otsu threshold of log values", float(np.exp(otsu_threshold(np.log(pos))))))
        if t > 0:
            out.append(("half Otsu threshold", 0.5 * t))
    return out


def _blobs(fg: np.ndarray, zooms, min_area_mm2: float) -> list[Blob]:
    for k in range(fg.shape[2]):
        fg[:, :, k] = ndimage.binary_fill_holes(fg[:, :, k])
    lab, n = ndimage.label(fg, structure=_CROSS)
    if n == 0:
        return []
    dx, dy = float(zooms[0]), float(zooms[1])
    sizes = ndimage.sum_labels(fg, lab, index=np.arange(1, n + 1))
    blobs = []
    for idx, sl in enumerate(ndimage.find_objects(lab), start=1):
        if sl is None or sizes[idx - 1] * dx * dy < min_area_mm2:
            continue
        sub = lab[sl] == idx
        per_slice = sub.sum(axis=(0, 1))
        kbest = int(np.argmax(per_slice))
        ii, jj = np.nonzero(sub[:, :, kbest])
        area = ii.size * dx * dy
        if area < min_area_mm2:
            continue
        ci, cj = ii.mean(), jj.mean()
        rmax = float(np.sqrt(((ii - ci) * dx) ** 2 + ((jj - cj) * dy) ** 2).max()) + 0.5 * np.hypot(dx, dy)
        pts = np.argwhere(sub)
        ks = np.nonzero(per_slice)[0]
        blobs.append(Blob(pts.mean(axis=0) + np.array([s.start for s in sl], float), int(sub.sum()),
                          (int(ks[0] + sl[2].start), int(ks[-1] + sl[2].start)), float(np.sqrt(area / np.pi)),
                          float(area / (np.pi * rmax**2))))
    return blobs


def find_blobs(image: np.ndarray, zooms, *, min_radius_mm: float, max_radius_mm: float,
               expected: int) -> tuple[list[Blob], str]:
    """Detect plausible vials (see the module docstring).

    Parameters
    ----------
    image : (X, Y, Z) ndarray
        The detection image (vials bright); NaN counts as background.
    zooms : (3,) array_like
        Voxel sizes in mm.
    min_radius_mm, max_radius_mm : float
        Range of plausible equivalent vial radii.
    expected : int
        Number of vials in the layout.

    Returns
    -------
    blobs : list of Blob
        The plausible components of the winning threshold.
    method : str
        Which threshold won (for the report).
    """
    img = np.asarray(image, float)
    best, best_key, best_name = [], None, "no threshold"
    min_area = np.pi * min_radius_mm**2
    for name, thr in _thresholds(img):
        with np.errstate(invalid="ignore"):
            fg = np.isfinite(img) & (img > thr)
        found = _blobs(fg, zooms, min_area)
        ok = [b for b in found if b.radius_mm <= max_radius_mm and b.compactness >= MIN_COMPACTNESS]
        key = (min(len(ok), expected), -max(0, len(ok) - expected))
        if best_key is None or key > best_key:
            best, best_key, best_name = ok, key, name
    return best, best_name
