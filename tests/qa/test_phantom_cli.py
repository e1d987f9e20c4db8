"""``qmap phantom`` end to end through the command line (README: phantom QA, exit codes)."""

import csv
import json
import re
import shutil

import matplotlib.image
import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.qa.phantom_factory import (
    AFFINE,
    LAYOUT_XY,
    NAMES,
    RADIUS_MM,
    make_phantom,
    reference_csv,
    true_labels,
    write_nifti,
)

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _run(p, out, *extra, maps=("t1", "t2")):
    args = ["phantom", "--labels", p["labels"], "--reference", p["ref"], "-o", out, "--temperature", "21.5", "-q"]
    for m in maps:
        args += ["--map", p[m]]
    return main([str(a) for a in args + list(extra)])


def _rows(out):
    with open(out / "phantom_results.csv", newline="") as fh:
        return list(csv.DictReader(fh))


@pytest.fixture(scope="module")
def off_run(tmp_path_factory):
    """A phantom whose vial 3 reads T1 15 % high, analysed once for several checks."""
    base = tmp_path_factory.mktemp("off")
    p = make_phantom(base / "in", off={3: 1.15})
    out = base / "out"
    code = _run(p, out)
    return p, out, code


def test_vial_15_percent_off_is_the_only_failure(off_run):
    _, out, code = off_run
    assert code == 3
    rows = _rows(out)
    assert len(rows) == 16
    failing = [(r["label"], r["parameter"]) for r in rows if r["pass"] == "false"]
    assert failing == [("3", "T1")]
    bad = next(r for r in rows if r["label"] == "3" and r["parameter"] == "T1")
    assert float(bad["error_pct"]) == pytest.approx(15.0, abs=1.0)  # 2 % voxel noise, 150 voxels
    assert {r["pass"] for r in rows} == {"true", "false"}


def test_csv_columns_units_and_interpolated_references(off_run):
    _, out, _ = off_run
    with open(out / "phantom_results.csv", newline="") as fh:
        header = next(csv.reader(fh))
    assert header == ["label", "name", "parameter", "unit", "reference", "mean", "median", "sd", "n_voxels",
                      "error_pct", "pass"]
    res = json.loads((out / "phantom_results.json").read_text())
    ref = {(r["label"], r["parameter"]): r for r in res["rows"]}
    # hand-computed linear interpolation to 21.5 C between the 18 C and 24 C rows (weight 3.5/6):
    # vial 1 T1 1800 + 120 * 3.5/6 = 1870 ms; vial 5 T1 450 + 20 * 3.5/6 = 461.6667 ms;
    # vial 8 T2 30 + 2 * 3.5/6 = 31.1667 ms = 0.0311667 s (the table gives T2 in s)
    assert ref[(1, "T1")]["reference"] == pytest.approx(1870.0, rel=1e-9)
    assert ref[(5, "T1")]["reference"] == pytest.approx(461.666667, rel=1e-8)
    assert ref[(8, "T2")]["reference"] == pytest.approx(0.0311666667, rel=1e-8)
    assert ref[(1, "T1")]["unit"] == "ms" and ref[(1, "T2")]["unit"] == "s"
    # the T1 map is in seconds, the T2 map in ms (sidecars): both converted to the table's units
    assert ref[(1, "T1")]["median"] == pytest.approx(1870.0, rel=0.01)
    assert ref[(8, "T2")]["median"] == pytest.approx(0.0311667, rel=0.01)
    assert res["verdict"] == "fail" and res["n_failed"] == 1 and res["error_basis"] == "median"
    # the error is the median's: recompute it from the JSON
    r = ref[(3, "T1")]
    assert r["error_pct"] == pytest.approx(100 * (r["median"] - r["reference"]) / r["reference"], rel=1e-12)
    # the 1-voxel erosion of 13 x 13-voxel discs (radius 5 voxels) over 3 slices left 156 voxels, > min_voxels
    assert {row["n_voxels"] for row in res["rows"]} == {156}


def test_report_is_self_contained_with_valid_pngs(off_run):
    _, out, _ = off_run
    html = (out / "phantom_report.html").read_text()
    assert "NOT PASSED" in html and "clinical use" in html and "physicist" in html
    assert "http://" not in html and "https://" not in html  # nothing fetched from the internet
    srcs = re.findall(r"<img src='([^']+)'", html)
    assert len(srcs) >= 4  # measured vs reference, error per vial, one ROI figure per map
    for src in srcs:
        path = out / src
        assert path.parent == out and path.exists()
        assert path.read_bytes()[:8] == PNG_SIGNATURE
        img = matplotlib.image.imread(path)
        assert img.ndim == 3 and img.shape[0] > 100 and img.shape[1] > 100


def test_all_within_tolerance_exits_0(tmp_path):
    p = make_phantom(tmp_path / "in")
    write_nifti(p["labels"], true_labels().astype(np.float32))  # float storage of integer labels is fine
    assert _run(p, tmp_path / "out") == 0
    assert {r["pass"] for r in _rows(tmp_path / "out")} == {"true"}
    assert json.loads((tmp_path / "out/phantom_results.json").read_text())["verdict"] == "pass"


