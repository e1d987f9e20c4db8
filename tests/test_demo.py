"""qmap demo on the bundled sample data: every fit runs, the phantom passes, the maps match the ground truth."""

from __future__ import annotations

import csv
import importlib.util
import json
import sys
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from matplotlib import image as mpimg

from qmap.cli import main
from qmap.plots import PREVIEW_SIZE_PX
from qmap.workflows.demo import sample_data_dir

DATA = sample_data_dir()
MANIFEST = json.loads((DATA / "simulation.json").read_text())
SUB = "sub-phantom"


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "run"
    import contextlib
    import io

    buf, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(buf), contextlib.redirect_stderr(err):
        code = main(["demo", "-o", str(out), "-q"])
    sys.stderr.write(err.getvalue())
    DEMO_STDERR.append(err.getvalue())
    return out, code, buf.getvalue()


#: what the demo printed on stderr (filled by the fixture)
DEMO_STDERR: list = []


def test_demo_prints_no_warning(demo):
    # every step is clean on the sample data: in particular b1, whose coarse 24 x 24 x 2 images leave 240
    # background voxels per volume -- 480 samples give the noise level to 0.7213 / sqrt(480) = 3.3 %, inside
    # the 5 % that --sigma auto asks for, so its standard errors are not NaN (no fallback warning)
    assert DEMO_STDERR and "warning" not in DEMO_STDERR[-1], DEMO_STDERR[-1]


def _truth_median(param, label):
    truth = nib.load(str(DATA / SUB / "anat" / f"{SUB}_desc-truth_{param}map.nii.gz")).get_fdata()
    labels = np.asarray(nib.load(str(DATA / MANIFEST["labels"])).dataobj)
    return float(np.median(truth[labels == label]))


def _fitted_median(out, prefix, param, label):
    img = nib.load(str(out / "maps" / f"{prefix}_{param}map.nii.gz"))
    units = json.loads((out / "maps" / f"{prefix}_{param}map.json").read_text())["Units"]
    scale = 1e-3 if units == "ms" else 1.0
    labels = np.asarray(nib.load(str(DATA / MANIFEST["labels"])).dataobj)
    v = np.asarray(img.dataobj, float)[labels == label] * scale
    v = v[np.isfinite(v)]
    assert v.size >= 20, f"vial {label}: only {v.size} fitted voxels in {prefix}_{param}map"
    return float(np.median(v))


