"""ROI erosion and ROI statistics."""

import numpy as np
import pytest
from scipy import ndimage, stats

from qmap.qa.rois import erode, roi_masks
from qmap.qa.stats import roi_statistics


def _stats(values, ref=100.0, tol=10.0, min_voxels=3):
    return roi_statistics(np.asarray(values, float), label=1, name="A", parameter="T1", unit="ms", reference=ref,
                          tolerance_pct=tol, min_voxels=min_voxels)


def test_statistics_hand_computed():
    # values 90, 95, 100, 105, 300: median 100, mean 138, MAD = median(10, 5, 0, 5, 200) = 5
    # robust SD = 1.4826 * MAD (common practice; 1.4826 = 1 / Phi^-1(3/4) makes it the SD for Gaussian data)
    r = _stats([90, 95, 100, 105, 300])
    assert r.median == 100.0 and r.mean == pytest.approx(138.0)
    assert r.robust_sd == pytest.approx(5 / stats.norm.ppf(0.75), rel=1e-9)
    assert r.robust_sd == pytest.approx(7.413, abs=1e-3)
    assert r.sd == pytest.approx(np.std([90, 95, 100, 105, 300], ddof=1))
    # the error uses the median: the outlier at 300 does not fail the vial
    assert r.error_pct == 0.0 and r.pass_


def test_error_sign_tolerance_edge_and_nonfinite_voxels():
    r = _stats([110.0, 110.0, 110.0, np.nan, np.inf])
    assert r.n_voxels == 3 and r.n_nonfinite == 2
    assert r.error_pct == pytest.approx(10.0) and r.pass_  # |error| <= tolerance passes
    assert not _stats([110.5] * 3).pass_
    assert _stats([90.0] * 3).error_pct == pytest.approx(-10.0)


def test_too_small_roi_fails_even_when_accurate():
    r = _stats([100.0, 100.0], min_voxels=3)
    assert r.too_small and not r.pass_ and r.error_pct == 0.0
    empty = _stats([], min_voxels=3)
    assert empty.n_voxels == 0 and not empty.pass_ and np.isnan(empty.median)
    assert empty.as_dict()["median"] is None and empty.as_dict()["pass"] is False


def test_erosion_removes_one_layer_like_scipy():
    rng = np.random.default_rng(3)
    mask = ndimage.binary_dilation(rng.random((20, 18, 9)) > 0.97, iterations=2)
    full = ndimage.binary_erosion(mask, structure=ndimage.generate_binary_structure(3, 1), iterations=2,
                                  border_value=1)
    np.testing.assert_array_equal(erode(mask, 2), full)  # the bounding-box shortcut changes nothing
    np.testing.assert_array_equal(erode(mask, 0), mask)


def test_single_slice_and_slab_are_not_eroded_through_the_field_of_view_edge():
    disc = np.zeros((15, 15, 1), bool)
    i, j = np.ogrid[:15, :15]
    disc[..., 0] = (i - 7) ** 2 + (j - 7) ** 2 <= 16
    e = erode(disc, 1)
    assert e.any()
    # in-plane: exactly the voxels whose 4 neighbours are all inside
    inner = disc[1:-1, 1:-1, 0] & disc[:-2, 1:-1, 0] & disc[2:, 1:-1, 0] & disc[1:-1, :-2, 0] & disc[1:-1, 2:, 0]
    np.testing.assert_array_equal(e[1:-1, 1:-1, 0], inner)
    labels = np.zeros((10, 10, 3), int)
    labels[2:8, 2:8, :] = 4
    m = roi_masks(labels, [4], erode_voxels=1)[4]
    assert m[:, :, 0].sum() == 16 and m[:, :, 2].sum() == 16  # first and last slice kept (edge of the slab)
