"""The object mask and the noise level of a magnitude series.

One slab-wise path serves the command line (a :class:`qmap.io.series.Series`
read slab by slab under ``--max-memory``) and the array functions (an array
wrapped as one slab, :class:`ArraySource`):

* :func:`peak_image` / :func:`mask_from_peak` / :func:`object_mask`: each
  voxel's brightest sample, thresholded at half of Otsu's threshold (or lower,
  to keep dim regions clearly above the noise);
* :func:`estimate_noise`: the noise standard deviation per real channel, from
  the Rayleigh (chi) statistics of the background outside the grown object
  (:func:`background_estimate`), else from the residuals of a plain first fit
  inside the object (:func:`residual_estimate`); :func:`local_noise_map` for
  ``--sigma local``.

References
----------
Gudbjartsson H, Patz S. The Rician distribution of noisy MRI data. Magn Reson
Med 1995;34:910. doi:10.1002/mrm.1910340618

Constantinides CD, Atalar E, McVeigh ER. Signal-to-noise measurements in
magnitude images from NMR phased arrays. Magn Reson Med 1997;38:852.
doi:10.1002/mrm.1910380524

Otsu N. A threshold selection method from gray-level histograms. IEEE Trans
Syst Man Cybern 1979;9:62. doi:10.1109/TSMC.1979.4310076

(DOIs from memory.)
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import numpy.typing as npt

from .docstrings import shared_parameters
from .errors import InputError
from .noise import _check_coils
from .special import chi2_isf, chi2_pdf, chi2_ppf

__all__ = [
    "ArraySource",
    "auto_mask",
    "background_estimate",
    "estimate_sigma_background",
    "mask_from_peak",
    "object_mask",
    "otsu_threshold",
    "peak_image",
]

#: Largest fraction of the background that may be far brighter than noise
#: (ghosts, unmasked dim tissue) before ``--sigma auto`` gives up.
_MAX_OUTLIER_FRACTION = 0.2
#: Most background values used for the noise estimate: 400k values put the median's relative standard
#: error at 0.11 % for one coil (``median_relative_se(1) / sqrt(n)``), far below TARGET_PRECISION; more
#: only cost time and memory (measured: 2M values took ~0.6 s and ~100 MB on a 1M-voxel x 12-echo series).
_MAX_SAMPLES = 400_000
#: values used for the automatic mask's threshold (a stride through the peak image)
_MASK_SAMPLES = 1_000_000
#: the automatic mask keeps every voxel brighter than this many times the median of the dim class
#: (the background noise's peak over the volumes: 3 x its median is 3.5 sigma for one volume, 7.2 sigma
#: for 12 volumes; the opening removes the few isolated noise voxels above it)
MASK_NOISE_FACTOR = 3.0
#: background samples collected for ``--sigma auto`` (every k-th voxel by flat index, so that the
#: choice does not depend on how the volume is read)
SIGMA_SAMPLES = 400_000
#: values handled at a time where the noise estimate gathers or filters its samples (bounds the temporaries)
_BLOCK = 1 << 16
#: voxels a run of the background counts covers (its temporaries: a few bytes a voxel)
_COUNT_BLOCK = 1 << 17



class VolumeSource(Protocol):
    """What the mask and noise estimates read: a series of volumes, slab by slab along z."""

    _object_mask: np.ndarray | None
    _object_median: float | None

    @property
    def shape(self) -> tuple[int, int, int]: ...

    @property
    def n(self) -> int: ...

    def read(self, z0: int, z1: int) -> np.ndarray: ...

    def slabs(self, max_bytes: float | None) -> list[tuple[int, int]]: ...


class ArraySource:
    """An in-memory (X, Y, Z) or (X, Y, Z, n) array seen as a :class:`VolumeSource` (one slab)."""

    def __init__(self, data: npt.ArrayLike):
        a = np.asanyarray(data)
        if a.ndim == 3:
            a = a[..., None]
        if a.ndim != 4:
            raise InputError(f"expected a 3D volume or 4D series, got shape {np.shape(data)}")
        self.data = a
        self._object_mask: np.ndarray | None = None
        self._object_median: float | None = None

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.data.shape[:3])

    @property
    def n(self) -> int:
        return int(self.data.shape[3])

    def read(self, z0: int, z1: int) -> np.ndarray:
        return self.data[:, :, z0:z1]

    def slabs(self, max_bytes: float | None) -> list[tuple[int, int]]:
        return [(0, self.shape[2])]


# ---------------------------------------------------------------------------
# Object mask
# ---------------------------------------------------------------------------


def otsu_threshold(values: npt.ArrayLike) -> float:
    """Otsu's threshold of a set of values (256-bin histogram).

    Parameters
    ----------
    values : (m,) array_like of float
        Finite values (any shape; flattened).

    Returns
    -------
    float
        The bin edge that maximises the between-class variance; the lower
        class is ``values <= threshold`` (up to the bin width). For constant
        input, that constant.

    Raises
    ------
    ValueError
        Empty input or non-finite values.

    Notes
    -----
    Otsu (1979): with class weights :math:`w_0, w_1` and means
    :math:`m_0, m_1` of the histogram split after bin :math:`k`, the
    threshold maximises :math:`w_0 w_1 (m_0 - m_1)^2`.
    """
    v = np.ravel(np.asarray(values))
    if v.dtype.kind not in "fiub":
        v = v.astype(np.float64)
    if v.size == 0:
        raise ValueError("otsu_threshold needs at least one value")
    if not np.all(np.isfinite(v)):
        raise ValueError("otsu_threshold needs finite values")
    lo, hi = float(v.min()), float(v.max())
    if lo == hi:
        return lo
    # the histogram of the float64 values, taken in parts (no float64 copy of them all; the same counts)
    hist = np.zeros(256, np.float64)
    for i in range(0, v.size, 1 << 16):
        part, edges = np.histogram(v[i:i + (1 << 16)].astype(np.float64), bins=256, range=(lo, hi))
        hist += part
    centres = 0.5 * (edges[:-1] + edges[1:])
    w0 = np.cumsum(hist)[:-1]
    s0 = np.cumsum(hist * centres)[:-1]
    w1 = hist.sum() - w0
    s1 = float(np.dot(hist, centres)) - s0
    with np.errstate(divide="ignore", invalid="ignore"):
        between = w0 * w1 * (s0 / w0 - s1 / w1) ** 2
    between = np.where((w0 > 0) & (w1 > 0), between, -1.0)
    # with well separated classes the score is flat across the empty gap between them: take the
    # middle of that plateau, not its first bin (which sits right on top of the lower class)
    best = np.flatnonzero(between >= between.max() * (1 - 1e-9))
    k = int(best[best.size // 2]) if np.all(np.diff(best) == 1) else int(best[0])
    return float(edges[k + 1])


def peak_image(block: npt.ArrayLike) -> np.ndarray:
    """Each voxel's largest magnitude over the volumes, without copying the series.

    Parameters
    ----------
    block : (X, Y, Z) or (X, Y, Z, n) array_like
        Magnitude, real (signed) or complex samples.

    Returns
    -------
    (X, Y, Z) float32 ndarray
        ``max |sample|`` over the volumes. Non-finite samples are skipped: a
        voxel with one inf sample keeps the peak of its other samples, so
        that it stays in the automatic mask and the fit flags it instead of
        it silently counting as background; a voxel with nothing finite gets 0.
    """
    block = np.asanyarray(block)
    if block.ndim == 3:
        block = block[..., None]
    with np.errstate(invalid="ignore"):
        if np.iscomplexobj(block):
            peak = np.fmax.reduce(np.abs(block), axis=3)
        else:  # real-valued data may be negative (phase-corrected IR): the largest |value|, one volume at a time
            # (one pass over the series; a temporary of one volume)
            peak = np.abs(block[..., 0])
            tmp = np.empty_like(peak)
            for v in range(1, block.shape[3]):
                np.fmax(peak, np.abs(block[..., v], out=tmp), out=peak)
            del tmp
    bad = ~np.isfinite(peak)
    if bad.any():  # rare: only the voxels holding +-inf (or nothing finite at all) are looked at again
        sub = np.abs(block[bad])
        peak[bad] = np.max(np.where(np.isfinite(sub), sub, 0.0), axis=-1)
    return peak.astype(np.float32, copy=False)


def percentile_inplace(values: np.ndarray, q: float):
    """``np.percentile(values, q, overwrite_input=True)`` of a 1-D float array (its linear method), bit for bit.

    One partition at the lower of the two order statistics the linear method interpolates between; the
    upper one is the smallest value above it. numpy partitions at both and at the ends (1.2 against 6.8 ms
    for the 99.9th percentile of 1M float32 values). ``values`` is reordered. NaN: numpy's own.
    """
    n = values.size
    if n == 0 or np.isnan(values).any():
        return np.percentile(values, q, overwrite_input=True)
    virtual = (n - 1) * np.true_divide(q, 100)  # Hyndman & Fan (1996) definition 7, numpy's 'linear'
    below = np.floor(virtual)
    i0 = min(max(int(below), 0), n - 1)
    values.partition(i0)
    lo = values[i0]
    hi = values[i0 + 1:].min() if i0 + 1 < n else lo
    gamma = float(virtual - below)
    diff = hi - lo
    # numpy's lerp, with its weak (Python float) gamma: in the values' own precision
    return hi - diff * (1 - gamma) if gamma >= 0.5 else lo + diff * gamma


def mask_from_peak(peak: np.ndarray) -> np.ndarray:
    """The object mask from a peak image (see :func:`auto_mask`)."""
    return fill_holes(_mask_before_filling(peak))


def _mask_before_filling(peak: np.ndarray) -> np.ndarray:
    """:func:`mask_from_peak` before its holes are filled: the threshold, eroded and dilated."""
    nonzero = peak[peak != 0]
    if nonzero.size == 0:
        return np.zeros(peak.shape, dtype=bool)
    if nonzero.size > _MASK_SAMPLES:  # an even stride: the histogram needs no more (memory, time)
        nonzero = nonzero[:: -(-nonzero.size // _MASK_SAMPLES)].copy()
    # in place on this copy of the values: the percentile, Otsu's histogram and the median depend on the
    # values, not on their order
    clipped = np.minimum(nonzero, percentile_inplace(nonzero, 99.9), out=nonzero)
    t_otsu = otsu_threshold(clipped)
    # dim regions clearly above the noise stay in: the threshold is at most NOISE_FACTOR x the median of
    # the class below Otsu's threshold (the noise where the image has background)
    lower = clipped[clipped <= t_otsu]
    del clipped, nonzero
    threshold = 0.5 * t_otsu
    if lower.size:
        threshold = min(threshold, MASK_NOISE_FACTOR * float(median_inplace(lower)))
    del lower
    # pad by repeating the edge so that the image border does not erode the object
    # (thin slabs and 2D multi-slice data would lose the rim of the first and last slice); in C order
    # (a peak image of NIfTI data is Fortran-ordered: the morphology's shifted views are 6x slower on it)
    above = np.ascontiguousarray(peak > threshold)
    return dilate_cross(erode_cross(np.pad(above, 1, mode="edge")))[1:-1, 1:-1, 1:-1]


def median_inplace(values: np.ndarray):
    """``np.median(values, overwrite_input=True)`` of a 1-D array, bit for bit, by one partition (numpy's
    median partitions at both middle order statistics; the lower one is the largest value below the upper).
    ``values`` is reordered. NaN: numpy's own."""
    n = values.size
    if n == 0 or np.isnan(values).any():
        return np.median(values, overwrite_input=True)
    k = n // 2
    values.partition(k)
    if n % 2:
        return np.mean(values[k:k + 1])
    return np.mean(np.array([values[:k].max(), values[k]], values.dtype))  # numpy's mean of the two


