"""`qmap t2star` end to end through the command line (the README's contract)."""

import json

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.conftest import decay_phantom, snapshot, write_nifti


def _run(*args):
    return main(["t2star", *map(str, args), "-q"])


def test_outputs_names_units_affine_and_provenance(megre, tmp_path):
    path, te, t2, obj = megre
    out = tmp_path / "out"
    assert _run(path, "-o", out, "--noise-floor", "none") == 0
    src = nib.load(str(path))
    prov = json.loads((out / "sub-01_acq-megre_provenance.json").read_text())
    assert set(prov) == {"qmap_version", "command_line", "inputs", "acquisition", "options", "model", "noise",
                         "status_counts", "status_codes", "wall_time_s", "outputs"}
    assert prov["acquisition"]["EchoTime"] == pytest.approx(te.tolist())
    assert prov["inputs"][0]["path"] == str(path) and len(prov["inputs"][0]["sha256"]) == 64
    assert sum(prov["status_counts"].values()) == obj.size
    for name, meta in prov["outputs"].items():
        img = nib.load(str(out / name))
        np.testing.assert_allclose(img.affine, src.affine, atol=1e-6)  # same grid as the input
        assert img.shape == src.shape[:3]
        side = json.loads((out / name.replace(".nii.gz", ".json")).read_text())
        assert side["Units"] == meta["units"] and side["Description"]
    assert prov["outputs"]["sub-01_acq-megre_T2starmap.nii.gz"] == {"parameter": "T2star", "kind": "estimate", "units": "s"}
    assert prov["outputs"]["sub-01_acq-megre_desc-status_fitmap.nii.gz"]["kind"] == "status"
    status = np.asanyarray(nib.load(str(out / "sub-01_acq-megre_desc-status_fitmap.nii.gz")).dataobj)
    assert status.dtype == np.uint8
    t2map = nib.load(str(out / "sub-01_acq-megre_T2starmap.nii.gz")).get_fdata()
    good = obj & (status == 0)
    assert good.sum() > 0.9 * obj.sum()
    assert abs(np.median(t2map[good] / t2[good]) - 1) < 0.01


def test_units_ms_scales_times_not_rates(megre, tmp_path):
    path, *_ = megre
    assert _run(path, "-o", tmp_path / "s", "--noise-floor", "none") == 0
    assert _run(path, "-o", tmp_path / "ms", "--noise-floor", "none", "--units", "ms") == 0
    t_s = nib.load(str(tmp_path / "s/sub-01_acq-megre_T2starmap.nii.gz")).get_fdata()
    t_ms = nib.load(str(tmp_path / "ms/sub-01_acq-megre_T2starmap.nii.gz")).get_fdata()
    r_s = nib.load(str(tmp_path / "s/sub-01_acq-megre_R2starmap.nii.gz")).get_fdata()
    r_ms = nib.load(str(tmp_path / "ms/sub-01_acq-megre_R2starmap.nii.gz")).get_fdata()
    np.testing.assert_allclose(t_ms, 1000 * t_s, rtol=1e-6)
    np.testing.assert_array_equal(r_ms, r_s)
    prov = json.loads((tmp_path / "ms/sub-01_acq-megre_provenance.json").read_text())
    assert prov["outputs"]["sub-01_acq-megre_desc-stderr_T2starmap.nii.gz"]["units"] == "ms"
    assert prov["outputs"]["sub-01_acq-megre_R2starmap.nii.gz"]["units"] == "1/s"


def test_jobs_give_identical_maps(megre, tmp_path):
    path, *_ = megre
    assert _run(path, "-o", tmp_path / "a", "-j", "1", "--chunk-size", "100") == 0
    assert _run(path, "-o", tmp_path / "b", "-j", "2", "--chunk-size", "37") == 0
    for name in sorted(p.name for p in (tmp_path / "a").glob("*.nii.gz")):
        a = np.asanyarray(nib.load(str(tmp_path / "a" / name)).dataobj)
        b = np.asanyarray(nib.load(str(tmp_path / "b" / name)).dataobj)
        assert np.array_equal(a, b, equal_nan=True), name


def test_separate_3d_files_with_scalar_sidecars(tmp_path):
    data, te, t2, obj = decay_phantom(sigma=0)
    files = [write_nifti(tmp_path / f"sub-01_echo-{i + 1}_MEGRE.nii.gz", data[..., i], sidecar={"EchoTime": float(t)})
             for i, t in enumerate(te)]
    assert main(["t2star", *map(str, files), "-o", str(tmp_path / "o"), "--noise-floor", "none", "--mask", "none",
                 "-q"]) == 0
    t2map = nib.load(str(tmp_path / "o/sub-01_acq-megre_T2starmap.nii.gz")).get_fdata()
    np.testing.assert_allclose(t2map[obj], t2[obj], rtol=1e-6)


