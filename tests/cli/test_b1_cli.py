"""`qmap b1` end to end: AFI and double-angle images -> TB1map (fraction), status 8, bad inputs.

Synthetic images (an invented scenario) are written from the published signal
equations, here and not from qmap: AFI finite-T1 steady state (Yarnykh, Magn
Reson Med 2007;57:192, (memory); checked against a Bloch simulation in
tests/models/test_signal_equations.py) and the double-angle method with full
recovery, S(a) = M0 sin a (Insko & Bolinger, J Magn Reson A 1993;103:82);
magnitude with complex Gaussian noise (Gudbjartsson & Patz 1995).
"""

from __future__ import annotations

import json
import math

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.conftest import refused, write_nifti

SHAPE = (40, 40, 4)
AFFINE = np.diag([3.0, 3.0, 4.0, 1.0])


def _scene(seed=0):
    idx = np.indices(SHAPE, dtype=float)
    x, y = (idx[0] - 19.5) / 19.5, (idx[1] - 19.5) / 19.5
    obj = np.hypot(x, y) < 0.6  # leaves > 1000 background voxels for the noise estimate
    b1 = 1.0 + 0.22 * x + 0.03 * (1 - y**2)
    return obj, b1, np.random.default_rng(seed)


def _noisy(s, sigma, rng):
    return np.abs(s + sigma * rng.standard_normal(s.shape) + 1j * sigma * rng.standard_normal(s.shape))


def _save(path, data, sidecar=None):
    return write_nifti(path, data, AFFINE, sidecar)


def _afi(fa_deg, tr1, tr2, t1, m0):
    a = np.radians(fa_deg)
    e1, e2, c = math.exp(-tr1 / t1), math.exp(-tr2 / t1), np.cos(a)
    den = 1 - e1 * e2 * c * c
    return (m0 * np.sin(a) * (1 - e2 + (1 - e1) * e2 * c) / den,
            m0 * np.sin(a) * (1 - e1 + (1 - e2) * e1 * c) / den)


def _read(out, prefix):
    tb1 = nib.load(str(out / f"{prefix}_TB1map.nii.gz")).get_fdata()
    se = nib.load(str(out / f"{prefix}_desc-stderr_TB1map.nii.gz")).get_fdata()
    status = np.asanyarray(nib.load(str(out / f"{prefix}_desc-status_fitmap.nii.gz")).dataobj)
    prov = json.loads((out / f"{prefix}_provenance.json").read_text())
    return tb1, se, status, prov


def test_afi_two_files_with_sidecars(tmp_path, capsys):
    obj, b1, rng = _scene(1)
    fa, tr1, tr2 = 60.0, 0.020, 0.100
    # T1 = 5 s: the TR << T1 limit used by qmap is then good to ~0.05 deg (first order in TR/T1)
    s1, s2 = _afi(fa * b1, tr1, tr2, 5.0, 20000.0)  # S1 ~ 400, SNR ~ 400
    sigma = 1.0
    files = [_save(tmp_path / f"sub-01_acq-tr{i + 1}_AFI.nii.gz", _noisy(np.where(obj, s, 0), sigma, rng),
                   {"FlipAngle": fa, "RepetitionTime": tr}) for i, (s, tr) in enumerate([(s1, tr1), (s2, tr2)])]
    out = tmp_path / "out"
    assert main(["b1", *map(str, files), "--method", "afi", "-o", str(out)]) == 0
    summary = capsys.readouterr().out
    tb1, se, status, prov = _read(out, "sub-01_acq-tb1afi")
    good = obj & (status == 0)
    assert good.sum() > 0.9 * obj.sum()
    err = tb1[good] / b1[good] - 1
    assert abs(np.median(err)) < 2e-3 and np.median(np.abs(err)) < 5e-3
    # noise from the background: sigma recovered, standard errors describe the scatter (within 25 %)
    assert prov["noise"]["sigma"] == pytest.approx(sigma, rel=0.05)
    assert np.std(tb1[good] - b1[good]) == pytest.approx(np.sqrt(np.mean(se[good] ** 2)), rel=0.25)
    assert prov["acquisition"] == {"RepetitionTime": [tr1, tr2], "FlipAngle": fa}
    assert prov["outputs"]["sub-01_acq-tb1afi_TB1map.nii.gz"] == {"parameter": "TB1", "kind": "estimate",
                                                                   "units": "fraction"}
    assert prov["model"]["name"] == "afi" and prov["model"]["tr_ratio"] == pytest.approx(5.0)
    assert set(prov["status_codes"]) >= {"0", "1", "2", "8"}
    assert sum(prov["status_counts"].values()) == obj.size
    assert "TB1 (fraction): median" in summary
    side = json.loads((out / "sub-01_acq-tb1afi_TB1map.json").read_text())
    assert side["Units"] == "fraction"


