"""``qmap t1-ir`` end to end: files in, maps and provenance out, exit codes.

Synthetic series follow S = M0 (1 - (1 + k) exp(-TI/T1)) (Bernstein, King &
Zhou, Handbook of MRI Pulse Sequences, 2004), written as NIfTI with BIDS
sidecars (InversionTime in seconds; BIDS is an open standard).
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from qmap.models.ir import ir_signal

TI = np.array([0.05, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.5, 2.5, 5.0])
AFFINE = np.diag([1.5, 1.5, 3.0, 1.0])
SHAPE = (10, 8, 2)


def phantom(seed: int = 0, *, sigma: float = 10.0):
    """Two T1 compartments in a zero background; complex samples with a smooth receive phase."""
    rng = np.random.default_rng(seed)
    t1 = np.zeros(SHAPE)
    t1[2:8, 2:6] = 0.9
    t1[2:5, 2:6] = 1.8
    obj = t1 > 0
    s = np.where(obj[..., None], ir_signal(TI, np.where(obj, t1, 1.0)[..., None], m0=1000.0, efficiency=0.96), 0.0)
    phase = 0.3 + 0.2 * np.arange(SHAPE[0])[:, None, None, None] * np.ones(SHAPE + (1,))
    noise = sigma * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape))
    return t1, obj, (s + noise) * np.exp(1j * phase)


def save(path, data, sidecar=None):
    nib.save(nib.Nifti1Image(np.asarray(data), AFFINE), str(path))
    if sidecar is not None:
        path.with_name(path.name.replace(".nii.gz", ".json")).write_text(json.dumps(sidecar))
    return str(path)


def maps_in(out, prefix):
    names = sorted(p.name for p in out.glob(f"{prefix}_*.nii.gz"))
    return {n: np.asanyarray(nib.load(str(out / n)).dataobj) for n in names}


def one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith("qmap: error: ")
    return err[0]


def test_4d_list_sidecar_and_3d_scalar_sidecars_give_identical_maps(tmp_path, capsys):
    t1, obj, z = phantom()
    mag = np.abs(z).astype(np.float32)
    four = save(tmp_path / "sub-01_IRT1.nii.gz", mag, {"InversionTime": TI.tolist(), "RepetitionTime": 8.0})
    threes = [save(tmp_path / f"sub-01_inv-{i + 1}_IRT1.nii.gz", mag[..., i],
                   {"InversionTime": float(TI[i]), "RepetitionTime": 8.0}) for i in range(TI.size)]
    shuffled = [threes[i] for i in np.random.default_rng(1).permutation(TI.size)]  # sorted by InversionTime
    assert main(["t1-ir", four, "-o", str(tmp_path / "a"), "--prefix", "x", "-q"]) == 0
    assert main(["t1-ir", *shuffled, "-o", str(tmp_path / "b"), "--prefix", "x", "-q"]) == 0
    a, b = maps_in(tmp_path / "a", "x"), maps_in(tmp_path / "b", "x")
    assert set(a) == set(b) and "x_T1map.nii.gz" in a and "x_desc-stderr_InversionEfficiencymap.nii.gz" in a
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)
    # and the maps are right: median T1 per compartment within 1% (SNR 100), over the voxels the
    # automatic mask kept (most of the object)
    fitted = a["x_desc-status_fitmap.nii.gz"] == 0
    assert fitted[obj].mean() > 0.75
    for v in (0.9, 1.8):
        assert abs(np.median(a["x_T1map.nii.gz"][(t1 == v) & fitted]) / v - 1) < 0.01
    prov = json.loads((tmp_path / "a" / "x_provenance.json").read_text())
    assert prov["acquisition"]["InversionTime"] == pytest.approx(TI.tolist())
    assert prov["acquisition"]["RepetitionTime"] == 8.0
    # a tightly cropped image: no background, so the noise level comes from the residuals of a first fit of
    # the inversion-recovery model inside the object (true sigma 10), and the standard errors from it
    assert prov["noise"]["source"] == "residuals" and prov["noise"]["sigma"] == pytest.approx(10.0, rel=0.2)
    assert prov["noise"]["stderr"]["convention"] == "noise"
    assert prov["outputs"]["x_desc-stderr_T1map.nii.gz"]["convention"] == "noise"
    assert prov["model"]["look_locker"] is False and prov["model"]["signal"] == "magnitude"
    assert prov["outputs"]["x_InversionEfficiencymap.nii.gz"] == {
        "parameter": "InversionEfficiency", "kind": "estimate", "units": "fraction"}
    assert prov["outputs"]["x_R1map.nii.gz"]["units"] == "1/s"


def test_ti_count_mismatch_is_one_line_exit_2(tmp_path, capsys):
    _, _, z = phantom()
    path = save(tmp_path / "ir.nii.gz", np.abs(z).astype(np.float32))
    out = tmp_path / "out"
    assert main(["t1-ir", path, "--ti", "50ms,100ms,200ms", "-o", str(out)]) == 2
    line = one_error_line(capsys)
    assert "3 values" in line and "10 volumes" in line
    assert not out.exists() or not any(out.iterdir())


def test_bare_millisecond_tis_are_rejected_with_the_ms_hint(tmp_path, capsys):
    _, _, z = phantom()
    path = save(tmp_path / "ir.nii.gz", np.abs(z).astype(np.float32))
    ms = ",".join(f"{v * 1e3:g}" for v in TI)  # 50,100,...,5000: bare numbers are seconds
    assert main(["t1-ir", path, "--ti", ms, "-o", str(tmp_path / "out")]) == 2
    line = one_error_line(capsys)
    assert "50ms,100ms" in line


def test_complex_nifti_and_magnitude_plus_phase_agree(tmp_path, capsys):
    t1, obj, z = phantom(2)
    cplx = save(tmp_path / "c.nii.gz", z.astype(np.complex64), {"InversionTime": TI.tolist()})
    mag = save(tmp_path / "m.nii.gz", np.abs(z).astype(np.float32), {"InversionTime": TI.tolist()})
    pha = save(tmp_path / "p.nii.gz", np.angle(z).astype(np.float32))
    mask = save(tmp_path / "mask.nii.gz", obj.astype(np.uint8))
    common = ["--mask", mask, "--prefix", "x", "-q"]
    assert main(["t1-ir", cplx, "--signal", "complex", "-o", str(tmp_path / "c"), *common]) == 0
    assert main(["t1-ir", mag, "--signal", "complex", "--phase", pha, "-o", str(tmp_path / "m"), *common]) == 0
    a, b = maps_in(tmp_path / "c", "x"), maps_in(tmp_path / "m", "x")
    fitted = a["x_desc-status_fitmap.nii.gz"] == 0
    assert fitted[obj].all() and not fitted[~obj].any()
    # float32 storage of magnitude and phase: agreement to ~1e-6 relative, far below the noise (~1%)
    np.testing.assert_allclose(b["x_T1map.nii.gz"][fitted], a["x_T1map.nii.gz"][fitted], rtol=1e-4)
    for v in (0.9, 1.8):
        assert abs(np.median(a["x_T1map.nii.gz"][t1 == v]) / v - 1) < 0.01
    prov = json.loads((tmp_path / "m" / "x_provenance.json").read_text())
    paths = [i["path"] for i in prov["inputs"]]
    assert paths[:2] == [mag, pha] and all(len(i["sha256"]) == 64 for i in prov["inputs"])
    assert "longest TI" in prov["model"]["phase_correction"]


def test_real_data_need_signal_real(tmp_path, capsys):
    _, _, z = phantom(3)
    real = save(tmp_path / "r.nii.gz", (z * np.exp(-1j * np.angle(z[..., -1:]))).real.astype(np.float32),
                {"InversionTime": TI.tolist()})
    assert main(["t1-ir", real, "-o", str(tmp_path / "o1")]) == 2
    assert "--signal real" in one_error_line(capsys)
    assert main(["t1-ir", real, "--signal", "real", "-o", str(tmp_path / "o2"), "-q"]) == 0
    # signed data: the background is Gaussian, not Rayleigh, so --sigma auto does not estimate the noise
    # there (a Rayleigh estimator would give ~0.57 sigma); the standard errors use the residual variance
    prov = json.loads(next((tmp_path / "o2").glob("*_provenance.json")).read_text())
    assert "signed" in prov["noise"]["stderr_fallback"] and prov["noise"]["stderr"]["convention"] == "residual"
    assert main(["t1-ir", real, "--signal", "real", "--sigma", "10", "-o", str(tmp_path / "o3"), "-q"]) == 0
    prov = json.loads(next((tmp_path / "o3").glob("*_provenance.json")).read_text())
    assert prov["noise"]["sigma"] == 10.0 and prov["noise"]["stderr"]["convention"] == "noise"


def test_look_locker_is_recorded(tmp_path):
    _, _, z = phantom(4)
    path = save(tmp_path / "ll.nii.gz", np.abs(z).astype(np.float32), {"InversionTime": TI.tolist()})
    assert main(["t1-ir", path, "--look-locker", "-o", str(tmp_path / "o"), "--prefix", "x", "-q"]) == 0
    prov = json.loads((tmp_path / "o" / "x_provenance.json").read_text())
    assert prov["model"]["look_locker"] is True and prov["options"]["look_locker"] is True
    assert "Deichmann" in prov["model"]["look_locker_correction"]
    assert "x_ApparentT1map.nii.gz" in prov["outputs"]
    assert "x_InversionEfficiencymap.nii.gz" not in prov["outputs"]


@pytest.mark.parametrize(
    ("extra", "expect"),
    [(["--tr", "2s"], "RepetitionTime"),  # TI up to 5 s cannot follow a 2 s TR
     (["--phase", "p.nii.gz"], "--signal complex")],
)
def test_inconsistent_options_are_exit_2(tmp_path, capsys, extra, expect):
    _, _, z = phantom()
    path = save(tmp_path / "ir.nii.gz", np.abs(z).astype(np.float32), {"InversionTime": TI.tolist()})
    assert main(["t1-ir", path, *extra, "-o", str(tmp_path / "out")]) == 2
    assert expect in one_error_line(capsys)


def test_help_describes_the_model(capsys):
    assert main(["t1-ir", "--help"]) == 0
    out = capsys.readouterr().out
    for word in ("a + b exp(-TI/T1)", "InversionEfficiency", "--look-locker", "--phase", "50ms"):
        assert word in out


def test_short_tr_note_in_the_summary(tmp_path, capsys):
    # with TR < 5 T1 the recovery before each inversion is incomplete: the fitted a and b
    # absorb it (a = M0 (1 + k exp(-TR/T1)) for a readout that saturates Mz; Bernstein 2004
    # signal form), so M0 and the efficiency are apparent while T1 is not
    y = np.abs(ir_signal(TI, 1.6, m0=1000.0) * np.ones(SHAPE + (1,))).astype(np.float32)
    path = save(tmp_path / "ir.nii.gz", y, {"InversionTime": TI.tolist()})
    assert main(["t1-ir", path, "--tr", "5.5s", "--mask", "none", "-o", str(tmp_path / "o")]) == 0
    out = capsys.readouterr().out
    assert "T1: median 1.6 s" in out and "TR 5.5 s is < 5 x the median T1" in out


def test_noise_map_with_holes_one_standard_error_convention(tmp_path):
    # a noise map with holes inside the fitted voxels: there the standard errors are NaN (no noise sd known),
    # not the residual variance -- one convention per map, said in the provenance and the sidecars; the
    # estimates, the status map and the other voxels' standard errors are those of the hole-free map,
    # slab by slab too (--max-memory)
    _t1, obj, z = phantom(3)
    mag = save(tmp_path / "ir.nii.gz", np.abs(z).astype(np.float32), {"InversionTime": TI.tolist(),
                                                                       "RepetitionTime": 8.0})
    full = np.full(SHAPE, 10.0, np.float32)
    holed = full.copy()
    holes = np.zeros(SHAPE, bool)
    holes[3, 3, 0] = holes[6, 4, 1] = holes[4, 5, 1] = True
    holed[holes] = 0.0
    mask = save(tmp_path / "mask.nii.gz", obj.astype(np.uint8))
    base = ["t1-ir", mag, "--mask", mask, "--prefix", "x", "-q"]
    assert main([*base, "--sigma", save(tmp_path / "full.nii.gz", full), "-o", str(tmp_path / "a")]) == 0
    assert main([*base, "--sigma", save(tmp_path / "holed.nii.gz", holed), "-o", str(tmp_path / "b"),
                 "--max-memory", "4KB"]) == 0
    a, b = maps_in(tmp_path / "a", "x"), maps_in(tmp_path / "b", "x")
    assert set(a) == set(b)
    for name in a:
        if "stderr" in name:
            assert np.isnan(b[name][holes]).all(), name
            np.testing.assert_array_equal(a[name][~holes], b[name][~holes], err_msg=name)
        else:
            np.testing.assert_array_equal(a[name], b[name], err_msg=name)
    assert (a["x_desc-status_fitmap.nii.gz"][holes] == 0).all()
    prov = json.loads((tmp_path / "b" / "x_provenance.json").read_text())
    assert prov["noise"]["stderr"]["convention"] == "noise"
    assert prov["noise"]["stderr"]["no_noise_level_voxels"] == 3
    assert json.loads((tmp_path / "a" / "x_provenance.json").read_text())["noise"]["stderr"][
        "no_noise_level_voxels"] == 0
    side = json.loads((tmp_path / "b" / "x_desc-stderr_T1map.json").read_text())
    assert "NaN in the 3 fitted voxels where the noise map has no positive value" in side["Description"]
