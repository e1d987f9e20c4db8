"""Start-up: what a ``--help`` and a plain fit import (checked in a fresh interpreter via ``sys.modules``).

``--help`` must not load numpy / scipy / nibabel (it is read by a person waiting at a terminal); a fit must
not load scipy.stats, matplotlib or dask unless it uses them (previews, the Dask backend), and a T2* fit of
one-coil data not scipy.special either (:mod:`qmap.special` has what it needs; that import held the
interpreter lock for ~0.1 s of a 1 s run).
"""

from __future__ import annotations

import json
import subprocess
import sys

from tests.conftest import decay_phantom, write_nifti

_PROBE = """
import contextlib, io, json, sys
from qmap.cli import main
out = io.StringIO()
with contextlib.redirect_stdout(out), contextlib.redirect_stderr(io.StringIO()):
    rc = [main(argv) for argv in json.loads(sys.argv[1])]
heavy = ("numpy", "scipy", "scipy.stats", "scipy.optimize", "scipy.special", "nibabel", "matplotlib", "dask", "distributed",
         "lmfit")
print(json.dumps({"rc": rc, "loaded": [m for m in heavy if m in sys.modules]}))
"""


def _probe(*argvs: list[str]) -> dict:
    """Run the command lines one after the other in one fresh interpreter; exit codes and heavy modules loaded."""
    res = subprocess.run([sys.executable, "-c", _PROBE, json.dumps(argvs)], capture_output=True, text=True,
                         check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def test_help_imports_no_numerical_library():
    got = _probe(*([c, "--help"] for c in ("t2star", "t2", "t1-ir", "t1-vfa", "b1")))
    assert got["rc"] == [0] * 5
    assert got["loaded"] == []
    # `qmap --help` loads every command's parser: still no plotting, statistics or cluster stack
    got = _probe(["--help"])
    assert got["rc"] == [0]
    assert not {"matplotlib", "dask", "distributed", "scipy.stats", "lmfit"} & set(got["loaded"]), got["loaded"]


def test_a_fit_imports_no_stats_plotting_or_cluster(tmp_path):
    data, te, _, _ = decay_phantom(shape=(32, 32, 2))
    path = write_nifti(tmp_path / "s_MEGRE.nii.gz", data, sidecar={"EchoTime": te.tolist()})
    run = ["t2star", str(path), "-q", "-j", "1"]
    # plain fit, and the default (Rician with sigma estimated from the background)
    got = _probe(run + ["-o", str(tmp_path / "a"), "--noise-floor", "none"], run + ["-o", str(tmp_path / "b")])
    assert got["rc"] == [0, 0]
    assert "numpy" in got["loaded"]  # the probe sees real imports
    assert not {"scipy.stats", "matplotlib", "dask", "distributed", "lmfit"} & set(got["loaded"]), got["loaded"]
    # the noise level (background and residual estimates) and the Rician fit of one coil: no scipy.special
    assert "scipy.special" not in got["loaded"], got["loaded"]


_BLAS_PROBE = """
import json, os, sys
from qmap.cli import _one_blas_thread
_one_blas_thread()
import numpy  # noqa: F401 (loads the BLAS library, which reads the setting)
from threadpoolctl import threadpool_info
blas = [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas" and "numpy" in i["filepath"]]
print(json.dumps({"env": os.environ.get("OPENBLAS_NUM_THREADS"), "threads": blas}))
"""


def _blas_probe(env: dict) -> dict:
    import os

    clean = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")}
    res = subprocess.run([sys.executable, "-c", _BLAS_PROBE], capture_output=True, text=True, check=True,
                         env={**clean, **env})
    return json.loads(res.stdout.strip().splitlines()[-1])


def test_the_program_runs_one_blas_thread_unless_the_user_chose():
    # qmap's own workers (-j) do the parallel work; the program's BLAS keeps to one thread
    got = _blas_probe({})
    assert got["env"] == "1"
    assert got["threads"] in ([1], [])  # [] where numpy's BLAS is not OpenBLAS (threadpoolctl sees it as another)
    # a setting of the user's is kept as it is
    assert _blas_probe({"OPENBLAS_NUM_THREADS": "2"})["env"] == "2"
    assert _blas_probe({"OMP_NUM_THREADS": "2"})["env"] is None
