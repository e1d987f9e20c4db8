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
import qmap.noise_level as noise_mod
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
    "automatic-mask": (noise_mod, "fill_holes", 1, None),
    "fit-chunk-3": (engine_mod, "fit_chunk", 3, None),
    "fit-last-chunk": (engine_mod, "fit_chunk", 9, None),
    # the maps are streamed into their files as they are fitted (one slab here: one write per map), and
    # completed (header, gzip trailer) when the run writes
    "writing-1st-nifti": (writer_mod.NiftiStream, "_put", 1, "method"),
    "writing-6th-nifti": (writer_mod.NiftiStream, "_put", 6, "method"),
    "writing-last-nifti": (writer_mod.NiftiStream, "_put", 11, "method"),
    "completing-1st-nifti": (writer_mod.NiftiStream, "finish", 1, "method"),
    "completing-last-nifti": (writer_mod.NiftiStream, "finish", 11, "method"),
    "writing-4th-sidecar": (writer_mod, "open", 4, "json"),
    "writing-provenance": (writer_mod, "open", 12, "json"),
    "commit-1st-rename": (writer_mod.os, "replace", 1, None),
    "commit-2nd-rename": (writer_mod.os, "replace", 2, None),
    "commit-middle-rename": (writer_mod.os, "replace", 12, None),
    "commit-last-rename": (writer_mod.os, "replace", 23, None),
}
# offset noise floor: 11 NIfTI maps (T2star, R2star, M0, Offset with stderr; rsquared, rmse; status),
# 11 sidecars + provenance = 23 files. 9 chunks (of the ~870 object voxels) with --chunk-size 100.


def _set_trap(monkeypatch, owner, attr, k, *, opening=None, method=False):
    """Replace ``owner.attr`` by an :class:`Interrupt` after ``k`` calls and return it.

    ``opening``: ``attr`` is ``open`` and only writes of files ending so count; ``method``: a method of a
    class (the trap gets ``self`` too).
    """
    if opening is not None:
        trap = _open_interrupting(k, suffix=opening)
        monkeypatch.setattr(owner, attr, trap, raising=False)
        return trap
    trap = Interrupt(getattr(owner, attr), k)
    monkeypatch.setattr(owner, attr, (lambda self, *a, **kw: trap(self, *a, **kw)) if method else trap)
    return trap


def _arm(monkeypatch, stage):
    mod, attr, k, kind = STAGES[stage]
    return _set_trap(monkeypatch, mod, attr, k, opening=".json" if kind == "json" else None, method=kind == "method")


def _run(inputs, out, *extra):
    return main(["t2star", *map(str, inputs), "-o", str(out), "--prefix", "run", "-q", "--noise-floor", "offset",
                 "--chunk-size", "100", *extra])


# two workers matter where threads run: the fit (joblib) and the staging of the NIfTI files
THREADED = [s for s in STAGES if s.startswith(("fit", "writing", "completing"))]


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
    trap = Interrupt(noise_mod.background_estimate, 1)
    monkeypatch.setattr(noise_mod, "background_estimate", trap)
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


# --------------------------------------------------------------------------- the other commands
# The same guarantee for each command's own path to the writer; inputs built as in test_hostile_inputs.


@pytest.fixture(scope="module")
def others(tmp_path_factory):
    """Inputs for t1-vfa (+ B1 map), b1 (DAM), t1-ir, t2 (EPG) and phantom."""
    from tests.qa import phantom_factory as pf
    from tests.test_hostile_inputs import _b1map, _dam, _ir, _mese, _vfa

    d = tmp_path_factory.mktemp("others")
    ph = pf.make_phantom(d / "ph")
    (d / "history.csv").write_text("")  # filled by a first phantom run below
    args = {
        "t1-vfa": ["t1-vfa", _vfa(d), "--b1", _b1map(d, 1.0)],
        "b1": ["b1", _dam(d), "--method", "dam", "--fa", "45"],
        "t1-ir": ["t1-ir", _ir(d)],
        "t2": ["t2", _mese(d), "--epg", "--sigma", "5"],
        "phantom": ["phantom", "--labels", ph["labels"], "--reference", ph["ref"], "--map", ph["t1"], "--map", ph["t2"],
                    "--temperature", "21.5", "--history", d / "history.csv", "--date", "2026-01-05",
                    "--scanner", "s1"],
    }
    (d / "history.csv").unlink()
    return d, {k: [str(a) for a in v] for k, v in args.items()}


# command -> (module, attribute, k): where the interrupt is injected
OTHER_STAGES = {
    "t1-vfa-resampling-b1": ("t1-vfa", "qmap.b1", "resample_blocks_of", 1),
    "t1-vfa-fit": ("t1-vfa", "qmap.engine", "fit_chunk", 1),
    "t1-vfa-3rd-nifti": ("t1-vfa", "qmap.io.writer", "NiftiStream._put", 3),
    "b1-2nd-nifti": ("b1", "qmap.io.writer", "NiftiStream._put", 2),
    "b1-commit": ("b1", "qmap.io.writer", "os.replace", 5),
    "t1-ir-fit": ("t1-ir", "qmap.engine", "fit_chunk", 1),
    "t1-ir-last-nifti": ("t1-ir", "qmap.io.writer", "NiftiStream.finish", 11),
    "t2-epg-fit": ("t2", "qmap.engine", "fit_chunk", 1),
    "t2-epg-4th-nifti": ("t2", "qmap.io.writer", "NiftiStream._put", 4),
    "phantom-3rd-file": ("phantom", "qmap.io.writer", "open", 3),
    "phantom-commit": ("phantom", "qmap.io.writer", "os.replace", 4),
}