def fill_holes(mask: np.ndarray) -> np.ndarray:
    """``mask`` with every region of False not 6-connected to the array's faces set True, (X, Y, Z) bool.

    The same as ``scipy.ndimage.binary_fill_holes(mask)`` (its default cross; tested equal), without
    scipy (whose import costs a fitting run more start-up time than this takes). The background
    reached from the faces grows along whole runs of background voxels, one axis after another,
    until it stops changing: a run (a line of consecutive background voxels along an axis) touched
    by the reached set is reached entirely, which is 6-connectivity exactly. Each sweep costs a few
    milliseconds on 1M voxels; a head-shaped mask needs a handful.

    The first sweep along each axis runs on the whole array with that axis' run labels only; the
    sweeps after it run in the box around the background still unreached, with one voxel of margin
    (every background voxel outside the box is reached, so every path out of the box meets a reached
    voxel in its margin: the same result). The labels of the three axes are held for that box only.
    """
    mask = np.asarray(mask, dtype=bool)
    if mask.ndim == 0 or mask.size == 0 or not mask.any():
        return mask.copy()
    # outside the object's bounding box every voxel is background with a straight line to a face: the work
    # is done in the box with one voxel of margin (whose background is reached), the same result
    box = _box_around(mask)
    if any(b.stop - b.start < n for b, n in zip(box, mask.shape)):
        out = mask.copy()
        out[box] = _fill_holes_in(mask[box])
        return out
    return _fill_holes_in(mask)


def _fill_holes_in(mask: np.ndarray) -> np.ndarray:
    """:func:`fill_holes` of a non-empty boolean array (on the whole array)."""
    bg = ~mask
    reached = np.zeros_like(bg)
    for axis in range(bg.ndim):
        for k in (0, -1):
            idx: list[slice | int] = [slice(None)] * bg.ndim
            idx[axis] = k
            reached[tuple(idx)] = bg[tuple(idx)]
    for axis in range(bg.ndim):  # one sweep along each axis, on the whole array (one axis' labels at a time)
        reached = _sweep(_background_runs(bg, axis), reached)
    left = bg > reached
    if not left.any():
        return ~reached
    box = _box_around(left)
    del left
    sub_bg = bg[box]
    sub = reached[box]  # a copy: the box's reached voxels (its margin: all of its background)
    runs = [_background_runs(sub_bg, axis) for axis in range(bg.ndim)]
    stable = 0
    axis = 0
    for _ in range(FILL_SWEEPS - bg.ndim):
        if stable == bg.ndim:  # a sweep along every axis in turn has added nothing
            reached[box] = sub
            return ~reached
        grown = _sweep(runs[axis], sub)
        if np.array_equal(grown, sub):
            stable += 1
        else:
            stable = 1
            sub = grown
        axis = (axis + 1) % bg.ndim
    return _fill_holes_by_labels(mask)  # a maze-like background: labelling is cheaper than more sweeps


def _box_around(a: np.ndarray) -> tuple[slice, ...]:
    """The bounding box of the True voxels of ``a`` (at least one), with one voxel of margin inside the array."""
    box = []
    for axis in range(a.ndim):
        along = np.flatnonzero(np.any(a, axis=tuple(k for k in range(a.ndim) if k != axis)))
        box.append(slice(max(int(along[0]) - 1, 0), int(along[-1]) + 2))
    return tuple(box)


def _sweep(runs: tuple[np.ndarray, int], reached: np.ndarray) -> np.ndarray:
    """``reached`` grown by every run of ``runs`` (labels from :func:`_background_runs`) it touches."""
    ids, n = runs
    hit = np.zeros(n + 1, bool)
    hit[ids[reached]] = True
    hit[0] = False  # id 0: not background
    return hit[ids]


#: sweeps of :func:`fill_holes` before it labels the background instead (a head-shaped mask needs 4-8)
FILL_SWEEPS = 15


def _fill_holes_by_labels(mask: np.ndarray) -> np.ndarray:
    """:func:`fill_holes` by labelling the background's 6-connected components (``scipy.ndimage.label``)."""
    from scipy import ndimage  # imported on use (start-up time)

    lab, n = ndimage.label(~mask)
    outside = np.zeros(n + 1, bool)
    outside[0] = True  # label 0: the mask itself
    for axis in range(mask.ndim):
        for k in (0, -1):
            outside[np.take(lab, k, axis=axis).ravel()] = True
    return mask | ~outside[lab]


def _background_runs(bg: np.ndarray, axis: int) -> tuple[np.ndarray, int]:
    """A label per voxel of ``bg`` naming its run of consecutive True voxels along ``axis`` (0 off ``bg``).

    The runs are numbered in the order that walks each line along ``axis`` (the axis moved last), so
    every voxel of a run gets the count of run starts up to it: a count along each line, plus the
    starts of the lines before it. Built in the labels' own array (no flattened copies: the labels
    and one boolean volume of run starts are all it holds).
    """
    start = bg.copy()
    lo: list[slice] = [slice(None)] * bg.ndim
    hi: list[slice] = [slice(None)] * bg.ndim
    lo[axis], hi[axis] = slice(None, -1), slice(1, None)
    # a run starts where the previous voxel along the axis is not background (True > False, no temporary)
    np.greater(bg[tuple(hi)], bg[tuple(lo)], out=start[tuple(hi)])
    n = int(np.count_nonzero(start))
    # the smallest type that holds the run numbers (a head-shaped 1M-voxel mask has ~10-30k runs an axis:
    # 2 bytes a voxel instead of 4 for each axis' labels, which fill_holes holds for all three axes)
    dtype = np.uint16 if n < 2**16 else np.int32 if n < 2**31 else np.int64
    ids = np.empty(bg.shape, dtype)  # C-contiguous, as the masks it is indexed with
    along = np.moveaxis(ids, axis, -1)  # a view: each line along ``axis`` is its last axis
    np.cumsum(np.moveaxis(start, axis, -1), axis=-1, dtype=dtype, out=along)
    del start
    last = along[..., -1]  # the starts in each line
    before: np.ndarray = np.cumsum(last, axis=None, dtype=dtype).reshape(last.shape)
    before -= last  # the starts in the lines before each line
    along += before[..., None]
    ids *= bg  # 0 off the background (in place)
    return ids, n


def erode_cross(a: np.ndarray) -> np.ndarray:
    """Binary erosion by the 6-connected cross (one voxel), outside the array False, (X, Y, Z) bool.

    The same as ``scipy.ndimage.binary_erosion(a)`` (its default structure and border), by shifted
    views: a few milliseconds on 1M voxels instead of tens.
    """
    a = np.asarray(a, dtype=bool)
    out = a.copy(order="K")  # in the input's memory order (a transposing copy costs more than the erosion)
    for axis in range(a.ndim):
        lo = [slice(None)] * a.ndim
        hi = [slice(None)] * a.ndim
        lo[axis], hi[axis] = slice(None, -1), slice(1, None)
        out[tuple(hi)] &= a[tuple(lo)]
        out[tuple(lo)] &= a[tuple(hi)]
        edge: list[slice | int] = [slice(None)] * a.ndim
        for k in (0, -1):
            edge[axis] = k
            out[tuple(edge)] = False
    return out


def dilate_cross(a: np.ndarray, iterations: int = 1) -> np.ndarray:
    """Binary dilation by the 6-connected cross, ``iterations`` times, (X, Y, Z) bool.

    The same as ``scipy.ndimage.binary_dilation(a, iterations=iterations)`` (its default structure
    and border), by shifted views.
    """
    out = np.asarray(a, dtype=bool)
    for _ in range(iterations):
        src = out
        out = src.copy(order="K")
        for axis in range(src.ndim):
            lo = [slice(None)] * src.ndim
            hi = [slice(None)] * src.ndim
            lo[axis], hi[axis] = slice(None, -1), slice(1, None)
            out[tuple(hi)] |= src[tuple(lo)]
            out[tuple(lo)] |= src[tuple(hi)]
    return out


