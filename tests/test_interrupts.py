"""Ctrl-C at any stage leaves the output folder as it was before the run (issue 10).

``KeyboardInterrupt`` is injected (monkeypatch) while the series is read, while
the object mask is found, in the middle of the fit (after a few chunks,
with one and with two workers), while the k-th NIfTI or JSON file is staged,
and between the renames of the commit. For each stage, two starting states:

* a fresh output folder -- it must not exist afterwards;
* a folder holding a previous run's outputs, rerun with ``--overwrite`` --
  every file must be byte-identical afterwards, and nothing added.

``main`` returns 130 (common practice: 128 + SIGINT) and prints one line.
An interrupt that arrives after every output is in place (while the replaced
files are deleted) cannot undo a completed run: the new outputs are complete,
no backup is left behind, and the message says so.
"""

from __future__ import annotations

import shutil

import nibabel as nib
import numpy as np
import pytest

import qmap.engine as engine_mod
import qmap.io.series as series_mod
import qmap.io.writer as writer_mod
import qmap.noise as noise_mod
from qmap.cli import main
from tests.conftest import decay_phantom, snapshot, write_nifti

TE = np.arange(1, 9) * 0.005


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    """Eight 3D echo files with scalar sidecars (read-only for the tests)."""
    data, te, *_ = decay_phantom(te=TE)
    d = tmp_path_factory.mktemp("series")
    return [write_nifti(d / f"sub-01_echo-{i + 1}_MEGRE.nii.gz", data[..., i], sidecar={"EchoTime": float(t)})
            for i, t in enumerate(te)]


@pytest.fixture(scope="module")
def previous(tmp_path_factory, inputs):
    """Outputs of an earlier complete run (prefix ``run``)."""
    out = tmp_path_factory.mktemp("previous") / "out"
    assert main(["t2star", *map(str, inputs), "-o", str(out), "--prefix", "run", "-q", "--noise-floor", "offset"]) == 0
    (out / "notes.txt").write_text("kept\n")
    return out


class Interrupt:
    """Call ``fn`` normally except the ``k``-th call (1-based), which raises KeyboardInterrupt."""

    def __init__(self, fn, k, when=None):
        self.fn, self.k, self.when, self.calls, self.fired = fn, k, when, 0, False

    def __call__(self, *a, **kw):
        if self.when is None or self.when(*a, **kw):
            self.calls += 1
            if self.calls == self.k:
                self.fired = True
                raise KeyboardInterrupt
        return self.fn(*a, **kw)


def _open_interrupting(k, suffix=".json"):
    real_open = open

    def is_write(path, mode="r", *a, **kw):
        return "w" in mode and str(path).endswith(suffix)

    return Interrupt(real_open, k, when=is_write)


# name -> (module, attribute, k, filter) ; the filter selects which calls count
STAGES = {
    "opening-the-3rd-file": (series_mod, "load_image", 3, None),
    "reading-voxel-data": (series_mod, "image_data", 5, None),
    "automatic-mask": (noise_mod, "mask_from_peak", 1, None),
    "fit-chunk-3": (engine_mod, "fit_chunk", 3, None),
    "fit-last-chunk": (engine_mod, "fit_chunk", 9, None),
    "writing-1st-nifti": (writer_mod.nib, "save", 1, None),
    "writing-6th-nifti": (writer_mod.nib, "save", 6, None),
    "writing-last-nifti": (writer_mod.nib, "save", 11, None),
    "writing-4th-sidecar": (writer_mod, "open", 4, "json"),
    "writing-provenance": (writer_mod, "open", 12, "json"),
    "commit-1st-rename": (writer_mod.os, "replace", 1, None),
    "commit-2nd-rename": (writer_mod.os, "replace", 2, None),
    "commit-middle-rename": (writer_mod.os, "replace", 12, None),
    "commit-last-rename": (writer_mod.os, "replace", 23, None),
}
# offset noise floor: 11 NIfTI maps (T2star, R2star, M0, Offset with stderr; rsquared, rmse; status),
# 11 sidecars + provenance = 23 files. 9 chunks (of the ~870 object voxels) with --chunk-size 100.


def _arm(monkeypatch, stage):
    mod, attr, k, kind = STAGES[stage]
    if kind == "json":
        trap = _open_interrupting(k)
        monkeypatch.setattr(mod, attr, trap, raising=False)
    else:
        trap = Interrupt(getattr(mod, attr), k)
        monkeypatch.setattr(mod, attr, trap)
    return trap


