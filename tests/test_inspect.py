"""qmap inspect: the printed numbers equal the written maps; plots; prefix and voxel handling."""

from __future__ import annotations

import re

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


@pytest.mark.parametrize("prefix", ["ir", "vfa", "mese", "megre"])
def test_printed_values_equal_the_maps(fits, prefix, capsys):
    ijk = (33, 24, 1)  # inside vial C (right of the centre) for this geometry
    assert main(["inspect", str(fits), "--prefix", prefix, "--voxel", ",".join(map(str, ijk))]) == 0
    out = capsys.readouterr().out
    vals = _parse(out)
    assert vals, out
    assert "status 0 (fitted)" in out
    assert "note: refitting" not in out  # the refit of the voxel reproduces the maps
    for param, (v, se) in vals.items():
        # the printed text reads back to exactly the float32 stored in the map
        assert np.float32(v) == _at(fits / f"{prefix}_{param}map.nii.gz", ijk)
        assert np.float32(se) == _at(fits / f"{prefix}_desc-stderr_{param}map.nii.gz", ijk)
    png = fits / f"{prefix}_voxel-33-24-1.png"
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