def object_mask(source: VolumeSource, max_bytes: float | None = None) -> np.ndarray:
    """The automatically detected object of a series, read slab by slab (see :func:`auto_mask`).

    The mask is cached on ``source`` (used by ``--mask auto`` and ``--sigma auto``), and so is the
    median of the object voxels' finite peaks, which the background noise estimate compares its own
    median with; the peak image itself is dropped once the mask is made. For a series in memory it is
    dropped before the holes are filled (the peaks of the few voxels filling adds are taken from the
    data again): the peak image and the hole filling's labels are not held together.
    """
    if source._object_mask is None:
        slabs = source.slabs(max_bytes)
        in_memory = len(slabs) == 1 and not getattr(source, "lazy", False)
        if len(slabs) == 1:
            peak = peak_image(source.read(*slabs[0]))
        else:  # filled slab by slab (no list of slab peaks and concatenated copy)
            peak = np.empty(source.shape, np.float32)
            for z0, z1 in slabs:
                peak[:, :, z0:z1] = peak_image(source.read(z0, z1))
        before = _mask_before_filling(peak)
        if in_memory:
            peaks = [peak[before]]
            del peak
            mask = fill_holes(before)
            added = mask > before
            if added.any():  # the filled voxels' peaks, from the data (the same values: one voxel at a time)
                peaks.append(peak_image(source.read(*slabs[0])[added][:, None, None, :]).ravel())
            del added
            obj_peak = np.concatenate(peaks) if len(peaks) > 1 else peaks[0]
            del peaks
        else:
            mask = fill_holes(before)
            obj_peak = peak[mask]
            del peak
        del before
        finite = obj_peak[np.isfinite(obj_peak)]  # a copy: partitioned in place
        del obj_peak
        source._object_median = _median64(finite, overwrite=True) if finite.size else 0.0
        source._object_mask = mask
    return source._object_mask


def auto_mask(data: npt.ArrayLike) -> np.ndarray:
    """Object mask of a magnitude volume or series.

    Parameters
    ----------
    data : (X, Y, Z) or (X, Y, Z, n) array_like of float
        Magnitude image or series (a.u.).

    Returns
    -------
    (X, Y, Z) ndarray of bool
        True inside the object. Empty for an image with no non-zero value.

    Notes
    -----
    1. Each voxel's maximum over the volumes (:func:`peak_image`): in an
       inversion-recovery series some tissue is near its null in one volume,
       and a decaying T2 series is dim in its late echoes; the maximum shows
       every voxel at its brightest.
    2. Threshold at half of Otsu's threshold of that maximum image, or at
       :data:`MASK_NOISE_FACTOR` (3) times the median of the values below
       Otsu's threshold where that is lower. Otsu on images with several
       tissue classes often splits dim from bright tissue rather than tissue
       from background; half of it keeps dim tissue (e.g. long-T1 / short-T2
       regions), and the noise-based limit keeps regions much dimmer than the
       rest (an insert at 20 % of the surrounding signal) as long as they are
       clearly above the background noise. Exact zeros (zero filling) are
       left out of the histogram, and values above the 99.9th percentile are
       clipped to it so that a few very bright voxels cannot squeeze the
       tissue into the lowest bins.
    3. A binary opening with the 6-connected cross (one voxel) removes
       isolated noise voxels above the threshold: the maximum over many
       volumes pushes the background noise up (the maximum of n Rayleigh
       variates), so at modest SNR a few per cent of background voxels pass
       half the Otsu threshold; without the opening they would enter the
       fit and, once dilated, eat the background used by
       :func:`estimate_sigma_background`. Structures thinner than 3 voxels
       are lost with them.
    4. Holes enclosed in 3D are filled (:func:`fill_holes`),
       so that dark structures inside the object (e.g. a voxel at its null,
       fluid, an air bubble in a phantom) are kept.
    """
    a = np.asanyarray(data)
    if a.ndim not in (3, 4):
        raise InputError(f"cannot build a mask: expected a 3D volume or 4D series, got shape {a.shape}")
    return object_mask(ArraySource(a))


# ---------------------------------------------------------------------------
# Noise level from the background
# ---------------------------------------------------------------------------


@shared_parameters("source", "max_bytes")
def background_estimate(
    source: VolumeSource,
    *,
    coils: int | None = None,
    obj: np.ndarray | None = None,
    max_bytes: float | None = None,
    dilate: int = 3,
    min_voxels: int | None = None,
) -> NoiseEstimate:
    """Noise sigma from the image background, reading the series slab by slab.

    Parameters
    ----------
    coils : int, optional
        Root-sum-of-squares coils (background distribution chi with ``2 * coils`` degrees of
        freedom). None: one, unless the background's moments clearly show more (then that many).
    obj : (X, Y, Z) ndarray of bool, optional
        The object; default the automatic mask (:func:`object_mask`).
    dilate : int
        The object is grown by this many voxels before taking the complement.
    min_voxels : int, optional
        Fewest background voxels; default from the precision needed: the median-based estimate from
        n samples has a relative standard error of 0.7213 / sqrt(n) (one coil), so
        :data:`TARGET_PRECISION` (5 %) needs 208 samples, and at least
        :data:`MIN_BACKGROUND_VOXELS` voxels.

    Returns
    -------
    NoiseEstimate
        ``source="background"``.

    Raises
    ------
    InputError
        The background gives no trustworthy value; the message names the cause (no background / mask
        covering the image, zero-filled or NaN background, negative values, signal or a constant in the
        background).
    """
    if obj is None:
        obj = object_mask(source, max_bytes)
    b = _collect_background(source, obj, max_bytes, dilate)
    c = 1 if coils is None else _check_coils(coils)
    if min_voxels is None:
        need_samples = math.ceil((median_relative_se(c) / TARGET_PRECISION) ** 2)
        need_voxels = MIN_BACKGROUND_VOXELS
    else:
        need_samples, need_voxels = 1, int(min_voxels)
    return _assess_background(b, coils, need_samples, need_voxels)


def estimate_sigma_background(
    data: npt.ArrayLike,
    object_mask: npt.ArrayLike,
    *,
    coils: int = 1,
    min_voxels: int | None = None,
    dilate: int = 3,
) -> tuple[float, int]:
    """Robust noise standard deviation from the image background of an array.

    Parameters
    ----------
    data : (X, Y, Z) or (X, Y, Z, n) array_like of float
        Magnitude image or series (a.u.).
    object_mask : (X, Y, Z) array_like of bool
        The object (e.g. from :func:`auto_mask`).
    coils : int, optional
        Number of root-sum-of-squares coils (background distribution chi with
        ``2 * coils`` degrees of freedom; 1 = Rayleigh).
    min_voxels : int, optional
        Fewest background voxels accepted (default: from the precision needed, see
        :func:`background_estimate`).
    dilate : int, optional
        The object mask is grown by this many voxels (6-connected steps)
        before taking the complement, to keep partial-volume edges and blur
        out of the background.

    Returns
    -------
    sigma : float
        Noise standard deviation per real channel (a.u.).
    n_voxels : int
        Number of background voxels used (voxels with at least one usable
        value; the values of all volumes are pooled).

    Raises
    ------
    InputError
        Too few background voxels (e.g. a tightly cropped image, a zero-filled
        or NaN background); the background looks like signal rather than noise
        (its median above a third of the object's, or more than 20 % of it far
        brighter than noise), or does not scatter like noise (a constant); it holds
        negative values (not a magnitude image); or the object mask is empty.

    Notes
    -----
    The same computation as ``--sigma auto``'s background source on the command
    line (:func:`background_estimate` on the array as one slab). Voxels that are
    zero or not finite in every volume (zero filling outside the field of view) are
    ignored. Pure-noise magnitude is :math:`\\sigma\\,\\chi_{2N}` (Rayleigh for
    one coil), so :math:`\\sigma = \\mathrm{median} / \\mathrm{median}(\\chi_{2N})`;
    for one coil :math:`\\mathrm{median}(\\chi_2) = \\sqrt{2\\ln 2}`. The median is
    insensitive to a few bright ghosts or artefacts in the background; values
    that pure noise would practically never reach (above the ``1 - 1e-6``
    quantile of :math:`\\sigma\\chi_{2N}`, 5.26 sigma for one coil) are set
    aside and the median retaken until sigma settles, which removes their
    remaining pull. More than 20 % of such values means the background is not
    noise (a median alone would not notice up to half of it being signal).
    Integer-stored data are treated as grouped data (see :func:`_median_sigma`). The
    object reference for the plausibility check is the median over the object
    of each voxel's maximum over volumes (so that a series whose late volumes
    have decayed into the noise is not rejected).
    """
    coils = _check_coils(coils)
    src = ArraySource(data)
    mask = np.asarray(object_mask, dtype=bool)
    if mask.shape != src.shape:
        raise InputError(
            f"noise estimate: data of shape {np.shape(data)} and object mask of shape {mask.shape} do not match; "
            "expected (X,Y,Z[,n]) data with an (X,Y,Z) mask"
        )
    if not mask.any():
        raise InputError("cannot estimate the noise: no object was found in the image to set apart")
    est = background_estimate(src, coils=coils, obj=mask, dilate=dilate, min_voxels=min_voxels)
    return float(est.sigma), int(est.n_voxels)


def _clipped_sigma(bg: np.ndarray, coils: int, quantum: float = 0.0) -> tuple[float, float]:
    """Median-based sigma, ignoring values far brighter than the noise.

    Starting from ``median / median(chi_2N)``, values above the
    ``1 - 1e-6`` quantile of ``sigma * chi_2N`` (5.26 sigma for one coil;
    pure noise exceeds it once in a million) are set aside and sigma is
    re-estimated from the median of the rest, until it settles. Bright
    ghosts then no longer shift the median.

    Returns
    -------
    sigma : float
    outlier_fraction : float
        Fraction of the values set aside.
    """
    tail = _chi_tail(coils)
    sigma = _median_sigma(bg, quantum, coils)
    kept = bg
    new = sigma
    for _ in range(20):
        size = kept.size
        kept = bg[bg <= np.float64(tail * sigma)]  # float32 values compared in float64, as a float64 copy was
        if kept.size == size:  # {x <= limit} with as many values: the same values, the same median
            new = sigma
            break
        new = _median_sigma(kept, quantum, coils)
        if abs(new - sigma) <= 1e-9 * sigma:
            break
        sigma = new
    return new, 1.0 - kept.size / bg.size


