"""qmap.checks on a series read from disk in slabs (--max-memory): the profile reads a few slabs only."""

from __future__ import annotations

import numpy as np
import pytest

from qmap.checks import PROFILE_SLABS, check_series_shape, series_profile
from qmap.errors import InputError
from qmap.io.series import load_series
from qmap.models.monoexp import MonoExponential
from qmap.noise_level import ArraySource
from tests.conftest import decay_phantom, write_nifti

TE = np.arange(1, 13) * 0.005


@pytest.mark.parametrize("order", ["acquisition", "glob"])
def test_profile_of_a_series_read_in_slabs(order, tmp_path):
    data, te, _, obj = decay_phantom(shape=(24, 24, 10), te=TE)
    idx = np.arange(12) if order == "acquisition" else np.array([0, 9, 10, 11, 1, 2, 3, 4, 5, 6, 7, 8])
    p = write_nifti(tmp_path / "s.nii.gz", data[..., idx])
    lazy = load_series([p], key="EchoTime", value=te, option="--te", max_bytes=24 * 24 * 12 * 4 * 2.5 * 2)
    full = load_series([p], key="EchoTime", value=te, option="--te")
    assert lazy.lazy and len(lazy.slabs(24 * 24 * 12 * 4 * 2.5 * 2)) == 5 > PROFILE_SLABS
    s_lazy = series_profile(lazy, obj, max_bytes=24 * 24 * 12 * 4 * 2.5 * 2)
    s_full = series_profile(full, obj)
    # the phantom's T2* varies along x only, so any three slabs give the profile of the whole object
    np.testing.assert_allclose(s_lazy, s_full, atol=0.02)
    model = MonoExponential(te)
    if order == "acquisition":
        assert np.all(np.diff(s_lazy) < 0)
        check_series_shape(lazy, model, obj, max_bytes=24 * 24 * 12 * 4 * 2.5 * 2)
    else:
        with pytest.raises(InputError, match=r"does not decay with echo time: the median object signal rises from "
                                             r"20 ms to 25 ms"):
            check_series_shape(lazy, model, obj, max_bytes=24 * 24 * 12 * 4 * 2.5 * 2)
        assert check_series_shape(lazy, model, obj, enabled=False, max_bytes=1e4) is not None


def test_series_profile_takes_every_kth_object_voxel_by_flat_index(monkeypatch):
    # the voxels used are those of the mask whose flat (C-order) index is a multiple of k (no int64 index volume)
    import qmap.checks as checks_mod

    rng = np.random.default_rng(2)
    data = rng.uniform(1.0, 2.0, (7, 6, 5, 3)).astype(np.float32)
    obj = rng.uniform(size=(7, 6, 5)) < 0.6
    monkeypatch.setattr(checks_mod, "PROFILE_VOXELS", 20)
    k = -(-int(obj.sum()) // 20)
    keep = obj & (np.arange(obj.size).reshape(obj.shape) % k == 0)
    y = data[keep].astype(float)
    peak = y.max(axis=1)
    y = y[peak >= np.median(peak)]
    expected = np.median(y / y.max(axis=1, keepdims=True), axis=0)
    assert np.array_equal(series_profile(ArraySource(data), obj), expected)
