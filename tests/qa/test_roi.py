"""``qmap roi``: ROI statistics of any maps, checked against numpy computed independently here."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest

from qmap.cli import main
from qmap.workflows.roi import CSV_COLUMNS, run_roi
from tests.conftest import snapshot, write_nifti

SHAPE = (12, 10, 3)
AFF = np.diag([1.0, 1.0, 2.0, 1.0])


@pytest.fixture
def scene(tmp_path):
    """Two labels (with a dseg.tsv), a T1 map in ms with qmap's status map beside it, and a T2 map in s."""
    rng = np.random.default_rng(7)
    lab = np.zeros(SHAPE, np.int16)
    lab[1:6, 1:8, :] = 1
    lab[7:11, 2:9, :2] = 2
    labels = write_nifti(tmp_path / "sub-01_dseg.nii.gz", lab, AFF)
    (tmp_path / "sub-01_dseg.tsv").write_text("index\tname\n1\twhite matter\n2\tgrey matter\n")
    fit = tmp_path / "fit"
    fit.mkdir()
    t1 = rng.normal(900.0, 40.0, SHAPE)
    status = np.zeros(SHAPE, np.uint8)
    status[2, 2:5, 0] = 3  # hit a bound: an estimate is written, but it is not a good fit
    status[4, 1:3, 1] = 1  # masked out: no estimate
    t1[status == 1] = np.nan
    t1[3, 3, 2] = np.nan  # a non-finite value of a voxel with status 0 (counted separately)
    t1m = write_nifti(fit / "sub-01_acq-vfa_T1map.nii.gz", t1, AFF, {"Units": "ms", "Description": "T1"})
    write_nifti(fit / "sub-01_acq-vfa_desc-status_fitmap.nii.gz", status, AFF, {"Units": "code", "Kind": "status"})
    t2 = rng.normal(0.08, 0.01, SHAPE)
    t2m = write_nifti(tmp_path / "sub-01_T2map.nii.gz", t2, AFF, {"Units": "s"})
    return {"labels": labels, "lab": lab, "t1": t1, "status": status, "t2": t2, "t1m": t1m, "t2m": t2m}


def _reference(values):
    """Independent numpy statistics of the values used."""
    v = np.asarray(values, float)
    return len(v), np.median(v), np.mean(v), np.std(v, ddof=1), np.percentile(v, 5), np.percentile(v, 95)


def test_medians_counts_names_units_and_unfitted_voxels(scene, tmp_path):
    rep = run_roi([scene["t1m"], scene["t2m"]], labels=scene["labels"], out_dir=tmp_path / "out")
    rows = {(r.label, r.parameter): r for r in rep.rows}
    assert set(rows) == {(1, "T1"), (2, "T1"), (1, "T2"), (2, "T2")}
    for k in (1, 2):
        roi = scene["lab"] == k
        # T1: only status-0 voxels with a finite value
        use = roi & (scene["status"] == 0) & np.isfinite(scene["t1"])
        n, med, mean, sd, p5, p95 = _reference(scene["t1"][use].astype(np.float32))
        r = rows[(k, "T1")]
        assert r.n_voxels == n
        assert r.median == pytest.approx(med, rel=1e-4)
        assert r.mean == pytest.approx(mean, rel=1e-4)
        assert r.sd == pytest.approx(sd, rel=1e-4)
        assert (r.p5, r.p95) == pytest.approx((p5, p95), rel=1e-4)
        assert r.n_excluded == int((roi & (scene["status"] != 0)).sum())
        assert r.unit == "ms"
        # T2: no status map beside it -> every finite voxel
        n2, med2, *_ = _reference(scene["t2"][roi].astype(np.float32))
        assert rows[(k, "T2")].n_voxels == n2 and rows[(k, "T2")].n_excluded == 0
        assert rows[(k, "T2")].median == pytest.approx(med2, rel=1e-4)
        assert rows[(k, "T2")].unit == "s"
    assert rows[(1, "T1")].n_excluded == 3 + 2 and rows[(1, "T1")].n_nonfinite == 1
    assert rows[(1, "T1")].excluded_by_status == {1: 2, 3: 3}
    assert rows[(1, "T1")].name == "white matter" and rows[(2, "T2")].name == "grey matter"
    # the CSV holds the same numbers, in the documented columns
    with open(tmp_path / "out" / "roi_stats.csv") as fh:
        table = list(csv.DictReader(fh))
    assert list(table[0]) == CSV_COLUMNS
    first = table[0]
    assert (first["label"], first["name"], first["parameter"], first["unit"]) == ("1", "white matter", "T1", "ms")
    assert float(first["median"]) == pytest.approx(rows[(1, "T1")].median, rel=1e-5)
    doc = json.loads((tmp_path / "out" / "roi_stats.json").read_text())
    assert doc["rows"][0]["excluded_by_status"] == {"1": 2, "3": 3}
    assert doc["settings"]["maps"][0]["status_map"].endswith("_desc-status_fitmap.nii.gz")