def test_outputs_are_not_replaced_without_overwrite(off_run, tmp_path, capsys):
    p, out, _ = off_run
    before = {f.name: f.read_bytes() for f in out.iterdir()}
    assert _run(p, out) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert {f.name: f.read_bytes() for f in out.iterdir()} == before
    again = tmp_path / "again"
    shutil.copytree(out, again)
    (again / "phantom_results.csv").write_text("stale\n")
    assert _run(p, again, "--overwrite") == 3
    assert (again / "phantom_results.csv").read_bytes() == before["phantom_results.csv"]
    assert not [f for f in again.iterdir() if f.name.startswith(".")]  # no temporary files left


def test_labels_on_another_grid_are_resampled(tmp_path):
    p = make_phantom(tmp_path / "in")
    # the same labels on a grid of 1 x 1 x 4 mm voxels covering the same field of view
    fine_aff = AFFINE.copy()
    fine_aff[0, 0] = fine_aff[1, 1] = 1.0
    fine_aff[:2, 3] -= 0.5
    fine = np.repeat(np.repeat(true_labels(), 2, axis=0), 2, axis=1)
    p["labels"] = write_nifti(tmp_path / "in/fine_dseg.nii.gz", fine.astype(np.int16), affine=fine_aff)
    assert _run(p, tmp_path / "out") == 0
    res = json.loads((tmp_path / "out/phantom_results.json").read_text())
    assert all(m["labels_resampled"] for m in res["settings"]["maps"])
    assert {r["n_voxels"] for r in res["rows"]} == {156}  # nearest neighbour gives back the coarse labels


def test_param_option_and_per_vial_tolerance(tmp_path):
    p = make_phantom(tmp_path / "in", off={2: 1.07})
    plain = tmp_path / "in/relax_a.nii.gz"
    plain.write_bytes(p["t1"].read_bytes())
    (tmp_path / "in/relax_a.json").write_text('{"Units": "s"}')
    p["plain"] = plain
    reference_csv(p["ref"], extra_cols=",T1_tolerance_pct", rows_extra=lambda lab, t: ",5" if lab == 2 else ",")
    code = main([str(a) for a in ["phantom", "--labels", p["labels"], "--map", plain, "--param", "T1",
                                  "--reference", p["ref"], "-o", tmp_path / "out", "--temperature", "20", "-q"]])
    assert code == 3
    rows = _rows(tmp_path / "out")
    assert [r["label"] for r in rows if r["pass"] == "false"] == ["2"]  # 7 % > its own 5 %; others at 10 %


def test_layout_cli_writes_the_labels_it_used(tmp_path, capsys):
    truth = true_labels(angle_deg=10.0, shift_mm=(10.0, -6.0))  # 10 deg and 5 / 3 voxels
    p = make_phantom(tmp_path / "in", labels=truth)
    lay = tmp_path / "in/layout.csv"
    lay.write_text("label,name,x_mm,y_mm,radius_mm\n" + "".join(
        f"{k + 1},{NAMES[k]},{x:g},{y:g},{RADIUS_MM:g}\n" for k, (x, y) in enumerate(LAYOUT_XY)))
    out = tmp_path / "out"
    code = main([str(a) for a in ["phantom", "--layout", lay, "--map", p["t1"], "--map", p["t2"], "--reference",
                                  p["ref"], "-o", out, "--temperature", "21.5"]])
    assert code == 0
    assert "residual rms" in capsys.readouterr().out
    drawn = np.asanyarray(nib.load(str(out / "phantom_labels.nii.gz")).dataobj)
    for k in range(1, 9):
        a, b = drawn == k, truth == k
        assert 2 * (a & b).sum() / (a.sum() + b.sum()) > 0.9
    reg = json.loads((out / "phantom_results.json").read_text())["registration"]
    assert reg["matched_vials"] == 8 and reg["rms_residual_mm"] < 1.0
    assert reg["rotation_deg"] == pytest.approx(10.0, abs=1.0)


def test_unmatchable_layout_exits_2_and_writes_nothing(tmp_path, capsys):
    p = make_phantom(tmp_path / "in")
    lay = tmp_path / "in/layout.csv"
    lay.write_text("label,x_mm,y_mm,radius_mm\n" + "".join(
        f"{k + 1},{3 * x:g},{y:g},8\n" for k, (x, y) in enumerate(LAYOUT_XY)))  # stretched: no rigid fit
    out = tmp_path / "out"
    code = main([str(a) for a in ["phantom", "--layout", lay, "--map", p["t1"], "--reference", p["ref"], "-o", out,
                                  "--temperature", "21.5"]])
    assert code == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "cannot be matched" in err
    assert not out.exists()


