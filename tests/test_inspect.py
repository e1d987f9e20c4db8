"""qmap inspect: the printed numbers equal the written maps; plots; prefix and voxel handling."""

from __future__ import annotations

import json
import re
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from matplotlib import image as mpimg

from qmap.cli import main
from qmap.plots import VOXEL_PLOT_SIZE_PX
from qmap.simulate import simulate

_LINE = re.compile(r"^  (\w+) = (\S+) \+/- (\S+)(?: (\S+))?$")


@pytest.fixture(scope="module")
def fits(tmp_path_factory):
    """Simulated vial phantom, fitted by four commands into one folder (prefixes ir, vfa, mese, megre)."""
    root = tmp_path_factory.mktemp("inspect")
    man = simulate(root / "sim", shape=(48, 48, 2), snr=80, seed=11)
    files = {k: [str(root / "sim" / f) for f in v["files"]] for k, v in man["series"].items()}
    out = root / "out"
    assert main(["b1", *files["b1"], "--method", "dam", "-o", str(out), "--prefix", "b1", "-q"]) == 0
    assert main(["t1-ir", *files["ir"], "-o", str(out), "--prefix", "ir", "-q"]) == 0
    assert main(["t1-vfa", *files["vfa"], "--b1", str(out / "b1_TB1map.nii.gz"), "-o", str(out), "--prefix", "vfa",
                 "--units", "ms", "-q"]) == 0
    assert main(["t2", *files["mese"], "--epg", "-o", str(out), "--prefix", "mese", "-q"]) == 0
    assert main(["t2star", *files["megre"], "-o", str(out), "--prefix", "megre", "--units", "ms", "-q"]) == 0
    return out


def _parse(text):
    vals = {}
    for line in text.splitlines():
        m = _LINE.match(line)
        if m:
            vals[m.group(1)] = (float(m.group(2)), float(m.group(3)))
    return vals


def _at(path, ijk):
    return np.asarray(nib.load(str(path)).dataobj)[ijk]


@pytest.mark.parametrize("prefix", ["ir", "vfa", "mese", "megre", "b1"])
def test_printed_values_equal_the_maps(fits, prefix, capsys):
    ijk = (16, 12, 1) if prefix == "b1" else (33, 24, 1)  # inside vial C (B1: its coarser grid)
    assert main(["inspect", str(fits), "--prefix", prefix, "--voxel", ",".join(map(str, ijk))]) == 0
    out = capsys.readouterr().out
    vals = _parse(out)
    assert vals, out
    assert "status 0 (fitted)" in out
    assert "note: refitting" not in out  # the refit of the voxel reproduces the maps
    for param, (v, se) in vals.items():
        # the printed value is the map's, rounded to two significant digits of its standard error (common
        # practice for reporting a measurement with its uncertainty)
        mv, mse = _at(fits / f"{prefix}_{param}map.nii.gz", ijk), _at(fits / f"{prefix}_desc-stderr_{param}map.nii.gz", ijk)
        if np.isfinite(mse) and mse > 0:
            step = 10.0 ** (np.floor(np.log10(mse)) - 1)
            assert abs(v - mv) <= 0.5 * step * (1 + 1e-6) and abs(se - mse) <= 0.5 * step * (1 + 1e-6), (v, mv)
            assert step <= se < 100 * step  # two significant digits
        else:
            assert np.float32(v) == mv
    png = fits / f"{prefix}_voxel-{ijk[0]}-{ijk[1]}-{ijk[2]}.png"
    img = mpimg.imread(str(png))
    assert (img.shape[1], img.shape[0]) == VOXEL_PLOT_SIZE_PX