def _chi_pdf(x: float, k: int) -> float:
    """Density of the chi distribution with ``k`` degrees of freedom at ``x`` (2 x chi2_pdf(x^2) x)."""
    return 2.0 * x * float(chi2_pdf(x * x, float(k)))


@functools.lru_cache(maxsize=64)
def _chi_tail(coils: int) -> float:
    """The ``1 - 1e-6`` quantile of the chi distribution with ``2 * coils`` dof."""
    return math.sqrt(chi2_isf(1e-6, 2.0 * int(coils)))


@functools.lru_cache(maxsize=64)
def _chi_median(coils: int) -> float:
    """Median of the chi distribution with ``2 * coils`` degrees of freedom."""
    if coils == 1:
        return math.sqrt(2.0 * math.log(2.0))
    return math.sqrt(chi2_ppf(0.5, 2.0 * int(coils)))


# ---------------------------------------------------------------------------
# The noise-level chain behind ``--sigma auto`` / ``--sigma local``
# ---------------------------------------------------------------------------

#: relative standard error of sigma that a source must reach to be used (``--sigma auto``)
TARGET_PRECISION = 0.05
#: fewest background voxels / fitted voxels behind an estimate, whatever its nominal precision
MIN_BACKGROUND_VOXELS = 50
MIN_RESIDUAL_VOXELS = 30
#: a sample counts as "well above the noise floor" when its fitted value is at least this many sigma
#: (the Rician bias of the magnitude there is sigma / (2 * 5) = 0.1 sigma and its sd is within 1 % of sigma)
FLOOR_MARGIN = 5.0
#: voxels fitted for the residual estimate (an even stride through the object)
RESIDUAL_VOXELS = 4000
#: number of chi-distributed samples below which a multi-coil background is not claimed
_MIN_COIL_SAMPLES = 500


@dataclass
class NoiseEstimate:
    """A noise level with where it came from and how precise it is.

    Attributes
    ----------
    sigma : float or (X, Y, Z) ndarray
        Noise standard deviation per real channel, signal units (a map for ``--sigma local``).
    source : str
        ``"background"``, ``"residuals"``, ``"local"``, ``"command line"`` or ``"noise map"``.
    n_voxels : int
        Voxels behind the estimate.
    relative_precision : float or None
        Estimated relative standard error of ``sigma`` (of the median of the map for ``local``).
    coils : int or None
        Effective number of sum-of-squares coils found in the background (None: not assessed).
    details : dict
        Further facts for the provenance (e.g. the other source's value when both were computed).
    notes : list of str
        What a user should know (printed with the run summary).
    warnings : list of str
        What may make the value wrong (a model that does not fit, uneven noise, a coil count that
        disagrees): logged as warnings by the command line and recorded in the provenance.
    """

    sigma: float | np.ndarray
    source: str
    n_voxels: int = 0
    relative_precision: float | None = None
    coils: int | None = None
    details: dict = field(default_factory=dict)
    notes: list = field(default_factory=list)
    warnings: list = field(default_factory=list)

    @property
    def value(self) -> float:
        """The scalar noise level (the median of the map for a local estimate)."""
        s = np.asarray(self.sigma, dtype=np.float64)
        if s.ndim == 0:
            return float(s)
        ok = np.isfinite(s) & (s > 0)
        return float(np.median(s[ok])) if ok.any() else float("nan")

    def provenance(self, mode: str) -> dict:
        out = {"sigma_mode": mode, "sigma": self.value, "source": self.source, "n_voxels": int(self.n_voxels),
               "relative_precision": None if self.relative_precision is None else float(self.relative_precision)}
        out.update(self.details)
        if self.warnings:
            out["warnings"] = list(self.warnings)
        return out


def median_relative_se(coils: int = 1) -> float:
    """Relative standard error x sqrt(n) of sigma = median / median(chi_2N) from n samples.

    The sample median of n draws from a density f has the asymptotic standard error
    :math:`1 / (2 f(m) \\sqrt n)` (e.g. Stuart & Ord, Kendall's Advanced Theory of Statistics,
    vol. 1, §10.10; from memory). For the Rayleigh density (one coil) :math:`f(m) = m e^{-m^2/2}`
    at :math:`m = \\sqrt{2 \\ln 2}` this gives :math:`1 / (2 \\ln 2) = 0.7213`.
    """
    coils = _check_coils(coils)
    if coils == 1:
        return 1.0 / (2.0 * math.log(2.0))
    m = _chi_median(coils)
    return 1.0 / (2.0 * _chi_pdf(m, 2 * coils) * m)


def _quantum(values: np.ndarray) -> float:
    """The storage step of quantised (integer, or integer x slope) values; 0 for continuous data."""
    v = values[: 200_000]
    if v.size < 20:
        return 0.0
    u = np.unique(v)  # float32 samples: the same distinct values in the same order as their float64 copy
    if u.size < 2 or u.size > 0.25 * v.size:
        return 0.0
    u = u.astype(np.float64, copy=False)  # the step and the grid check in float64, as before
    h = float(np.min(np.diff(u)))
    if not h > 0:
        return 0.0
    k = u / h
    if np.max(np.abs(k - np.round(k))) > 1e-3:
        return 0.0
    return h


def _median_sigma(values: np.ndarray, quantum: float, coils: int) -> float:
    """Sigma from the median of chi-distributed magnitudes: ``median / median(chi_2N)``.

    For values stored on a grid of step ``quantum`` (integer storage) the median can only be a grid
    value, and sigma would snap to multiples of ``quantum / 1.1774`` (0.849 for integers, one coil).
    Rounding puts every magnitude below the boundary ``(k + 1/2) quantum`` at or below ``k quantum``,
    so the fraction ``F`` of values at or below ``k quantum`` estimates the chi distribution function
    at that boundary exactly: ``sigma = (k + 1/2) quantum / chi_2N.ppf(F)``, taken at the boundary
    where ``F`` is closest to 1/2 (the median's own precision).
    """
    if quantum <= 0:
        return _median64(values) / _chi_median(coils)
    k = np.round(np.divide(values, quantum, dtype=np.float64)).astype(np.int64)
    k0 = int(k.min())
    frac = np.cumsum(np.bincount(k - k0)) / values.size
    j = int(np.argmin(np.abs(frac - 0.5)))
    f = min(max(float(frac[j]), 1e-9), 1 - 1e-9)
    return (j + k0 + 0.5) * quantum / math.sqrt(chi2_ppf(f, 2.0 * coils))


def _moments_coils(bg: np.ndarray, quantum: float, keep: np.ndarray | None = None) -> tuple[float, float]:
    """Effective number of coils from the background's moments, and its standard error.

    For :math:`M = \\sigma \\chi_{2N}`: :math:`E[M^2] = 2N\\sigma^2` and :math:`E[M^4] =
    4N(N+1)\\sigma^4`, so :math:`r = E[M^4]/E[M^2]^2 = 1 + 1/N` (Constantinides et al. 1997 give
    the chi densities). Quantised values get Sheppard's corrections for grouping (Sheppard 1898:
    :math:`\\mu_2 = m_2 - h^2/12`, :math:`\\mu_4 = m_4 - m_2 h^2/2 + 7h^4/240`; from memory).
    The standard error of ``r`` is the delta-method one from the sample moments. ``keep`` ((k,) bool):
    the values of ``bg`` to use (default all). The moments are taken in float64 whatever the storage of
    ``bg`` (float32 samples: their exact float64 values), in two passes over blocks of :data:`_BLOCK`
    values (the means, then the centred sums of products that ``np.cov`` forms), the block sums added with
    ``math.fsum``: no (2, n) array of x^2 and x^4 (6 MB for 400k samples); the same numbers as
    ``np.mean`` / ``np.cov`` on the whole arrays to about 1e-15 relative (summation order; tested to 1e-12).
    """
    n = bg.size if keep is None else int(np.count_nonzero(keep))
    if n == 0:
        return float("inf"), float("inf")

    def squares():  # x^2 of the kept values in float64, a block at a time
        for i in range(0, bg.size, _BLOCK):
            part = bg[i:i + _BLOCK] if keep is None else bg[i:i + _BLOCK][keep[i:i + _BLOCK]]
            x2 = part.astype(np.float64)
            np.multiply(x2, x2, out=x2)
            yield x2

    s2, s4 = [], []
    for x2 in squares():
        s2.append(float(np.sum(x2)))
        s4.append(float(np.sum(x2 * x2)))
    a2, a4 = math.fsum(s2) / n, math.fsum(s4) / n  # the raw means of x^2 and x^4
    m2, m4 = a2, a4
    if quantum > 0:
        h2 = quantum * quantum
        m4 = m4 - m2 * h2 / 2 + 7 * h2 * h2 / 240
        m2 = m2 - h2 / 12
    if not (m2 > 0 and m4 > 0):
        return float("inf"), float("inf")
    r = m4 / (m2 * m2)
    # delta method for r = m4 / m2^2 with the sample covariance of (x^2, x^4) (as np.cov: centred by the raw means)
    g = np.array([-2.0 * m4 / m2**3, 1.0 / m2**2])
    if n < 2:
        cov = np.full((2, 2), np.nan)  # no spread from one value
    else:
        c22, c24, c44 = [], [], []
        for x2 in squares():
            d4 = x2 * x2
            d4 -= a4
            x2 -= a2
            # (einsum, not np.dot: BLAS runs a dot this long on its threads, whose idle spinning then competed
            # with the fit's workers for ~0.1 s of CPU; a library must not set its caller's BLAS threads)
            c22.append(float(np.einsum("i,i->", x2, x2)))
            c24.append(float(np.einsum("i,i->", x2, d4)))
            c44.append(float(np.einsum("i,i->", d4, d4)))
        c = np.array([[math.fsum(c22), math.fsum(c24)], [math.fsum(c24), math.fsum(c44)]])
        cov = c / (n - 1) / n
    se_r = float(np.sqrt(max(g @ cov @ g, 0.0)))
    if r <= 1.0:
        return float("inf"), se_r
    return 1.0 / (r - 1.0), se_r