def test_history_flags_a_drifting_vial(tmp_path):
    hist = tmp_path / "qa_history.csv"
    codes = []
    for i in range(4):  # the fewest sessions the drift rule looks at (MIN_SESSIONS)
        p = make_phantom(tmp_path / f"in{i}", off={4: 1 + 0.025 * i}, seed=i)
        codes.append(_run(p, tmp_path / f"out{i}", "--history", hist, "--date", f"2026-03-{2 + 7 * i:02d}",
                          "--scanner", "MR-2", "--protocol", "qa", maps=("t1",)))
    assert codes == [0] * 4  # 7.5 % at the last session: still within 10 %
    res = json.loads((tmp_path / "out3/phantom_results.json").read_text())
    flagged = [(t["label"], t["parameter"]) for t in res["trends"] if t["flagged"]]
    assert flagged == [(4, "T1")]
    html = (tmp_path / "out3/phantom_report.html").read_text()
    assert "phantom_history_T1.png" in html and "Drift" in html
    assert (tmp_path / "out3/phantom_history_T1.png").read_bytes()[:8] == PNG_SIGNATURE
    with open(hist, newline="") as fh:
        assert len(list(csv.DictReader(fh))) == 4 * 8


@pytest.mark.parametrize("case", ["float_labels", "no_label_column", "no_unit", "temperature_outside",
                                  "temperature_missing", "label_not_in_image", "unknown_parameter"])
def test_bad_input_exits_2_with_one_line_and_no_files(tmp_path, capsys, case):
    p = make_phantom(tmp_path / "in")
    extra = ["--temperature", "21.5"]
    text = p["ref"].read_text()
    if case == "float_labels":
        write_nifti(p["labels"], true_labels() * 0.5 + 0.25)
    elif case == "no_label_column":
        p["ref"].write_text(text.replace("label,", "vial,", 1))
    elif case == "no_unit":
        p["ref"].write_text(text.replace("T1_ms", "T1", 1))
    elif case == "temperature_outside":
        extra = ["--temperature", "30"]
    elif case == "temperature_missing":
        extra = []
    elif case == "label_not_in_image":
        p["ref"].write_text(text + "9,I,18,50,0.02\n9,I,24,52,0.021\n")
    elif case == "unknown_parameter":
        odd = tmp_path / "in/relax.nii.gz"
        odd.write_bytes(p["t1"].read_bytes())
        p["t1"] = odd
    out = tmp_path / "out"
    args = ["phantom", "--labels", p["labels"], "--map", p["t1"], "--reference", p["ref"], "-o", out] + extra
    code = main([str(a) for a in args])
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and err.startswith("qmap: error: "), err
    assert "Traceback" not in err
    assert not out.exists()


def test_roi_too_small_is_a_warned_failure(tmp_path, capsys):
    lab = true_labels()
    lab[lab == 8] = 0
    lab[40, 10, 1] = 8  # a single voxel: nothing survives the erosion
    p = make_phantom(tmp_path / "in", labels=lab)
    assert _run(p, tmp_path / "out") == 3
    err = capsys.readouterr().err
    assert "vial 8 T1: 0 usable voxels in the ROI, fewer than the minimum 10" in err
    rows = _rows(tmp_path / "out")
    assert [(r["label"], r["pass"], r["n_voxels"], r["median"]) for r in rows if r["pass"] == "false"] == [
        ("8", "false", "0", ""), ("8", "false", "0", "")]
    html = (tmp_path / "out/phantom_report.html").read_text()
    assert "too few voxels" in html


def test_map_in_ms_without_sidecar_units_is_flagged(tmp_path, capsys):
    p = make_phantom(tmp_path / "in", t1_units="ms")
    (tmp_path / "in/sess_T1map.json").unlink()  # no Units: seconds assumed, values are 1000x too large
    assert _run(p, tmp_path / "out", maps=("t1",)) == 3
    assert "probably wrong" in capsys.readouterr().err


def test_roi_table_shows_the_mean_standard_error_beside_the_sd(tmp_path):
    # a standard-error map beside the T1 map (as a fitting command writes it): the ROI table gains a
    # "mean SE" column, the mean of the SE map over the ROI in the table's unit
    p = make_phantom(tmp_path / "in")
    t1 = nib.load(str(p["t1"]))
    se = np.where(np.isfinite(np.asarray(t1.dataobj)), 0.02, np.nan)  # seconds, like the map
    nib.save(nib.Nifti1Image(se.astype(np.float32), t1.affine), str(tmp_path / "in" / "sess_desc-stderr_T1map.nii.gz"))
    out = tmp_path / "out"
    _run(p, out)
    rows = json.loads((out / "phantom_results.json").read_text())["rows"]
    t1_rows = [r for r in rows if r["parameter"] == "T1"]
    assert t1_rows and all(r["mean_se"] == pytest.approx(20.0 if r["unit"] == "ms" else 0.02, rel=1e-5)
                           for r in t1_rows)
    assert all(r["mean_se"] is None for r in rows if r["parameter"] == "T2")  # no SE map beside the T2 map
    assert "mean SE</th>" in (out / "phantom_report.html").read_text()
