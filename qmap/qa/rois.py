"""Regions of interest from a label image: per-label masks, eroded against partial volume; the values inside."""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["erode", "roi_masks", "roi_values"]

#: 6-connected (face-neighbour) structuring element: one iteration removes one voxel layer.
_CROSS = ndimage.generate_binary_structure(3, 1)


def erode(mask: np.ndarray, n: int) -> np.ndarray:
    """Erode a 3D boolean mask by ``n`` voxels (6-connected).

    The array edge counts as inside (``border_value=1``): a vial that runs
    through the whole slab (or a single-slice image) is eroded only where it
    meets the background, not where the field of view ends.

    Parameters
    ----------
    mask : (X, Y, Z) ndarray of bool
    n : int
        Layers to remove; 0 returns a copy.
    """
    mask = np.asarray(mask, bool)
    if n <= 0 or not mask.any():
        return mask.copy()
    # work in the bounding box (padded), which is exact: beyond it everything is background
    idx = np.argwhere(mask)
    lo = np.maximum(idx.min(0) - n - 1, 0)
    hi = np.minimum(idx.max(0) + n + 2, mask.shape)
    box = tuple(slice(a, b) for a, b in zip(lo, hi))
    out = np.zeros_like(mask)
    out[box] = ndimage.binary_erosion(mask[box], structure=_CROSS, iterations=int(n), border_value=1)
    return out


def roi_masks(labels: np.ndarray, wanted, *, erode_voxels: int = 1) -> dict[int, np.ndarray]:
    """Boolean mask of each wanted label, eroded by ``erode_voxels``.

    Parameters
    ----------
    labels : (X, Y, Z) ndarray of int
    wanted : iterable of int
    erode_voxels : int

    Returns
    -------
    dict
        label -> (X, Y, Z) boolean mask (possibly empty).
    """
    labels = np.asarray(labels)
    return {int(k): erode(labels == int(k), erode_voxels) for k in wanted}


def roi_values(data: np.ndarray, roi: np.ndarray, status: np.ndarray | None = None) -> tuple[np.ndarray, dict[int, int]]:
    """The map values of one ROI that statistics may use, and the voxels left out by their fit status.

    Used by ``qmap roi`` and ``qmap phantom`` alike. With a qmap status map
    (same grid), only voxels with status 0 (fitted) are used; the others are
    counted per status code. Non-finite values among the rest are left to the
    statistics (which skip and count them).

    Parameters
    ----------
    data : (X, Y, Z) ndarray
    roi : (X, Y, Z) ndarray of bool
    status : (X, Y, Z) ndarray of int, optional

    Returns
    -------
    values : (n,) ndarray
    excluded : dict
        status code -> number of ROI voxels excluded (empty without a status map).
    """
    if status is None:
        return data[roi], {}
    codes = status[roi]
    bad = codes != 0
    excluded: dict[int, int] = {}
    if bad.any():
        u, c = np.unique(codes[bad], return_counts=True)
        excluded = {int(a): int(b) for a, b in zip(u, c)}
    return data[roi][~bad], excluded