def _arm_other(monkeypatch, module, attr, k):
    import importlib

    mod = importlib.import_module(module)
    if "." in attr:
        owner, attr = attr.split(".")
        mod = getattr(mod, owner)
    return _set_trap(monkeypatch, mod, attr, k, opening="" if attr == "open" else None, method=isinstance(mod, type))


@pytest.mark.parametrize("stage", list(OTHER_STAGES))
@pytest.mark.parametrize("fresh", [True, False], ids=["fresh", "previous"])
def test_interrupt_other_commands(stage, fresh, tmp_path, others, monkeypatch, capsys):
    _d, args = others
    command, module, attr, k = OTHER_STAGES[stage]
    argv = list(args[command])
    out = tmp_path / "out"
    hist = None
    if command == "phantom":
        hist = tmp_path / "history.csv"
        argv[argv.index("--history") + 1] = str(hist)
    if not fresh:  # a complete earlier run (and, for phantom, its history file)
        assert main(argv + ["-o", str(out), "-q"]) == 0
        argv += ["--overwrite"]
        if hist is not None:
            argv[argv.index("--date") + 1] = "2026-02-05"  # a new session: the history would change
    before = snapshot(tmp_path)
    trap = _arm_other(monkeypatch, module, attr, k)
    rc = main(argv + ["-o", str(out), "-q"])
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert trap.fired, f"{stage} not reached ({trap.calls} calls)"
    assert rc == 130, err
    assert "no outputs were written" in err
    assert snapshot(tmp_path) == before
    assert out.exists() != fresh


def test_interrupted_batch_keeps_no_partial_series(tmp_path, monkeypatch, capsys):
    """batch: an interrupt in the first series' fit leaves no file of that series (only the dataset description,
    written first, may exist) and no temporary files."""
    data, te, *_ = decay_phantom(te=TE)
    anat = tmp_path / "bids" / "sub-01" / "anat"
    anat.mkdir(parents=True)
    for i, t in enumerate(te):
        write_nifti(anat / f"sub-01_echo-{i + 1}_MEGRE.nii.gz", data[..., i], sidecar={"EchoTime": float(t)})
    trap = Interrupt(engine_mod.fit_chunk, 1)
    monkeypatch.setattr(engine_mod, "fit_chunk", trap)
    rc = main(["batch", str(tmp_path / "bids"), "-o", str(tmp_path / "deriv"), "-j", "1", "-q"])
    monkeypatch.undo()
    capsys.readouterr()
    assert trap.fired and rc == 130
    assert set(snapshot(tmp_path / "deriv")) <= {"dataset_description.json"}


def test_interrupted_simulate_creates_nothing(tmp_path, monkeypatch, capsys):
    import qmap.simulate.output as sim_out

    trap = Interrupt(sim_out.nib.save, 3)
    monkeypatch.setattr(sim_out.nib, "save", trap)
    rc = main(["simulate", "-o", str(tmp_path / "new" / "deeper" / "sim"), "--protocol", "megre"])
    monkeypatch.undo()
    capsys.readouterr()
    assert trap.fired and rc == 130
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("k", [1, 4, 9])
def test_interrupt_while_two_slabs_are_fitted_at_once(k, tmp_path, inputs, monkeypatch, capsys):
    """A lean fit (no noise floor) on two workers fits two slabs at a time, each in a helper thread: an
    interrupt in any chunk leaves the folder as it was, and the same run uninterrupted gives the maps of a
    run in one slab."""
    import qmap.pipeline as pipeline_mod

    shape = nib.load(str(inputs[0])).shape
    monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", shape[0] * shape[1] * 2)  # slabs of two slices
    out = tmp_path / "new" / "out"
    trap = _set_trap(monkeypatch, engine_mod, "fit_chunk", k)
    rc = main(["t2star", *map(str, inputs), "-o", str(out), "-q", "--noise-floor", "none", "-j", "2",
               "--chunk-size", "50"])
    assert trap.fired and rc == 130
    assert "no outputs were written" in capsys.readouterr().err
    assert not (tmp_path / "new").exists()
    monkeypatch.setattr(engine_mod, "fit_chunk", trap.fn)
    assert main(["t2star", *map(str, inputs), "-o", str(tmp_path / "slabs"), "-q", "--noise-floor", "none",
                 "-j", "2", "--chunk-size", "50"]) == 0
    monkeypatch.setattr(pipeline_mod, "AUTO_SLAB_VOXELS", 1 << 30)
    assert main(["t2star", *map(str, inputs), "-o", str(tmp_path / "one"), "-q", "--noise-floor", "none",
                 "-j", "2", "--chunk-size", "50"]) == 0
    for f in sorted((tmp_path / "one").glob("*.nii.gz")):
        assert np.array_equal(np.asanyarray(nib.load(str(f)).dataobj),
                              np.asanyarray(nib.load(str(tmp_path / "slabs" / f.name)).dataobj), equal_nan=True)
