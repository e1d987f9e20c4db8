"""What a new user meets first: output names, the last line of a fit, help texts, -q on every command."""

from __future__ import annotations

import pytest

from qmap.cli import COMMANDS, as_options, main
from qmap.pipeline import default_prefix


@pytest.mark.parametrize(("name", "method", "prefix"), [
    # BIDS inputs follow the batch naming: the suffix becomes the acq label, per-volume entities go
    ("sub-01_VFA.nii.gz", "vfa", "sub-01_acq-vfa"),
    ("sub-01_flip-1_VFA.nii.gz", "vfa", "sub-01_acq-vfa"),
    ("sub-phantom_echo-1_MESE.nii.gz", "mese", "sub-phantom_acq-mese"),
    ("sub-01_ses-2_acq-fast_run-1_echo-1_part-mag_MEGRE.nii", "megre", "sub-01_ses-2_acq-fastmegre_run-1"),
    ("sub-01_inv-3_IRT1.nii.gz", "irt1", "sub-01_acq-irt1"),
    ("sub-01_T2w.nii.gz", "mese", "sub-01_acq-mese"),
    ("sub-01_acq-tr1_TB1AFI.nii.gz", "tb1afi", "sub-01_acq-tb1afi"),
    ("sub-01_acq-tr1_AFI.nii.gz", "tb1afi", "sub-01_acq-tb1afi"),
    ("sub-01_UNIT1.nii.gz", None, "sub-01_acq-mp2rage"),  # not a qMRI suffix: the command's method
    # converter names lose the tokens of one volume and the series number after them
    ("T1_IR_TI100_5.nii.gz", "irt1", "T1_IR"),
    ("GRE_TE5ms_12.nii.gz", "megre", "GRE"),
    ("t2star_e1.nii.gz", "megre", "t2star"),
    ("scan_echo-1.nii.gz", "megre", "scan"),
    ("patient_01.nii.gz", "megre", "patient_01"),  # no converter token: the name is kept
])
def test_default_prefix(name, method, prefix):
    assert default_prefix(name, method) == prefix


@pytest.mark.parametrize(("name", "prefix"), [
    # t2-spectrum's variant: the batch --t2-spectrum naming for BIDS inputs, "_spectrum" for any other stem
    ("sub-01_echo-1_MESE.nii.gz", "sub-01_acq-mesespectrum"),
    ("sub-01_ses-2_acq-fast_echo-1_MESE.nii.gz", "sub-01_ses-2_acq-fastmesespectrum"),
    ("T2_MESE_TE10_7.nii.gz", "T2_MESE_spectrum"),
])
def test_default_prefix_variant(name, prefix):
    assert default_prefix(name, variant="spectrum") == prefix
    assert default_prefix(name, "mese") != prefix  # what t2 uses for the same series


def test_last_line_names_the_main_map(megre, tmp_path, capsys):
    path, *_ = megre
    assert main(["t2star", str(path), "-o", str(tmp_path / "o"), "--sigma", "5"]) == 0
    last = capsys.readouterr().out.strip().splitlines()[-1]
    main_map = tmp_path / "o" / "sub-01_acq-megre_T2starmap.nii.gz"
    assert last.endswith(f"main map: {main_map}") and main_map.is_file()


@pytest.mark.parametrize("cmd", sorted(COMMANDS))
def test_every_command_has_an_example_and_quiet(cmd, capsys):
    assert main([cmd, "--help"]) == 0
    out = capsys.readouterr().out
    tail = out[out.lower().rindex("example"):]  # "example:" (or a command's own "Examples:") ends the help
    assert f"qmap {cmd} " in tail
    assert "-q, --quiet" in out and "stderr" in " ".join(out.split("-q, --quiet")[1].split())[:200]


def test_quiet_silences_a_command_without_its_own_summary_switch(tmp_path, capsys):
    assert main(["simulate", "-o", str(tmp_path / "s"), "--protocol", "megre", "--shape", "24,24,1", "-q"]) == 0
    assert capsys.readouterr().out == ""
    assert (tmp_path / "s" / "simulation.json").is_file()


def test_distribution_name_is_our_own():
    """The package index already has an unrelated ``qmap``: the distribution has a name of its own."""
    import tomllib
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    conf = tomllib.loads((root / "pyproject.toml").read_text())
    assert conf["project"]["name"] == "qmap-relaxometry"
    assert conf["project"]["scripts"] == {"qmap": "qmap.cli:console"}
    assert "qmap-relaxometry" in (root / "README.md").read_text()


