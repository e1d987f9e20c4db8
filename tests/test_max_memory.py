"""--max-memory: a series larger than the budget is read from disk in slabs, with identical maps."""

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from qmap.errors import QmapWarning
from qmap.io.series import load_series
from tests.conftest import decay_phantom, write_nifti


def test_slab_reading_gives_identical_maps(tmp_path):
    data, te, _t2, _obj = decay_phantom(shape=(40, 40, 12), seed=11)
    path = write_nifti(tmp_path / "raw_MEGRE.nii", data, sidecar={"EchoTime": te.tolist()})  # uncompressed
    size_mb = path.stat().st_size / 2**20
    budget = f"{size_mb / 4:.3f}MB"
    assert main(["t2star", str(path), "-o", str(tmp_path / "mem"), "-q"]) == 0  # default: rician, sigma auto
    assert main(["t2star", str(path), "-o", str(tmp_path / "slab"), "-q", "--max-memory", budget]) == 0
    names = sorted(p.name for p in (tmp_path / "mem").glob("*.nii.gz"))
    assert names
    for name in names:
        a = np.asanyarray(nib.load(str(tmp_path / "mem" / name)).dataobj)
        b = np.asanyarray(nib.load(str(tmp_path / "slab" / name)).dataobj)
        assert np.array_equal(a, b, equal_nan=True), name


def test_lazy_series_reads_slabs_in_sorted_order(tmp_path):
    data, te, *_ = decay_phantom(shape=(8, 8, 5), sigma=0)
    order = [3, 0, 7, 1, 2, 6, 4, 5]
    path = write_nifti(tmp_path / "s.nii", data[..., order], sidecar={"EchoTime": te[order].tolist()})
    with pytest.warns(QmapWarning, match="sorted them"):
        eager = load_series([path], key="EchoTime", option="--te")
    with pytest.warns(QmapWarning, match="sorted them"):
        lazy = load_series([path], key="EchoTime", option="--te", max_bytes=100)
    assert lazy.lazy and not eager.lazy
    np.testing.assert_array_equal(lazy.acquisition["EchoTime"], te)
    slabs = lazy.slabs(100)
    assert len(slabs) == 5
    got = np.concatenate([lazy.read(z0, z1) for z0, z1 in slabs], axis=2)
    np.testing.assert_array_equal(got, eager.data)
    np.testing.assert_array_equal(got, data.astype(np.float32))


def test_bad_size_is_a_usage_error(megre, tmp_path, capsys):
    path, *_ = megre
    assert main(["t2star", str(path), "-o", str(tmp_path / "o"), "--max-memory", "lots"]) == 2
    assert "--max-memory" in capsys.readouterr().err


@pytest.mark.parametrize("suffix", [".nii", ".nii.gz"])
def test_a_slab_read_is_private_and_leaves_the_file_as_it_is(tmp_path, suffix):
    # an uncompressed slab is used as nibabel maps it (copy-on-write, no second copy): changing it in place --
    # as the reader's own clipping of small negative values does -- must never reach the file
    data, te, *_ = decay_phantom(shape=(8, 8, 6), sigma=0)
    data = data.astype(np.float32)
    data[2, 3, 1, 0] = -1.5
    path = write_nifti(tmp_path / f"s{suffix}", data, sidecar={"EchoTime": te.tolist()})
    lazy = load_series([path], key="EchoTime", option="--te", max_bytes=100)
    assert lazy.lazy
    lazy.clip_negative = True
    slab = lazy.read(0, 3)
    assert slab.dtype == np.float32 and slab[2, 3, 1, 0] == 0.0
    expected = np.maximum(data[:, :, 0:3], 0)
    np.testing.assert_array_equal(slab, expected)
    slab[...] = 7.0  # a fit may scribble on its slab
    np.testing.assert_array_equal(np.asanyarray(nib.load(str(path)).dataobj), data)  # the file is unchanged
    np.testing.assert_array_equal(lazy.read(0, 3), expected)  # and read again as it was
