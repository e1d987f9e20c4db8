"""The exception family and the warning category (qmap.errors)."""

from __future__ import annotations

import threading
import warnings

import pytest

from qmap.cli import main
from qmap.errors import InputError, QmapError, QmapWarning, collecting_warnings, warn


def test_input_error_is_a_value_error():
    # library callers catch bad values the Python way (common practice: ValueError for a bad argument value)
    with pytest.raises(ValueError, match="bad"):
        raise InputError("bad")
    assert issubclass(InputError, QmapError)


def test_warn_issues_a_qmap_warning():
    with pytest.warns(QmapWarning, match="^something happened$"):
        warn("something happened")
    with warnings.catch_warnings():
        warnings.simplefilter("error", QmapWarning)
        with pytest.raises(QmapWarning):
            warn("now an exception")


def test_collecting_warnings_is_per_thread():
    seen: dict[str, list[str]] = {}

    def work(name: str) -> None:
        with collecting_warnings(emit=False) as got:
            for i in range(3):
                warn(f"{name}-{i}")
        seen[name] = got

    threads = [threading.Thread(target=work, args=(n,)) for n in ("a", "b", "c")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert seen == {n: [f"{n}-{i}" for i in range(3)] for n in ("a", "b", "c")}
    with pytest.warns(QmapWarning), collecting_warnings() as got:  # emit=True: collected and issued
        warn("both")
    assert got == ["both"]


def test_cli_prints_each_warning_as_one_line(tmp_path, capsys):
    # -j with --scheduler: a warning, then the (unreachable) scheduler makes it a usage error; the
    # warning is one line "qmap: warning: ..." whatever the caller's warning filters (errors here)
    rc = main(["t2star", str(tmp_path / "missing.nii.gz"), "--te", "5ms", "-o", str(tmp_path / "o"), "-j", "2",
               "--scheduler", "tcp://127.0.0.1:1"])
    err = capsys.readouterr().err.splitlines()
    assert rc == 2
    assert err[0] == "qmap: warning: -j is ignored with --scheduler (the cluster's workers do the work)"
