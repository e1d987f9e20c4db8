"""Reading the series ahead while the command starts (qmap.io.readahead): the same data, the same errors.

The reference for the voxel data is nibabel itself (``np.asanyarray(img.dataobj)``, the array nibabel's
own proxy returns, scaling included), compared bit for bit and dtype for dtype.
"""

from __future__ import annotations

import gzip
import json
import time

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from qmap.io import readahead
from qmap.io.nifti import image_data, load_image
from tests.conftest import decay_phantom, snapshot, write_nifti


def _image(path, arr, slope=None, inter=None, extension=False):
    img = nib.Nifti1Image(arr, np.diag([1.5, 1.5, 2.0, 1.0]))
    if slope is not None:
        img.header.set_slope_inter(slope, inter)
    if extension:  # a header extension moves the voxel data further into the file
        img.header.extensions.append(nib.nifti1.Nifti1Extension("comment", b"an exporter's note" * 7))
    nib.save(img, str(path))
    return path


CASES = {
    "int16 with slope and intercept": (lambda r: r.integers(-3000, 3000, (7, 5, 4, 3)).astype(np.int16), 0.37, -12.5),
    "uint8 without scaling": (lambda r: r.integers(0, 255, (6, 5, 4, 2)).astype(np.uint8), None, None),
    "float32 with a slope": (lambda r: r.normal(size=(5, 4, 3, 2)).astype(np.float32), 2.0, 1.0),
    "float64": (lambda r: r.normal(size=(5, 4, 3, 2)), None, None),
    "big-endian int16": (lambda r: r.integers(0, 4000, (5, 4, 3, 2)).astype(">i2"), 0.5, 0.0),
    "complex64": (lambda r: (r.normal(size=(4, 3, 3, 2)) + 1j * r.normal(size=(4, 3, 3, 2))).astype(np.complex64),
                  None, None),
}


@pytest.mark.parametrize("case", sorted(CASES))
@pytest.mark.parametrize("extension", [False, True])
def test_read_ahead_data_are_nibabels_array_bit_for_bit(tmp_path, case, extension):
    make, slope, inter = CASES[case]
    path = _image(tmp_path / "s.nii.gz", make(np.random.default_rng(3)), slope, inter, extension)
    ref = np.asanyarray(nib.load(str(path)).dataobj)  # reference: nibabel's proxy, scaling applied by nibabel
    readahead.start([path])
    content = readahead.take(path)
    assert content is not None
    assert content == gzip.decompress(path.read_bytes())  # the whole file, decompressed (standard library)
    readahead.start([path])
    got = image_data(load_image(path), path, dtype=ref.dtype, allow_complex=True)
    assert got.dtype == ref.dtype
    assert got.shape == ref.shape and got.tobytes() == ref.tobytes()  # bit for bit (NaN-safe)
    assert readahead.take(path) is None  # given out once


def test_nothing_is_read_ahead_under_a_memory_budget_or_for_uncompressed_files(tmp_path):
    gz = write_nifti(tmp_path / "a.nii.gz", np.ones((4, 4, 3, 2), np.float32))
    plain = write_nifti(tmp_path / "b.nii", np.ones((4, 4, 3, 2), np.float32))
    readahead.start([gz], max_bytes=1e9)
    readahead.start([plain])
    assert readahead.take(gz) is None and readahead.take(plain) is None


def test_a_file_changed_after_the_read_ahead_is_read_again(tmp_path):
    path = write_nifti(tmp_path / "a.nii.gz", np.ones((4, 4, 3, 2), np.float32))
    readahead.start([path])
    readahead._PENDING[str(path)].done.wait()
    time.sleep(0.01)
    write_nifti(path, np.full((4, 4, 3, 2), 2.0, np.float32))
    assert readahead.take(path) is None
    assert np.all(image_data(load_image(path), path) == 2.0)


def test_discard_forgets_what_was_not_taken(tmp_path):
    path = write_nifti(tmp_path / "a.nii.gz", np.ones((4, 4, 3, 2), np.float32))
    readahead.start([path])
    readahead.discard()
    assert readahead.take(path) is None and not readahead._PENDING


