"""The noise estimate and the automatic mask on float32 samples: the same numbers as on float64, less memory.

The background noise estimate keeps float32 samples as float32 and takes every statistic of them in float64
(the median's one or two order statistics, float64 limits, the moments from their exact float64 values), so
its result on a float32 series must equal, to the bit, its result on the float64 copy of the same series
(which goes the plain float64 way). The reference values are recomputed with numpy directly
(``np.median``, ``np.cov``) in the tests below.
"""

from __future__ import annotations

import numpy as np
import pytest

from qmap.noise_level import (
    ArraySource,
    _median64,
    _moments_coils,
    background_estimate,
    mask_from_peak,
    object_mask,
    peak_image,
)
from tests.conftest import rician

TE = np.linspace(0.003, 0.036, 8)


def _series(seed: int, *, coils: int = 1, quantum: float = 0.0, scale: float = 1.0) -> np.ndarray:
    """A 24 x 26 x 6 x 8 magnitude decay with an ellipsoidal object in noise (sigma 10 per channel)."""
    rng = np.random.default_rng(seed)
    shape = (24, 26, 6)
    x, y, z = np.indices(shape)
    obj = ((x - 12) / 8.0) ** 2 + ((y - 13) / 9.0) ** 2 + ((z - 2.5) / 4.0) ** 2 < 1
    s = np.where(obj, 600.0, 0.0)[..., None] * np.exp(-TE / 0.03)
    acc = np.zeros(s.shape)
    for _ in range(coils):  # sum of squares over coils: chi with 2 * coils degrees of freedom
        acc += (s / np.sqrt(coils) + rng.normal(0, 10.0, s.shape)) ** 2 + rng.normal(0, 10.0, s.shape) ** 2
    m = np.sqrt(acc) if coils > 1 else rician(s, 10.0, rng)
    if quantum:
        m = np.round(m / quantum) * quantum  # integer storage with a slope
    return (m * scale).astype(np.float32)


@pytest.mark.parametrize("kind", ["plain", "quantised", "coils", "scaled"])
def test_float32_samples_give_the_float64_estimate_to_the_bit(kind):
    data = _series(3, coils=4 if kind == "coils" else 1, quantum=0.5 if kind == "quantised" else 0.0,
                   scale=1e6 if kind == "scaled" else 1.0)
    e32 = background_estimate(ArraySource(data), coils=None)
    e64 = background_estimate(ArraySource(data.astype(np.float64)), coils=None)
    assert e32.sigma == e64.sigma  # the same float, not approximately
    assert (e32.coils, e32.n_voxels, e32.relative_precision) == (e64.coils, e64.n_voxels, e64.relative_precision)
    assert e32.details == e64.details and e32.notes == e64.notes and e32.warnings == e64.warnings
    # and the values are right: sigma 10 per channel (x 1e6 for the scaled series) within the estimate's precision
    assert e32.sigma == pytest.approx(10.0 * (1e6 if kind == "scaled" else 1.0), rel=5 * e32.relative_precision)
    assert e32.coils == (4 if kind == "coils" else 1)
    if kind == "quantised":
        assert e32.details["quantum"] == 0.5


def test_median64_is_numpys_median_of_the_float64_values():
    rng = np.random.default_rng(5)
    for n in (1, 2, 7, 1000, 1001):
        v = rng.rayleigh(3.0, n).astype(np.float32)
        ref = float(np.median(v.astype(np.float64)))  # numpy's median of the exact float64 values
        assert _median64(v) == ref
        w = v.copy()
        assert _median64(w, overwrite=True) == ref  # partitioned in place, same value
        assert sorted(w.tolist()) == sorted(v.tolist())


def _moments_whole(x: np.ndarray, quantum: float) -> tuple[float, float]:
    """The coil moments on whole float64 arrays: np.mean and np.cov of (x^2, x^4) (the reference)."""
    x2 = x.astype(np.float64) ** 2
    xs = np.stack([x2, x2 * x2])
    m2, m4 = float(np.mean(xs[0])), float(np.mean(xs[1]))
    if quantum > 0:  # Sheppard's corrections for grouping (Sheppard 1898; from memory)
        h2 = quantum * quantum
        m2, m4 = m2 - h2 / 12, m4 - m2 * h2 / 2 + 7 * h2 * h2 / 240
    g = np.array([-2.0 * m4 / m2**3, 1.0 / m2**2])
    se = float(np.sqrt(g @ (np.cov(xs) / x.size) @ g))
    return 1.0 / (m4 / (m2 * m2) - 1.0), se


