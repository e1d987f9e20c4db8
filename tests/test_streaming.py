"""Maps streamed into their files slab by slab (qmap.streaming, qmap.io.writer.NiftiStream).

The files must be what nibabel's own writer makes of the whole map (same header and data bytes once
decompressed), ordinary gzip for the standard library (RFC 1952: CRC-32 and length checked), the same maps
for any slab size and with or without the background writing thread, and nothing may be left behind when
a run stops between its fit and its writing.
"""

from __future__ import annotations

import gzip
import itertools
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import qmap.pipeline as pipeline_mod
import qmap.streaming as streaming_mod
from qmap.cli import main
from qmap.io.writer import NiftiStream, OutputFile, nifti_for
from tests.conftest import decay_phantom, snapshot, write_nifti

AFFINE = np.array([[0.0, -1.5, 0.0, 90.0], [2.0, 0.0, 0.0, -100.0], [0.0, 0.0, 3.0, -40.0], [0.0, 0.0, 0.0, 1.0]])


def _stream(path: Path, arr: np.ndarray, kind: str, cuts, scale: float = 1.0) -> None:
    out = OutputFile(path.name, None, "T2star", kind, "ms" if scale != 1.0 else "s", "test", scale=scale)
    s = NiftiStream(path, out, arr.shape, AFFINE, None)
    for z0, z1 in itertools.pairwise(cuts):
        s.append(arr[:, :, z0:z1])
    s.finish()


def _read(path: Path) -> bytes:
    return gzip.decompress(path.read_bytes()) if path.name.endswith(".gz") else path.read_bytes()


@pytest.mark.parametrize("name", ["m.nii.gz", "m.nii"])
@pytest.mark.parametrize("kind", ["estimate", "status"])
@pytest.mark.parametrize("cuts", [(0, 7), (0, 1, 2, 7), (0, 3, 3, 5, 7)], ids=["one", "three", "empty-slab"])
def test_streamed_file_is_what_nibabel_writes_of_the_whole_map(name, kind, cuts, tmp_path):
    rng = np.random.default_rng(1)
    arr = rng.normal(0.05, 0.02, (9, 8, 7)).astype(np.float32)
    arr[2, 3, 4] = np.nan  # NaN and inf stay out of the display range (cal_min / cal_max)
    arr[5, 1, 0] = np.inf
    if kind == "status":
        arr = rng.integers(0, 12, arr.shape).astype(np.uint8)
    scale = 1000.0 if kind == "estimate" else 1.0
    ref = tmp_path / f"ref_{name}"
    nib.save(nifti_for(arr * scale if scale != 1.0 else arr, AFFINE, None, kind=kind, parameter="T2star",
                       units="ms" if scale != 1.0 else "s"), str(ref))
    got = tmp_path / name
    _stream(got, arr, kind, list(cuts), scale)
    assert _read(got) == _read(ref)  # header (display range included) and data, byte for byte
    if name.endswith(".gz"):
        raw = got.read_bytes()
        assert raw[:2] == b"\x1f\x8b" and raw[3] == 0  # gzip magic, no optional fields (RFC 1952)
        assert zlib.decompress(raw, wbits=31) == _read(ref)  # zlib's own gzip decoder: CRC-32 and ISIZE match
        img = nib.load(str(got))
        assert np.array_equal(np.asanyarray(img.dataobj), arr * scale if scale != 1.0 else arr, equal_nan=True)


def test_a_damaged_stream_is_refused_by_the_standard_library(tmp_path):
    arr = np.arange(4 * 5 * 6, dtype=np.float32).reshape(4, 5, 6)
    p = tmp_path / "m.nii.gz"
    _stream(p, arr, "estimate", [0, 2, 6])
    raw = bytearray(p.read_bytes())
    raw[-8] ^= 0xFF  # the CRC-32 of the trailer
    with pytest.raises(gzip.BadGzipFile):
        gzip.decompress(bytes(raw))


def test_slabs_must_continue_the_map(tmp_path):
    out = OutputFile("m.nii.gz", None, "T2star", "estimate", "s", "test")
    s = NiftiStream(tmp_path / "m.nii.gz", out, (4, 5, 6), AFFINE, None)
    s.append(np.zeros((4, 5, 4), np.float32))
    with pytest.raises(ValueError, match="does not continue"):
        s.append(np.zeros((4, 5, 3), np.float32))
    with pytest.raises(ValueError, match="4 of 6 slices"):
        s.finish()
    s.close()


@pytest.fixture(scope="module")
def series(tmp_path_factory):
    data, te, *_ = decay_phantom(shape=(24, 20, 9))
    d = tmp_path_factory.mktemp("series")
    return write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": te.tolist()})


def _maps(folder: Path) -> dict:
    return {p.name: (np.asanyarray(nib.load(str(p)).dataobj), nib.load(str(p)).header.binaryblock)
            for p in sorted(folder.glob("*.nii.gz"))}


