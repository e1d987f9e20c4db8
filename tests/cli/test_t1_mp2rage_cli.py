"""`qmap t1-mp2rage` end to end on data simulated pulse by pulse (not with qmap's closed form).

Invented scenario: an MP2RAGE protocol close to the 3 T one of Marques et al., NeuroImage
2010;49:1271 (TR_prep 5 s, TI 0.7/2.5 s, 4/5 deg, 176 shots spaced 7 ms; values from
memory), inversion efficiency 0.96. T1 runs 0.45-3.2 s along x, the transmit field B1
0.64-1.22 linearly along y. The inversion images come from tests/reference/mp2rage_pulses.py
(hard pulses as rotations, exact relaxation, cycles to the steady state) with M0 = 1000, a
common receive phase and complex Gaussian noise at SNR 150 (median |INV2| in the object /
sigma; Gudbjartsson & Patz 1995 for the magnitude). UNI = Re(S1* S2)/(|S1|^2 + |S2|^2)
(Marques et al. 2010) as a float image, and as the 12-bit integer export round((UNI + 0.5) x
4095) (common practice). The B1 map is the same linear field sampled on a 2x coarser,
shifted grid.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.conftest import write_nifti
from tests.reference.mp2rage_pulses import simulate

TI, FA, TR_PREP, TR_EXC, SHOTS, EFF = (0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176, 0.96
SHAPE = (32, 28, 3)
AFFINE = np.array([[1.5, 0, 0, -18.0], [0, 1.5, 0, -15.0], [0, 0, 2.0, -2.0], [0, 0, 0, 1]])
B1_AFFINE = np.array([[3.0, 0, 0, -20.0], [0, 3.0, 0, -17.5], [0, 0, 4.0, -4.0], [0, 0, 0, 1]])
B1_SHAPE = (20, 18, 3)
X0, Y0, NT, NB = 8, 8, 16, 12  # the object: NT T1 columns x NB B1 rows


def _b1_of_world_y(y):
    # linear in world y: 0.64 at the first object row, 1.22 at the last
    y_first, y_last = AFFINE[1, 3] + 1.5 * Y0, AFFINE[1, 3] + 1.5 * (Y0 + NB - 1)
    return 0.64 + (1.22 - 0.64) * (y - y_first) / (y_last - y_first)


def _save(path, data, affine=AFFINE, sidecar=None):
    return write_nifti(path, data, affine, sidecar)


@pytest.fixture(scope="module")
def mp2(tmp_path_factory):
    d = tmp_path_factory.mktemp("mp2rage")
    t1_cols = np.geomspace(0.45, 3.2, NT)
    yw = AFFINE[1, 3] + 1.5 * (Y0 + np.arange(NB))
    b1_rows = _b1_of_world_y(yw)
    t, b = np.meshgrid(t1_cols, b1_rows, indexing="ij")
    s1, s2 = simulate(t.ravel(), b.ravel(), ti=TI, fa=FA, tr_prep=TR_PREP, tr_exc=TR_EXC, shots=SHOTS,
                      efficiency=EFF)
    truth = np.full(SHAPE, np.nan)
    obj = np.zeros(SHAPE, bool)
    sig1, sig2 = np.zeros(SHAPE), np.zeros(SHAPE)
    sl = (slice(X0, X0 + NT), slice(Y0, Y0 + NB))
    for z in range(SHAPE[2]):
        truth[sl + (z,)] = t
        obj[sl + (z,)] = True
        sig1[sl + (z,)] = 1000.0 * s1.reshape(NT, NB)
        sig2[sl + (z,)] = 1000.0 * s2.reshape(NT, NB)
    sigma = np.median(np.abs(sig2[obj])) / 150.0
    rng = np.random.default_rng(16)
    phase = np.exp(1j * rng.uniform(-np.pi, np.pi, SHAPE))
    z1 = sig1 * phase + rng.normal(0, sigma, SHAPE) + 1j * rng.normal(0, sigma, SHAPE)
    z2 = sig2 * phase + rng.normal(0, sigma, SHAPE) + 1j * rng.normal(0, sigma, SHAPE)
    uni = np.real(np.conj(z1) * z2) / (np.abs(z1) ** 2 + np.abs(z2) ** 2)
    shared = {"RepetitionTimePreparation": TR_PREP, "RepetitionTimeExcitation": TR_EXC, "NumberShots": SHOTS}
    full = dict(shared, InversionTime=list(TI), FlipAngle=list(FA))
    p = {
        "uni_int": _save(d / "sub-01_UNIT1.nii.gz", np.round((uni + 0.5) * 4095).astype(np.uint16), sidecar=full),
        "uni_float": _save(d / "uni_float.nii.gz", uni),
        "inv1": _save(d / "sub-01_inv-1_MP2RAGE.nii.gz", np.abs(z1),
                      sidecar=dict(shared, InversionTime=TI[0], FlipAngle=FA[0])),
        "inv2": _save(d / "sub-01_inv-2_MP2RAGE.nii.gz", np.abs(z2),
                      sidecar=dict(shared, InversionTime=TI[1], FlipAngle=FA[1])),
        "inv1c": _save(d / "inv1_complex.nii.gz", z1.astype(np.complex64)),
        "inv2c": _save(d / "inv2_complex.nii.gz", z2.astype(np.complex64)),
    }
    yb = B1_AFFINE[1, 3] + 3.0 * np.arange(B1_SHAPE[1])
    b1map = np.broadcast_to(_b1_of_world_y(yb)[None, :, None], B1_SHAPE)
    p["b1"] = _save(d / "b1.nii.gz", b1map, affine=B1_AFFINE, sidecar={"Units": "fraction"})
    return {"paths": p, "truth": truth, "obj": obj, "sigma": sigma, "dir": d}


CLI_PROTOCOL = ["--ti", "700ms,2500ms", "--fa", "4,5", "--tr-prep", "5s", "--tr-exc", "7ms", "--shots", "176"]


def _t1(out, prefix):
    return np.asarray(nib.load(str(out / f"{prefix}_T1map.nii.gz")).dataobj)


def _median_error(mp2, t1):
    obj = mp2["obj"]
    return float(np.median(np.abs(t1[obj] / mp2["truth"][obj] - 1)))


def test_integer_uni_with_sidecar_and_b1(mp2, tmp_path):
    p = mp2["paths"]
    out = tmp_path / "int"
    assert main(["t1-mp2rage", str(p["uni_int"]), "--b1", str(p["b1"]), "-o", str(out), "-q"]) == 0
    t1 = _t1(out, "sub-01_acq-mp2rage")
    assert _median_error(mp2, t1) < 0.015  # the goal (with B1)
    status = np.asarray(nib.load(str(out / "sub-01_acq-mp2rage_desc-status_fitmap.nii.gz")).dataobj)
    assert np.all(status[mp2["obj"]] == 0)
    prov = json.loads((out / "sub-01_acq-mp2rage_provenance.json").read_text())
    assert prov["acquisition"] == {"InversionTime": [0.7, 2.5], "FlipAngle": [4.0, 5.0],
                                   "RepetitionTimePreparation": 5.0, "RepetitionTimeExcitation": 0.007,
                                   "NumberShots": 176}
    assert prov["options"]["uni_encoding"].startswith("12-bit")
    assert "9" in prov["status_codes"]
    assert sorted(prov["outputs"]) == ["sub-01_acq-mp2rage_R1map.nii.gz", "sub-01_acq-mp2rage_T1map.nii.gz",
                                       "sub-01_acq-mp2rage_desc-status_fitmap.nii.gz"]
    r1 = np.asarray(nib.load(str(out / "sub-01_acq-mp2rage_R1map.nii.gz")).dataobj)
    np.testing.assert_allclose(r1[mp2["obj"]], 1 / t1[mp2["obj"]], rtol=1e-6)


def test_float_uni_on_the_command_line_with_and_without_b1(mp2, tmp_path, capsys):
    p = mp2["paths"]
    with_b1, without = tmp_path / "b1", tmp_path / "nob1"
    assert main(["t1-mp2rage", str(p["uni_float"]), *CLI_PROTOCOL, "--b1", str(p["b1"]), "-o", str(with_b1),
                 "--units", "ms"]) == 0
    assert "B1 correction applied" in capsys.readouterr().out
    err_b1 = _median_error(mp2, _t1(with_b1, "uni_float") / 1e3)
    assert err_b1 < 0.015
    assert main(["t1-mp2rage", str(p["uni_float"]), *CLI_PROTOCOL, "-o", str(without)]) == 0
    assert "no B1 correction" in capsys.readouterr().out
    err_nob1 = _median_error(mp2, _t1(without, "uni_float"))
    assert err_nob1 > 3 * err_b1  # the goal: the B1 map matters


def test_inversion_images_give_m0_and_calibrated_stderr(mp2, tmp_path):
    p = mp2["paths"]
    out = tmp_path / "inv"
    assert main(["t1-mp2rage", str(p["uni_int"]), "--inv1", str(p["inv1"]), "--inv2", str(p["inv2"]),
                 "--b1", str(p["b1"]), "-o", str(out), "--prefix", "mp", "-q"]) == 0
    prov = json.loads((out / "mp_provenance.json").read_text())
    assert prov["noise"]["sigma"] == pytest.approx(mp2["sigma"], rel=0.15)
    def load(name):
        return np.asarray(nib.load(str(out / name)).dataobj)

    obj = mp2["obj"] & (load("mp_desc-status_fitmap.nii.gz") == 0)  # the auto mask's opening drops the corners
    assert np.count_nonzero(obj) == np.count_nonzero(mp2["obj"]) - 12
    m0 = load("mp_M0map.nii.gz")
    assert np.median(m0[obj]) == pytest.approx(1000.0, rel=0.02)
    t1, se = load("mp_T1map.nii.gz")[obj], load("mp_desc-stderr_T1map.nii.gz")[obj]
    z = (t1 - mp2["truth"][obj]) / se
    # the standard errors describe the scatter (576 voxels; 12-bit rounding and the lookup add a little)
    assert 0.8 < np.std(z) < 1.25
    kinds = {(o["parameter"], o["kind"]) for o in prov["outputs"].values()}
    assert kinds == {(q, k) for q in ("T1", "R1", "M0") for k in ("estimate", "stderr")} | {
        ("rmse", "quality"), ("status", "status")}
    # complex inversion images give the same M0 (their magnitudes are used)
    out2 = tmp_path / "inv_complex"
    assert main(["t1-mp2rage", str(p["uni_int"]), "--inv1", str(p["inv1c"]), "--inv2", str(p["inv2c"]),
                 *CLI_PROTOCOL, "--b1", str(p["b1"]), "-o", str(out2), "--prefix", "mp", "-q",
                 "--sigma", str(mp2["sigma"])]) == 0
    m0c = np.asarray(nib.load(str(out2 / "mp_M0map.nii.gz")).dataobj)
    np.testing.assert_allclose(m0c[obj], m0[obj], rtol=1e-5)
    # a standard-error map beside the B1 map (as qmap b1 writes it) is propagated into the standard errors
    d = tmp_path / "b1dir"
    d.mkdir()
    b1img = nib.load(str(p["b1"]))
    nib.save(b1img, str(d / "s_TB1map.nii.gz"))
    nib.save(nib.Nifti1Image(np.full(B1_SHAPE, 0.03, np.float32), B1_AFFINE), str(d / "s_desc-stderr_TB1map.nii.gz"))
    out3 = tmp_path / "inv_b1se"
    assert main(["t1-mp2rage", str(p["uni_int"]), "--inv1", str(p["inv1"]), "--inv2", str(p["inv2"]),
                 "--b1", str(d / "s_TB1map.nii.gz"), "-o", str(out3), "--prefix", "mp", "-q"]) == 0
    se3 = np.asarray(nib.load(str(out3 / "mp_desc-stderr_T1map.nii.gz")).dataobj)[obj]
    assert np.all(se3 >= se * (1 - 1e-6)) and np.median(se3 / se) > 1.2
    prov3 = json.loads((out3 / "mp_provenance.json").read_text())
    assert prov3["options"]["b1_stderr"]["propagated"] and prov3["options"]["b1_stderr"]["path"].endswith(
        "s_desc-stderr_TB1map.nii.gz")
    assert prov3["outputs"]["mp_desc-stderr_T1map.nii.gz"]["convention"] == "noise"


def test_command_line_wins_with_a_warning(mp2, tmp_path, capsys):
    p = mp2["paths"]
    assert main(["t1-mp2rage", str(p["uni_int"]), "--fa", "4,6", "-o", str(tmp_path / "o"), "-q"]) == 0
    err = capsys.readouterr().err
    assert "--fa 4,6 deg differs from the sidecar FlipAngle 4,5 deg" in err
    prov = json.loads((tmp_path / "o" / "sub-01_acq-mp2rage_provenance.json").read_text())
    assert prov["acquisition"]["FlipAngle"] == [4.0, 6.0]


@pytest.mark.parametrize("extra, message", [
    (["--ti", "700ms,1.5s"], "delay TB = -"),  # the two blocks overlap
    (["--tr-prep", "3s"], "delay TC = -"),
    (["--fa", "4"], "two flip angles"),
])
def test_bad_protocol_exits_2(mp2, tmp_path, capsys, extra, message):
    out = tmp_path / "bad"
    opts = dict(zip(CLI_PROTOCOL[::2], CLI_PROTOCOL[1::2]))
    opts.update(zip(extra[::2], extra[1::2]))
    argv = ["t1-mp2rage", str(mp2["paths"]["uni_float"]), *[x for kv in opts.items() for x in kv], "-o", str(out)]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert not out.exists() or not any(out.iterdir())


def test_uni_out_of_range_exits_2(tmp_path, capsys):
    rng = np.random.default_rng(1)
    uni = _save(tmp_path / "uni.nii.gz", rng.uniform(-0.5, 3.0, (8, 8, 2)))
    assert main(["t1-mp2rage", str(uni), *CLI_PROTOCOL, "-o", str(tmp_path / "o")]) == 2
    assert "neither a float UNI in [-0.5, 0.5] nor the 12-bit" in capsys.readouterr().err
    uni = _save(tmp_path / "uni01.nii.gz", rng.uniform(0.0, 1.0, (8, 8, 2)))
    assert main(["t1-mp2rage", str(uni), *CLI_PROTOCOL, "-o", str(tmp_path / "o")]) == 2
    assert "subtract 0.5" in capsys.readouterr().err
    assert not (tmp_path / "o").exists() or not any((tmp_path / "o").iterdir())


def test_preview_and_help(mp2, tmp_path, capsys):
    out = tmp_path / "pv"
    assert main(["t1-mp2rage", str(mp2["paths"]["uni_int"]), "--preview", "-o", str(out), "-q"]) == 0
    assert (out / "sub-01_acq-mp2rage_T1map.png").exists()
    assert main(["t1-mp2rage", "--help"]) == 0
    assert "--inversion-efficiency" in capsys.readouterr().out


def test_mask_file_and_cropped_inversion_images(mp2, tmp_path, capsys):
    """A mask FILE limits the lookup; inversion images cropped to the object (no background to estimate the
    noise from) still give M0, without standard errors, and a warning says why."""
    p, obj = mp2["paths"], mp2["obj"]
    mask = _save(tmp_path / "mask.nii.gz", obj.astype(np.uint8))
    out = tmp_path / "m"
    assert main(["t1-mp2rage", str(p["uni_int"]), "--mask", str(mask), "-o", str(out), "-q"]) == 0
    status = np.asarray(nib.load(str(out / "sub-01_acq-mp2rage_desc-status_fitmap.nii.gz")).dataobj)
    assert np.all(status[obj] == 0) and np.all(status[~obj] == 1)
    prov = json.loads((out / "sub-01_acq-mp2rage_provenance.json").read_text())
    assert str(mask) in [i["path"] for i in prov["inputs"]]
    crop = (slice(X0, X0 + NT), slice(Y0, Y0 + NB), slice(None))
    aff = AFFINE.copy()
    aff[:3, 3] += AFFINE[:3, :3] @ np.array([X0, Y0, 0.0])
    files = {}
    for k in ("uni_float", "inv1", "inv2"):
        data = np.asarray(nib.load(str(p[k])).dataobj)[crop]
        files[k] = _save(tmp_path / f"crop_{k}.nii.gz", data, affine=aff)
    out2 = tmp_path / "c"
    assert main(["t1-mp2rage", str(files["uni_float"]), *CLI_PROTOCOL, "--inv1", str(files["inv1"]), "--inv2",
                 str(files["inv2"]), "-o", str(out2), "--prefix", "c", "-q", "--mask", "none"]) == 0
    assert "the standard errors are not" in capsys.readouterr().err
    assert (out2 / "c_M0map.nii.gz").exists() and not list(out2.glob("*desc-stderr*"))


def test_zero_filled_background_is_not_looked_up(mp2, tmp_path):
    """A float UNI exported with a zero-filled background: the stored zeros are background (status 1)."""
    uni = np.asarray(nib.load(str(mp2["paths"]["uni_float"])).dataobj).copy()
    uni[~mp2["obj"]] = 0.0
    path = _save(tmp_path / "uni0.nii.gz", uni)
    assert main(["t1-mp2rage", str(path), *CLI_PROTOCOL, "-o", str(tmp_path / "o"), "-q"]) == 0
    status = np.asarray(nib.load(str(tmp_path / "o" / "uni0_desc-status_fitmap.nii.gz")).dataobj)
    assert np.all(status[~mp2["obj"]] == 1) and np.all(status[mp2["obj"]] == 0)


def test_noise_map_with_holes_gives_nan_standard_errors_counted(mp2, tmp_path):
    # one convention per map: where the noise map of the inversion images has no positive value the standard
    # errors are NaN (not 0), counted in the provenance; the estimates and the other voxels' standard errors
    # are those of the hole-free map
    p = mp2["paths"]
    full = np.full(SHAPE, mp2["sigma"], np.float32)
    holed = full.copy()
    inside = np.argwhere(mp2["obj"])[[50, 200, 400]]
    holes = np.zeros(SHAPE, bool)
    holes[tuple(inside.T)] = True
    holed[holes] = [0.0, -2.0, np.nan]
    maps = {}
    for name, sig in (("full", full), ("holed", holed)):
        sp = _save(tmp_path / f"{name}.nii.gz", sig)
        assert main(["t1-mp2rage", str(p["uni_float"]), "--inv1", str(p["inv1"]), "--inv2", str(p["inv2"]),
                     *CLI_PROTOCOL, "--sigma", str(sp), "-o", str(tmp_path / name), "--prefix", "x", "-q"]) == 0
        maps[name] = {f.name: np.asarray(nib.load(str(f)).dataobj) for f in (tmp_path / name).glob("*.nii.gz")}
    a, b = maps["full"], maps["holed"]
    assert set(a) == set(b) and (b["x_desc-status_fitmap.nii.gz"][holes] == 0).all()
    for name in a:
        if "stderr" in name:
            assert np.isfinite(a[name][holes]).all() and np.isnan(b[name][holes]).all(), name
            np.testing.assert_array_equal(a[name][~holes], b[name][~holes], err_msg=name)
        else:
            np.testing.assert_array_equal(a[name], b[name], err_msg=name)
    prov = json.loads((tmp_path / "holed" / "x_provenance.json").read_text())
    assert prov["noise"]["stderr"] == {"convention": "noise", "no_noise_level_voxels": 3}
    assert prov["noise"]["noise_map"]["path"] == str((tmp_path / "holed.nii.gz").absolute())
    full_prov = json.loads((tmp_path / "full" / "x_provenance.json").read_text())
    assert full_prov["noise"]["stderr"]["no_noise_level_voxels"] == 0
