"""`qmap batch` over a small synthetic BIDS dataset (README, section batch; issue 8).

The dataset: 2 subjects x 2 sessions of invented 48x48x3 scans (a disc of
tissue in a noise-only background: the automatic noise estimate of the
default t2star fit needs >= 1000 background voxels), with multi-echo GRE, variable-flip-angle (with a TB1map in
percent), inversion-recovery and multi-echo spin-echo series, and one
deliberately truncated .nii.gz. The signals come from the textbook
equations, computed here independently of qmap:

- MEGRE: S = M0 exp(-TE/T2*)  (common practice)
- MESE with ideal 180 deg refocusing: S = M0 exp(-TE/T2)  (CPMG echo
  amplitudes with perfect refocusing; Hennig 1988 -- memory)
- VFA: spoiled GRE steady state S = M0 sin(a) (1-E1)/(1 - cos(a) E1),
  E1 = exp(-TR/T1), with the actual angle a = B1 x nominal
  (Fram et al. 1987 -- memory; common practice)
- IRT1: magnitude inversion recovery S = |M0 (1 - 2 exp(-TI/T1))| for a long
  TR (common practice)
"""

from __future__ import annotations

import gzip
import io
import json
import os
import time
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from qmap import __version__
from qmap.batch import run_batch
from qmap.batch.plan import discover, parse_bids_name
from qmap.batch.series import equivalent_argv
from qmap.cli import get_parser, main
from qmap.fitting.noise_floor import DEFAULT_MODE
from qmap.io.writer import sha256_file

SHAPE = (48, 48, 3)
AFFINE = np.diag([2.0, 2.0, 3.0, 1.0])
SIGMA = 4.0
TRUTH = {"T2star": 0.030, "T2": 0.060, "T1_vfa": 1.1, "T1_ir": 0.9}
B1_PERCENT = 85.0
TE_GRE = [0.004, 0.010, 0.018, 0.028, 0.040, 0.055]
TE_SE = [0.012 * k for k in range(1, 9)]
FA = [3.0, 8.0, 16.0, 25.0]
TR_VFA = 0.015
TI = [0.05, 0.15, 0.4, 0.9, 1.8, 3.6]

def _obj():
    x, y, _ = np.indices(SHAPE)
    return (x - 23.5) ** 2 + (y - 23.5) ** 2 < 8.0 ** 2


def _rician(sig, rng):
    # magnitude of signal plus complex Gaussian noise (Gudbjartsson & Patz 1995)
    return np.abs(sig + rng.normal(0, SIGMA, sig.shape) + 1j * rng.normal(0, SIGMA, sig.shape))


def _save(path: Path, data, sidecar: dict | None) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(nib.Nifti1Image(np.asarray(data, np.float32), AFFINE), str(path))
    if sidecar is not None:
        path.with_name(path.name.removesuffix(".gz").removesuffix(".nii") + ".json").write_text(json.dumps(sidecar))
    return path


def _series(folder: Path, stem: str, index: str, suffix: str, values, signal, key: str, extra: dict, rng):
    obj = _obj()
    for i, v in enumerate(values, 1):
        sig = np.where(obj, signal(v), 0.0)
        _save(folder / f"{stem}_{index}-{i}_{suffix}.nii.gz", _rician(sig, rng), {key: v, **extra})


def megre(folder, stem, rng):
    _series(folder, stem, "echo", "MEGRE", TE_GRE, lambda te: 1000 * np.exp(-te / TRUTH["T2star"]), "EchoTime", {},
            rng)


def mese(folder, stem, rng):
    _series(folder, stem, "echo", "MESE", TE_SE, lambda te: 1000 * np.exp(-te / TRUTH["T2"]), "EchoTime",
            {"RefocusingFlipAngle": 180.0}, rng)