@pytest.mark.parametrize("quantum", [0.0, 0.5])
def test_moments_in_blocks_match_numpy_on_the_whole_arrays(quantum):
    rng = np.random.default_rng(9)
    bg = rng.rayleigh(10.0, 150_001).astype(np.float32)  # several blocks and a partial one
    if quantum:
        bg = (np.round(bg / quantum) * quantum).astype(np.float32)
    keep = bg <= np.float64(52.0)
    n_eff, se = _moments_coils(bg, quantum, keep)
    ref = _moments_whole(bg[keep], quantum)
    assert n_eff == pytest.approx(ref[0], rel=1e-12) and se == pytest.approx(ref[1], rel=1e-12)
    assert _moments_coils(bg[keep], quantum) == pytest.approx((n_eff, se), rel=1e-12)
    # one coil: r = E[M^4] / E[M^2]^2 = 2 for the Rayleigh distribution (Constantinides et al. 1997), N = 1
    assert n_eff == pytest.approx(1.0, abs=4 * se * n_eff**2)
    # four coils: chi with 8 degrees of freedom (the magnitude of a sum of squares), N = 4
    chi8 = np.sqrt(np.sum(rng.normal(0, 10.0, (8, 100_000)) ** 2, axis=0))
    n4, se4 = _moments_coils(chi8, 0.0)
    assert (n4, se4) == pytest.approx(_moments_whole(chi8, 0.0), rel=1e-12)
    assert n4 == pytest.approx(4.0, abs=4 * se4 * n4**2)


@pytest.mark.parametrize("holes", [False, True])
def test_object_mask_keeps_the_median_object_peak_not_the_peak_image(holes):
    data = _series(4)
    if holes:  # dark voxels inside the object: hole filling adds them, their peaks are read from the data again
        data[11:14, 12:15, 2:4] = 0.5
        data[12, 13, 2, 1] = np.inf  # a filled voxel with an inf sample keeps the peak of its finite ones
    src = ArraySource(data)
    mask = object_mask(src)
    peak = peak_image(data)
    assert np.array_equal(mask, mask_from_peak(peak))
    if holes:
        assert mask[12, 13, 2] and peak[12, 13, 2] < 1
    finite = peak[mask][np.isfinite(peak[mask])].astype(np.float64)
    assert src._object_median == np.median(finite)  # exact: one order statistic or the mean of two
    # the estimate from the cached median equals the one from a source that computes it from the data
    a = background_estimate(src, obj=mask)
    fresh = ArraySource(data)
    b = background_estimate(fresh, obj=mask.copy())  # not the cached mask: peaks taken from the data
    assert fresh._object_median is None and a.sigma == b.sigma and a.details == b.details


@pytest.mark.parametrize("density", [0.1, 0.5])
def test_hole_filling_labels_runs_in_the_smallest_type_with_scipys_result(density):
    from scipy import ndimage

    from qmap.noise_level import _background_runs, fill_holes

    rng = np.random.default_rng(12)
    mask = rng.uniform(size=(100, 80, 40)) < density  # 0.5: over 65535 runs along z (int32 labels), 0.1: fewer
    ids, n = _background_runs(~mask, 2)
    assert ids.dtype == (np.uint16 if n < 2**16 else np.int32) and ids.flags.c_contiguous
    assert (n >= 2**16) == (density == 0.5)
    assert np.array_equal(ids == 0, mask) and int(ids.max()) == n  # every background voxel in a numbered run
    # scipy.ndimage.binary_fill_holes (6-connected background reached from the faces) as the reference
    assert np.array_equal(fill_holes(mask), ndimage.binary_fill_holes(mask))


def test_hole_filling_in_a_box_and_around_bends_as_scipy():
    """The object's bounding box, and the box of background still unreached after one sweep per axis: both
    give scipy.ndimage.binary_fill_holes' result (6-connected background reached from the faces)."""
    from scipy import ndimage

    from qmap.noise_level import fill_holes

    # a hollow shell with a bent tunnel out of it: its inside is reached only through the bend (the y-run of
    # the tunnel, then the z-column into the cavity, then the cavity across: more sweeps than one per axis),
    # and a closed hollow cube beside it (a true hole)
    m = np.zeros((30, 28, 26), bool)
    m[3:15, 3:15, 3:15] = True
    m[5:13, 5:13, 5:13] = False  # the cavity (z 5-12), under a lid of two layers (z 13, 14)
    m[9, 9:15, 13] = False  # the tunnel: up from the cavity into the lid's lower layer, then along y out of the shell
    m[18:26, 16:24, 6:14] = True
    m[20:24, 18:22, 8:12] = False  # a closed cavity: filled
    ref = ndimage.binary_fill_holes(m)
    assert ref[22, 20, 10] and not ref[9, 9, 9]  # the closed one is filled, the tunnelled one is not
    assert np.array_equal(fill_holes(m), ref)
    rng = np.random.default_rng(5)
    for _ in range(200):  # random objects inside a background margin, and filling the whole array
        inner = rng.uniform(size=tuple(rng.integers(1, 12, 3))) < rng.uniform(0.3, 0.9)
        pad = [(int(rng.integers(0, 3)), int(rng.integers(0, 3))) for _ in range(3)]
        mask = np.pad(inner, pad)
        assert np.array_equal(fill_holes(mask), ndimage.binary_fill_holes(mask))
    assert not fill_holes(np.zeros((4, 5, 6), bool)).any()
