"""t1-mp2rage slab by slab: each ``.nii.gz`` read through one open gzip stream per pass in file order
(qmap.io.nifti.SlabReader), the B1 map (and its standard error) resampled onto one slab at a time
(qmap.b1.B1OnGrid). Checked against nibabel's own reading, scipy's trilinear interpolation on the whole
grid, and the maps of a run in one slab; corrupt and truncated files are still refused (exit 2)."""

from __future__ import annotations

import gzip
import json

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

import qmap.io.gz as gz_mod
import qmap.pipeline as pipeline_mod
from qmap.b1 import B1OnGrid, load_b1_map, open_b1_map
from qmap.cli import main
from qmap.io.nifti import SlabReader, load_image
from qmap.models.mp2rage import MP2RAGEProtocol, mp2rage_signals, mp2rage_uni
from tests.conftest import snapshot

AFFINE = np.array([[1.5, 0, 0, -14.0], [0, 1.5, 0, -12.0], [0, 0, 2.0, -9.0], [0, 0, 0, 1]])
PROTO = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)


def _oblique(voxel_mm: float, shift) -> np.ndarray:
    """A grid rotated 17 deg about z and 9 deg about x (an oblique acquisition), ``voxel_mm`` voxels."""
    a, b = np.radians(17.0), np.radians(9.0)
    rz = np.array([[np.cos(a), -np.sin(a), 0], [np.sin(a), np.cos(a), 0], [0, 0, 1]])
    rx = np.array([[1, 0, 0], [0, np.cos(b), -np.sin(b)], [0, np.sin(b), np.cos(b)]])
    out = np.eye(4)
    out[:3, :3] = rz @ rx * voxel_mm
    out[:3, 3] = shift
    return out


def _count_opens(monkeypatch) -> dict:
    """Count the gzip streams opened for reading, by file name."""
    opened: dict = {}
    real = gz_mod.gzip_open

    def counting(filename, mode="rb", *args, **kwargs):
        if "r" in mode:
            name = str(filename).rsplit("/", 1)[-1]
            opened[name] = opened.get(name, 0) + 1
        return real(filename, mode, *args, **kwargs)

    monkeypatch.setattr(gz_mod, "gzip_open", counting)  # (SlabReader's streams)
    monkeypatch.setattr(nib.openers.ImageOpener, "compress_ext_map",
                        dict(nib.openers.ImageOpener.compress_ext_map,
                             **{".gz": (counting, ("mode", "compresslevel", "mtime", "keep_open"))}))
    return opened


@pytest.mark.parametrize("ext", [".nii.gz", ".nii"])
def test_slab_reader_gives_nibabels_values(tmp_path, monkeypatch, ext):
    """Scaled integer storage (scl_slope / scl_inter), float, complex, big-endian and a 4D file of one volume:
    every slab is nibabel's value and dtype; a pass in z order opens a .nii.gz once."""
    rng = np.random.default_rng(4)
    shape = (9, 7, 11)
    images = {
        "int16_scaled": (rng.integers(-3000, 3000, shape).astype(np.int16), (0.37, 12.5)),
        "uint8_inter": (rng.integers(0, 255, shape).astype(np.uint8), (1.0, -3.0)),
        "uint16_plain": (rng.integers(0, 4095, shape).astype(np.uint16), None),
        "float32": (rng.normal(0, 1, shape).astype(np.float32), None),
        "float64_4d": (rng.normal(0, 1, shape + (1,)), (2.0, -1.0)),
        "complex64": ((rng.normal(0, 1, shape) + 1j * rng.normal(0, 1, shape)).astype(np.complex64), None),
        "bigendian": (rng.normal(0, 1, shape).astype(">f4"), None),
    }
    opened = _count_opens(monkeypatch)
    for name, (data, scaling) in images.items():
        img = nib.Nifti1Image(data, AFFINE)
        if scaling is not None:
            img.header.set_slope_inter(*scaling)
        path = tmp_path / f"{name}{ext}"
        nib.save(img, str(path))
        ref = np.asanyarray(nib.load(str(path)).dataobj)  # nibabel reading the whole image
        ref = ref.reshape(shape)
        loaded = load_image(path)
        before = opened.get(path.name, 0)
        reader = SlabReader(loaded)
        parts = [(0, 1), (1, 2), (2, 6), (6, 10), (10, 11)]
        for z0, z1 in parts:
            got = reader.read(z0, z1)
            assert got.dtype == ref.dtype, name
            assert np.array_equal(got, ref[:, :, z0:z1]), (name, z0, z1)
        if ext == ".nii.gz":
            assert opened[path.name] - before == 1, name  # decompressed once for the whole pass
        # a slab before the last one read: read again from the start, the same values
        for z0, z1 in [(4, 7), (0, 3), (8, 11)]:
            assert np.array_equal(reader.read(z0, z1), ref[:, :, z0:z1]), (name, z0, z1)