def vfa(folder, stem, rng):
    e1 = np.exp(-TR_VFA / TRUTH["T1_vfa"])

    def spgr(fa):
        a = np.deg2rad(fa * B1_PERCENT / 100)
        return 8000 * np.sin(a) * (1 - e1) / (1 - np.cos(a) * e1)

    _series(folder, stem, "flip", "VFA", FA, spgr, "FlipAngle", {"RepetitionTime": TR_VFA}, rng)


def irt1(folder, stem, rng):
    _series(folder, stem, "inv", "IRT1", TI, lambda ti: 1000 * np.abs(1 - 2 * np.exp(-ti / TRUTH["T1_ir"])),
            "InversionTime", {"RepetitionTime": 10.0}, rng)


def tb1(folder, stem):
    _save(folder / f"{stem}_TB1map.nii.gz", np.full(SHAPE, B1_PERCENT), {"Units": "percent"})


BUILDERS = {"MEGRE": megre, "MESE": mese, "VFA": vfa, "IRT1": irt1}

#: (subject, session, suffix, acq label) of every series in the dataset
LAYOUT = [
    ("01", "1", "MEGRE", None), ("01", "1", "VFA", None), ("01", "1", "IRT1", None),
    ("01", "2", "MEGRE", "fast"), ("01", "2", "MESE", None),
    ("02", "1", "MEGRE", None), ("02", "1", "IRT1", None),
    ("02", "2", "MEGRE", None), ("02", "2", "VFA", "fast"),
]
CORRUPT = ("02", "2", "MEGRE")


def prefix(sub, ses, suffix, acq):
    return f"sub-{sub}_ses-{ses}_acq-{acq or ''}{suffix.lower()}"