@pytest.mark.parametrize("noise", ["rician", "none"])
def test_maps_do_not_depend_on_the_slab_size_or_the_writing_thread(noise, series, tmp_path, monkeypatch):
    runs = {}
    for label, voxels, background in (("one", 1 << 30, True), ("slices", 24 * 20, True), ("three", 3 * 24 * 20, False),
                                      ("two-slices", 2 * 24 * 20, True)):
        monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", voxels)
        monkeypatch.setattr(streaming_mod, "BACKGROUND_WRITES", background)
        out = tmp_path / label
        assert main(["t2star", str(series), "-o", str(out), "-q", "--noise-floor", noise, "-j", "2",
                     "--chunk-size", "64"]) == 0
        runs[label] = _maps(out)
    ref = runs.pop("one")
    assert len(ref) >= 8
    for label, maps in runs.items():
        assert maps.keys() == ref.keys()
        for name, (arr, header) in maps.items():
            assert np.array_equal(arr, ref[name][0], equal_nan=True), (label, name)
            assert header == ref[name][1], (label, name)


def test_a_series_of_few_volumes_is_fitted_in_smaller_slabs_with_the_same_maps(tmp_path, monkeypatch):
    # fewer volumes than FIT_SLAB_VOLUMES: slabs shrink in proportion (at most to half), the maps do not change
    data, te, *_ = decay_phantom(shape=(24, 20, 9), te=[0.004, 0.012, 0.024, 0.040])
    path = write_nifti(tmp_path / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": te.tolist()})
    seen = []
    spied = pipeline_mod.PreparedRun.map_slabs

    def spy(self, fn, **kw):
        seen.append(kw.get("slabs"))
        return spied(self, fn, **kw)

    monkeypatch.setattr(pipeline_mod.PreparedRun, "map_slabs", spy)
    runs = {}
    for label, voxels in (("one", 1 << 30), ("slabs", 4 * 24 * 20)):
        monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", voxels)
        assert main(["t2star", str(path), "-o", str(tmp_path / label), "-q", "-j", "1"]) == 0
        runs[label] = _maps(tmp_path / label)
    assert seen[0] == [(0, 9)]
    assert seen[1] == [(0, 2), (2, 4), (4, 6), (6, 8), (8, 9)]  # 4 volumes of 8: half of 4 slices a slab
    for name, (arr, header) in runs["slabs"].items():
        assert np.array_equal(arr, runs["one"][name][0], equal_nan=True), name
        assert header == runs["one"][name][1], name


def test_run_report_reads_the_maps_from_the_files(series, tmp_path, monkeypatch):
    from qmap.pipeline import CommonOptions
    from qmap.streaming import StreamedMaps
    from qmap.workflows.decay import run_t2star

    monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", 4 * 24 * 20)  # three slabs
    report = run_t2star([series], common=CommonOptions(out_dir=tmp_path / "s", prefix="r", n_jobs=1))
    assert isinstance(report.maps, StreamedMaps)
    t2s = report.maps["T2star"]
    assert t2s.dtype == np.float32 and t2s.shape == (24, 20, 9)
    assert np.array_equal(t2s, np.asanyarray(nib.load(str(tmp_path / "s" / "r_T2starmap.nii.gz")).dataobj),
                          equal_nan=True)
    assert set(report.maps.quality) >= {"rsquared", "rmse"}
    assert report.maps.info["n_fitted"] == int(np.count_nonzero(report.maps.status != 1))
    # --units ms: written x 1000, read back in seconds (float32, within one unit in the last place)
    ms = run_t2star([series], common=CommonOptions(out_dir=tmp_path / "ms", prefix="r", n_jobs=1, units="ms"))
    np.testing.assert_allclose(ms.maps["T2star"], t2s, rtol=2e-7, equal_nan=True)
    written = np.asanyarray(nib.load(str(tmp_path / "ms" / "r_T2starmap.nii.gz")).dataobj)
    assert np.array_equal(written, t2s * 1000.0, equal_nan=True)  # the file holds exactly what was written before


def test_a_run_stopped_after_its_fit_leaves_nothing(tmp_path, capsys):
    """b1 refuses swapped images after the fit (the ratio fits no flip angle): the streamed maps go again."""
    rng = np.random.default_rng(3)
    b1 = rng.uniform(0.95, 1.05, (16, 16, 4))
    fa = 80.0  # swapped, S(a) / (2 S(2a)) = 1 / (4 cos a) > 1: no flip angle fits
    files = []
    for k in (2, 1):  # S(2a) first: the wrong order
        s = 1000.0 * np.abs(np.sin(np.radians(k * fa * b1))) + rng.normal(0, 2, b1.shape)
        files.append(write_nifti(tmp_path / f"dam{k}.nii.gz", np.abs(s)))
    out = tmp_path / "new" / "out"
    rc = main(["b1", *map(str, files), "--method", "dam", "--fa", str(fa), "--tr", "5s", "-o", str(out), "-q",
               "--mask", "none", "--sigma", "2"])
    assert rc == 2
    assert "wrong order" in capsys.readouterr().err
    assert not (tmp_path / "new").exists()
    assert set(snapshot(tmp_path)) == {"dam2.nii.gz", "dam1.nii.gz"}


def test_t1_mp2rage_streams_its_maps_whatever_the_slab_size(tmp_path, monkeypatch):
    """A UNI image (and a half-resolution oblique B1 map) read, inverted and written slab by slab (memory):
    the same maps as one slab, and T1 as the signal model says (Marques et al. 2010 steady state)."""
    from qmap.models.mp2rage import MP2RAGEProtocol, mp2rage_uni

    rng = np.random.default_rng(5)
    proto = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)
    shape = (20, 18, 12)
    t1 = rng.uniform(0.7, 2.5, shape)
    b1 = rng.uniform(0.85, 1.15, (10, 9, 6)).astype(np.float32)
    b1_affine = AFFINE.copy()
    b1_affine[:3, :3] *= 2.0
    b1_affine[:3, 3] += 0.3
    raw = np.clip(np.round((mp2rage_uni(t1, proto) + 0.5) * 4095), 0, 4095).astype(np.uint16)
    raw[0] = 0  # a zero-filled rim
    uni = tmp_path / "sub-01_UNIT1.nii.gz"
    nib.save(nib.Nifti1Image(raw, AFFINE), str(uni))
    (tmp_path / "sub-01_UNIT1.json").write_text(__import__("json").dumps(proto.as_acquisition()))
    b1p = tmp_path / "b1.nii.gz"
    nib.save(nib.Nifti1Image(b1, b1_affine), str(b1p))
    runs = {}
    for label, voxels in (("one", 1 << 30), ("slices", 20 * 18), ("five", 5 * 20 * 18)):
        monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", voxels)
        for b1_args in ([], ["--b1", str(b1p)]):
            out = tmp_path / f"{label}{len(b1_args)}"
            assert main(["t1-mp2rage", str(uni), "-o", str(out), "-q", *b1_args]) == 0
            runs[label, len(b1_args)] = _maps(out)
    for (label, nb1), maps in runs.items():
        ref = runs["one", nb1]
        assert maps.keys() == ref.keys() and len(maps) == 3
        for name, (arr, header) in maps.items():
            assert np.array_equal(arr, ref[name][0], equal_nan=True), (label, name)
            assert header == ref[name][1], (label, name)
    t1_map = next(a for n, (a, _) in runs["slices", 0].items() if n.endswith("_T1map.nii.gz"))
    inside = np.isfinite(t1_map[1:])
    assert inside.mean() > 0.95 and np.isnan(t1_map[0]).all()
    # 12-bit storage of UNI: T1 within 2 % of the simulated value
    np.testing.assert_allclose(t1_map[1:][inside], t1[1:][inside], rtol=0.02)