def test_demo_runs_and_the_phantom_passes(demo):
    out, code, text = demo
    assert code == 0, text
    assert "phantom QA (default tolerance 10 %): PASSED" in text
    assert (out / "phantom" / "phantom_report.html").is_file()
    with open(out / "phantom" / "phantom_results.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert rows and all(r["pass"] == "true" for r in rows)
    # T1 from inversion recovery and from VFA in one report, told apart by their tags
    assert {(r["parameter"], r["source"]) for r in rows} == {("T1", "ir"), ("T1", "vfa"), ("T1", "mp2rage"),
                                                             ("T2", ""), ("T2star", "")}
    html = (out / "phantom" / "phantom_report.html").read_text()
    assert "T1 (ir)" in html and "T1 (vfa)" in html
    assert "produced by `qmap t1-vfa" in html and "model vfa" in html  # from each map's provenance (the registry name)


def test_demo_maps_use_the_commands_default_unit(demo):
    out = demo[0]
    for prefix, param in (("ir", "T1"), ("mese", "T2"), ("megre", "T2star")):
        assert json.loads((out / "maps" / f"{prefix}_{param}map.json").read_text())["Units"] == "s"


def test_demo_commands_are_copyable_and_inputs_lie_beside_the_outputs(demo, tmp_path):
    import glob
    import shlex

    out = demo[0]
    lines = [ln for ln in (out / "commands.sh").read_text().splitlines() if ln.startswith("qmap ")]
    assert [ln.split()[1] for ln in lines] == ["t1-ir", "b1", "t1-vfa", "t1-mp2rage", "t2", "t2star", "phantom",
                                               "simulate", "t2-spectrum"]
    assert all(str(out / "data") in ln for ln in lines[:7])  # the copied inputs, not the installed package
    assert (out / "data" / MANIFEST["labels"]).is_file()
    # run the T2* line again as written (globs expanded as a shell would), into another folder
    words = shlex.split(lines[5])[1:]
    words = [w for t in words for w in (sorted(glob.glob(t)) if "*" in t else [t])]
    words[words.index("-o") + 1] = str(tmp_path / "again")
    assert main(words) == 0
    a = nib.load(str(out / "maps" / "megre_T2starmap.nii.gz")).get_fdata()
    b = nib.load(str(tmp_path / "again" / "megre_T2starmap.nii.gz")).get_fdata()
    np.testing.assert_array_equal(a, b)


def test_layout_places_every_vial_of_the_bundled_phantom(demo, tmp_path, capsys):
    # the shipped layout file, matched on the spin-echo M0 map (vials bright over the half-PD fill), puts each
    # vial's ROI inside that vial: every drawn voxel lies entirely inside the vial of its own label in the
    # simulation's label image (voxels wholly inside a vial), which the layout matching never sees
    out = demo[0]
    data = out / "data"
    capsys.readouterr()
    code = main(["phantom", "--layout", str(data / "phantom_layout.csv"), "--layout-image",
                 str(out / "maps" / "mese_M0map.nii.gz"), "--map", str(out / "maps" / "ir_T1map.nii.gz"),
                 "--map", str(out / "maps" / "mese_T2map.nii.gz"), "--reference", str(data / "phantom_reference.csv"),
                 "--temperature", "21.5", "-o", str(tmp_path / "qa")])
    printed = capsys.readouterr()
    assert code == 0, printed
    assert "warning" not in printed.err  # neither mirror-symmetric nor a vial missed
    truth = np.asarray(nib.load(str(data / MANIFEST["labels"])).dataobj)
    drawn = np.asarray(nib.load(str(tmp_path / "qa" / "phantom_labels.nii.gz")).dataobj)
    assert set(np.unique(drawn).tolist()) == set(range(10))
    for k in range(1, 10):
        inside = drawn == k
        # a 5 mm disc on 2 mm voxels holds about pi 2.5^2 = 19.6 voxels per slice, 4 slices
        assert 60 <= inside.sum() <= 100, (k, inside.sum())
        assert np.all(truth[inside] == k), (k, np.unique(truth[inside]))
    reg = json.loads((tmp_path / "qa" / "phantom_results.json").read_text())["registration"]
    assert reg["matched_vials"] == 9 and not reg["mirrored"] and reg["rms_residual_mm"] < 1.0


@pytest.mark.parametrize("prefix,param", [("ir", "T1"), ("vfa", "T1"), ("mese", "T2")])
def test_fitted_medians_match_the_ground_truth(demo, prefix, param):
    # the requirement of the sample data: median per vial within 2 % of the simulation's truth (T1 and T2)
    out = demo[0]
    for label in range(1, 10):
        truth = _truth_median(param, label)
        fitted = _fitted_median(out, prefix, param, label)
        assert abs(fitted - truth) / truth < 0.02, (prefix, param, label, fitted, truth)


def test_t2star_and_b1_are_close_to_the_truth(demo):
    out = demo[0]
    for label in range(1, 10):
        t = _truth_median("T2star", label)
        assert abs(_fitted_median(out, "megre", "T2star", label) - t) / t < 0.02
    # B1 on its own coarse grid against the true field there (double-angle method)
    b1 = nib.load(str(out / "maps" / "b1_TB1map.nii.gz")).get_fdata()
    ref = nib.load(str(DATA / MANIFEST["truth"]["TB1_lowres"])).get_fdata()
    ok = np.isfinite(b1)
    assert ok.sum() > 400
    assert np.median(np.abs(b1[ok] - ref[ok])) < 0.01
    # its standard error is finite wherever B1 is (the noise level comes from the coarse image's
    # 240 background voxels x 2 volumes: 0.7213 / sqrt(480) = 3.3 % precision)
    se = nib.load(str(out / "maps" / "b1_desc-stderr_TB1map.nii.gz")).get_fdata()
    assert np.all(np.isfinite(se[ok]) & (se[ok] > 0))


def test_printed_table_matches_the_report(demo):
    # one ROI definition: the printed table shows the phantom QA's numbers (eroded vial ROIs)
    out, _, text = demo
    assert "eroded by 1 voxel" in text
    row = next(ln for ln in text.splitlines() if ln.startswith("vial-E"))
    printed_ir_t1_ms = float(row.split()[1])
    with open(out / "phantom" / "phantom_results.csv") as fh:
        qa = next(r for r in csv.DictReader(fh) if r["label"] == "5" and r["source"] == "ir")
    assert qa["unit"] == "ms"
    assert printed_ir_t1_ms == pytest.approx(float(qa["median"]), rel=1e-3)


def test_previews_of_every_map(demo):
    maps = demo[0] / "maps"
    pngs = sorted(maps.glob("*map.png"))
    names = {p.name for p in pngs}
    assert {"ir_T1map.png", "vfa_T1map.png", "mese_T2map.png", "megre_T2starmap.png", "b1_TB1map.png"} <= names
    for p in pngs:
        img = mpimg.imread(str(p))
        assert (img.shape[1], img.shape[0]) == PREVIEW_SIZE_PX


def test_rerun_without_overwrite_is_refused(demo):
    out = demo[0]
    before = sorted(p.name for p in (out / "maps").iterdir())
    assert main(["demo", "-o", str(out), "-q"]) == 2
    assert sorted(p.name for p in (out / "maps").iterdir()) == before


def test_sample_data_are_small_documented_and_regenerable(tmp_path):
    files = [p for p in DATA.rglob("*") if p.is_file()]
    assert sum(p.stat().st_size for p in files) < 5e6
    readme = (DATA / "README.md").read_text()
    assert "synthetic" in readme and "invented" in readme and "make_sample_data.py" in readme
    # the generator script reproduces the shipped images
    script = Path(__file__).resolve().parents[1] / "scripts" / "make_sample_data.py"
    spec = importlib.util.spec_from_file_location("make_sample_data", script)
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(["--out", str(tmp_path / "regen")]) == 0
    for rel in (MANIFEST["series"]["ir"]["files"][0], MANIFEST["series"]["mese"]["files"][-1],
                MANIFEST["series"]["b1"]["files"][1], MANIFEST["labels"]):
        a = np.asarray(nib.load(str(DATA / rel)).dataobj)
        b = np.asarray(nib.load(str(tmp_path / "regen" / rel)).dataobj)
        np.testing.assert_allclose(b, a, rtol=1e-5, atol=1e-4)


def test_demo_fits_t2_spectra_of_the_simulated_multi_pool_disc(demo):
    out, _, text = demo
    assert "multi-component T2 (t2-spectrum)" in text
    mwf = nib.load(str(out / "maps" / "pools_MWFmap.nii.gz")).get_fdata()
    truth = nib.load(str(out / "pools-data" / "sub-pools" / "anat" / "sub-pools_desc-truth_MWFmap.nii.gz")).get_fdata()
    ok = np.isfinite(mwf) & np.isfinite(truth)
    assert ok.sum() > 250
    # SNR 300, two- and three-pool voxels: the regularised fraction is biased low by about 0.01-0.03
    assert np.median(np.abs(mwf[ok] - truth[ok])) < 0.04
    assert np.corrcoef(mwf[ok], truth[ok])[0, 1] > 0.8