def build_dataset(root: Path) -> tuple[Path, list]:
    """Write the dataset; returns (root, LAYOUT)."""
    rng = np.random.default_rng(20240611)
    (root / "dataset_description.json").parent.mkdir(parents=True, exist_ok=True)
    (root / "dataset_description.json").write_text(json.dumps({"Name": "invented relaxometry cohort",
                                                               "BIDSVersion": "1.9.0"}))
    layout = []
    for sub, ses, suffix, acq in LAYOUT:
        folder = root / f"sub-{sub}" / f"ses-{ses}" / "anat"
        stem = f"sub-{sub}_ses-{ses}" + (f"_acq-{acq}" if acq else "")
        BUILDERS[suffix](folder, stem, rng)
        if suffix == "VFA":
            tb1(root / f"sub-{sub}" / f"ses-{ses}" / "fmap", f"sub-{sub}_ses-{ses}")
        layout.append((sub, ses, suffix, acq))
    bad = root / "sub-02/ses-2/anat/sub-02_ses-2_echo-3_MEGRE.nii.gz"
    payload = bad.read_bytes()
    bad.write_bytes(payload[: len(payload) // 2])  # truncated gzip stream
    return root, layout


def out_dir(deriv, sub, ses):
    return deriv / f"sub-{sub}" / f"ses-{ses}" / "anat"


def state(folder: Path) -> dict:
    """Relative path -> (mtime_ns, bytes) of every file below ``folder``."""
    return {str(p.relative_to(folder)): (p.stat().st_mtime_ns, p.read_bytes())
            for p in sorted(folder.rglob("*")) if p.is_file()}


def maps_of(folder: Path) -> dict:
    return {str(p.relative_to(folder)): np.asanyarray(nib.load(str(p)).dataobj)
            for p in sorted(folder.rglob("*.nii.gz"))}


@pytest.fixture
def dataset(tmp_path):
    return build_dataset(tmp_path / "bids")


@pytest.fixture(scope="module")
def fitted(tmp_path_factory):
    """The dataset after one ``qmap batch -j 1`` run: (root, layout, deriv, exit code, stdout, stderr).

    Shared by the tests that only read it (a rerun of a complete batch rewrites nothing).
    """
    base = tmp_path_factory.mktemp("fitted")
    root, layout = build_dataset(base / "bids")
    deriv = base / "deriv"
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main(["batch", str(root), "-o", str(deriv), "-j", "1"])
    return root, layout, deriv, rc, out.getvalue(), err.getvalue()


def test_first_run_writes_the_derivatives_and_isolates_the_corrupt_series(fitted):
    root, layout, deriv, rc, out, err = fitted
    assert rc == 4
    good = [e for e in layout if e[:3] != CORRUPT]
    # progress on stderr (not a terminal here: one line per series done, failures marked)
    progress = [line for line in err.splitlines() if line.startswith("qmap batch: [")]
    assert len(progress) == len(layout) and progress[-1].startswith(f"qmap batch: [{len(layout)}/{len(layout)}]")
    assert sum("FAILED" in line for line in progress) == 1
    assert f"{len(good)} fitted, 0 skipped (up to date), 1 failed" in out
    failed = [line for line in out.splitlines() if "FAILED" in line]
    assert len(failed) == 1 and "sub-02 ses-2 MEGRE" in failed[0] and "truncated or corrupt" in failed[0]

    desc = json.loads((deriv / "dataset_description.json").read_text())
    assert desc["DatasetType"] == "derivative" and desc["BIDSVersion"] and desc["Name"]
    assert desc["GeneratedBy"][0]["Name"] == "qmap" and desc["GeneratedBy"][0]["Version"] == __version__

    params = {"MEGRE": ["T2star", "R2star", "M0"], "VFA": ["T1", "R1", "M0"], "IRT1": ["T1", "R1"],
              "MESE": ["T2", "R2"]}
    provs = sorted(p.relative_to(deriv).as_posix() for p in deriv.rglob("*_provenance.json"))
    assert provs == sorted(f"sub-{s}/ses-{t}/anat/{prefix(s, t, x, a)}_provenance.json" for s, t, x, a in good)
    obj = _obj()
    for sub, ses, suffix, acq in good:
        d, pre = out_dir(deriv, sub, ses), prefix(sub, ses, suffix, acq)
        for p in params[suffix]:
            assert (d / f"{pre}_{p}map.nii.gz").is_file() and (d / f"{pre}_desc-stderr_{p}map.nii.gz").is_file()
        status = np.asanyarray(nib.load(str(d / f"{pre}_desc-status_fitmap.nii.gz")).dataobj)
        fitted_vox = status == 0
        assert fitted_vox[obj].mean() > 0.8
        truth = {"MEGRE": ("T2star", TRUTH["T2star"]), "MESE": ("T2", TRUTH["T2"]),
                 "VFA": ("T1", TRUTH["T1_vfa"]), "IRT1": ("T1", TRUTH["T1_ir"])}[suffix]
        est = nib.load(str(d / f"{pre}_{truth[0]}map.nii.gz")).get_fdata()
        # median over the disc within 3 % of the simulated value; for VFA this holds only with the
        # TB1map applied (85 % B1 -> an uncorrected T1 would be ~ 1/0.85^2 = 1.38x too long)
        assert np.median(est[fitted_vox & obj]) == pytest.approx(truth[1], rel=0.03), (pre, truth)
        prov = json.loads((d / f"{pre}_provenance.json").read_text())
        if suffix == "VFA":
            tb1_path = str(root / f"sub-{sub}/ses-{ses}/fmap/sub-{sub}_ses-{ses}_TB1map.nii.gz")
            assert tb1_path in [i["path"] for i in prov["inputs"]]
            assert prov["command_line"][prov["command_line"].index("--b1-scale") + 1] == "percent"
    # the failed series wrote nothing, and no temporary file is left anywhere
    assert not list((deriv / "sub-02/ses-2/anat").glob(prefix("02", "2", "MEGRE", None) + "_*"))
    assert not [p for p in deriv.rglob(".qmap-*")]


def test_rerun_skips_everything_and_still_reports_the_failed_series(fitted, capsys):
    root, layout, deriv, *_ = fitted
    before = state(deriv)
    time.sleep(0.01)
    assert main(["batch", str(root), "-o", str(deriv), "-j", "1"]) == 4
    out = capsys.readouterr().out
    assert f"0 fitted, {len(layout) - 1} skipped (up to date), 1 failed" in out
    assert "FAILED sub-02 ses-2 MEGRE" in out  # retried (not skipped) and still reported
    assert state(deriv) == before  # nothing rewritten, not even dataset_description.json
    assert main(["batch", str(root), "-o", str(deriv), "-j", "1", "-q"]) == 4
    out, err = capsys.readouterr()
    assert out == "" and err.count("\n") == 1 and "series failed: sub-02 ses-2" in err  # -q: just the failure


def test_dry_run_prints_the_plan_and_creates_nothing(dataset, tmp_path, capsys):
    root, layout = dataset
    deriv = tmp_path / "deriv"
    raw = state(root)
    assert main(["batch", str(root), "-o", str(deriv), "--dry-run"]) == 0
    assert not deriv.exists()
    assert state(root) == raw
    lines = capsys.readouterr().out.splitlines()
    fits = {"MEGRE": "t2star", "VFA": "t1-vfa", "IRT1": "t1-ir", "MESE": "t2"}
    for sub, ses, suffix, acq in layout:
        pre = prefix(sub, ses, suffix, acq)
        row = [line for line in lines if line.rstrip().endswith(pre)]
        assert len(row) == 1, pre
        cells = row[0].split()
        assert cells[:2] == [sub, ses] and fits[suffix] in cells and "fit" in cells
    vfa_rows = [line for line in lines if "t1-vfa" in line]
    assert all("TB1map" in line and "percent" in line for line in vfa_rows)


def test_dry_run_after_a_run_says_what_a_rerun_would_do(fitted, capsys):
    root, layout, deriv, *_ = fitted
    before = state(deriv)
    assert main(["batch", str(root), "-o", str(deriv), "--dry-run"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert sum("skip (up to date)" in line for line in lines) == len(layout) - 1
    failed_row = [line for line in lines if line.rstrip().endswith(prefix(*CORRUPT, None))]
    assert len(failed_row) == 1 and " fit " in failed_row[0]  # the failed one would be retried
    assert state(deriv) == before


def test_retries_a_repaired_series_and_refits_one_whose_input_changed(dataset, tmp_path):
    root, layout = dataset
    deriv = tmp_path / "deriv"
    assert run_batch(root, deriv, n_jobs=1).exit_code == 4
    before = state(deriv)
    megre(root / "sub-02/ses-2/anat", "sub-02_ses-2", np.random.default_rng(1))  # repaired
    changed = root / "sub-01/ses-1/anat/sub-01_ses-1_echo-2_MEGRE.nii.gz"
    img = nib.load(str(changed))
    nib.save(nib.Nifti1Image(np.asarray(img.dataobj) * 1.01, img.affine), str(changed))
    report = run_batch(root, deriv, n_jobs=1)
    assert report.exit_code == 0
    redone = {prefix("01", "1", "MEGRE", None), prefix("02", "2", "MEGRE", None)}
    assert {p.prefix for p, _ in report.fitted} == redone and len(report.skipped) == len(layout) - 2
    (_, res), = [(p, r) for p, r in report.fitted if p.subject == "01"]
    assert "changed" in res.replaced and "refitted" in report.summary()
    after = state(deriv)
    touched = {k for k in after if after[k] != before.get(k)}
    assert touched == {k for k in after if k.split("/")[-1].startswith(tuple(redone))}
    prov = json.loads((deriv / f"sub-01/ses-1/anat/{prefix('01', '1', 'MEGRE', None)}_provenance.json").read_text())
    assert {i["path"]: i["sha256"] for i in prov["inputs"]}[str(changed)] == sha256_file(changed)


def test_overwrite_refits_with_identical_maps(dataset, tmp_path):
    root, _ = dataset
    deriv = tmp_path / "deriv"
    assert run_batch(root, deriv, n_jobs=1).exit_code == 4
    before = state(deriv)
    maps = maps_of(deriv)
    time.sleep(0.01)
    assert main(["batch", str(root), "-o", str(deriv), "-j", "1", "--overwrite", "-q"]) == 4
    after = state(deriv)
    assert set(after) == set(before)
    refit = [k for k in after if k.endswith(".nii.gz")]
    assert refit and all(after[k][0] != before[k][0] for k in refit)
    assert after["dataset_description.json"] == before["dataset_description.json"]  # same content: left alone
    for name, arr in maps_of(deriv).items():
        assert np.array_equal(arr, maps[name], equal_nan=True), name


def test_worker_processes_give_the_same_maps(fitted, tmp_path):
    root, layout, deriv, *_ = fitted
    two = run_batch(root, tmp_path / "two", n_jobs=2)
    assert len(two.fitted) == len(layout) - 1 and len(two.failed) == 1
    a, b = maps_of(deriv), maps_of(tmp_path / "two")
    assert set(a) == set(b) and a
    for name, arr in a.items():
        assert np.array_equal(arr, b[name], equal_nan=True), name


def test_equivalent_command_lines_parse_as_the_single_fit_commands(fitted):
    root, _, deriv, *_ = fitted
    plan = discover(root, deriv)
    parser = get_parser()
    for p in plan.series:
        argv = equivalent_argv(p)
        assert argv[0] == "qmap" and argv[1] == p.kind.command
        args = parser.parse_args(argv[1:])
        assert args.out_dir == p.out_dir and args.prefix == p.prefix and args.series == p.inputs
        if p.suffix == "VFA":
            assert args.method == "nonlinear" and args.b1 == p.b1 and args.b1_scale == "percent"
        assert args.epg if p.suffix == "MESE" else True
        assert args.signal == "magnitude" if p.suffix == "IRT1" else True
        assert args.noise_floor == DEFAULT_MODE if p.suffix in ("MEGRE", "MESE") else True
    assert {p.suffix for p in plan.series} == {"MEGRE", "VFA", "IRT1", "MESE"}


# -- discovery on names alone (no fitting) --------------------------------------------------------

def _touch(path: Path, sidecar: dict | None = None):
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(gzip.compress(b""))
    if sidecar is not None:
        path.with_name(path.name.removesuffix(".nii.gz") + ".json").write_text(json.dumps(sidecar))


def test_discovery_groups_by_entities_and_skips_non_magnitude(tmp_path):
    a = tmp_path / "bids/sub-07/anat"
    for i in (1, 2, 10):  # numeric order, not text order
        _touch(a / f"sub-07_acq-hi_echo-{i}_MEGRE.nii.gz")
        _touch(a / f"sub-07_acq-hi_run-2_echo-{i}_MEGRE.nii.gz")
        _touch(a / f"sub-07_echo-{i}_part-phase_MEGRE.nii.gz")
        _touch(a / f"sub-07_echo-{i}_part-mag_MEGRE.nii.gz")
    _touch(a / "sub-07_T1w.nii.gz")
    plan = discover(tmp_path / "bids", tmp_path / "bids/derivatives/qmap")
    assert [(p.prefix, p.session, p.error) for p in plan.series] == [
        ("sub-07_acq-himegre", None, None), ("sub-07_acq-himegre_run-2", None, None), ("sub-07_acq-megre", None, None)]
    assert [Path(f).name for f in plan.series[0].inputs] == [f"sub-07_acq-hi_echo-{i}_MEGRE.nii.gz" for i in (1, 2, 10)]
    assert plan.series[0].out_dir == str(tmp_path / "bids/derivatives/qmap/sub-07/anat")
    assert len(plan.ignored) == 3 and all("part-phase" in why for _, why in plan.ignored)
    assert parse_bids_name("sub-01_echo-1_MEGRE.json") is None
    assert parse_bids_name("sub-01_ses-a_echo-2_MEGRE.nii") == ([("sub", "01"), ("ses", "a"), ("echo", "2")], "MEGRE")


def test_series_that_would_share_outputs_are_not_fitted_over_each_other(tmp_path):
    a = tmp_path / "bids/sub-07/anat"
    for i in (1, 2):
        _touch(a / f"sub-07_echo-{i}_MEGRE.nii.gz")
        _touch(a / f"sub-07_echo-{i}_part-mag_MEGRE.nii.gz")  # same prefix sub-07_acq-megre
    first, second = discover(tmp_path / "bids", tmp_path / "d").series
    assert first.prefix == second.prefix == "sub-07_acq-megre"
    assert first.error is None and "would replace those of" in second.error


def test_b1_map_choice(tmp_path):
    ses = tmp_path / "bids/sub-01/ses-1"
    for acq in ("fast", "slow"):
        for i in (1, 2):
            _touch(ses / f"anat/sub-01_ses-1_acq-{acq}_flip-{i}_VFA.nii.gz")
    _touch(ses / "anat/sub-01_ses-1_acq-mid_flip-1_VFA.nii.gz")
    _touch(ses / "anat/sub-01_ses-1_acq-mid_flip-2_VFA.nii.gz")
    # one map named by IntendedFor (subject-relative), one matching by acq label, none for acq-mid
    _touch(ses / "fmap/sub-01_ses-1_acq-a_TB1map.nii.gz",
           {"Units": "fraction", "IntendedFor": ["ses-1/anat/sub-01_ses-1_acq-fast_flip-1_VFA.nii.gz"]})
    _touch(ses / "fmap/sub-01_ses-1_acq-slow_TB1map.nii.gz", {"Units": "%"})
    plan = {p.prefix: p for p in discover(tmp_path / "bids", tmp_path / "d").series}
    fast, slow, mid = (plan[f"sub-01_ses-1_acq-{a}vfa"] for a in ("fast", "slow", "mid"))
    assert Path(fast.b1).name == "sub-01_ses-1_acq-a_TB1map.nii.gz" and fast.b1_scale == "fraction"
    assert Path(slow.b1).name == "sub-01_ses-1_acq-slow_TB1map.nii.gz" and slow.b1_scale == "percent"
    assert mid.b1 is None and "several TB1 maps" in mid.error  # ambiguous: reported, not guessed


def test_planning_problems_fail_their_series_only(tmp_path, capsys):
    root = tmp_path / "bids"
    rng = np.random.default_rng(3)
    megre(root / "sub-01/anat", "sub-01", rng)
    _touch(root / "sub-01/anat/sub-01_flip-1_VFA.nii.gz")
    _touch(root / "sub-01/anat/sub-01_flip-2_VFA.nii.gz")
    _touch(root / "sub-01/fmap/sub-01_TB1map.nii.gz", {"Units": "degrees"})
    report = run_batch(root, tmp_path / "d", n_jobs=1)
    assert report.exit_code == 4
    assert [p.suffix for p, _ in report.fitted] == ["MEGRE"]
    (p, r), = report.failed
    assert p.suffix == "VFA" and "Units 'degrees'" in r.reason
    assert (tmp_path / "d/sub-01/anat/sub-01_acq-megre_T2starmap.nii.gz").is_file()


def test_bad_dataset_is_a_usage_error(tmp_path, capsys):
    assert main(["batch", str(tmp_path / "nowhere"), "-o", str(tmp_path / "d")]) == 2
    assert "no such folder" in capsys.readouterr().err
    (tmp_path / "empty/sub-01/anat").mkdir(parents=True)
    assert main(["batch", str(tmp_path / "empty"), "-o", str(tmp_path / "d")]) == 2
    assert "no relaxometry series" in capsys.readouterr().err
    assert main(["batch", str(tmp_path / "empty"), "-o", str(tmp_path / "empty/sub-01/x")]) == 2
    assert not (tmp_path / "d").exists()
    assert os.listdir(tmp_path / "empty/sub-01") == ["anat"]


def test_up_to_date_check_ignores_outputs_of_a_longer_prefix(tmp_path):
    # regression: outputs of prefix "<p>_b1" were taken for outputs of "<p>" (the same file pattern as
    # the fitting commands' overwrite check), so a never-fitted series counted as stale, not missing
    from qmap.batch.plan import SeriesPlan
    from qmap.batch.series import series_state

    out = tmp_path / "sub-01" / "anat"
    out.mkdir(parents=True)
    for name in ("sub-01_acq-vfa_b1_T1map.nii.gz", "sub-01_acq-vfa_b1_provenance.json"):
        (out / name).write_bytes(b"x")
    plan = SeriesPlan(subject="01", session=None, suffix="VFA", label="sub-01_flip-*_VFA", inputs=[],
                      prefix="sub-01_acq-vfa", out_dir=str(out))
    assert series_state(plan) == ("missing", "")
    (out / "sub-01_acq-vfa_T1map.nii.gz").write_bytes(b"x")
    assert series_state(plan)[0] == "stale"


def test_t2_spectrum_option_fits_mese_series_by_t2_spectrum_too(tmp_path, capsys):
    """--t2-spectrum: every MESE series is also fitted by t2-spectrum (prefix ..._acq-mesespectrum); reruns skip it."""
    from tests.reference.epg_states import cpmg_reference

    rng = np.random.default_rng(3)
    shape, n_echoes = (6, 5, 1), 32
    frac = np.linspace(0.05, 0.25, shape[0])[:, None, None] * np.ones(shape)
    trains = (frac.reshape(-1, 1) * cpmg_reference(np.full(frac.size, 0.02), np.full(frac.size, 170.0), esp=0.01,
                                                   n_echoes=n_echoes)
              + (1 - frac.reshape(-1, 1)) * cpmg_reference(np.full(frac.size, 0.08), np.full(frac.size, 170.0),
                                                           esp=0.01, n_echoes=n_echoes))
    data = np.abs(1000.0 * trains.reshape(*shape, n_echoes) + rng.normal(0, 3.0, (*shape, n_echoes)))
    a = tmp_path / "bids/sub-01/anat"
    a.mkdir(parents=True)
    for k in range(n_echoes):
        nib.save(nib.Nifti1Image(data[..., k].astype(np.float32), AFFINE), str(a / f"sub-01_echo-{k + 1}_MESE.nii.gz"))
        (a / f"sub-01_echo-{k + 1}_MESE.json").write_text(json.dumps({"EchoTime": 0.01 * (k + 1)}))
    deriv = tmp_path / "deriv"
    assert main(["batch", str(tmp_path / "bids"), "-o", str(deriv), "--t2-spectrum", "--dry-run"]) == 0
    table = capsys.readouterr().out
    assert "t2-spectrum (regularised NNLS, EPG basis)" in table and "t2 (EPG)" in table
    report = run_batch(tmp_path / "bids", deriv, n_jobs=1, t2_spectrum=True)
    done = {p.prefix: r for p, r in zip(report.plan.series, report.results)}
    res = done["sub-01_acq-mesespectrum"]
    assert res.status == "fitted", res.reason
    out = deriv / "sub-01" / "anat"
    mwf = nib.load(str(out / "sub-01_acq-mesespectrum_MWFmap.nii.gz")).get_fdata()
    prov = json.loads((out / "sub-01_acq-mesespectrum_provenance.json").read_text())
    assert prov["command_line"][:2] == ["qmap", "t2-spectrum"]
    ok = np.isfinite(mwf)
    assert ok.sum() >= 20 and np.median(np.abs(mwf[ok] - frac[ok])) < 0.05
    again = run_batch(tmp_path / "bids", deriv, n_jobs=1, t2_spectrum=True)
    assert {p.prefix: r.status for p, r in zip(again.plan.series, again.results)}["sub-01_acq-mesespectrum"] == "skipped"