def test_units_follow_the_maps(fits, capsys):
    assert main(["inspect", str(fits), "--prefix", "vfa", "--voxel", "33,24,1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert any(re.match(r"^  T1 = \S+ \+/- \S+ ms$", ln) for ln in lines)  # written with --units ms
    assert main(["inspect", str(fits), "--prefix", "ir", "--voxel", "33,24,1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert any(re.match(r"^  T1 = \S+ \+/- \S+ s$", ln) for ln in lines)


def test_background_voxel_shows_samples_only(fits, capsys, tmp_path):
    target = tmp_path / "sub" / "bg.png"
    assert main(["inspect", str(fits), "--prefix", "megre", "--voxel", "0,0,0", "-o", str(target)]) == 0
    out = capsys.readouterr().out
    assert "status 1" in out and "not fitted" in out and "T2star = nan" in out
    assert mpimg.imread(str(target)).shape[:2] == VOXEL_PLOT_SIZE_PX[::-1]


def test_prefix_and_voxel_errors(fits, capsys, tmp_path):
    assert main(["inspect", str(fits), "--voxel", "1,1,1"]) == 2  # several fits, no --prefix
    err = capsys.readouterr().err
    assert "--prefix" in err and "ir" in err and "megre" in err and err.count("\n") == 1
    assert main(["inspect", str(fits), "--prefix", "nope", "--voxel", "1,1,1"]) == 2
    assert main(["inspect", str(fits), "--prefix", "ir", "--voxel", "48,0,0"]) == 2  # outside the 48x48x2 grid
    assert "outside" in capsys.readouterr().err
    assert main(["inspect", str(fits), "--prefix", "ir", "--voxel", "1,2"]) == 2
    assert main(["inspect", str(tmp_path), "--voxel", "1,1,1"]) == 2  # no fit at all
    assert not list(tmp_path.glob("*.png"))


def test_single_fit_needs_no_prefix(fits, tmp_path, capsys):
    import shutil

    one = tmp_path / "one"
    one.mkdir()
    for p in fits.glob("megre_*"):
        if not p.name.endswith(".png"):
            shutil.copy(p, one / p.name)
    assert main(["inspect", str(one), "--voxel", "33,24,1"]) == 0
    assert (one / "megre_voxel-33-24-1.png").exists()


def test_inspect_rebuilds_complex_ir_from_magnitude_and_phase(tmp_path, capsys):
    # the refit that draws the curve uses the phase-corrected real data the workflow fitted
    # (qmap.workflows.ir.phase_correct); without it the magnitude refit would land elsewhere
    import json

    import nibabel as nib

    from qmap.cli import main

    rng = np.random.default_rng(3)
    ti = np.array([0.05, 0.15, 0.3, 0.6, 1.0, 1.6, 2.5, 4.0])
    x, y, _ = np.indices((20, 20, 2))
    obj = (x - 10) ** 2 + (y - 10) ** 2 < 40
    s = np.where(obj, 1000.0, 0.0)[..., None] * (1 - 1.95 * np.exp(-ti / 0.7))
    z = s * np.exp(1j * (0.7 + 0.02 * x[..., None])) + rng.normal(0, 5, s.shape) + 1j * rng.normal(0, 5, s.shape)
    nib.save(nib.Nifti1Image(np.abs(z).astype(np.float32), np.eye(4)), str(tmp_path / "mag.nii.gz"))
    (tmp_path / "mag.json").write_text(json.dumps({"InversionTime": ti.tolist()}))
    nib.save(nib.Nifti1Image(np.angle(z).astype(np.float32), np.eye(4)), str(tmp_path / "ph.nii.gz"))
    out = tmp_path / "out"
    assert main(["t1-ir", str(tmp_path / "mag.nii.gz"), "--signal", "complex", "--phase", str(tmp_path / "ph.nii.gz"),
                 "-o", str(out), "-q"]) == 0
    capsys.readouterr()
    assert main(["inspect", str(out), "--voxel", "10,10,1", "-o", str(tmp_path / "v.png")]) == 0
    captured = capsys.readouterr()
    assert "warning" not in captured.err, captured.err
    # the refit reproduces the written maps (otherwise inspect adds a "refitting this voxel gave" note)
    assert "refitting this voxel" not in captured.out, captured.out
    t1_map = nib.load(str(out / "mag_T1map.nii.gz")).get_fdata()[10, 10, 1]
    assert abs(t1_map - 0.7) < 0.05


def test_states_the_standard_error_convention(fits, capsys):
    # the line names the convention the provenance records for the stderr maps
    from qmap.workflows.inspect import CONVENTIONS_SHOWN

    for prefix in ("ir", "megre"):
        assert main(["inspect", str(fits), "--prefix", prefix, "--voxel", "33,24,1"]) == 0
        prov = json.loads((fits / f"{prefix}_provenance.json").read_text())
        conv = prov["outputs"][f"{prefix}_desc-stderr_T1map.nii.gz" if prefix == "ir"
                               else f"{prefix}_desc-stderr_T2starmap.nii.gz"]["convention"]
        assert conv == ("noise" if prov["noise"]["sigma"] else "residual")
        assert f"  (+/- is 1 standard error, {CONVENTIONS_SHOWN[conv]})" in capsys.readouterr().out.splitlines()
    # qmap b1 found its noise level in the background of its coarse images (a 5 % precision needs a few
    # hundred background samples, not a fixed thousand voxels), so t1-vfa found its standard-error map
    # beside the TB1map and propagated it
    prov = json.loads((fits / "vfa_provenance.json").read_text())
    b1_prov = json.loads((fits / "b1_provenance.json").read_text())
    assert b1_prov["noise"]["source"] == "background" and b1_prov["noise"]["relative_precision"] <= 0.05
    assert prov["options"]["b1_stderr"]["propagated"] is True
    assert prov["options"]["b1_stderr"]["path"].endswith("b1_desc-stderr_TB1map.nii.gz")


def test_world_coordinates_pick_the_nearest_voxel(fits, capsys, tmp_path):
    img = nib.load(str(fits / "ir_T1map.nii.gz"))
    xyz = img.affine @ np.array([33.2, 23.9, 1.1, 1.0])  # near the centre of voxel (33, 24, 1)
    png = tmp_path / "w.png"
    assert main(["inspect", str(fits), "--prefix", "ir", "--world", ",".join(f"{v:.3f}" for v in xyz[:3]),
                 "-o", str(png)]) == 0
    assert "voxel (33, 24, 1)" in capsys.readouterr().out and png.is_file()
    assert main(["inspect", str(fits), "--prefix", "ir", "--world", "1e4,0,0"]) == 2
    assert "outside the maps" in capsys.readouterr().err


def test_ir_plot_is_signed_on_a_log_axis(fits, tmp_path, monkeypatch):
    # magnitude IR: the plotted data carry the polarity the fit restored (negative before the null)
    from qmap import plots

    seen = {}
    monkeypatch.setattr(plots, "plot_voxel_fit", lambda path, **kw: (seen.update(kw), Path(path).write_bytes(b"")))
    assert main(["inspect", str(fits), "--prefix", "ir", "--voxel", "33,24,1", "-o", str(tmp_path / "p.png")]) == 0
    assert seen["x_log"] is True
    assert seen["y"][0] < 0 < seen["y"][-1] and seen["curve"][0] < 0 < seen["curve"][-1]


def test_inspect_refits_a_sigma_local_run_with_its_noise_map(tmp_path, capsys):
    # the provenance names the run's noise map as a structured field (noise.noise_map: path, role); inspect
    # reads the voxel's sigma from it, so the Rician refit (its expectation depends on sigma) reproduces the
    # maps; provenance written before the field existed ("noise map PATH" in sigma_source) still works
    rng = np.random.default_rng(21)
    te = np.array([0.004, 0.008, 0.014, 0.022, 0.032, 0.045])
    x, y, _ = np.indices((18, 16, 2))
    obj = (x - 9) ** 2 + (y - 8) ** 2 < 36
    noise = np.where(x < 9, 6.0, 18.0)  # the noise sd varies over the image: one number would not do
    s = np.where(obj, 600.0, 0.0)[..., None] * np.exp(-te / 0.02)
    mag = np.abs(s + noise[..., None] * (rng.standard_normal(s.shape) + 1j * rng.standard_normal(s.shape)))
    nib.save(nib.Nifti1Image(mag.astype(np.float32), np.diag([2.0, 2.0, 3.0, 1.0])), str(tmp_path / "megre.nii.gz"))
    (tmp_path / "megre.json").write_text(json.dumps({"EchoTime": te.tolist()}))
    out = tmp_path / "out"
    assert main(["t2star", str(tmp_path / "megre.nii.gz"), "--sigma", "local", "-o", str(out), "--prefix", "m",
                 "-q"]) == 0
    prov_path = out / "m_provenance.json"
    prov = json.loads(prov_path.read_text())
    sigma_map = out / "m_desc-noise_sigmamap.nii.gz"
    assert prov["noise"]["noise_map"] == {"path": str(sigma_map.absolute()), "role": "output"}
    ijk = (12, 8, 1)  # on the noisier side, where the map is far from its median
    local = float(_at(sigma_map, ijk))
    assert abs(local / prov["noise"]["sigma"] - 1) > 0.2
    capsys.readouterr()
    text_source = prov["noise"]["sigma_source"]
    for old in (False, True):
        if old:  # the previous format: the path only inside the sigma_source text
            del prov["noise"]["noise_map"]
            prov["noise"]["sigma_source"] = text_source
        else:  # the structured field alone finds the map
            prov["noise"]["sigma_source"] = "local"
        prov_path.write_text(json.dumps(prov))
        assert main(["inspect", str(out), "--voxel", "12,8,1", "-o", str(tmp_path / f"v{old}.png")]) == 0
        text = capsys.readouterr().out
        assert "refitting this voxel" not in text, text
    # the median sigma instead of the voxel's (what inspect used when it could not find the map) does not
    # reproduce the voxel's fit: the check above can fail
    prov["noise"]["sigma_source"] = "local"
    prov_path.write_text(json.dumps(prov))
    assert main(["inspect", str(out), "--voxel", "12,8,1", "-o", str(tmp_path / "median.png")]) == 0
    assert "refitting this voxel" in capsys.readouterr().out
