"""Faults while running (issue 20): SIGTERM, and two qmap processes writing into one output folder.

SIGTERM is what a batch system or ``kill`` sends: it is handled exactly like
Ctrl-C (the output folder stays as it was) and exits with 143 (common practice:
128 + the signal number, SIGTERM = 15). Two runs writing into one folder take
turns through an advisory lock (``.qmap-lock``): the second waits, and is
refused with one clear line when the first holds the folder for too long. A
disk filling up while writing is covered by the hostile-input battery
(tests/test_hostile_inputs.py, ``test_disk_full_*``: OSError(ENOSPC) injected in
the writer).
"""

from __future__ import annotations

import fcntl
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import qmap.engine as engine_mod
import qmap.io.writer as writer_mod
from qmap.cli import main
from tests.conftest import decay_phantom, snapshot, write_nifti

TE = np.arange(1, 9) * 0.005
ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def series(tmp_path_factory):
    data, te, *_ = decay_phantom(te=TE)
    d = tmp_path_factory.mktemp("series")
    return write_nifti(d / "sub-01_MEGRE.nii.gz", data, sidecar={"EchoTime": te.tolist()})


def _run(series, out, *extra):
    return main(["t2star", str(series), "-o", str(out), "--prefix", "run", "-q", "--sigma", "5", *extra])


class _SigtermAt:
    """Call ``fn``; on the ``k``-th call send SIGTERM to this process first (the handler raises in the main thread)."""

    def __init__(self, fn, k):
        self.fn, self.k, self.calls = fn, k, 0

    def __call__(self, *a, **kw):
        self.calls += 1
        if self.calls == self.k:
            os.kill(os.getpid(), signal.SIGTERM)
        return self.fn(*a, **kw)


@pytest.mark.parametrize("where", ["fit", "write"])
def test_sigterm_is_an_interrupt(where, series, tmp_path, monkeypatch, capsys):
    out = tmp_path / "out"
    assert _run(series, out) == 0
    before = snapshot(tmp_path)
    if where == "fit":
        monkeypatch.setattr(engine_mod, "fit_chunk", _SigtermAt(engine_mod.fit_chunk, 2))
    else:
        trap = _SigtermAt(writer_mod.NiftiStream._put, 4)  # the 4th write of streamed map data
        monkeypatch.setattr(writer_mod.NiftiStream, "_put", lambda self, raw: trap(self, raw))
    capsys.readouterr()
    rc = _run(series, out, "--overwrite", "-j", "1", "--chunk-size", "100")
    monkeypatch.undo()
    err = capsys.readouterr().err
    assert rc == 143
    line = "qmap: terminated (SIGTERM); no outputs were written (the output folder is as it was)"
    assert err.strip().splitlines() == [line]
    assert snapshot(tmp_path) == before
    # the handler is only installed while main() runs
    assert signal.getsignal(signal.SIGTERM) == signal.SIG_DFL


_CHILD = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    import qmap.engine as engine
    real = engine.fit_chunk
    calls = []

    def slow(*a, **kw):
        calls.append(1)
        if len(calls) == 2:
            Path(sys.argv[1]).write_text("fitting")
            time.sleep(30)
        return real(*a, **kw)

    engine.fit_chunk = slow
    from qmap.cli import main
    sys.exit(main(sys.argv[2:]))
""")


def test_sigterm_to_a_real_process(series, tmp_path):
    """A separate process killed with SIGTERM in the middle of its fit: exit 143, no output folder."""
    marker = tmp_path / "marker"
    out = tmp_path / "new" / "out"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen([sys.executable, "-c", _CHILD, str(marker), "t2star", str(series), "-o", str(out),
                             "-q", "--sigma", "5", "-j", "1", "--chunk-size", "100"],
                            stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 60
    while not marker.exists() and proc.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    assert marker.exists(), proc.communicate()[1]
    proc.send_signal(signal.SIGTERM)
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 143, err
    assert err.strip().splitlines()[-1].startswith("qmap: terminated (SIGTERM); no outputs were written")
    assert not (tmp_path / "new").exists()


def _hold_lock(folder: Path, pid: int = 4242):
    folder.mkdir(parents=True, exist_ok=True)
    fd = os.open(folder / writer_mod.LOCK_NAME, os.O_RDWR | os.O_CREAT, 0o644)
    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    os.write(fd, f"{pid}\n".encode())
    return fd


def test_second_writer_into_a_locked_folder_is_refused(series, tmp_path, monkeypatch, capsys):
    out = tmp_path / "out"
    fd = _hold_lock(out)  # another qmap process (pid 4242) is writing into the folder
    monkeypatch.setattr(writer_mod, "LOCK_WAIT_S", 0.3)
    try:
        before = snapshot(tmp_path)
        capsys.readouterr()
        t0 = time.monotonic()
        rc = _run(series, out)
        waited = time.monotonic() - t0
        err = capsys.readouterr().err
        assert rc == 2
        lines = err.strip().splitlines()
        assert len(lines) == 1 and "Traceback" not in err
        assert lines[0] == (f"qmap: error: another qmap process (pid 4242) is writing into {out} and did not finish "
                            f"within 0.3 s; wait for it to finish, or choose another -o")
        assert waited >= 0.3
        assert snapshot(tmp_path) == before  # no output, no temporary file
    finally:
        os.close(fd)
    # once the folder is free the run goes through, and leaves no lock file behind
    (out / writer_mod.LOCK_NAME).unlink()
    assert _run(series, out) == 0
    assert not (out / writer_mod.LOCK_NAME).exists()
    outputs = json.loads((out / "run_provenance.json").read_text())["outputs"]
    assert len(outputs) >= 9 and all((out / name).exists() for name in outputs)


def test_waiting_writer_goes_through_when_the_folder_is_freed(series, tmp_path, monkeypatch):
    """The lock is held for 0.5 s: the run waits for it (well within LOCK_WAIT_S) and then writes its outputs."""
    import threading

    out = tmp_path / "out"
    fd = _hold_lock(out)

    def release():
        time.sleep(0.5)
        (out / writer_mod.LOCK_NAME).unlink()  # as the AtomicWriter does: remove while still locked
        os.close(fd)

    t = threading.Thread(target=release)
    t.start()
    t0 = time.monotonic()
    try:
        assert _run(series, out) == 0
    finally:
        t.join()
    assert time.monotonic() - t0 >= 0.5
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".")) == []


_CHILD_SLOW_LOCK = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    import qmap.io.writer as writer
    real = writer.AtomicWriter._lock

    def slow_lock(self):
        real(self)
        Path(sys.argv[1]).write_text("locked")  # holds the folder now, and keeps it a while
        time.sleep(float(sys.argv[2]))

    writer.AtomicWriter._lock = slow_lock
    from qmap.cli import main
    sys.exit(main(sys.argv[3:]))
""")