def test_command_line_overrides_sidecar_with_warning(megre, tmp_path, capsys):
    path, te, *_ = megre
    other = ",".join(f"{1000 * t * 1.1:g}ms" for t in te)
    assert _run(path, "-o", tmp_path / "o", "--te", other, "--noise-floor", "none") == 0
    err = capsys.readouterr().err
    assert "differs from the sidecar" in err and "using the --te given" in err
    prov = json.loads((tmp_path / "o/sub-01_acq-megre_provenance.json").read_text())
    np.testing.assert_allclose(prov["acquisition"]["EchoTime"], te * 1.1, rtol=1e-9)


def test_nan_voxel_gets_status_and_neighbours_unchanged(tmp_path):
    data, te, _t2, _obj = decay_phantom(seed=7)
    a = write_nifti(tmp_path / "a.nii.gz", data, sidecar={"EchoTime": te.tolist()})
    bad = data.copy()
    bad[16, 16, 1, 4] = np.nan
    b = write_nifti(tmp_path / "b.nii.gz", bad, sidecar={"EchoTime": te.tolist()})
    assert main(["t2star", str(a), "-o", str(tmp_path / "oa"), "--sigma", "5", "-q"]) == 0
    assert main(["t2star", str(b), "-o", str(tmp_path / "ob"), "--sigma", "5", "-q"]) == 0
    sa = np.asanyarray(nib.load(str(tmp_path / "oa/a_desc-status_fitmap.nii.gz")).dataobj)
    sb = np.asanyarray(nib.load(str(tmp_path / "ob/b_desc-status_fitmap.nii.gz")).dataobj)
    ta = nib.load(str(tmp_path / "oa/a_T2starmap.nii.gz")).get_fdata()
    tb = nib.load(str(tmp_path / "ob/b_T2starmap.nii.gz")).get_fdata()
    assert sb[16, 16, 1] == 2 and np.isnan(tb[16, 16, 1])
    others = np.ones(sa.shape, bool)
    others[16, 16, 1] = False
    assert np.array_equal(ta[others], tb[others], equal_nan=True)
    assert np.array_equal(sa[others], sb[others])


# ---- bad input: exit 2, one line, no traceback, nothing left behind --------------------------------------
def _bad(capsys, tmp_path, args, expect):
    out = tmp_path / "out"
    code = main(["t2star", *map(str, args), "-o", str(out), "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert expect in err, err
    assert not out.exists()


def test_missing_file(tmp_path, capsys):
    _bad(capsys, tmp_path, [tmp_path / "nope.nii.gz", "--te", "5ms,10ms"], "no such file")


def test_corrupt_gzip(tmp_path, capsys, megre):
    path, *_ = megre
    broken = tmp_path / "broken.nii.gz"
    broken.write_bytes(path.read_bytes()[:2000])
    _bad(capsys, tmp_path, [broken, "--te", ",".join(["5ms"] * 8)], "broken.nii.gz")


def test_te_count_mismatch(megre, tmp_path, capsys):
    path, *_ = megre
    _bad(capsys, tmp_path, [path, "--te", "5ms,10ms,15ms"], "3 values given for a series of 8")


def test_bare_te_in_ms(megre, tmp_path, capsys):
    path, *_ = megre
    _bad(capsys, tmp_path, [path, "--te", "5,10,15,20,25,30,35,40"], "5ms,10ms")


def test_single_3d_volume(tmp_path, capsys):
    one = write_nifti(tmp_path / "one.nii.gz", np.ones((4, 4, 4)), sidecar={"EchoTime": 0.005})
    _bad(capsys, tmp_path, [one], "single 3D volume")


def test_existing_outputs_untouched_without_overwrite(megre, tmp_path, capsys):
    path, *_ = megre
    out = tmp_path / "out"
    assert _run(path, "-o", out, "--noise-floor", "none") == 0
    before = snapshot(out)
    code = _run(path, "-o", out, "--noise-floor", "none")
    err = capsys.readouterr().err
    assert code == 2 and "--overwrite" in err
    assert snapshot(out) == before  # byte-identical
    assert _run(path, "-o", out, "--noise-floor", "offset", "--overwrite") == 0
    assert (out / "sub-01_acq-megre_Offsetmap.nii.gz").exists()
