"""qmap.plots: PNG montages and voxel-fit plots are valid images of the expected size and content."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib import image as mpimg

from qmap.cli import main
from qmap.fitting import status as st
from qmap.io.writer import AtomicWriter
from qmap.maps import MapSet
from qmap.plots import (
    PREVIEW_SIZE_PX,
    VOXEL_PLOT_SIZE_PX,
    montage,
    pick_slices,
    plot_voxel_fit,
    robust_range,
    stage_previews,
)
from tests.conftest import rician, write_nifti


def _size(path):
    img = mpimg.imread(str(path))  # raises on anything that is not a readable PNG
    return img, (img.shape[1], img.shape[0])


def _disc_maps(shape=(32, 28, 5)):
    x, y = np.meshgrid(np.linspace(-1, 1, shape[0]), np.linspace(-1, 1, shape[1]), indexing="ij")
    inside = np.repeat((x**2 + y**2 < 0.5)[:, :, None], shape[2], axis=2)
    inside[:, :, 0] = False  # an empty first slice
    t2 = np.where(inside, 0.04 + 0.02 * x[:, :, None], np.nan)
    status = np.where(inside, st.FITTED, st.MASKED).astype(np.uint8)
    return MapSet({"T2": t2, "M0": np.where(inside, 1000.0, np.nan)}, {"T2": t2 * 0.01, "M0": t2 * 0 + 3.0},
                  {"T2": "s", "M0": "a.u."}, {"T2": "T2 decay time", "M0": "amplitude"}, ("T2",), {}, status)


def test_stage_previews_writes_one_png_per_estimate(tmp_path):
    maps = _disc_maps()
    with AtomicWriter(tmp_path) as w:
        paths = stage_previews(w, maps, "sub-01", units="ms", mask=maps.status != st.MASKED)
        assert not any(p.exists() for p in paths)  # nothing appears before the commit
        w.commit()
    assert sorted(p.name for p in paths) == ["sub-01_M0map.png", "sub-01_T2map.png"]
    for p in paths:
        img, size = _size(p)
        assert size == PREVIEW_SIZE_PX
        assert img.shape[2] in (3, 4) and np.ptp(img[..., :3]) > 0.5  # not blank


def test_montage_background_is_white_and_object_coloured(tmp_path):
    vol = np.full((20, 20, 1), np.nan)
    vol[5:15, 5:15, 0] = np.linspace(10, 20, 100).reshape(10, 10)
    p = tmp_path / "m.png"
    montage(p, vol, mask=np.isfinite(vol), param="T1", units="ms", title="t", slices=[0])
    img, _ = _size(p)
    # locate the panel: the grey frame of the axes; sample at 1/8 and 1/2 of it
    W, H = PREVIEW_SIZE_PX
    panel_h = 0.715 * H
    x0, y_top = 0.015 * W, H - 0.745 * H
    bg = img[int(y_top + panel_h / 8), int(x0 + panel_h / 8), :3]
    obj = img[int(y_top + panel_h / 2), int(x0 + panel_h / 2), :3]
    np.testing.assert_allclose(bg, 1.0, atol=0.02)  # white: no estimate
    assert np.max(np.abs(obj - 1.0)) > 0.2  # coloured


def test_robust_range_ignores_outliers_and_non_finite():
    rng = np.random.default_rng(1)
    v = rng.normal(100.0, 1.0, 10_000)
    v[:50] = 1e6  # 0.5 % wild values (e.g. fits at a bound)
    v[50:60] = np.nan
    lo, hi = robust_range(v)
    # 2nd/98th percentiles of N(100, 1): 100 -/+ 2.054 (normal quantile, common practice)
    assert lo == pytest.approx(100 - 2.054, abs=0.15) and hi == pytest.approx(100 + 2.054, abs=0.15)
    assert robust_range(np.full(5, 3.0))[0] < 3.0 < robust_range(np.full(5, 3.0))[1]
    assert robust_range(np.array([np.nan])) == (0.0, 1.0)


def test_pick_slices_only_occupied_and_spread():
    mask = np.zeros((4, 4, 30), bool)
    mask[:, :, 10:22] = True
    s = pick_slices(mask, 6)
    assert len(s) == 6 and s == sorted(set(s)) and min(s) >= 10 and max(s) <= 21
    assert pick_slices(np.ones((2, 2, 3), bool)) == [0, 1, 2]
    assert pick_slices(np.zeros((2, 2, 3), bool)) == [0, 1, 2]


def test_voxel_plot_size(tmp_path):
    x = np.array([0.01, 0.02, 0.04, 0.08])
    xf = np.linspace(0, 0.09, 50)
    p = tmp_path / "v.png"
    plot_voxel_fit(p, x=x, y=100 * np.exp(-x / 0.03) + 1, x_fine=xf, curve=100 * np.exp(-xf / 0.03),
                   fitted_at_x=100 * np.exp(-x / 0.03), xlabel="echo time", title="t", lines=["T2 = 30 ms"],
                   x_scale=1e3, x_unit="ms", noise_sd=1.0, used=np.array([True, True, True, False]),
                   floor_curve=100 * np.exp(-xf / 0.03) + 3, notes=["model: S = M0 exp(-TE/T2)"])
    assert _size(p)[1] == VOXEL_PLOT_SIZE_PX
    # no fit: samples only
    p2 = tmp_path / "v2.png"
    plot_voxel_fit(p2, x=x, y=x * 0 + 5, x_fine=x[:0], curve=x[:0], fitted_at_x=x * np.nan, xlabel="echo time",
                   title="t", lines=["no estimates"])
    assert _size(p2)[1] == VOXEL_PLOT_SIZE_PX


def test_preview_option_of_a_fitting_command(tmp_path):
    rng = np.random.default_rng(3)
    te = np.arange(1, 9) * 0.005
    shape = (40, 40, 3)  # enough background for --sigma auto
    x, y = np.meshgrid(np.linspace(-1, 1, 40), np.linspace(-1, 1, 40), indexing="ij")
    obj = np.repeat((x**2 + y**2 < 0.3)[:, :, None], 3, axis=2)
    sig = np.where(obj[..., None], 800 * np.exp(-te / 0.03), 0.0)
    f = write_nifti(tmp_path / "megre.nii.gz", rician(sig, 8.0, rng).reshape(shape + (8,)),
                    sidecar={"EchoTime": te.tolist()})
    out = tmp_path / "out"
    assert main(["t2star", str(f), "-o", str(out), "--preview", "--units", "ms", "-q"]) == 0
    pngs = sorted(p.name for p in out.glob("*.png"))
    assert pngs == ["megre_M0map.png", "megre_R2starmap.png", "megre_T2starmap.png"]
    assert all(_size(out / n)[1] == PREVIEW_SIZE_PX for n in pngs)
    # a rerun without --overwrite refuses because the previews are outputs too
    assert main(["t2star", str(f), "-o", str(out), "--preview", "-q"]) == 2