def test_resampling_block_by_block_is_one_map_coordinates_call(monkeypatch):
    """qmap.io.nifti.resample_to_grid in blocks of planes gives scipy.ndimage.map_coordinates' values on the
    whole grid (trilinear, the coordinates through the two affines), for any block size."""
    from scipy import ndimage

    import qmap.io.nifti as nifti_mod

    rng = np.random.default_rng(2)
    src = rng.random((9, 11, 7))
    src_affine = np.diag([2.0, 2.0, 2.5, 1.0])
    dst_shape = (17, 13, 12)
    dst_affine = np.array([[0.0, -1.5, 0.0, 10.0], [2.0, 0.0, 0.0, -3.0], [0.0, 0.2, 3.0, -5.0], [0, 0, 0, 1]])
    mat = np.linalg.inv(src_affine) @ dst_affine
    idx = np.indices(dst_shape, dtype=float).reshape(3, -1)
    coords = mat[:3, :3] @ idx + mat[:3, 3:4]
    edge = np.array(src.shape, float)[:, None]
    inside = np.all((coords >= -0.5) & (coords <= edge - 0.5), axis=0)
    ref = ndimage.map_coordinates(src, np.clip(coords, 0, edge - 1), order=1, mode="nearest")
    ref[~inside] = np.nan
    assert 0.05 < inside.mean() < 0.95  # both parts of the grid are tested
    for block in (1, 13 * 12, 3 * 13 * 12 + 5, 1 << 20):
        monkeypatch.setattr(nifti_mod, "RESAMPLE_BLOCK", block)
        got = nifti_mod.resample_to_grid(src, src_affine, dst_shape, dst_affine)
        assert np.array_equal(got.reshape(-1), ref, equal_nan=True), block
