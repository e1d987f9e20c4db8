"""phantom: two maps of one parameter in one report (--tag), tolerance wording, unit hints, provenance of maps."""

from __future__ import annotations

import csv
import json
import shutil

import pytest

from qmap.cli import main
from qmap.qa.quantities import example_column
from tests.qa.phantom_factory import make_phantom


def _rows(out):
    with open(out / "phantom_results.csv", newline="") as fh:
        return list(csv.DictReader(fh))


def test_two_t1_maps_with_tags_in_one_report(tmp_path, capsys):
    p = make_phantom(tmp_path / "in", off={3: 1.3})
    vfa = tmp_path / "in" / "vfa_T1map.nii.gz"  # a second T1 map (a copy, with vial 3 as wrong)
    shutil.copy(p["t1"], vfa)
    shutil.copy(str(p["t1"]).replace(".nii.gz", ".json"), str(vfa).replace(".nii.gz", ".json"))
    base = ["phantom", "--labels", str(p["labels"]), "--reference", str(p["ref"]), "--temperature", "21.5"]
    # without tags the second T1 map is refused, with a hint
    assert main(base + ["--map", str(p["t1"]), "--map", str(vfa), "-o", str(tmp_path / "x")]) == 2
    assert "--tag" in capsys.readouterr().err
    code = main(base + ["--map", str(p["t1"]), "--tag", "ir", "--map", str(vfa), "--tag", "vfa",
                        "--tolerance", "12", "-o", str(tmp_path / "out")])
    out = capsys.readouterr().out
    assert code == 3
    rows = _rows(tmp_path / "out")
    assert {(r["parameter"], r["source"]) for r in rows} == {("T1", "ir"), ("T1", "vfa")}
    assert {r["label"] for r in rows if r["pass"] == "false"} == {"3"}
    assert "vial 3 (C) T1 (ir)" in out and "vial 3 (C) T1 (vfa)" in out
    # a tolerance the user gave is not called the default
    assert "tolerance 12%" in out and "default tolerance" not in out
    html = (tmp_path / "out" / "phantom_report.html").read_text()
    assert "default tolerance" not in html and "T1 (vfa)" in html
    assert (tmp_path / "out" / "phantom_rois_T1-vfa.png").is_file()
    # maps without qmap provenance beside them say so
    assert "no qmap provenance beside it" in html


def test_default_tolerance_is_called_default(tmp_path, capsys):
    p = make_phantom(tmp_path / "in")
    assert main(["phantom", "--labels", str(p["labels"]), "--reference", str(p["ref"]), "--temperature", "21.5",
                 "--map", str(p["t1"]), "-o", str(tmp_path / "o")]) == 0
    assert "default tolerance 10%" in capsys.readouterr().out
    doc = json.loads((tmp_path / "o" / "phantom_results.json").read_text())
    assert doc["settings"]["tolerance_source"] == "default"


@pytest.mark.parametrize(("param", "column"), [("T1", "T1_ms"), ("T2star", "T2star_ms"), ("R1", "R1_per_s"),
                                                ("M0", "M0_au"), ("TB1", "TB1_fraction")])
def test_unit_hints_make_sense(param, column):
    assert example_column(param) == column


def test_missing_column_hint_for_a_rate_map(tmp_path, capsys):
    p = make_phantom(tmp_path / "in")
    r1 = tmp_path / "in" / "sess_R1map.nii.gz"
    shutil.copy(p["t1"], r1)
    assert main(["phantom", "--labels", str(p["labels"]), "--reference", str(p["ref"]), "--temperature", "21.5",
                 "--map", str(r1), "-o", str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "R1_per_s" in err and "R1_ms" not in err