def _run(inputs, out, *extra):
    return main(["t2star", *map(str, inputs), "-o", str(out), "--prefix", "run", "-q", "--noise-floor", "offset",
                 "--chunk-size", "100", *extra])


# two workers matter where threads run: the fit (joblib) and the staging of the NIfTI files
THREADED = [s for s in STAGES if s.startswith(("fit", "writing"))]


@pytest.mark.parametrize("stage, jobs", [(s, "1") for s in STAGES] + [(s, "2") for s in THREADED])
def test_interrupt_fresh_folder(stage, jobs, tmp_path, inputs, monkeypatch, capsys):
    out = tmp_path / "new" / "out"
    trap = _arm(monkeypatch, stage)
    rc = _run(inputs, out, "-j", jobs)
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert trap.fired, f"the stage {stage} was not reached ({trap.calls} calls)"
    assert rc == 130
    assert err.strip().splitlines() == ["qmap: interrupted; no outputs were written (the output folder is as it was)"]
    assert not (tmp_path / "new").exists()
    assert snapshot(tmp_path) == {}


@pytest.mark.parametrize("stage", list(STAGES))
def test_interrupt_keeps_previous_outputs(stage, tmp_path, inputs, previous, monkeypatch, capsys):
    out = tmp_path / "out"
    shutil.copytree(previous, out)
    before = snapshot(out)
    trap = _arm(monkeypatch, stage)
    rc = _run(inputs, out, "--overwrite", "-j", "2")
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert trap.fired and rc == 130, err
    assert "no outputs were written" in err
    assert snapshot(out) == before


@pytest.mark.parametrize("k", [1, 2, 25, 45, 46])
def test_interrupt_between_backup_and_rename(k, tmp_path, inputs, previous, monkeypatch, capsys):
    """With --overwrite each output takes two renames (old -> backup, new -> final); interrupt at any of the 46."""
    out = tmp_path / "out"
    shutil.copytree(previous, out)
    before = snapshot(out)
    trap = Interrupt(writer_mod.os.replace, k)
    monkeypatch.setattr(writer_mod.os, "replace", trap)
    rc = _run(inputs, out, "--overwrite", "-j", "1")
    monkeypatch.undo()
    assert trap.fired and rc == 130
    assert snapshot(out) == before
    capsys.readouterr()


def test_interrupt_while_estimating_sigma(tmp_path, inputs, monkeypatch, capsys):
    """The default noise floor (rician) estimates sigma from the background first."""
    trap = Interrupt(noise_mod.sigma_from_samples, 1)
    monkeypatch.setattr(noise_mod, "sigma_from_samples", trap)
    rc = main(["t2star", *map(str, inputs), "-o", str(tmp_path / "out"), "-q"])
    monkeypatch.undo()
    assert trap.fired and rc == 130
    assert "no outputs were written" in capsys.readouterr().err
    assert snapshot(tmp_path) == {}


def test_interrupt_after_commit_keeps_complete_new_outputs(tmp_path, inputs, previous, monkeypatch, capsys):
    """Once every output is in place the run has succeeded: an interrupt while the old files are deleted
    leaves the complete new set (no backups, nothing of the old run) and says so."""
    out = tmp_path / "out"
    shutil.copytree(previous, out)
    real_unlink = writer_mod.Path.unlink
    fired = []

    def unlink(self, *a, **kw):
        if ".qmap-bak-" in self.name and not fired:
            fired.append(self.name)
            raise KeyboardInterrupt
        return real_unlink(self, *a, **kw)

    monkeypatch.setattr(writer_mod.Path, "unlink", unlink)
    rc = _run(inputs, out, "--overwrite", "-j", "1", "--units", "ms")  # ms: the new maps differ from the old
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert fired and rc == 130
    assert err.strip() == "qmap: interrupted after the outputs were written; they are complete"
    names = sorted(p.name for p in out.iterdir())
    assert names == sorted(p.name for p in previous.iterdir())  # same names, no backups or temporaries
    new = nib.load(str(out / "run_T2starmap.nii.gz")).get_fdata()
    old = nib.load(str(previous / "run_T2starmap.nii.gz")).get_fdata()
    np.testing.assert_allclose(new, 1000 * old, rtol=1e-6)  # the new (ms) map, not the old (s) one
