"""What a new user meets first: output names, the last line of a fit, help texts, -q on every command."""

from __future__ import annotations

import pytest

from qmap.cli import COMMANDS, main
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
