"""The options every fitting command shares, checked once for all of them (README, "Outputs").

One test per fitting command, driven by :data:`FITTING_COMMANDS`: a command joins the contract by
adding an entry there (its inputs and its own options). On small series (the bundled sample phantom,
every other voxel in x and y) each command must

* record a ``--mask FILE`` among the provenance inputs with its SHA-256 (checked with hashlib);
* give bit-identical maps when read in slabs (``--max-memory``) and with two workers (``-j 2``);
* write time maps in ms with ``--units ms`` (1000 x the seconds map, sidecar and provenance say ms);
* write float32 maps, a uint8 status map, a JSON sidecar with ``Units`` and ``Description`` for each;
* name every output with ``--prefix`` and list it in the provenance ``outputs``;
* refuse to replace outputs without ``--overwrite`` (exit 2, nothing touched) and replace them with it;
* not mistake another prefix's outputs for its own (``p_x`` outputs do not block ``p``).
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from qmap.io.writer import existing_outputs
from qmap.workflows.demo import sample_data_dir
from tests.conftest import snapshot

ANAT = "sub-phantom/anat"
FMAP = "sub-phantom/fmap"


@dataclass
class Case:
    """A fitting command in the contract test."""

    command: str
    series: tuple  #: glob patterns (relative to the sample data) of the series files, in order
    options: list = field(default_factory=list)  #: command-specific options (may name files, see ``files``)
    files: dict = field(default_factory=dict)  #: placeholder in ``options`` -> sample-data file (used as is)
    time_maps: tuple = ()  #: parameters written in ms by --units ms
    crop: bool = True  #: subsample the series (every other voxel in x and y)
    slabs: bool = True  #: reads in slabs under --max-memory (False: a known gap, the maps must still agree)
    #: maps bit-identical in slabs / with -j 2; False: a known gap (matrix products across the voxels of a chunk,
    #: whose rounding depends on the chunk), the maps must then agree to float32 rounding (rtol 1e-5)
    exact: bool = True


#: every fitting command (and notable variants); a new command joins the contract here
FITTING_COMMANDS = {
    "t1-ir": Case("t1-ir", (f"{ANAT}/*_IRT1.nii.gz",), time_maps=("T1",)),
    "t1-vfa": Case("t1-vfa", (f"{ANAT}/*_VFA.nii.gz",), ["--b1", "{b1}"], {"{b1}": f"{FMAP}/sub-phantom_TB1map.nii.gz"},
                   time_maps=("T1",)),
    "t1-vfa-linear": Case("t1-vfa", (f"{ANAT}/*_VFA.nii.gz",), ["--method", "linear"], time_maps=("T1",)),
    "b1": Case("b1", (f"{FMAP}/*_TB1DAM.nii.gz",), ["--method", "dam"], crop=False),
    # the noise floor needs the image background: full field of view
    "t2": Case("t2", (f"{ANAT}/*_echo-0[1-8]_MESE.nii.gz",), time_maps=("T2",), crop=False),
    "t2star": Case("t2star", (f"{ANAT}/*_MEGRE.nii.gz",), time_maps=("T2star",), crop=False),
    "t1-mp2rage": Case("t1-mp2rage", (f"{ANAT}/*_UNIT1.nii.gz",), ["--inv1", "{inv1}", "--inv2", "{inv2}"],
                       {"{inv1}": f"{ANAT}/sub-phantom_inv-1_MP2RAGE.nii.gz",
                        "{inv2}": f"{ANAT}/sub-phantom_inv-2_MP2RAGE.nii.gz"}, time_maps=("T1",), crop=False),
    "t2-spectrum": Case("t2-spectrum", (f"{ANAT}/*_echo-0[1-9]_MESE.nii.gz", f"{ANAT}/*_echo-1[0-6]_MESE.nii.gz")),
}


def _copy(src: Path, dst: Path, crop: bool) -> Path:
    img = nib.load(str(src))
    data = np.asarray(img.dataobj)
    affine = img.affine.copy()
    if crop:
        data = data[::2, ::2]
        affine[:3, :2] *= 2.0
    nib.save(nib.Nifti1Image(data, affine), str(dst))
    side = src.with_name(src.name.removesuffix(".nii.gz") + ".json")
    if side.is_file():
        dst.with_name(dst.name.removesuffix(".nii.gz") + ".json").write_text(side.read_text())
    return dst


def _nifti_outputs(folder: Path, prefix: str) -> dict[str, np.ndarray]:
    return {p.name: np.asarray(nib.load(str(p)).dataobj) for p in existing_outputs(folder, prefix)
            if p.name.endswith(".nii.gz")}


def _same(actual: np.ndarray, desired: np.ndarray, case: Case, fname: str) -> None:
    """The same map: bit for bit, or to float32 rounding for a command with a known gap (``Case.exact``)."""
    if case.exact or actual.dtype != np.float32:
        np.testing.assert_array_equal(actual, desired, err_msg=fname)
    else:
        np.testing.assert_allclose(actual, desired, rtol=1e-5, atol=0, equal_nan=True, err_msg=fname)


def _run(argv, capsys) -> tuple[int, str, str]:
    rc = main(argv)
    out, err = capsys.readouterr()
    return rc, out, err


@pytest.mark.parametrize("name", sorted(FITTING_COMMANDS))
def test_shared_options(name, tmp_path, capsys):
    case = FITTING_COMMANDS[name]
    data = sample_data_dir()
    src = [p for pat in case.series for p in sorted(data.glob(pat))]
    assert src, case.series
    inputs = [_copy(p, tmp_path / p.name, case.crop) for p in src]
    options = [str(data / case.files[o]) if o in case.files else o for o in case.options]
    first = nib.load(str(inputs[0]))
    shape = first.shape[:3]
    # a mask file: every voxel but the outermost ring (the auto mask would differ from it)
    mask = np.zeros(shape, np.uint8)
    mask[1:-1, 1:-1, :] = 1
    mask_path = tmp_path / "mask.nii.gz"
    nib.save(nib.Nifti1Image(mask, first.affine), str(mask_path))
    series_bytes = sum(nib.load(str(p)).get_fdata(dtype=np.float32).nbytes for p in inputs)
    base = [case.command, *map(str, inputs), *options, "--mask", str(mask_path)]
    ms = ["--units", "ms"] if case.time_maps else []  # a command without time maps refuses --units

    # run A: mask file, one worker, ms, prefix p_x
    a_dir = tmp_path / "a"
    rc, out, err = _run([*base, "-o", str(a_dir), "-j", "1", *ms, "--prefix", "p_x", "-q"], capsys)
    assert rc == 0, err
    prov = json.loads((a_dir / "p_x_provenance.json").read_text())
    recorded = {i["path"]: i["sha256"] for i in prov["inputs"]}
    mask_abs = str(mask_path.absolute())
    assert recorded.get(mask_abs) == hashlib.sha256(mask_path.read_bytes()).hexdigest(), sorted(recorded)
    for p in inputs:
        assert recorded[str(p.absolute())] == hashlib.sha256(p.read_bytes()).hexdigest()
    maps_a = _nifti_outputs(a_dir, "p_x")
    assert set(maps_a) == {n for n in prov["outputs"] if n.endswith(".nii.gz")}
    assert "p_x_desc-status_fitmap.nii.gz" in maps_a
    for fname, arr in maps_a.items():
        info = prov["outputs"][fname]
        assert arr.dtype == (np.uint8 if info["kind"] == "status" else np.float32), (fname, arr.dtype)
        side = json.loads((a_dir / fname.replace(".nii.gz", ".json")).read_text())
        assert side["Units"] == info["units"] and side["Description"], fname
        if info["parameter"] in case.time_maps and info["kind"] in ("estimate", "stderr"):
            assert info["units"] == "ms", fname
    assert sum(prov["status_counts"].values()) == int(np.prod(shape))
    assert prov["status_counts"].get("1", 0) >= int(np.prod(shape)) - int(mask.sum())  # outside the mask file

    # run B: read in slabs with two workers -> the same bits
    b_dir = tmp_path / "b"
    budget = f"{series_bytes / 3 / 1024:.0f}K"  # at most one slice per slab
    rc, out, err = _run([*base, "-o", str(b_dir), "-j", "2", *ms, "--prefix", "p_x",
                         "--max-memory", budget], capsys)
    assert rc == 0, err
    assert ("slabs" in out) == case.slabs, out
    maps_b = _nifti_outputs(b_dir, "p_x")
    assert set(maps_b) == set(maps_a)
    for fname in maps_a:
        _same(maps_b[fname], maps_a[fname], case, fname)

    # run C: prefix p beside p_x's outputs (not taken for its own), seconds
    rc, out, err = _run([*base, "-o", str(a_dir), "-j", "1", "--prefix", "p", "-q"], capsys)
    assert rc == 0, err
    maps_c = _nifti_outputs(a_dir, "p")
    assert {n.replace("p_", "p_x_", 1) for n in maps_c} == set(maps_a)
    for param in case.time_maps:
        ms, s = maps_a[f"p_x_{param}map.nii.gz"], maps_c[f"p_{param}map.nii.gz"]
        np.testing.assert_allclose(ms, np.float32(s * np.float32(1e3)), rtol=1e-6, equal_nan=True)

    # again without --overwrite: refused, nothing touched; with it: replaced
    before = snapshot(a_dir)
    rc, out, err = _run([*base, "-o", str(a_dir), "--prefix", "p"], capsys)
    assert rc == 2 and "--overwrite" in err, err
    assert snapshot(a_dir) == before
    rc, out, err = _run([*base, "-o", str(a_dir), "--prefix", "p", "--overwrite", "-q"], capsys)
    assert rc == 0, err
    for fname, arr in _nifti_outputs(a_dir, "p").items():
        _same(arr, maps_c[fname], case, fname)


def test_vfa_and_b1_maps_are_held_as_float32(tmp_path):
    # the maps are held in the precision they are written in (regression: t1-vfa and b1 held float64)
    from qmap.pipeline import CommonOptions
    from qmap.workflows.b1 import run_b1
    from qmap.workflows.vfa import run_t1_vfa

    data = sample_data_dir()
    vfa = sorted((data / ANAT).glob("*_VFA.nii.gz"))
    dam = sorted((data / FMAP).glob("*_TB1DAM.nii.gz"))
    # (the small B1 images have too little background for the noise level: the library default says so quietly)
    b1_report = run_b1(dam, common=CommonOptions(out_dir=tmp_path, prefix="b", n_jobs=1), method="dam")
    for report in (run_t1_vfa(vfa, common=CommonOptions(out_dir=tmp_path, prefix="v", n_jobs=1)),
                   run_t1_vfa(vfa, common=CommonOptions(out_dir=tmp_path, prefix="l", n_jobs=1), method="linear"),
                   b1_report):
        for group in (report.maps.estimates, report.maps.stderr, report.maps.quality):
            assert {str(v.dtype) for v in group.values()} == {"float32"}, report.prefix
