"""The object mask and the noise level of a magnitude series.

One slab-wise path serves the command line (a :class:`qmap.io.series.Series`
read slab by slab under ``--max-memory``) and the array functions (an array
wrapped as one slab, :class:`ArraySource`):

* :func:`peak_image` / :func:`mask_from_peak` / :func:`object_mask`: each
  voxel's brightest sample, thresholded at half of Otsu's threshold;
* :func:`background_sigma`: the noise standard deviation per real channel from
  the Rayleigh (chi) statistics of the background outside the grown object.

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
from typing import Protocol

import numpy as np
import numpy.typing as npt

from .errors import InputError
from .noise import _check_coils

__all__ = [
    "ArraySource",
    "auto_mask",
    "background_exclusion",
    "background_sigma",
    "estimate_sigma_background",
    "mask_from_peak",
    "object_mask",
    "otsu_threshold",
    "peak_image",
    "sigma_from_samples",
]

#: Largest fraction of the background that may be far brighter than noise
#: (ghosts, unmasked dim tissue) before ``--sigma auto`` gives up.
_MAX_OUTLIER_FRACTION = 0.2
#: Most background values used for the noise estimate.
_MAX_SAMPLES = 2_000_000
#: values used for the automatic mask's threshold (a stride through the peak image)
_MASK_SAMPLES = 1_000_000
#: background samples collected for ``--sigma auto`` (every k-th voxel by flat index, so that the
#: choice does not depend on how the volume is read)
SIGMA_SAMPLES = 2_000_000

_HINT = "give the noise level with --sigma VALUE"


class VolumeSource(Protocol):
    """What the mask and noise estimates read: a series of volumes, slab by slab along z."""

    _object_mask: np.ndarray | None
    _peak: np.ndarray | None

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
        self._peak: np.ndarray | None = None

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.data.shape[:3])  # type: ignore[return-value]

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
    v = np.ravel(np.asarray(values, dtype=np.float64))
    if v.size == 0:
        raise ValueError("otsu_threshold needs at least one value")
    if not np.all(np.isfinite(v)):
        raise ValueError("otsu_threshold needs finite values")
    lo, hi = float(v.min()), float(v.max())
    if lo == hi:
        return lo
    hist, edges = np.histogram(v, bins=256, range=(lo, hi))
    hist = hist.astype(np.float64)
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
        else:
            lo = np.fmin.reduce(block, axis=3)
            hi = np.fmax.reduce(block, axis=3)
            peak = np.fmax(hi, -lo)  # real-valued data may be negative (phase-corrected IR)
    bad = ~np.isfinite(peak)
    if bad.any():  # rare: only the voxels holding +-inf (or nothing finite at all) are looked at again
        sub = np.abs(block[bad])
        peak[bad] = np.max(np.where(np.isfinite(sub), sub, 0.0), axis=-1)
    return peak.astype(np.float32)


def mask_from_peak(peak: np.ndarray) -> np.ndarray:
    """The object mask from a peak image (see :func:`auto_mask`)."""
    nonzero = peak[peak != 0]
    if nonzero.size == 0:
        return np.zeros(peak.shape, dtype=bool)
    if nonzero.size > _MASK_SAMPLES:  # an even stride: the histogram needs no more (memory, time)
        nonzero = nonzero[:: -(-nonzero.size // _MASK_SAMPLES)]
    clipped = np.minimum(nonzero, np.percentile(nonzero, 99.9))
    threshold = 0.5 * otsu_threshold(clipped)
    # pad by repeating the edge so that the image border does not erode the object
    # (thin slabs and 2D multi-slice data would lose the rim of the first and last slice)
    from scipy import ndimage  # imported on use (start-up time)
    mask = ndimage.binary_opening(np.pad(peak > threshold, 1, mode="edge"))[1:-1, 1:-1, 1:-1]
    return ndimage.binary_fill_holes(mask)


def object_mask(source: VolumeSource, max_bytes: float | None = None) -> np.ndarray:
    """The automatically detected object of a series, read slab by slab (see :func:`auto_mask`).

    The mask and the peak image are cached on ``source`` (used by ``--mask auto`` and
    ``--sigma auto``).
    """
    if source._object_mask is None:
        peak = np.concatenate([peak_image(source.read(z0, z1)) for z0, z1 in source.slabs(max_bytes)], axis=2)
        source._object_mask = mask_from_peak(peak)
        source._peak = peak
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
    2. Threshold at half of Otsu's threshold of that maximum image. Otsu on
       images with several tissue classes often splits dim from bright
       tissue rather than tissue from background; half of it keeps dim
       tissue (e.g. long-T1 / short-T2 regions) while staying far above the
       Rayleigh noise of the background. Exact zeros (zero filling) are left
       out of the histogram, and values above the 99.9th percentile are
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
    4. Holes enclosed in 3D are filled (``scipy.ndimage.binary_fill_holes``),
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


def background_exclusion(object_mask: np.ndarray, dilate: int = 3) -> np.ndarray:
    """The object grown by ``dilate`` voxels: everything outside it counts as background."""
    mask = np.asarray(object_mask, dtype=bool)
    if not mask.any():
        raise InputError(f"cannot estimate the noise: no object was found in the image to set apart; {_HINT}")
    from scipy import ndimage  # imported on use (start-up time)
    return ndimage.binary_dilation(mask, iterations=dilate) if dilate > 0 else mask


def background_sigma(
    source: VolumeSource,
    *,
    coils: int = 1,
    max_bytes: float | None = None,
    obj: np.ndarray | None = None,
    min_voxels: int = 1000,
    dilate: int = 3,
) -> tuple[float, int]:
    """Noise sigma from the image background, reading the series slab by slab.

    Parameters
    ----------
    source : VolumeSource
        The series (a :class:`~qmap.io.series.Series` or an :class:`ArraySource`).
    coils : int, optional
        Root-sum-of-squares coils (background distribution chi with ``2 * coils`` degrees of freedom).
    max_bytes : float, optional
        Memory budget (bytes) for reading the series.
    obj : (X, Y, Z) ndarray of bool, optional
        The object; default the automatic mask (:func:`object_mask`).
    min_voxels, dilate
        As for :func:`estimate_sigma_background`.

    Returns
    -------
    sigma : float
        Noise standard deviation per real channel (a.u.).
    n_voxels : int
        Usable background voxels.
    """
    if obj is None:
        obj = object_mask(source, max_bytes)
    obj = np.asarray(obj, dtype=bool)
    bg = ~background_exclusion(obj, dilate)
    k = max(1, -(-int(bg.sum()) * source.n // SIGMA_SAMPLES))
    keep = bg & (np.arange(bg.size).reshape(bg.shape) % k == 0)
    values, peaks, n_voxels = [], [], 0
    for z0, z1 in source.slabs(max_bytes):
        block = source.read(z0, z1)
        block = np.abs(block) if np.iscomplexobj(block) else block
        b = block[bg[:, :, z0:z1]]
        n_voxels += int(np.count_nonzero((np.isfinite(b) & (b != 0)).any(axis=1)))
        values.append(block[keep[:, :, z0:z1]])
        if source._peak is None:
            peaks.append(peak_image(block)[obj[:, :, z0:z1]])
    obj_peak = source._peak[obj] if source._peak is not None else np.concatenate(peaks)
    return sigma_from_samples(np.concatenate(values, axis=0), obj_peak, coils=coils, n_voxels=n_voxels,
                              min_voxels=min_voxels)


def estimate_sigma_background(
    data: npt.ArrayLike,
    object_mask: npt.ArrayLike,
    *,
    coils: int = 1,
    min_voxels: int = 1000,
    dilate: int = 3,
) -> tuple[float, int]:
    """Robust noise standard deviation from the image background.

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
        Fewest background voxels accepted.
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
        Fewer than ``min_voxels`` background voxels (e.g. a tightly cropped
        image); the background looks like signal rather than noise (its
        median above a third of the object's, or more than 20 % of it far
        brighter than noise); it holds negative values (not
        a magnitude image); or the object mask is empty. The message suggests
        ``--sigma VALUE``.

    Notes
    -----
    The same computation as ``--sigma auto`` on the command line
    (:func:`background_sigma` on the array as one slab). Background values
    that are exactly zero (zero filling outside the field of view) or not
    finite are ignored. Pure-noise magnitude is :math:`\\sigma\\,\\chi_{2N}`
    (Rayleigh for one coil), so :math:`\\sigma = \\mathrm{median} /
    \\mathrm{median}(\\chi_{2N})`; for one coil :math:`\\mathrm{median}(\\chi_2)
    = \\sqrt{2\\ln 2}`. The median is insensitive to a few bright ghosts or
    artefacts in the background; values that pure noise would practically
    never reach (above the ``1 - 1e-6`` quantile of :math:`\\sigma\\chi_{2N}`,
    5.26 sigma for one coil) are set aside and the median retaken until sigma
    settles, which removes their remaining pull. More than 20 % of such
    values means the background is not noise (a median alone would not
    notice up to half of it being signal). The object reference for the
    plausibility check is the median over the object of each voxel's
    maximum over volumes (so that a series whose late volumes have decayed
    into the noise is not rejected).
    """
    coils = _check_coils(coils)
    src = ArraySource(data)
    mask = np.asarray(object_mask, dtype=bool)
    if mask.shape != src.shape:
        raise InputError(
            f"noise estimate: data of shape {np.shape(data)} and object mask of shape {mask.shape} do not match; "
            "expected (X,Y,Z[,n]) data with an (X,Y,Z) mask"
        )
    return background_sigma(src, coils=coils, obj=mask, min_voxels=min_voxels, dilate=dilate)


def sigma_from_samples(
    values: np.ndarray,
    object_peak: np.ndarray,
    *,
    coils: int = 1,
    min_voxels: int = 1000,
    n_voxels: int | None = None,
) -> tuple[float, int]:
    """Noise sigma from background samples (the core of :func:`background_sigma`).

    Parameters
    ----------
    values : (n_bg,) or (n_bg, n) ndarray
        Background magnitudes (voxels x volumes), possibly a subsample.
    object_peak : (k,) ndarray
        Each object voxel's maximum over volumes (for the plausibility check).
    n_voxels : int, optional
        Number of usable background voxels when ``values`` is a subsample.
    """
    coils = _check_coils(coils)
    values = np.asarray(values)
    if values.ndim == 1:
        values = values[:, None]
    usable = np.isfinite(values) & (values != 0)
    if n_voxels is None:
        n_voxels = int(np.count_nonzero(usable.any(axis=1)))
    if n_voxels < min_voxels:
        raise InputError(
            f"cannot estimate the noise: only {n_voxels} background voxels outside the object "
            f"(at least {min_voxels} needed; the image is probably cropped tightly); {_HINT}"
        )
    bg = values[usable].astype(np.float64)
    if bg.size > _MAX_SAMPLES:  # an even stride; a million values fix the median to 0.1 %
        bg = bg[:: -(-bg.size // _MAX_SAMPLES)]
    if np.count_nonzero(bg < 0) > 0.01 * bg.size:
        raise InputError(
            "cannot estimate the noise: the image background has negative values, so it is not a "
            f"magnitude image; {_HINT}"
        )
    med_bg = float(np.median(bg))
    obj = np.asarray(object_peak, dtype=np.float64)
    obj = obj[np.isfinite(obj)]
    med_obj = float(np.median(obj)) if obj.size else 0.0
    if not med_bg * 3.0 <= med_obj:
        raise InputError(
            f"cannot estimate the noise: the image background is not pure noise (background median {med_bg:.4g} "
            f"vs object median {med_obj:.4g}, expected below a third); {_HINT}"
        )
    sigma, outliers = _clipped_sigma(bg, coils)
    if outliers > _MAX_OUTLIER_FRACTION:
        raise InputError(
            f"cannot estimate the noise: the image background is not pure noise ({100 * outliers:.0f} % of it is "
            f"far brighter than noise, expected below {100 * _MAX_OUTLIER_FRACTION:.0f} %; unmasked signal or "
            f"strong artefacts); {_HINT}"
        )
    return sigma, int(n_voxels)


def _clipped_sigma(bg: np.ndarray, coils: int) -> tuple[float, float]:
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
    med, tail = _chi_median(coils), _chi_tail(coils)
    sigma = float(np.median(bg)) / med
    kept = bg
    new = sigma
    for _ in range(20):
        kept = bg[bg <= tail * sigma]
        new = float(np.median(kept)) / med
        if abs(new - sigma) <= 1e-9 * sigma:
            break
        sigma = new
    return new, 1.0 - kept.size / bg.size


@functools.lru_cache(maxsize=64)
def _chi_tail(coils: int) -> float:
    """The ``1 - 1e-6`` quantile of the chi distribution with ``2 * coils`` dof.

    ``X^2 / 2`` of a chi variable with ``2N`` degrees of freedom is Gamma(N, 1) distributed, so the
    quantile is ``sqrt(2 Q^-1(N, p))`` with the inverse regularised upper incomplete gamma function
    (DLMF 8.2.4; ``scipy.special.gammainccinv``) -- no scipy.stats import (about 0.5 s at start-up).
    """
    from scipy import special

    return math.sqrt(2.0 * float(special.gammainccinv(int(coils), 1e-6)))


@functools.lru_cache(maxsize=64)
def _chi_median(coils: int) -> float:
    """Median of the chi distribution with ``2 * coils`` degrees of freedom."""
    if coils == 1:
        return math.sqrt(2.0 * math.log(2.0))
    from scipy import special

    return math.sqrt(2.0 * float(special.gammainccinv(int(coils), 0.5)))  # as _chi_tail, at p = 1/2