@dataclass
class _Background:
    """Background samples of a series (see :func:`_collect_background`)."""

    values: np.ndarray  # (k, n) magnitudes of a strided subsample of the background voxels
    index: np.ndarray  # (k,) flat voxel index of each row (int32 for volumes under 2**31 voxels)
    obj_median: float  # the median (float64) of the object voxels' finite peaks, 0 without any
    n_outside: int  # voxels outside the grown object
    n_usable: int  # of which with a usable (finite, not zero-filled) sample
    n_zero: int  # ... zero in every volume (zero filling)
    n_nonfinite: int  # ... with no finite sample
    n_samples: int  # usable samples (voxels x volumes)
    mask_fraction: float  # object voxels / image voxels
    shape: tuple = ()


def _collect_background(source: VolumeSource, obj: np.ndarray, max_bytes: float | None, dilate: int) -> _Background:
    obj = np.asarray(obj, dtype=bool)
    bg = ~dilate_cross(obj, dilate) if (dilate > 0 and obj.any()) else ~obj
    n_out = int(bg.sum())
    k = max(1, -(-n_out * source.n // SIGMA_SAMPLES))
    # the sampled background voxels: every k-th flat (C-order) index, without a volume of indices
    kept = np.flatnonzero(bg.reshape(-1)[::k]) * k  # the background's flat (C-order) indices that are multiples of k
    if bg.size <= np.iinfo(np.int32).max:  # half the memory of int64
        kept = kept.astype(np.int32)
    nz = bg.shape[2]
    n = source.n
    values: np.ndarray | None = None  # (kept.size, n), filled slab by slab
    index = np.empty(kept.size, kept.dtype)  # the flat index of each row of values
    row = 0
    peaks = []
    cached = source._object_median is not None and obj is source._object_mask
    n_usable = n_zero = n_nonfinite = n_samples = 0
    for z0, z1 in source.slabs(max_bytes):
        block = source.read(z0, z1)
        block = np.abs(block) if np.iscomplexobj(block) else block
        # counts over the whole background, one volume and one run of voxels at a time (no copy of the
        # background's samples, nor of one volume's)
        bgs = bg[:, :, z0:z1]
        # the volumes' flat views in their memory order (NIfTI data: Fortran volumes) with the mask raveled
        # alike: counts do not depend on the order, and the gather reads memory in sequence (18 -> 7 ms on
        # 12 volumes of 1M voxels, against boolean indexing of a Fortran volume by a C-ordered mask); a
        # C-ordered series (volumes interleaved) is gathered a run of voxels at a time, all volumes at once
        by_volume = all(block[..., v].flags.f_contiguous for v in range(block.shape[-1]))
        if not by_volume and not block.flags.c_contiguous:
            block = np.ascontiguousarray(block)  # a series neither way (not one qmap reads): one copy
        bg_flat = bgs.ravel(order="F" if by_volume else "C")
        flats = [block[..., v].ravel(order="F") for v in range(block.shape[-1])] if by_volume else []
        rows = None if by_volume else block.reshape(-1, block.shape[-1])
        for i in range(0, bg_flat.size, _COUNT_BLOCK):
            sel = bg_flat[i:i + _COUNT_BLOCK]
            n_bg = int(np.count_nonzero(sel))
            if n_bg == 0:
                continue
            any_fin = np.zeros(n_bg, bool)
            any_nz = np.zeros(n_bg, bool)
            n_fin: np.ndarray = np.zeros(n_bg, np.uint8 if block.shape[-1] < 256 else np.int32)  # finite samples
            part = None if rows is None else rows[i:i + _COUNT_BLOCK][sel]
            for v in range(block.shape[-1]):
                b = flats[v][i:i + _COUNT_BLOCK][sel] if part is None else part[:, v]
                fin = np.isfinite(b)
                any_fin |= fin
                any_nz |= fin & (b != 0)
                n_fin += fin
            n_nonfinite += int(np.count_nonzero(~any_fin))
            n_zero += int(np.count_nonzero(any_fin & ~any_nz))
            n_usable += int(np.count_nonzero(any_nz))
            n_samples += int(n_fin[any_nz].sum())
        del flats, rows, bg_flat
        if values is None:
            values = np.empty((kept.size, n), block.dtype)
        # the slab's sampled voxels in C order (as boolean indexing of the slab takes them), a block of
        # indices at a time (no coordinate arrays for all of them)
        for i in range(0, kept.size, _BLOCK):
            part = kept[i:i + _BLOCK]
            zz = part % nz
            at = part[(zz >= z0) & (zz < z1)]
            x, y, z = np.unravel_index(at, bg.shape)
            values[row:row + at.size] = block[x, y, z - z0].reshape(-1, n)
            index[row:row + at.size] = at
            row += at.size
        if not cached:
            peaks.append(peak_image(block)[obj[:, :, z0:z1]])
    # the median of the object's finite peaks (cached by object_mask for its own mask), for the plausibility check
    if cached and source._object_median is not None:
        obj_median = source._object_median
    else:
        obj_peak = np.concatenate(peaks) if peaks else np.zeros(0, np.float32)
        del peaks
        finite_peak = obj_peak[np.isfinite(obj_peak)]  # a copy: partitioned in place below
        obj_median = _median64(finite_peak, overwrite=True) if finite_peak.size else 0.0
        del obj_peak, finite_peak
    return _Background(
        values=values[:row] if values is not None else np.zeros((0, n)),
        index=index[:row],
        obj_median=obj_median, n_outside=n_out, n_usable=n_usable, n_zero=n_zero,
        n_nonfinite=n_nonfinite, n_samples=n_samples, mask_fraction=float(obj.mean()) if obj.size else 0.0,
        shape=tuple(obj.shape),
    )


def _median64(values: np.ndarray, overwrite: bool = False) -> float:
    """``np.median`` of ``values`` taken in float64, without a float64 copy of them (float32 samples, peaks).

    The median is one order statistic (odd count) or the float64 mean of two; both are exact whatever the
    storage type, so this is ``float(np.median(values.astype(np.float64)))`` to the bit (for float64
    values: ``float(np.median(values))``). ``overwrite``: partition ``values`` (a 1-D array) in place
    instead of a copy of it.
    """
    n = values.size
    k = n // 2
    if overwrite:
        values.partition(k)
        part = values
    else:
        part = np.partition(values, k)
    if n % 2:
        return float(part[k])
    # the lower middle value: the largest below the upper one (one partition instead of numpy's two)
    return float((np.float64(part[:k].max()) + np.float64(part[k])) / 2.0)


def _background_samples(values: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """Usable background values (flat), their storage step, and the row of each value.

    float32 samples stay float32 (half the memory; every statistic of them is taken in float64 from their
    exact values: :func:`_median64`, float64 limits, :func:`_moments_coils`), other types become float64.
    Voxels that are zero (or not finite) in every volume are zero filling, not noise. In continuous data
    an exact zero elsewhere is zero filling too; in quantised data (integer storage) a zero is the lowest
    bin of the noise and is kept.
    """
    values = np.asarray(values)
    if values.ndim == 1:
        values = values[:, None]
    fin = np.isfinite(values)
    live = (fin & (values != 0)).any(axis=1)
    rtype = np.int32 if values.shape[0] < 2**31 else np.int64  # row numbers: half the memory of int64
    rows = np.broadcast_to(np.arange(values.shape[0], dtype=rtype)[:, None], values.shape)
    sel = fin & live[:, None]
    del fin, live
    bg = values[sel]
    if bg.dtype != np.float32:
        bg = bg.astype(np.float64)
    row = rows[sel]
    del sel
    nz = bg != 0
    nonzero = bg[nz]
    q = _quantum(nonzero) if bg.size else 0.0
    if q == 0.0:
        bg, row = nonzero, row[nz]
    return bg, q, row


def _background_problem(b: _Background, need: int, need_samples: int) -> str:
    """Why the background gives no usable estimate: the actual cause, in words."""
    if b.n_outside == 0 or b.mask_fraction > 0.85:
        return (f"no background: the object mask covers {100 * b.mask_fraction:.0f} % of the image (a field of view "
                "cropped to the object, or at very low SNR an automatic mask that took in the noise itself -- "
                "then give a mask file: mask=FILE)")
    if b.n_zero + b.n_nonfinite >= 0.5 * b.n_outside:
        what = "zero-filled (exact zeros)" if b.n_zero >= b.n_nonfinite else "NaN (no finite value)"
        return (f"the background is {what} in {b.n_zero + b.n_nonfinite} of its {b.n_outside} voxels, leaving "
                f"{b.n_usable} noise voxels (at least {need} needed)")
    return (f"only {b.n_usable} background voxels ({b.n_samples} samples) outside the object (at least {need} "
            f"voxels and {need_samples} samples needed for {100 * TARGET_PRECISION:.0f} % precision; the field of "
            "view is close to the object)")


def _assess_background(b: _Background, coils: int | None, need_samples: int, need_voxels: int) -> NoiseEstimate:
    """Sigma from collected background samples, or InputError naming the cause."""
    if b.n_usable < need_voxels or b.n_samples < need_samples:
        raise InputError(f"cannot estimate the noise from the background: {_background_problem(b, need_voxels, need_samples)}")
    bg, quantum, rows = _background_samples(b.values)
    b.values = b.values[:0]  # the samples are in bg now (this consumes b's values: memory)
    if bg.size > _MAX_SAMPLES:
        step = -(-bg.size // _MAX_SAMPLES)
        bg, rows = bg[::step], rows[::step]
    if np.count_nonzero(bg < 0) > 0.01 * bg.size:
        raise InputError("cannot estimate the noise from the background: it holds negative values, so this is not "
                         "a magnitude image (a real-valued or phase export?)")
    med_bg = _median64(bg)
    med_obj = b.obj_median
    if not med_bg * 3.0 <= med_obj:
        raise InputError(
            f"cannot estimate the noise from the background: it is not pure noise (background median {med_bg:.4g} "
            f"vs object median {med_obj:.4g}, expected below a third; unmasked signal, or no object in the image)")
    notes: list[str] = []
    warns: list[str] = []
    details: dict = {}
    use = 1 if coils is None else _check_coils(coils)
    sigma, outliers = _clipped_sigma(bg, use, quantum)
    if outliers > _MAX_OUTLIER_FRACTION:
        raise InputError(
            f"cannot estimate the noise from the background: it is not pure noise ({100 * outliers:.0f} % of it is "
            f"far brighter than noise, expected below {100 * _MAX_OUTLIER_FRACTION:.0f} %; unmasked signal or "
            "strong artefacts)")
    kept = bg <= np.float64(_chi_tail(use) * sigma)  # compared in float64 (float32 samples)
    n_eff, se_r = _moments_coils(bg, quantum, kept)
    del kept
    details["background_coils_estimate"] = None if not np.isfinite(n_eff) else round(n_eff, 2)
    if not np.isfinite(n_eff) or n_eff > 64:
        raise InputError(
            "cannot estimate the noise from the background: it does not scatter like noise (its spread is far "
            f"smaller than magnitude noise has: a constant offset, or a processed / noise-free image; median "
            f"{med_bg:.4g})")
    if bg.size >= _MIN_COIL_SAMPLES:
        # r = 1 + 1/N: with one coil r = 2; claim N >= 2 only when r is clearly below 2
        r = 1.0 + 1.0 / n_eff
        n_round = max(1, round(n_eff))
        if coils is None and n_round >= 2 and r < 2.0 - 3.0 * se_r:
            use = n_round
            sigma, outliers = _clipped_sigma(bg, use, quantum)
            notes.append(f"the background is not Rayleigh: its moments fit a sum of squares over {n_round} coils "
                         f"(effective {n_eff:.1f}); sigma and the Rician fit use {n_round} coils (override with "
                         "coils=N)")
        elif coils is not None and abs(n_eff - coils) > max(0.5, 3.0 * se_r * n_eff * n_eff) and n_round != coils:
            warns.append(f"the background's moments fit a sum of squares over about {n_eff:.1f} coils, not the "
                         f"coils={coils} given; check coils=")
    rel = median_relative_se(use) / math.sqrt(bg.size)
    if quantum > 0:
        details["quantum"] = quantum
    uneven = _uneven_background(bg, rows, b.index, b.shape, use, quantum)
    if uneven:
        warns.append(uneven)
        details["uneven_background"] = True
    return NoiseEstimate(sigma=float(sigma), source="background", n_voxels=b.n_usable, relative_precision=rel,
                         coils=use, details=details, notes=notes, warnings=warns)


def _uneven_background(bg, rows, index, shape, coils, quantum) -> str:
    """A note when the background noise differs between halves of the image along x or y (else "")."""
    if bg.size < 4 * _MIN_COIL_SAMPLES or index.size == 0:
        return ""
    worst = (1.0, "")
    for axis in (0, 1):  # the voxel's x, then y (C order), one at a time: np.unravel_index's coordinates
        # the half of each sampled voxel, then of each sample (no index or coordinate per sample)
        key = index // (shape[1] * shape[2]) if axis == 0 else (index // shape[2]) % shape[1]
        cut = 0.5 * (shape[axis] - 1)
        lo, hi = (key < cut)[rows], (key > cut)[rows]
        del key
        a, b2 = bg[lo], bg[hi]
        del lo, hi
        if min(a.size, b2.size) < _MIN_COIL_SAMPLES:
            continue
        sa = _clipped_sigma(a, coils, quantum)[0]
        sb = _clipped_sigma(b2, coils, quantum)[0]
        ratio = max(sa, sb) / min(sa, sb)
        se = median_relative_se(coils) * math.sqrt(1.0 / a.size + 1.0 / b2.size)
        if ratio > max(1.2, 1.0 + 4.0 * se) and ratio > worst[0]:
            worst = (ratio, (f"the background noise differs by a factor {ratio:.2f} between the two halves of the "
                            f"image along {'xy'[axis]} (parallel imaging or coil sensitivity?): one sigma biases "
                            "the fit where the noise is higher; consider sigma='local'"))
    return worst[1]


# ---------------------------------------------------------------------------
# Noise level from the residuals of a first fit inside the object
# ---------------------------------------------------------------------------


def _gather(source: VolumeSource, index: np.ndarray, max_bytes: float | None) -> np.ndarray:
    """Samples (k, n) of the voxels with flat indices ``index`` (sorted), read slab by slab."""
    shape = source.shape
    z = np.unravel_index(index, shape)[2]
    out = np.empty((index.size, source.n), dtype=np.float64)
    for z0, z1 in source.slabs(max_bytes):
        sel = (z >= z0) & (z < z1)
        if not sel.any():
            continue
        block = source.read(z0, z1)
        block = np.abs(block) if np.iscomplexobj(block) else block
        ii, jj, kk = np.unravel_index(index[sel], shape)
        out[sel] = block[ii, jj, kk - z0]
    return out


def _gather_finite(
    source: VolumeSource, index: np.ndarray, ctx_maps: dict | None, max_bytes: float | None
) -> tuple[np.ndarray, np.ndarray, dict | None]:
    """The voxels of ``index`` whose samples and model inputs are all finite, for a fit.

    Returns their flat indices (k,), their samples (k, n) (see :func:`_gather`) and, with ``ctx_maps``
    ((X, Y, Z) maps of per-voxel model inputs), their model inputs as ``{name: (k,) ndarray}`` (else None).
    """
    y = _gather(source, index, max_bytes)
    ok = np.all(np.isfinite(y), axis=1)
    ctx = None
    if ctx_maps:
        ctx = {k: np.asarray(v, float).reshape(-1)[index] for k, v in ctx_maps.items()}
        for v in ctx.values():
            ok &= np.isfinite(v)
        ctx = {k: v[ok] for k, v in ctx.items()}
    return index[ok], y[ok], ctx


def _leverage(J: np.ndarray) -> np.ndarray:
    """Diagonal of the hat matrix J^T (J J^T)^-1 J per voxel: J (n, P, m) -> (n, m)."""
    if J.shape[1] == 2:  # two parameters: the closed-form inverse (an SVD per voxel costs ~20x more)
        j0, j1 = J[:, 0], J[:, 1]
        a, b, c = (np.einsum("nm,nm->n", u, v) for u, v in ((j0, j0), (j0, j1), (j1, j1)))
        A = np.stack([np.stack([a, b], 1), np.stack([b, c], 1)], 1)
        det = a * c - b * b
        ok = det > 1e-12 * np.maximum(a * c, np.finfo(float).tiny)
        Ainv = np.empty_like(A)
        with np.errstate(divide="ignore", invalid="ignore"):
            Ainv[:, 0, 0], Ainv[:, 1, 1] = c / det, a / det
            Ainv[:, 0, 1] = Ainv[:, 1, 0] = -b / det
        if not ok.all():
            Ainv[~ok] = np.linalg.pinv(A[~ok])
        return (Ainv[:, 0, 0, None] * j0 * j0 + 2.0 * Ainv[:, 0, 1, None] * j0 * j1
                + Ainv[:, 1, 1, None] * j1 * j1)
    return np.einsum("npm,npq,nqm->nm", J, np.linalg.pinv(np.einsum("npm,nqm->npq", J, J)), J)


def pooled_sigma(rss: np.ndarray, dof: np.ndarray) -> float:
    """Robust pooled sigma from per-voxel residual sums of squares.

    For voxels whose residuals are Gaussian with sd sigma, ``rss_i / sigma^2`` is chi-squared with
    ``dof_i`` degrees of freedom (number of residuals used minus the fitted parameters' leverage on
    them), so ``u_i = rss_i / median(chi2(dof_i))`` has median ``sigma^2`` for every voxel, and so has
    their pool: sigma is the square root of the median of the ``u_i``. A minority of voxels where the
    model does not fit (edges, partial volume) moves the median little.
    """
    # the median of chi2(dof) once per distinct dof (most voxels share one: the quantile is a Newton search)
    levels, which = np.unique(np.asarray(dof, float), return_inverse=True)
    return math.sqrt(float(np.median(rss / chi2_ppf(0.5, levels)[which.reshape(np.shape(dof))])))


def pooled_relative_se(dof: np.ndarray) -> float:
    """Relative standard error of :func:`pooled_sigma` (sample-median asymptotics, median dof)."""
    k = float(np.median(dof))
    q = float(chi2_ppf(0.5, k))
    return 1.0 / (4.0 * float(chi2_pdf(q, k)) * q * math.sqrt(dof.size))


def _fitted_data(model, y: np.ndarray, pred: np.ndarray) -> np.ndarray:
    """The variant of ``y`` the fit used per voxel (``model.candidates``, e.g. IR polarity): the closest to ``pred``."""
    cands = model.candidates(y)
    if len(cands) == 1:
        return y
    best = np.asarray(cands[0], dtype=np.float64)
    best_rss = np.sum((best - pred) ** 2, axis=1)
    for c in cands[1:]:
        c = np.asarray(c, dtype=np.float64)
        rss = np.sum((c - pred) ** 2, axis=1)
        take = rss < best_rss
        best[take], best_rss[take] = c[take], rss[take]
    return best


def _residuals_above(y, pred, h, ok, sigma, n_params):
    keep = np.abs(pred) >= FLOOR_MARGIN * np.reshape(np.asarray(sigma, float), (-1, 1))
    r = y - pred
    rss = np.sum(np.where(keep, r * r, 0.0), axis=1)
    dof = np.sum(np.where(keep, 1.0 - h, 0.0), axis=1)
    good = ok & (keep.sum(axis=1) >= n_params + 2) & np.isfinite(rss) & (dof > 0.5)
    return np.where(good, rss, 0.0), np.where(good, dof, 0.0)


@shared_parameters("source", "max_bytes")
def residual_estimate(
    source: VolumeSource,
    model,
    *,
    mask: np.ndarray,
    ctx_maps: dict | None = None,
    max_bytes: float | None = None,
    max_voxels: int = RESIDUAL_VOXELS,
) -> NoiseEstimate:
    """Noise sigma from the scatter of the residuals of a plain fit inside the object.

    Parameters
    ----------
    model : SeparableModel
        The command's own model (fitted without a noise floor).
    mask : (X, Y, Z) ndarray of bool
        Voxels that may be used (the fit mask).
    ctx_maps : dict, optional
        Per-voxel model inputs as (X, Y, Z) maps (e.g. B1).
    max_voxels : int
        Voxels fitted (an even stride through the mask).

    Returns
    -------
    NoiseEstimate
        ``source="residuals"``.

    Raises
    ------
    InputError
        Too few voxels well above the noise floor, or too few samples per voxel for the model.

    Notes
    -----
    For a model that describes the data, the residuals of a least-squares fit scatter with the noise sd:
    :math:`E[\\sum_j r_j^2] = \\sigma^2 \\sum_j (1 - h_{jj})` with :math:`h` the hat matrix of the
    (linearised) fit. Only samples whose fitted value is at least :data:`FLOOR_MARGIN` sigma count,
    where the magnitude of a Rician sample has nearly Gaussian noise of sd sigma (Gudbjartsson & Patz
    1995); sigma and that selection are iterated to agreement. Voxels are pooled robustly
    (:func:`pooled_sigma`). A model that does not fit (e.g. a
    multi-exponential decay fitted as one exponential) inflates the estimate.
    """
    mask = np.asarray(mask, bool)
    n_params = len(model.param_names)
    if model.n_samples < n_params + 2:
        raise InputError(f"cannot estimate the noise from fit residuals: {model.n_samples} samples per voxel leave "
                         f"too few degrees of freedom for the {n_params} fitted parameters")
    idx = np.flatnonzero(mask.reshape(-1))
    if idx.size > max_voxels:
        idx = idx[:: -(-idx.size // max_voxels)]
    if idx.size == 0:
        raise InputError("cannot estimate the noise from fit residuals: the mask is empty")
    idx, y, ctx = _gather_finite(source, idx, ctx_maps, max_bytes)
    if y.shape[0] < MIN_RESIDUAL_VOXELS:
        raise InputError(f"cannot estimate the noise from fit residuals: only {y.shape[0]} usable voxels")
    from .fitting.solver import fit_chunk

    fit = fit_chunk(model, y, ctx=ctx)
    pred, J = model.signal_jacobian(fit.params, ctx)
    h = _leverage(J)
    y = _fitted_data(model, y, pred)
    good = fit.status == 0
    # start from every sample (an underestimate where the decay reaches the floor), then iterate
    r = y - pred
    rss0 = np.sum(r * r, axis=1)
    dof0 = np.sum(1.0 - h, axis=1)
    use = good & (dof0 > 0.5)
    if use.sum() < MIN_RESIDUAL_VOXELS:
        raise InputError("cannot estimate the noise from fit residuals: the first fit failed in most voxels")
    sigma = pooled_sigma(rss0[use], dof0[use])
    rss = dof = np.zeros(0)
    for _ in range(20):
        rss, dof = _residuals_above(y, pred, h, good, sigma, n_params)
        use = dof > 0
        if use.sum() < MIN_RESIDUAL_VOXELS:
            raise InputError(
                f"cannot estimate the noise from fit residuals: only {int(use.sum())} of {y.shape[0]} voxels have "
                f"enough samples well above the noise floor (fitted value >= {FLOOR_MARGIN:g} sigma)")
        new = pooled_sigma(rss[use], dof[use])
        if abs(new - sigma) <= 1e-4 * sigma:
            sigma = new
            break
        sigma = new
    rss, dof = _residuals_above(y, pred, h, good, sigma, n_params)
    use = dof > 0
    rel = pooled_relative_se(dof[use])
    return NoiseEstimate(sigma=float(sigma), source="residuals", n_voxels=int(use.sum()), relative_precision=rel,
                         details={"residual_dof_median": float(np.median(dof[use]))})


# ---------------------------------------------------------------------------
# The chain
# ---------------------------------------------------------------------------


def _agree(a: NoiseEstimate, b: NoiseEstimate) -> tuple[bool, float]:
    """Do two estimates agree within 3 combined standard errors (+ 5 %)? Returns (agree, ratio a/b)."""
    ratio = a.value / b.value
    se = math.hypot(a.relative_precision or 0.0, b.relative_precision or 0.0)
    return abs(math.log(ratio)) <= 3.0 * se + 0.05, ratio


@shared_parameters("source", "max_bytes")
def estimate_noise(
    source: VolumeSource,
    *,
    model=None,
    mask: np.ndarray | None = None,
    ctx_maps: dict | None = None,
    coils: int | None = None,
    max_bytes: float | None = None,
    local: bool = False,
    n_jobs: int | None = None,
) -> NoiseEstimate:
    """The noise level of a magnitude series from the data itself (``--sigma auto`` / ``--sigma local``).

    Parameters
    ----------
    model : SeparableModel, optional
        The command's model; enables the residual source. Without it only the background is used.
    mask : (X, Y, Z) ndarray of bool, optional
        Voxels the residual source may use (default: the automatic object mask).
    ctx_maps : dict, optional
        Per-voxel model inputs (X, Y, Z) (e.g. B1).
    coils : int, optional
        Sum-of-squares coils; None lets the background's moments decide (default one).
    local : bool
        Return a smooth noise map (:func:`local_noise_map`) instead of one value.
    n_jobs : int, optional
        Workers for the fit of the local map.

    Returns
    -------
    NoiseEstimate

    Raises
    ------
    InputError
        Neither source gives a trustworthy value; the message says why for each and what to do.

    Notes
    -----
    In order, the first source whose relative standard error is at most :data:`TARGET_PRECISION`:

    1. the background (:func:`background_estimate`): Rayleigh / chi statistics of the voxels outside
       the grown object, zero filling excluded;
    2. the residuals of a plain fit of the model in voxels well above the noise floor
       (:func:`residual_estimate`).

    When both are available they are compared and a disagreement beyond their uncertainty is reported
    (a model that does not fit the data, or noise that is not uniform). When neither reaches the target,
    the more precise one is used if it is within twice the target, with a note.
    """
    from .engine import resolve_jobs, worker_pool

    obj = object_mask(source, max_bytes)
    fit_mask = obj if mask is None else np.asarray(mask, bool)
    errors = []
    bg = res = None

    def residuals() -> NoiseEstimate:
        return residual_estimate(source, model, mask=fit_mask, ctx_maps=ctx_maps, max_bytes=max_bytes)

    # a series in memory: the residual source's fit runs on a worker of the run's fit (no new thread) while
    # this thread takes the background statistics (measured: 1M-voxel t2star, 20 ms of 80 overlapped)
    jobs = resolve_jobs(n_jobs)
    beside = worker_pool(jobs).submit(residuals) if model is not None and max_bytes is None and jobs > 1 else None
    try:
        bg = background_estimate(source, coils=coils, obj=obj, max_bytes=max_bytes)
    except InputError as exc:
        errors.append(str(exc))
    if model is not None:
        try:
            res = beside.result() if beside is not None else residuals()
        except InputError as exc:
            errors.append(str(exc))
    candidates = [e for e in (bg, res) if e is not None]
    good = [e for e in candidates if (e.relative_precision or 0.0) <= TARGET_PRECISION]
    if good:
        chosen = good[0]
    else:
        ok = [e for e in candidates if (e.relative_precision or 0.0) <= 2 * TARGET_PRECISION]
        if not ok:
            for e in candidates:
                errors.append(f"the {e.source} estimate {e.value:.4g} is too imprecise "
                              f"({100 * (e.relative_precision or 0):.0f} % relative standard error)")
            raise InputError(_failure_message(errors, model is not None, obj))
        chosen = min(ok, key=lambda e: e.relative_precision or 0.0)
        chosen.notes.append(f"the noise level is known to only {100 * (chosen.relative_precision or 0):.0f} % "
                            f"(from the {chosen.source}); give sigma=VALUE if you know it better")
    if bg is not None and res is not None:
        chosen.details["background_sigma"] = bg.value
        chosen.details["residual_sigma"] = res.value
        agree, ratio = _agree(bg, res)
        if not agree:
            chosen.warnings.append(
                f"the background ({bg.value:.4g}) and the fit residuals ({res.value:.4g}) disagree on the noise "
                f"level (ratio {ratio:.2f}, beyond their uncertainty): the model may not describe the data (e.g. "
                "a multi-exponential decay), the noise may vary over the image (sigma='local'), or the background "
                "may hold artefacts; using the " + chosen.source)
    if chosen.coils is None:
        chosen.coils = 1 if coils is None else coils
    if local:
        if model is None:
            raise InputError("sigma='local' needs a fitted model (model=; on the command line: a command that fits a "
                             "signal model)")
        return local_noise_map(source, model, mask=fit_mask, obj=obj, ctx_maps=ctx_maps, max_bytes=max_bytes,
                               first=chosen, n_jobs=n_jobs)
    return chosen


def _failure_message(errors: list, have_model: bool, obj: np.ndarray) -> str:
    fixes = ["give the noise level with sigma=VALUE (signal units)"]
    if any("mask covers" in e for e in errors):
        fixes.insert(0, "give a mask file (mask=FILE)")
    if any("not a magnitude image" in e for e in errors):
        fixes = ["check that the input is a magnitude image (not a real-valued or phase export)"] + fixes
    if have_model:
        fixes.append("or fit without the noise floor (noise_floor='none')")
    if not obj.any():
        errors.insert(0, "no object was found in the image")
    errors = [e.replace("cannot estimate the noise from ", "") for e in errors]
    return "cannot estimate the noise level: " + "; ".join(errors) + ". Fix: " + ", ".join(fixes)


# ---------------------------------------------------------------------------
# A smooth noise map (``--sigma local``)
# ---------------------------------------------------------------------------

#: relative standard error aimed at by the local map at each voxel (sets the smoothing width)
LOCAL_PRECISION = 0.05
#: smoothing widths tried (Gaussian sd in voxels), smallest first
_LOCAL_WIDTHS = (1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0, 12.0, 16.0)


def local_noise_map(
    source: VolumeSource,
    model,
    *,
    mask: np.ndarray,
    obj: np.ndarray,
    first: NoiseEstimate,
    ctx_maps: dict | None = None,
    max_bytes: float | None = None,
    n_jobs: int | None = None,
) -> NoiseEstimate:
    """A smooth map of the noise sd for noise that varies over the field of view.

    Every voxel of ``mask`` is fitted without a noise floor; its residual variance over the samples
    well above the floor (``rss / dof``, see :func:`residual_estimate`) and, outside the grown object,
    each background voxel's mean square over the volumes (``E[M^2] = 2 N sigma^2`` for N coils) are
    averaged with a Gaussian kernel, weighting each voxel by its degrees of freedom (normalised
    convolution). The kernel width is the smallest that gives the median voxel
    ``(sum g w)^2 / sum g^2 w >= 1 / (2 p^2)`` effective degrees of freedom (relative standard error
    ``p`` = :data:`LOCAL_PRECISION` of sigma). Voxels whose residual variance is far above the first
    (global) estimate (beyond what a 3x change of the noise and chance explain) are left out as misfits.

    Returns
    -------
    NoiseEstimate
        ``sigma`` an (X, Y, Z) map, ``source="local"``, ``relative_precision`` the median over the
        mask of each voxel's.
    """
    from .engine import fit_voxels

    g = first.value
    idx = np.flatnonzero(np.asarray(mask, bool).reshape(-1))
    idx, y, ctx = _gather_finite(source, idx, ctx_maps, max_bytes)
    n_params = len(model.param_names)
    rss = np.zeros(idx.size)
    dof = np.zeros(idx.size)

    def on_chunk(a: int, b: int, fit) -> None:
        c = None if not ctx else {k: v[a:b] for k, v in ctx.items()}
        pred, J = model.signal_jacobian(fit.params, c)
        yy = _fitted_data(model, np.asarray(y[a:b], np.float64), pred)
        rss[a:b], dof[a:b] = _residuals_above(yy, pred, _leverage(J), fit.status == 0, g, n_params)

    if idx.size:
        fit_voxels(model, y, ctx=ctx, n_jobs=n_jobs, on_chunk=on_chunk, label="noise map")
    return smooth_noise_map(source, idx=idx, rss=rss, dof=dof, mask=mask, obj=obj, first=first, max_bytes=max_bytes)


def smooth_noise_map(
    source: VolumeSource,
    *,
    idx: np.ndarray,
    rss: np.ndarray,
    dof: np.ndarray,
    mask: np.ndarray,
    obj: np.ndarray,
    first: NoiseEstimate,
    max_bytes: float | None = None,
) -> NoiseEstimate:
    """The smooth noise map of :func:`local_noise_map` from per-voxel residuals the caller computed.

    For a command whose fit already gives each voxel's residual sum of squares and its degrees of freedom
    (e.g. the NNLS T2 spectrum), so that no second fit is needed.

    Parameters
    ----------
    source : VolumeSource
        The series (its background voxels join the map).
    idx : (N,) int ndarray
        Flat (C-order) indices of the fitted voxels.
    rss, dof : (N,) ndarray
        Their residual sums of squares (signal units squared) and degrees of freedom (0: not usable).
    mask : (X, Y, Z) ndarray of bool
        The fit mask (where the map's precision is assessed).
    obj : (X, Y, Z) ndarray of bool
        The object (voxels outside it are background).
    first : NoiseEstimate
        A first, global estimate (sets the misfit limit and the fallback of poorly supported voxels).
    max_bytes : float, optional
        Memory budget for reading the background.

    Returns
    -------
    NoiseEstimate
        As :func:`local_noise_map`.
    """
    from scipy import ndimage

    shape = source.shape
    g = first.value
    coils = first.coils or 1
    idx = np.asarray(idx, np.intp)
    rss = np.asarray(rss, np.float64)
    dof = np.asarray(dof, np.float64)
    use = dof > 0
    s2 = np.zeros(idx.size)
    s2[use] = rss[use] / dof[use]
    # misfits: far above what a 3x higher noise would give by chance
    limit = 9.0 * g * g * chi2_isf(1e-4, np.maximum(dof, 1.0)) / np.maximum(dof, 1.0)
    use &= s2 <= limit
    w = np.zeros(int(np.prod(shape)))
    v = np.zeros_like(w)
    w[idx[use]] = dof[use]
    v[idx[use]] = rss[use]
    # background voxels: sum of M^2 over the volumes, 2 N n degrees of freedom
    b = _collect_background(source, obj, max_bytes, 3)
    if b.values.size:
        vals = b.values.astype(np.float64)
        fin = np.isfinite(vals) & (vals != 0)
        rows = fin.sum(axis=1) > 0
        m2 = np.where(fin, vals * vals, 0.0)
        cnt = fin.sum(axis=1)
        w_bg = 2.0 * coils * cnt
        w[b.index[rows]] = w_bg[rows]
        v[b.index[rows]] = m2.sum(axis=1)[rows]  # E = 2 N sigma^2 per sample: sum / (2 N n) estimates sigma^2
    w = w.reshape(shape)
    v = v.reshape(shape)
    need = 1.0 / (2.0 * LOCAL_PRECISION**2)
    inside = np.asarray(mask, bool)
    width = _LOCAL_WIDTHS[-1]
    for width in _LOCAL_WIDTHS:
        sw = ndimage.gaussian_filter(w, width, mode="nearest", truncate=3.0)
        sw2 = ndimage.gaussian_filter(w, width / math.sqrt(2.0), mode="nearest", truncate=3.0)
        # (sum g w)^2 / sum g^2 w with g the normalised Gaussian: g^2 is a Gaussian of sd width/sqrt(2),
        # scaled by 1 / (2 sqrt(pi) width)^d
        norm = (2.0 * math.sqrt(math.pi) * width) ** 3
        with np.errstate(divide="ignore", invalid="ignore"):
            eff = sw * sw / (sw2 / norm)
        if not inside.any() or np.median(eff[inside]) >= need:
            break
    sv = ndimage.gaussian_filter(v, width, mode="nearest", truncate=3.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        sig2 = sv / sw
        eff = sw * sw / (sw2 / norm)
    weak = ~(np.isfinite(sig2) & (sig2 > 0) & (eff >= 0.25 * need))
    sig = np.sqrt(np.where(weak, g * g, sig2))
    prec = 1.0 / np.sqrt(2.0 * np.maximum(eff, 1e-12))
    rel = float(np.median(prec[inside])) if inside.any() else None
    notes = list(first.notes)
    notes.append(f"local noise map: smoothed over a Gaussian of sd {width:g} voxels; sigma "
                 f"{np.percentile(sig[inside], 5):.4g}-{np.percentile(sig[inside], 95):.4g} (5-95 % over the mask)"
                 if inside.any() else "local noise map: empty mask")
    details = dict(first.details, smoothing_sd_voxels=width, first_source=first.source, first_sigma=g)
    return NoiseEstimate(sigma=sig.astype(np.float32), source="local", n_voxels=int(use.sum() + b.n_usable),
                         relative_precision=rel, coils=first.coils, details=details, notes=notes,
                         warnings=[w for w in first.warnings if "sigma='local'" not in w])


def array_sigma(data: np.ndarray, model, spec, *, mask=None, coils: int | None = None,
                n_jobs: int | None = None) -> tuple[object, dict | None]:
    """The array API's ``sigma`` argument: ``"auto"`` / ``"local"`` run :func:`estimate_noise` on ``data``.

    Parameters
    ----------
    data : (..., m) ndarray
        The samples (a 4D (X, Y, Z, m) array keeps its geometry for the background source; other shapes
        are treated as a row of voxels).
    model : SeparableModel
    spec : "auto", "local", None, float or ndarray
        Anything but ``"auto"`` / ``"local"`` is returned unchanged (with ``info`` None).
    mask : (...) array_like of bool, optional
    coils : int, optional

    Returns
    -------
    sigma : float, ndarray or None
        The value (or map, shaped like ``data.shape[:-1]``).
    info : dict or None
        The provenance of the estimate (see :meth:`NoiseEstimate.provenance`) and its ``notes``.
    """
    if not isinstance(spec, str):
        return spec, None
    if spec not in ("auto", "local"):
        raise ValueError(f"sigma={spec!r}: expected 'auto', 'local', a positive number or an array of them")
    a = np.asarray(data)
    lead = a.shape[:-1]
    a4 = a if a.ndim == 4 else a.reshape(-1, 1, 1, a.shape[-1])
    m = None if mask is None else np.asarray(mask, bool).reshape(a4.shape[:3])
    est = estimate_noise(ArraySource(a4), model=model, mask=m, coils=coils, local=spec == "local", n_jobs=n_jobs)
    info = est.provenance(spec)
    info.update(coils=est.coils, notes=list(est.notes))
    sigma = np.asarray(est.sigma).reshape(lead) if spec == "local" else float(est.sigma)
    return sigma, info