def _gz_volume(tmp_path, name="vol.nii.gz", shape=(40, 40, 20)):
    """A 12-bit volume whose gzip stream is long enough that opening the file (the header) does not reach
    the end of it (ISA-L decompresses its input in blocks)."""
    rng = np.random.default_rng(8)
    data = rng.integers(0, 4095, shape).astype(np.uint16)
    path = tmp_path / name
    nib.save(nib.Nifti1Image(data, AFFINE), str(path))
    return path, data


@pytest.mark.parametrize("damage", ["crc", "length", "truncated"])
def test_slab_reader_still_checks_the_gzip_stream(tmp_path, damage):
    """A wrong CRC-32 or length in the gzip trailer, or a stream cut short, raises when the pass reaches it
    (the gzip format, RFC 1952, ends with CRC-32 and ISIZE), as nibabel's whole read does."""
    path, _ = _gz_volume(tmp_path)
    raw = bytearray(path.read_bytes())
    if damage == "crc":
        raw[-8] ^= 0x01
    elif damage == "length":
        raw[-4] ^= 0x01
    else:
        raw = raw[: len(raw) * 2 // 3]
    path.write_bytes(bytes(raw))
    with pytest.raises((OSError, EOFError, ValueError)):
        np.asanyarray(nib.load(str(path)).dataobj)  # the reference: nibabel refuses it too
    reader = SlabReader(load_image(path))
    with pytest.raises((OSError, EOFError, ValueError)):
        for z in range(20):
            reader.read(z, z + 1)


def _b1_source(shape=(9, 8, 7)):
    """A smooth relative B1 map with holes (NaN and 0: no B1 there)."""
    rng = np.random.default_rng(12)
    i, j, k = np.indices(shape, dtype=float)
    b1 = 0.85 + 0.3 * (i / shape[0]) * (1 - j / shape[1]) + 0.05 * np.cos(k)
    b1[rng.random(shape) < 0.08] = np.nan
    b1[0, 0, :] = 0.0
    return b1


def test_b1_resampled_slab_by_slab_is_the_whole_resampling(tmp_path):
    """Oblique B1 grid at another resolution, partly outside the data: any partition into z slabs (single
    slices, the edges) gives each voxel the value of the whole grid bit for bit; and that value is scipy's
    trilinear interpolation of value x valid divided by that of valid, kept where the latter >= 0.5."""
    b1 = _b1_source()
    src_affine = _oblique(2.6, (-11.0, -14.0, -6.0))
    shape = (13, 11, 9)
    valid = np.isfinite(b1) & (b1 > 0)
    grid = B1OnGrid(b1, valid, src_affine, shape, AFFINE)
    whole = grid.slab(0, shape[2])
    # the reference, independently: coordinates of the whole grid through the affines, scipy on the whole
    mat = np.linalg.inv(src_affine) @ AFFINE
    idx = np.indices(shape, dtype=float).reshape(3, -1)
    coords = mat[:3, :3] @ idx + mat[:3, 3:4]
    edge = np.array(b1.shape, float)[:, None]
    inside = np.all((coords >= -0.5) & (coords <= edge - 0.5), axis=0)
    clamped = np.clip(coords, 0, edge - 1)
    num = ndimage.map_coordinates(np.where(valid, b1, 0.0), clamped, order=1, mode="nearest")
    den = ndimage.map_coordinates(valid.astype(float), clamped, order=1, mode="nearest")
    with np.errstate(divide="ignore", invalid="ignore"):
        ref = np.where(inside & (den >= 0.5), num / den, np.nan)
    assert np.array_equal(whole.reshape(-1), ref, equal_nan=True)
    covered = np.isfinite(whole)
    assert 0.2 < covered.mean() < 0.95  # both covered and uncovered voxels, holes and the edge of the map
    for parts in ([(z, z + 1) for z in range(shape[2])], [(0, 4), (4, 9)], [(0, 1), (1, 8), (8, 9)]):
        got = np.concatenate([grid.slab(z0, z1) for z0, z1 in parts], axis=2)
        assert np.array_equal(got, whole, equal_nan=True), parts
        got32 = np.concatenate([grid.slab(z0, z1, np.float32) for z0, z1 in parts], axis=2)
        assert np.array_equal(got32, whole.astype(np.float32), equal_nan=True), parts
    # the same through the file loaders: load_b1_map (whole) is open_b1_map's slabs put together
    path = tmp_path / "b1.nii.gz"
    nib.save(nib.Nifti1Image(b1, src_affine), str(path))
    loaded, info = load_b1_map(path, shape=shape, affine=AFFINE, dtype=np.float32)
    lazy, lazy_info = open_b1_map(path, shape=shape, affine=AFFINE)
    slabs = np.concatenate([lazy.slab(z, min(z + 2, shape[2]), np.float32) for z in range(0, shape[2], 2)], axis=2)
    assert np.array_equal(slabs, loaded, equal_nan=True)
    assert info["b1_grid_coverage"] == lazy.coverage(int(np.count_nonzero(np.isfinite(slabs))))
    assert {k: v for k, v in info.items() if k != "b1_grid_coverage"} == lazy_info


@pytest.fixture(scope="module")
def mp2rage_set(tmp_path_factory):
    """UNI (12-bit export), magnitude inversion images (one int16 with scaling), an oblique half-resolution
    B1 map and its standard-error map beside it, on a 20 x 18 x 12 grid with a zero-filled rim."""
    d = tmp_path_factory.mktemp("mp2slabs")
    rng = np.random.default_rng(21)
    shape = (20, 18, 12)
    t1 = rng.uniform(0.6, 2.6, shape)
    b1_src = 0.8 + 0.4 * rng.random((10, 9, 7))
    b1_affine = _oblique(3.0, (-15.0, -13.0, -11.0))
    # B1 on the data grid for the simulated signals: the map resampled (its values where it covers the data)
    b1_on_data, _ = _resampled(b1_src, b1_affine, shape)
    b1_true = np.where(np.isfinite(b1_on_data), b1_on_data, 1.0)
    s1, s2 = mp2rage_signals(t1, PROTO, b1_true)
    m0 = 800.0
    inv1 = np.abs(m0 * s1) + rng.normal(0, 2.0, shape)
    inv2 = np.abs(m0 * s2) + rng.normal(0, 2.0, shape)
    uni = mp2rage_uni(t1, PROTO, b1_true) + rng.normal(0, 0.002, shape)
    raw = np.clip(np.round((uni + 0.5) * 4095), 0, 4095).astype(np.uint16)
    raw[0] = 0  # zero-filled rim
    paths = {"uni": d / "sub-01_UNIT1.nii.gz", "inv1": d / "sub-01_inv-1_MP2RAGE.nii.gz",
             "inv2": d / "sub-01_inv-2_MP2RAGE.nii.gz", "b1": d / "sub-01_TB1map.nii.gz",
             "b1se": d / "sub-01_desc-stderr_TB1map.nii.gz"}
    nib.save(nib.Nifti1Image(raw, AFFINE), str(paths["uni"]))
    (d / "sub-01_UNIT1.json").write_text(json.dumps(PROTO.as_acquisition()))
    scaled = nib.Nifti1Image(np.round(np.abs(inv1) / 0.25).astype(np.int16), AFFINE)
    scaled.header.set_slope_inter(0.25, 0.0)  # integer storage with a scale factor
    nib.save(scaled, str(paths["inv1"]))
    nib.save(nib.Nifti1Image(np.abs(inv2).astype(np.float32), AFFINE), str(paths["inv2"]))
    nib.save(nib.Nifti1Image(b1_src, b1_affine), str(paths["b1"]))
    nib.save(nib.Nifti1Image(np.full(b1_src.shape, 0.02), b1_affine), str(paths["b1se"]))
    return {k: str(v) for k, v in paths.items()}


def _resampled(src, src_affine, shape):
    grid = B1OnGrid(src, np.isfinite(src), src_affine, shape, AFFINE)
    return grid.slab(0, shape[2]), grid


def _maps(out):
    return {p.name: (np.asanyarray(nib.load(str(p)).dataobj), nib.load(str(p)).header.binaryblock)
            for p in sorted(out.glob("*.nii.gz"))}


def test_t1_mp2rage_maps_do_not_depend_on_the_slabs(mp2rage_set, tmp_path, monkeypatch, capsys):
    """With the inversion images, an oblique B1 map and its standard error: one slab, one slice a slab
    (LAZY_SLAB_VOXELS), and --max-memory slabs give the same files bit for bit; each input .nii.gz is
    decompressed a fixed number of times whatever the number of slabs (one stream per pass)."""
    p = mp2rage_set
    argv = ["t1-mp2rage", p["uni"], "--inv1", p["inv1"], "--inv2", p["inv2"], "--b1", p["b1"], "--sigma", "2"]
    runs, opens = {}, {}
    for label, voxels, extra in (("one", 1 << 30, []), ("slices", 20 * 18, []), ("budget", 1 << 30,
                                                                                ["--max-memory", "9KB"])):
        monkeypatch.setattr(pipeline_mod, "LAZY_SLAB_VOXELS", voxels)
        monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", max(voxels, 1 << 17))
        with monkeypatch.context() as m:
            opened = _count_opens(m)
            out = tmp_path / label
            assert main([*argv, *extra, "-o", str(out)]) == 0
        # the summary mentions --max-memory only when it was given (the slabs are the norm without it)
        assert ("--max-memory" in capsys.readouterr().out) == bool(extra), label
        runs[label] = _maps(out)
        opens[label] = dict(opened)
        prov = json.loads(next(out.glob("*_provenance.json")).read_text())
        assert prov["options"]["b1_stderr"]["propagated"] is True
    ref = runs["one"]
    pre = "sub-01_acq-mp2rage_"
    assert set(ref) >= {pre + n for n in ("T1map.nii.gz", "M0map.nii.gz", "desc-stderr_T1map.nii.gz",
                                          "R1map.nii.gz", "desc-status_fitmap.nii.gz")}
    for label in ("slices", "budget"):
        assert runs[label].keys() == ref.keys()
        for name, (arr, header) in runs[label].items():
            assert np.array_equal(arr, ref[name][0], equal_nan=True), (label, name)
            assert header == ref[name][1], (label, name)
    # 12 slabs read as often as one: the header, and one stream per pass (not one per slab)
    for name in ("sub-01_UNIT1.nii.gz", "sub-01_inv-1_MP2RAGE.nii.gz", "sub-01_inv-2_MP2RAGE.nii.gz"):
        assert opens["slices"][name] == opens["one"][name] <= 5, (name, opens)
    t1 = ref[pre + "T1map.nii.gz"][0]
    status = ref[pre + "desc-status_fitmap.nii.gz"][0]
    # the oblique map covers part of the grid: both inverted voxels and voxels outside the B1 map (status 6)
    assert (status == 0).mean() > 0.3 and (status == 6).any()
    assert np.isfinite(t1[status == 0]).all() and np.isnan(t1[status == 6]).all()


@pytest.fixture(scope="module")
def large_set(tmp_path_factory):
    """UNI and inversion images on a 48 x 48 x 16 grid: gzip streams long enough that opening a file (its
    header) does not decompress it to the end."""
    d = tmp_path_factory.mktemp("mp2large")
    rng = np.random.default_rng(22)
    shape = (48, 48, 16)
    t1 = rng.uniform(0.6, 2.6, shape)
    s1, s2 = mp2rage_signals(t1, PROTO, 1.0)
    raw = np.clip(np.round((mp2rage_uni(t1, PROTO) + rng.normal(0, 0.002, shape) + 0.5) * 4095), 0, 4095)
    paths = {"uni": d / "sub-01_UNIT1.nii.gz", "inv1": d / "inv1.nii.gz", "inv2": d / "inv2.nii.gz"}
    nib.save(nib.Nifti1Image(raw.astype(np.uint16), AFFINE), str(paths["uni"]))
    (d / "sub-01_UNIT1.json").write_text(json.dumps(PROTO.as_acquisition()))
    for key, s in (("inv1", s1), ("inv2", s2)):
        nib.save(nib.Nifti1Image(np.abs(800.0 * s + rng.normal(0, 2.0, shape)).astype(np.float32), AFFINE),
                 str(paths[key]))
    return {k: str(v) for k, v in paths.items()}


@pytest.mark.parametrize("damage", ["crc", "truncated"])
@pytest.mark.parametrize("which", ["uni", "inv2"])
def test_corrupt_input_still_exits_2(large_set, tmp_path, capsys, damage, which):
    """A .nii.gz with a wrong gzip CRC-32 or cut short: one line naming the file, exit 2, nothing written,
    read in one slab or in many."""
    import shutil

    p = dict(large_set)
    bad = tmp_path / f"bad_{which}.nii.gz"
    shutil.copy(p[which], bad)
    raw = bytearray(bad.read_bytes())
    if damage == "crc":
        raw[-8] ^= 0x01
    else:
        raw = raw[: len(raw) * 3 // 4]
    bad.write_bytes(bytes(raw))
    p[which] = str(bad)
    for extra in ([], ["--max-memory", "9KB"]):
        out = tmp_path / "new" / "out"
        before = snapshot(tmp_path)
        rc = main(["t1-mp2rage", p["uni"], "--inv1", p["inv1"], "--inv2", p["inv2"], "-q", "-o", str(out), *extra])
        err = capsys.readouterr().err
        assert rc == 2, err
        lines = [ln for ln in err.splitlines() if ln.strip()]
        assert len(lines) == 1 and bad.name in lines[0] and "corrupt" in lines[0], err
        assert "Traceback" not in err
        assert not (tmp_path / "new").exists()
        assert snapshot(tmp_path) == before
    with gzip.open(bad) as fh, pytest.raises((OSError, EOFError)):  # the standard library agrees it is damaged
        fh.read()


def test_lookup_table_does_not_depend_on_rows_at_a_time(monkeypatch):
    """Mp2rageLookup computes UNI over its T1 grid a few B1 rows at a time (memory): the table is the same,
    bit for bit, computed one row at a time or all rows at once, over a wide B1 range."""
    import qmap.models.mp2rage as model

    tables = []
    for rows in (1, 3, 10**6):
        monkeypatch.setattr(model, "_B1_ROWS", rows)
        lut = model.Mp2rageLookup(PROTO, b1_range=(0.37, 1.93))
        tables.append((lut.log_t1, lut.limits))
    assert tables[0][0].shape == (157, model.UNI_POINTS)  # B1 0.37..1.93 in steps of 0.01
    for log_t1, limits in tables[1:]:
        assert np.array_equal(log_t1, tables[0][0], equal_nan=True)
        assert np.array_equal(limits, tables[0][1], equal_nan=True)


def test_a_single_slice_2d_uni_is_one_slice(tmp_path):
    """A UNI exported as a 2D image (X, Y) -- one slice -- is inverted as the (X, Y, 1) volume it is: the same
    maps as the same slice stored as 3D (a traceback before)."""
    rng = np.random.default_rng(31)
    t1 = rng.uniform(0.6, 2.6, (14, 12))
    raw = np.clip(np.round((mp2rage_uni(t1, PROTO) + 0.5) * 4095), 0, 4095).astype(np.uint16)
    b1 = tmp_path / "b1.nii.gz"
    nib.save(nib.Nifti1Image(0.9 + 0.2 * rng.random((6, 5, 3)), _oblique(3.0, (-16.0, -14.0, -12.0))), str(b1))
    outs = {}
    for label, data in (("2d", raw), ("3d", raw[:, :, None])):
        uni = tmp_path / f"{label}_UNIT1.nii.gz"
        nib.save(nib.Nifti1Image(data, AFFINE), str(uni))
        (tmp_path / f"{label}_UNIT1.json").write_text(json.dumps(PROTO.as_acquisition()))
        reader = SlabReader(load_image(uni))
        assert np.array_equal(reader.read(0, 1), raw[:, :, None])
        assert main(["t1-mp2rage", str(uni), "--b1", str(b1), "-o", str(tmp_path / label), "-q",
                     "--prefix", "x"]) == 0
        outs[label] = _maps(tmp_path / label)
    for name, (arr, _header) in outs["3d"].items():
        assert outs["2d"][name][0].shape == (14, 12, 1)
        assert np.array_equal(outs["2d"][name][0], arr, equal_nan=True), name
    t1_map = outs["3d"]["x_T1map.nii.gz"][0][..., 0]
    ok = np.isfinite(t1_map)
    assert ok.mean() > 0.3  # (the oblique B1 map covers part of the slice)