def test_afi_4d_with_options_and_invalid_ratio(tmp_path):
    obj, b1, rng = _scene(2)
    s1, s2 = _afi(60.0 * b1, 0.02, 0.10, 5.0, 20000.0)
    data = np.stack([np.where(obj, s1, 0), np.where(obj, s2, 0)], -1)
    data = _noisy(data, 1.0, rng)
    # a few voxels where S2 > S1: no flip angle gives r > 1 -> status 8
    data[19:21, 19:21, :, 1] = 1.2 * data[19:21, 19:21, :, 0]
    path = _save(tmp_path / "afi.nii.gz", data)
    out = tmp_path / "o"
    assert main(["b1", str(path), "--method", "afi", "--fa", "60", "--tr", "20ms,100ms", "-o", str(out), "-q"]) == 0
    tb1, _se, status, prov = _read(out, "afi")
    assert np.all(status[19:21, 19:21, :] == 8)
    assert np.all(np.isnan(tb1[status == 8]))
    assert prov["status_counts"]["8"] >= 16
    assert np.all(np.isfinite(tb1[status == 0]))


def test_dam_recovers_b1_from_single_fa(tmp_path):
    obj, b1, rng = _scene(3)
    fa = 50.0
    imgs = [np.where(obj, 1000.0 * np.sin(np.radians(k * fa * b1)), 0.0) for k in (1, 2)]
    files = [_save(tmp_path / f"dam{k}.nii.gz", _noisy(im, 2.0, rng)) for k, im in enumerate(imgs)]
    out = tmp_path / "o"
    assert main(["b1", *map(str, files), "--method", "dam", "--fa", str(fa), "--tr", "5s", "-o", str(out),
                 "-q"]) == 0
    tb1, _se, status, prov = _read(out, "dam0")
    good = obj & (status == 0)
    assert good.sum() > 0.9 * obj.sum()
    err = tb1[good] / b1[good] - 1
    assert abs(np.median(err)) < 2e-3 and np.median(np.abs(err)) < 5e-3
    assert prov["acquisition"]["FlipAngle"] == [fa, 2 * fa]
    assert prov["acquisition"]["RepetitionTime"] == 5.0
    # two images determine B1 exactly: R-squared and the RMS residual are not defined (NaN), not a "perfect fit"
    for q in ("rsquared", "rmse"):
        assert np.all(np.isnan(nib.load(str(out / f"dam0_desc-{q}_fitmap.nii.gz")).get_fdata()))
    assert "exactly determined" in prov["model"]["quality"]
    # the status map's sidecar lists the codes it uses
    side = json.loads((out / "dam0_desc-status_fitmap.json").read_text())
    used = {str(c) for c in np.unique(status)}
    assert set(side["StatusCodes"]) == used and side["StatusCodes"]["0"] == "fitted"


def _bad(args, tmp_path, capsys):
    return refused(["b1", *args], tmp_path / "bad", capsys)


