"""Gzip through ISA-L: the maps qmap writes are ordinary gzip that the standard library reads bit for bit."""

from __future__ import annotations

import gzip
import hashlib
import json
import subprocess
import sys

import nibabel as nib
import numpy as np
from nibabel.openers import ImageOpener

from qmap.cli import main
from qmap.io import gz


def test_isal_is_the_gz_opener():
    import qmap.io.nifti  # noqa: F401  (registration happens on import)

    assert ImageOpener.compress_ext_map[".gz"][0] is gz.gzip_open


def test_written_maps_read_bit_for_bit_with_the_standard_library(megre, tmp_path):
    path, _, _, _ = megre
    out = tmp_path / "out"
    assert main(["t2star", str(path), "-o", str(out), "--noise-floor", "none", "-q", "-j", "1"]) == 0
    maps = sorted(out.glob("*.nii.gz"))
    assert len(maps) >= 8
    for p in maps:
        raw = p.read_bytes()
        assert raw[:2] == b"\x1f\x8b"  # gzip magic (RFC 1952)
        std = nib.Nifti1Image.from_bytes(gzip.decompress(raw))  # Python's zlib, not ISA-L
        via_isal = nib.load(str(p))
        a, b = np.asanyarray(std.dataobj), np.asanyarray(via_isal.dataobj)
        assert a.dtype == b.dtype and a.tobytes() == b.tobytes()
        assert std.header.binaryblock == via_isal.header.binaryblock
    # a fresh interpreter that never imports qmap (nibabel's own gzip reader) gets the same bytes
    code = ("import json,sys,hashlib,nibabel as nib,numpy as np;"
            "print(json.dumps({p: hashlib.sha256(np.asanyarray(nib.load(p).dataobj).tobytes()).hexdigest() "
            "for p in sys.argv[1:]}))")
    res = subprocess.run([sys.executable, "-c", code, *map(str, maps)], capture_output=True, text=True, check=True)
    fresh = json.loads(res.stdout)
    for p in maps:
        assert fresh[str(p)] == hashlib.sha256(np.asanyarray(nib.load(str(p)).dataobj).tobytes()).hexdigest()


def test_standard_gzip_input_is_read_unchanged(tmp_path):
    rng = np.random.default_rng(3)
    data = rng.normal(100, 20, (9, 7, 5, 4)).astype(np.float32)
    img = nib.Nifti1Image(data, np.eye(4))
    p = tmp_path / "std.nii.gz"
    p.write_bytes(gzip.compress(img.to_bytes(), compresslevel=9))  # written by the standard library
    back = np.asanyarray(nib.load(str(p)).dataobj)  # read through ISA-L
    assert back.tobytes() == data.tobytes()
    # slices of the proxy (slab reading) read the same bytes
    assert np.array_equal(nib.load(str(p)).dataobj[:, :, 2:4, :], data[:, :, 2:4, :])


def test_level_mapping_and_header(tmp_path):
    data = np.arange(1000, dtype=np.float32).reshape(10, 10, 10)
    p = tmp_path / "m.nii.gz"
    nib.save(nib.Nifti1Image(data, np.eye(4)), str(p))
    raw = p.read_bytes()
    # no file name stored and mtime 0 (reproducible outputs): FLG byte without FNAME, MTIME field zero
    assert raw[3] & 0x08 == 0 and raw[4:8] == b"\x00\x00\x00\x00"
    with gz.gzip_open(str(tmp_path / "x.gz"), "wb", compresslevel=9) as fh:  # levels above ISA-L's 3 are clamped
        fh.write(b"abc" * 1000)
    assert gzip.decompress((tmp_path / "x.gz").read_bytes()) == b"abc" * 1000