def _two_processes(series, out, tmp_path, first: list[str], second: list[str], hold_s: float = 3.0):
    """Start a qmap process that holds ``out`` for ``hold_s`` s, then a second one into the same folder."""
    marker = tmp_path / "marker"
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    base = ["t2star", str(series), "-o", str(out), "-q", "--sigma", "5"]
    a = subprocess.Popen([sys.executable, "-c", _CHILD_SLOW_LOCK, str(marker), str(hold_s), *base, *first],
                         stderr=subprocess.PIPE, text=True, env=env)
    deadline = time.monotonic() + 60
    while not marker.exists() and a.poll() is None and time.monotonic() < deadline:
        time.sleep(0.02)
    assert marker.exists(), a.communicate()[1]
    b = subprocess.Popen([sys.executable, "-m", "qmap", *base, *second], stderr=subprocess.PIPE, text=True, env=env)
    _, err_a = a.communicate(timeout=120)
    _, err_b = b.communicate(timeout=120)
    return (a.returncode, err_a), (b.returncode, err_b)


def _files_of(out: Path, prefix: str) -> set[str]:
    """The files one run wrote: its provenance, the outputs it lists and their JSON sidecars."""
    outputs = json.loads((out / f"{prefix}_provenance.json").read_text())["outputs"]
    sidecars = {name[: -len(".nii.gz")] + ".json" for name in outputs if name.endswith(".nii.gz")}
    return {f"{prefix}_provenance.json", *outputs, *sidecars}


def _chunk_size_of(out: Path, prefix: str) -> int:
    return json.loads((out / f"{prefix}_provenance.json").read_text())["options"]["chunk_size"]


def test_two_real_processes_same_outputs_the_second_is_refused(series, tmp_path):
    """Two separate qmap processes, same folder and prefix, no --overwrite.

    The second starts while the first holds the folder (before the first has
    written anything, so its up-front check of existing outputs passes); it
    waits for the lock, re-checks under it, finds the first run's outputs and
    is refused with one line. The folder holds exactly the first run's files.
    """
    out = tmp_path / "out"
    (rc_a, err_a), (rc_b, err_b) = _two_processes(series, out, tmp_path, ["--prefix", "run", "--chunk-size", "100"],
                                                  ["--prefix", "run", "--chunk-size", "200"])
    assert rc_a == 0, err_a
    assert rc_b == 2, err_b
    lines = err_b.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err_b
    assert "exists already; pass --overwrite to replace it, or choose another -o" in lines[0]
    assert _chunk_size_of(out, "run") == 100  # the first run's record, not overwritten by the second
    assert {p.name for p in out.iterdir()} == _files_of(out, "run")  # no temporary or lock file


def test_two_real_processes_different_prefixes_take_turns(series, tmp_path):
    """Two separate qmap processes into one folder with different prefixes: both complete, neither mixes files."""
    out = tmp_path / "out"
    (rc_a, err_a), (rc_b, err_b) = _two_processes(series, out, tmp_path, ["--prefix", "a", "--chunk-size", "100"],
                                                  ["--prefix", "b", "--chunk-size", "200"])
    assert (rc_a, rc_b) == (0, 0), (err_a, err_b)
    assert _chunk_size_of(out, "a") == 100 and _chunk_size_of(out, "b") == 200
    # every output of both runs, no temporary or lock file left
    assert {p.name for p in out.iterdir()} == _files_of(out, "a") | _files_of(out, "b")
    # the same data and options give the same maps whichever process wrote them
    t2a = nib.load(out / "a_T2starmap.nii.gz").get_fdata()
    t2b = nib.load(out / "b_T2starmap.nii.gz").get_fdata()
    np.testing.assert_array_equal(t2a, t2b)