def test_bad_inputs(tmp_path, capsys):
    obj, _b1, rng = _scene(4)
    a = _save(tmp_path / "a.nii.gz", _noisy(np.where(obj, 500.0, 0), 1.0, rng))
    b = _save(tmp_path / "b.nii.gz", _noisy(np.where(obj, 800.0, 0), 1.0, rng))
    assert "a and 2a" in _bad([a, b, "--method", "dam", "--fa", "30,50"], tmp_path, capsys)
    assert "one nominal flip angle" in _bad([a, b, "--method", "afi", "--fa", "60,120", "--tr", "20ms,100ms"],
                                            tmp_path, capsys)
    assert "RepetitionTime" in _bad([a, b, "--method", "afi", "--fa", "60"], tmp_path, capsys)
    assert "one angle a or two, a and 2a; got 3" in _bad([a, b, "--method", "dam", "--fa", "30,60,90"], tmp_path, capsys)
    three = [_save(tmp_path / f"t{k}.nii.gz", _noisy(np.where(obj, 300.0 * k, 0), 1.0, rng), {"FlipAngle": 30.0 * k})
             for k in (1, 2, 3)]
    assert "two images" in _bad([*three, "--method", "dam"], tmp_path, capsys)
    assert "--method" in _bad([a, b, "--fa", "30"], tmp_path, capsys)  # --method is required
    # b1 writes no time map and computes B1 in closed form: --units and --engine are not options of b1
    assert "--units" in _bad([a, b, "--method", "dam", "--fa", "30", "--units", "ms"], tmp_path, capsys)
    assert "--engine" in _bad([a, b, "--method", "dam", "--fa", "30", "--engine", "lmfit"], tmp_path, capsys)


def test_noise_map_with_holes_gives_nan_standard_errors_counted(tmp_path):
    # one convention per map (as the fitting commands): where the noise map has no positive value the TB1
    # standard error is NaN (first-order noise propagation needs sigma), counted in the provenance and said
    # in the stderr sidecar; every other voxel is that of a hole-free map; the map's path and SHA-256 are
    # recorded as a structured field
    obj, b1, rng = _scene(4)
    s1, s2 = _afi(60.0 * b1, 0.020, 0.100, 5.0, 20000.0)
    files = [str(_save(tmp_path / f"afi{i}.nii.gz", _noisy(np.where(obj, s, 0), 1.0, rng),
                       {"FlipAngle": 60.0, "RepetitionTime": tr})) for i, (s, tr) in enumerate([(s1, 0.02), (s2, 0.1)])]
    full = np.ones(SHAPE, np.float32)
    holed = full.copy()
    holes = np.zeros(SHAPE, bool)
    holes[20, 20, 1] = holes[21, 22, 2] = True  # inside the object
    holed[20, 20, 1], holed[21, 22, 2] = 0.0, -1.0
    holed[0, 0, 0] = 0.0  # a hole in the background (masked out) is not counted
    runs = {}
    for name, sig in (("full", full), ("holed", holed)):
        sp = _save(tmp_path / f"{name}.nii.gz", sig)
        assert main(["b1", *files, "--method", "afi", "--sigma", str(sp), "-o", str(tmp_path / name), "-q",
                     "--prefix", "x", "--max-memory", "20KB"]) == 0
        runs[name] = _read(tmp_path / name, "x")
    (tb1_a, se_a, st_a, prov_a), (tb1_b, se_b, st_b, prov_b) = runs["full"], runs["holed"]
    assert (st_b[holes] == 0).all() and np.isfinite(se_a[holes]).all() and np.isnan(se_b[holes]).all()
    np.testing.assert_array_equal(se_a[~holes], se_b[~holes])
    np.testing.assert_array_equal(tb1_a, tb1_b)
    np.testing.assert_array_equal(st_a, st_b)
    assert prov_b["noise"]["stderr"]["no_noise_level_voxels"] == 2
    assert prov_a["noise"]["stderr"]["no_noise_level_voxels"] == 0
    side = json.loads((tmp_path / "holed" / "x_desc-stderr_TB1map.json").read_text())
    assert "NaN in the 2 fitted voxels where the noise map has no positive value" in side["Description"]
    entry = prov_b["noise"]["noise_map"]
    assert entry["path"] == str((tmp_path / "holed.nii.gz").absolute()) and entry["role"] == "input"
    assert {"path": entry["path"], "sha256": entry["sha256"]} in prov_b["inputs"]
