"""The code stays type-checked and lint-clean: ``mypy qmap`` and ``ruff check qmap tests scripts`` pass.

Both tools are in the ``test`` extra (pinned to a minor series in pyproject.toml, because new releases
add checks) and take their settings from pyproject.toml (``[tool.mypy]``, ``[tool.ruff]``). They run
as subprocesses from the repository root, exactly as a developer runs them.

mypy keeps its incremental cache in the default ``.mypy_cache/`` of the repository root: a fresh
checkout (as CI uses) checks everything from scratch, a developer's second run re-checks only what
changed. The cache is keyed on the content of every module, the mypy version and the settings, so a
warm cache gives the same verdict as a cold one.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", *args], cwd=ROOT, capture_output=True, text=True, check=False,
                          timeout=600)


def _report(proc: subprocess.CompletedProcess) -> str:
    return f"exit {proc.returncode}\n--- stdout ---\n{proc.stdout}\n--- stderr ---\n{proc.stderr}"


def test_mypy_reports_no_error_in_qmap():
    proc = _run("mypy", "qmap")
    assert proc.returncode == 0, _report(proc)
    assert "Success: no issues found" in proc.stdout, _report(proc)


def test_ruff_finds_nothing_in_qmap_tests_scripts():
    proc = _run("ruff", "check", "--no-fix", "qmap", "tests", "scripts")
    assert proc.returncode == 0, _report(proc)
    assert "All checks passed" in proc.stdout, _report(proc)