def test_a_corrupt_series_gives_the_same_one_line_error_with_the_read_ahead(tmp_path, capsys, monkeypatch):
    data, te, _, _ = decay_phantom(shape=(12, 10, 3))
    path = write_nifti(tmp_path / "s_MEGRE.nii.gz", data, sidecar={"EchoTime": te.tolist()})
    raw = bytearray(path.read_bytes())
    raw[len(raw) // 2] ^= 0xFF  # a flipped byte in the deflate stream (or its CRC no longer matches)
    path.write_bytes(bytes(raw))
    messages = []
    for ahead in (True, False):
        if not ahead:
            monkeypatch.setattr(readahead, "start", lambda *a, **k: None)
        rc = main(["t2star", str(path), "-o", str(tmp_path / "out"), "-q"])
        err = capsys.readouterr().err
        assert rc == 2 and len(err.strip().splitlines()) == 1 and "Traceback" not in err
        messages.append(err)
        assert not (tmp_path / "out").exists()
    assert messages[0] == messages[1]  # the loader reads a file the read-ahead could not: its own words
    assert "the file is truncated or corrupt" in messages[0]


def test_outputs_are_the_same_with_and_without_reading_ahead(tmp_path, monkeypatch):
    data, te, _, _ = decay_phantom(shape=(20, 18, 4))
    scaled = np.round(data * 7.0).astype(np.int16)  # integer storage with a slope, as scanners export
    img = nib.Nifti1Image(scaled, np.diag([2.0, 2.0, 3.0, 1.0]))
    img.header.set_slope_inter(1 / 7.0, 0.0)
    path = tmp_path / "s_MEGRE.nii.gz"
    nib.save(img, str(path))
    (tmp_path / "s_MEGRE.json").write_text(json.dumps({"EchoTime": te.tolist()}))
    assert main(["t2star", str(path), "-o", str(tmp_path / "a"), "-q", "-j", "1"]) == 0
    monkeypatch.setattr(readahead, "start", lambda *a, **k: None)
    assert main(["t2star", str(path), "-o", str(tmp_path / "b"), "-q", "-j", "1"]) == 0
    a, b = snapshot(tmp_path / "a"), snapshot(tmp_path / "b")
    maps = [n for n in a if n.endswith(".nii.gz")]
    assert len(maps) >= 8
    for name in maps:
        assert a[name] == b[name], name


def test_of_several_files_only_the_first_is_read_ahead(tmp_path):
    # 3D files of a series are copied one by one into it: a second file decompressed beside them would
    # raise the memory of the loading, so only the first is read ahead (reference: the standard library)
    paths = [write_nifti(tmp_path / f"v{k}.nii.gz", np.full((6, 5, 4), float(k), np.float32)) for k in range(3)]
    readahead.start(paths)
    assert readahead.take(paths[0]) == gzip.decompress(paths[0].read_bytes())
    assert readahead.take(paths[1]) is None and readahead.take(paths[2]) is None
    readahead.discard()


def test_the_provenance_hash_of_a_file_read_ahead_is_its_sha256(tmp_path):
    # reference: hashlib over the file's bytes (standard library)
    import hashlib

    from qmap.io.writer import sha256_file

    path = write_nifti(tmp_path / "a.nii.gz", np.arange(4 * 4 * 3 * 2, dtype=np.float32).reshape(4, 4, 3, 2))
    readahead.start([path])
    assert readahead.take(path) is not None
    assert readahead.sha256(path) == sha256_file(path) == hashlib.sha256(path.read_bytes()).hexdigest()
    time.sleep(0.01)
    write_nifti(path, np.zeros((4, 4, 3, 2), np.float32))  # changed since: hashed anew
    assert readahead.sha256(path) is None
    assert sha256_file(path) == hashlib.sha256(path.read_bytes()).hexdigest()
    readahead.discard()


def test_the_bytes_given_out_are_not_kept(tmp_path):
    # the entry stays for the digest: it must not keep the bytes the loader took (the series' memory)
    path = write_nifti(tmp_path / "v.nii.gz", np.full((6, 5, 4, 2), 1.0, np.float32))
    readahead.start([path])
    assert readahead.take(path) is not None
    assert readahead._HASHED[str(path)].data is None
    assert readahead.sha256(path) is not None  # the digest is still there
    readahead.discard()
