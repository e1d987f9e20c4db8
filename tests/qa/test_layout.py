"""Layout-based ROI placement: vial detection, rigid matching, drawn ROIs."""

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from qmap.errors import InputError
from qmap.qa.layout import Layout, place_rois
from qmap.qa.register import MatchFailure, kabsch, register_points
from tests.qa.phantom_factory import AFFINE, LAYOUT_XY, NAMES, RADIUS_MM, SHAPE, true_labels


def _rot2(deg):
    a = np.radians(deg)
    return np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])


def _layout(xy=LAYOUT_XY, radius=RADIUS_MM):
    n = len(xy)
    xyz = np.column_stack([xy, np.zeros(n)])
    return Layout(np.arange(1, n + 1), NAMES[:n], xyz, np.full(n, radius), False, "layout.csv")


def _dice(a, b):
    return 2 * (a & b).sum() / (a.sum() + b.sum())


def test_kabsch_agrees_with_scipy_align_vectors():
    # independent check: scipy's Rotation.align_vectors solves the same (Wahba / Kabsch) problem
    rng = np.random.default_rng(0)
    src = rng.normal(size=(7, 3)) * 20
    true = Rotation.from_euler("zyx", [25, -10, 40], degrees=True)
    dst = true.apply(src) + [3.0, -7.0, 12.0] + rng.normal(scale=0.05, size=(7, 3))
    r, t = kabsch(src, dst)
    ref, _ = Rotation.align_vectors(dst - dst.mean(0), src - src.mean(0))
    np.testing.assert_allclose(r, ref.as_matrix(), atol=1e-9)
    assert np.linalg.det(r) == pytest.approx(1.0)
    np.testing.assert_allclose(t, [3.0, -7.0, 12.0], atol=0.2)


def test_registration_with_missing_and_extra_detections():
    rng = np.random.default_rng(1)
    det = LAYOUT_XY @ _rot2(-23).T + [12.0, 5.0] + rng.normal(scale=0.3, size=LAYOUT_XY.shape)
    keep = [0, 1, 2, 4, 5, 7]  # vials 4 and 7 not detected
    det = np.vstack([det[keep], [[80.0, 80.0], [-70.0, 60.0]]])  # two spurious components
    m = register_points(LAYOUT_XY, det, accept_mm=6.0, min_pairs=4)
    assert sorted(m.pairs) == [(k, i) for i, k in enumerate(keep)]
    assert m.angle_deg == pytest.approx(23.0, abs=1.0)
    assert m.rms_mm < 1.0
    pred = m.apply(LAYOUT_XY)
    truth = LAYOUT_XY @ _rot2(-23).T + [12.0, 5.0]
    assert np.max(np.linalg.norm(pred - truth, axis=1)) < 1.0  # undetected vials placed from the transform


def test_symmetric_layout_is_refused():
    ring = 40 * np.column_stack([np.cos(np.arange(6) * np.pi / 3), np.sin(np.arange(6) * np.pi / 3)])
    with pytest.raises(MatchFailure, match="too symmetric"):
        register_points(ring, ring @ _rot2(7).T, accept_mm=5.0, min_pairs=4)


@pytest.mark.parametrize(("angle", "shift_mm"), [(10.0, (10.0, -6.0)), (-10.0, (-8.0, 12.0))])
def test_rotated_shifted_phantom_recovers_true_labels(angle, shift_mm):
    # shifts of 5 and 3 (4 and 6) voxels of 2 mm
    truth = true_labels(angle_deg=angle, shift_mm=shift_mm)
    image = np.where(truth > 0, 1.0 + 0.1 * truth, np.nan)  # a masked map: vials only
    res = place_rois(image, AFFINE, _layout())
    assert res.geometry == "2D" and not res.mirrored and len(res.match.pairs) == 8
    assert res.match.angle_deg == pytest.approx(abs(angle), abs=1.0)
    assert res.match.rms_mm < 1.0  # sub-voxel (2 mm voxels)
    for k in range(1, 9):
        assert _dice(res.labels == k, truth == k) > 0.9, k