def test_labels_on_a_coarser_grid_are_resampled_nearest_neighbour(tmp_path):
    rng = np.random.default_rng(3)
    fine = np.diag([1.0, 1.0, 1.0, 1.0])
    coarse = np.array([[2.0, 0, 0, 0.5], [0, 2.0, 0, 0.5], [0, 0, 1.0, 0], [0, 0, 0, 1]])
    lab_c = np.zeros((5, 5, 2), np.int16)
    lab_c[1:3, 1:4, :] = 1
    lab_c[3, 0:2, 1] = 4
    labels = write_nifti(tmp_path / "labels.nii.gz", lab_c, coarse)
    data = rng.normal(5.0, 1.0, (10, 10, 2))
    m = write_nifti(tmp_path / "x_R2starmap.nii.gz", data, fine)
    rep = run_roi([m], labels=labels, out_dir=tmp_path / "o")
    # fine voxel i lies at x = i mm; coarse voxel I at 2 I + 0.5 mm: the nearest is I = i // 2
    ii, jj, kk = np.indices(data.shape)
    lab_f = lab_c[ii // 2, jj // 2, kk]
    for r in rep.rows:
        v = data[lab_f == r.label].astype(np.float32)
        assert r.n_voxels == v.size
        assert r.median == pytest.approx(np.median(v), rel=1e-4)
        assert r.unit == "1/s" and r.parameter == "R2star"
    assert rep.settings["maps"][0]["labels_resampled"] is True


def test_cli_prints_the_table_per_slice_rows_and_any_map_name(scene, tmp_path, capsys):
    eff = write_nifti(tmp_path / "sub-01_InversionEfficiencymap.nii.gz", np.full(SHAPE, 0.95), AFF)
    code = main(["roi", "--labels", str(scene["labels"]), "--map", str(scene["t1m"]), "--map", str(eff),
                 "--per-slice", "-o", str(tmp_path / "o")])
    out = capsys.readouterr().out
    assert code == 0
    assert "white matter" in out and "InversionEfficiency" in out and "median" in out
    doc = json.loads((tmp_path / "o" / "roi_stats.json").read_text())
    rows = doc["rows"]
    # per label x map: one whole-ROI row plus one per slice the label covers (3 for label 1, 2 for label 2)
    assert len(rows) == 2 * (1 + 3 + 1 + 2)
    whole = next(r for r in rows if r["slice"] is None and r["parameter"] == "T1" and r["label"] == 1)
    per = [r for r in rows if r["slice"] is not None and r["parameter"] == "T1" and r["label"] == 1]
    assert sum(r["n_voxels"] for r in per) == whole["n_voxels"]
    e = [r for r in rows if r["parameter"] == "InversionEfficiency" and r["slice"] is None]
    assert e[0]["median"] == pytest.approx(0.95, rel=1e-6) and e[0]["unit"] == ""


def test_existing_outputs_exit_2_and_stay(scene, tmp_path, capsys):
    args = ["roi", "--labels", str(scene["labels"]), "--map", str(scene["t2m"]), "-o", str(tmp_path / "o")]
    assert main(args + ["-q"]) == 0
    assert capsys.readouterr().out == ""
    before = snapshot(tmp_path / "o")
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "--overwrite" in err and err.count("\n") == 1
    assert snapshot(tmp_path / "o") == before


def test_phantom_uses_the_same_roi_values(scene, tmp_path):
    """phantom excludes the voxels qmap's status map marks as unfitted, as roi does (one implementation)."""
    from qmap.workflows.phantom import run_phantom

    ref = tmp_path / "ref.csv"
    ref.write_text("label,name,T1_ms\n1,wm,900\n2,gm,900\n")
    ph = run_phantom([scene["t1m"]], reference=ref, labels=scene["labels"], out_dir=tmp_path / "ph", erode=0,
                     tolerance=20)
    rr = run_roi([scene["t1m"]], labels=scene["labels"], out_dir=tmp_path / "roi")
    for a, b in zip(ph.rows, rr.rows):
        assert (a.label, a.n_voxels, a.n_excluded) == (b.label, b.n_voxels, b.n_excluded)
        assert a.median == pytest.approx(b.median, rel=1e-12)