def test_ir_provenance_names_qmaps_own_parameters(tmp_path):
    """The IR model is recorded as M0, inversion efficiency and T1 (the fitted amplitudes a, b are internal)."""
    import json

    import numpy as np

    from tests.conftest import write_nifti

    ti = np.array([0.05, 0.15, 0.4, 0.8, 1.5, 3.0])
    x = np.indices((24, 24, 1))[0]
    obj = (np.indices((24, 24, 1))[1] - 11.5) ** 2 + (x - 11.5) ** 2 < 64
    t1 = np.where(obj, 0.5 + 0.05 * x, 1.0)
    sig = np.where(obj[..., None], 1000 * np.abs(1 - 1.95 * np.exp(-ti / t1[..., None])), 0.0)
    path = write_nifti(tmp_path / "sub-01_IRT1.nii.gz", sig, sidecar={"InversionTime": ti.tolist()})
    assert main(["t1-ir", str(path), "-o", str(tmp_path / "o"), "-q"]) == 0
    prov = json.loads((tmp_path / "o" / "sub-01_acq-irt1_provenance.json").read_text())
    assert prov["model"]["parameters"] == ["M0", "InversionEfficiency", "T1"]
    assert prov["model"]["equation"].startswith("S = M0 (1 - (1 + InversionEfficiency) exp(-TI/T1))")


def test_provenance_records_date_versions_and_warnings(megre, tmp_path, capsys):
    """Warnings go into the provenance as well as stderr; the top-level keys stay exactly the contract's."""
    import json

    import nibabel
    import numpy
    import scipy

    path, te, *_ = megre
    other = ",".join(f"{1e3 * t * 1.01:.4f}ms" for t in te)  # disagrees with the sidecar EchoTime by 1 %
    assert main(["t2star", str(path), "--te", other, "-o", str(tmp_path / "o"), "--sigma", "5", "-q"]) == 0
    err = capsys.readouterr().err
    prov = json.loads((tmp_path / "o" / "sub-01_acq-megre_provenance.json").read_text())
    assert list(prov) == ["qmap_version", "command_line", "inputs", "acquisition", "options", "model", "noise",
                          "status_counts", "status_codes", "wall_time_s", "outputs"]
    run = prov["options"]["run"]
    assert run["versions"] == {"qmap": prov["qmap_version"], "python": run["versions"]["python"],
                               "numpy": numpy.__version__, "scipy": scipy.__version__, "nibabel": nibabel.__version__}
    assert run["date"][:4].isdigit() and run["date"].endswith("+00:00")
    warned = [ln.removeprefix("qmap: warning: ") for ln in err.splitlines() if ln.startswith("qmap: warning:")]
    # the provenance keeps the library's wording (te=), the command line printed it as options (--te)
    assert warned and [as_options(w) for w in run["warnings"]] == warned and "EchoTime" in run["warnings"][0]
    assert run["warnings"][0].startswith("te= ") and warned[0].startswith("--te ")
    # a second run in the same process records only its own warnings
    assert main(["t2star", str(path), "-o", str(tmp_path / "p"), "--sigma", "5", "-q"]) == 0
    assert json.loads((tmp_path / "p" / "sub-01_acq-megre_provenance.json").read_text())["options"]["run"][
        "warnings"] == []


@pytest.mark.parametrize(("argv", "says"), [
    (["b1", "a.nii", "--method", "dam", "--units", "ms"], "--units does not apply to b1: it writes no time map"),
    (["b1", "a.nii", "--method", "dam", "--engine=lmfit"], "--engine does not apply to b1"),
    (["t2-spectrum", "a.nii", "--engine", "lmfit"], "--engine does not apply to t2-spectrum"),
    (["t1-mp2rage", "a.nii", "--engine", "fast"], "--engine does not apply to t1-mp2rage"),
    (["t2", "a.nii", "--te", "10ms", "--frobnicate"], "unrecognized arguments: --frobnicate"),
])
def test_an_option_the_command_does_not_take_is_named_with_the_command_help(argv, says, tmp_path, capsys):
    # the error names the command's own help (not the top-level 'qmap --help'), and why b1 has no --units
    assert main([*argv, "-o", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and says in err
    assert err.rstrip().endswith(f"(see qmap {argv[0]} --help)")
    assert not (tmp_path / "out").exists()



def test_the_program_flushes_its_output_and_keeps_its_exit_codes(tmp_path):
    # the program ends a successful run at once (os._exit after flushing): what it printed must still
    # reach a pipe, and a failed run keeps its exit code and message
    import subprocess
    import sys

    ok = subprocess.run([sys.executable, "-m", "qmap", "--version"], capture_output=True, text=True, check=False)
    assert ok.returncode == 0 and ok.stdout.startswith("qmap ")
    demo = subprocess.run([sys.executable, "-m", "qmap", "t2star", "--help"], capture_output=True, text=True,
                          check=False)
    assert demo.returncode == 0 and demo.stdout.count("\n") > 20 and "--te" in demo.stdout
    bad = subprocess.run([sys.executable, "-m", "qmap", "t2star", str(tmp_path / "missing.nii.gz"), "-o",
                          str(tmp_path / "o")], capture_output=True, text=True, check=False)
    assert bad.returncode == 2 and "no such file" in bad.stderr


def test_a_profiled_run_still_writes_its_profile(tmp_path):
    # under a profiler the program exits the ordinary way, so that the profiler writes its file at exit
    import subprocess
    import sys

    out = tmp_path / "run.prof"
    res = subprocess.run([sys.executable, "-m", "cProfile", "-o", str(out), "-m", "qmap", "--version"],
                         capture_output=True, text=True, check=False)
    assert res.returncode == 0 and out.stat().st_size > 1000