def test_detection_on_a_noisy_magnitude_image():
    rng = np.random.default_rng(5)
    truth = true_labels(angle_deg=10.0, shift_mm=(6.0, 4.0))
    # magnitude of signal plus complex Gaussian noise: Rician, Rayleigh in the background (Gudbjartsson & Patz,
    # Magn Reson Med 1995;34:910); vials at SNR 20
    image = np.abs(np.where(truth > 0, 400.0, 0.0) + rng.normal(0, 20, SHAPE) + 1j * rng.normal(0, 20, SHAPE))
    res = place_rois(image, AFFINE, _layout())
    assert len(res.match.pairs) == 8
    assert min(_dice(res.labels == k, truth == k) for k in range(1, 9)) > 0.9


def test_mirrored_layout_is_accepted_with_a_warning():
    truth = true_labels(angle_deg=10.0)
    image = np.where(truth > 0, 1.0, np.nan)
    flipped = LAYOUT_XY * [-1.0, 1.0]
    res = place_rois(image, AFFINE, _layout(flipped))
    assert res.mirrored and any("mirror" in w for w in res.warnings)
    assert res.match.rms_mm < 1.0 and res.summary()["rotation_deg"] == pytest.approx(10.0, abs=1.0)
    assert min(_dice(res.labels == k, truth == k) for k in range(1, 9)) > 0.9


def test_unmatchable_image_fails_clearly():
    image = np.full(SHAPE, np.nan)
    image[5:12, 5:12, :] = 1.0  # one square blob
    image[40:47, 20:27, :] = 1.0  # and another
    with pytest.raises(InputError, match="cannot be matched"):
        place_rois(image, AFFINE, _layout())


def test_three_dimensional_layout_draws_spheres():
    # spheres of 6 mm radius at different heights in a 40^3 grid of 1.5 mm voxels
    aff = np.diag([1.5, 1.5, 1.5, 1.0])
    aff[:3, 3] = -30.0
    pos = np.array([[0, 0, 0], [15, 2, 8], [-12, 10, -6], [5, -16, 10], [-14, -10, 4]], float)
    ang = np.radians(10)
    rot = np.array([[np.cos(ang), -np.sin(ang), 0], [np.sin(ang), np.cos(ang), 0], [0, 0, 1]])
    centres = pos @ rot.T + [3.0, -4.5, 1.5]
    ijk = np.indices((40, 40, 40)).reshape(3, -1).T
    w = ijk @ aff[:3, :3].T + aff[:3, 3]
    truth = np.zeros(40**3, int)
    for k, c in enumerate(centres, start=1):
        truth[np.linalg.norm(w - c, axis=1) <= 6.0] = k
    truth = truth.reshape(40, 40, 40)
    lay = Layout(np.arange(1, 6), [""] * 5, pos, np.full(5, 6.0), True, "layout3d.csv")
    res = place_rois(np.where(truth > 0, 1.0, 0.0), aff, lay)
    assert res.geometry == "3D" and len(res.match.pairs) == 5
    assert min(_dice(res.labels == k, truth == k) for k in range(1, 6)) > 0.9


def test_mirror_symmetric_layout_keeps_the_documented_handedness():
    # an isosceles arrangement symmetric about the y axis: mirrored and as-written fits are equally good
    xy = np.array([[0.0, 30.0], [-25.0, -10.0], [25.0, -10.0], [-10.0, -35.0], [10.0, -35.0]])
    aff = AFFINE
    x = aff[0, 0] * np.arange(SHAPE[0])[:, None] + aff[0, 3]
    y = aff[1, 1] * np.arange(SHAPE[1])[None, :] + aff[1, 3]
    truth2 = np.zeros(SHAPE[:2], int)
    for k, (cx, cy) in enumerate(xy @ _rot2(10).T, start=1):
        truth2[(x - cx) ** 2 + (y - cy) ** 2 <= 64] = k
    truth = np.repeat(truth2[:, :, None], SHAPE[2], axis=2)
    res = place_rois(np.where(truth > 0, 1.0, np.nan), aff, _layout(xy, radius=8.0))
    assert not res.mirrored and any("mirror-symmetric" in w for w in res.warnings)
    assert min(_dice(res.labels == k, truth == k) for k in range(1, 6)) > 0.9
