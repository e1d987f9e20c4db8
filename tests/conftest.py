"""Shared fixtures: small synthetic NIfTI series written to tmp_path (no committed binaries)."""

from __future__ import annotations

import json
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import settings

# property-based tests: reproducible in CI (fixed example sequence) and no wall-clock deadline
settings.register_profile("qmap", deadline=None, derandomize=True)
settings.load_profile("qmap")


def write_nifti(path: Path, data, affine=None, sidecar: dict | None = None) -> Path:
    """Write ``data`` as NIfTI (float32 unless integer) with an optional BIDS sidecar."""
    path = Path(path)
    affine = np.diag([2.0, 2.0, 3.0, 1.0]) if affine is None else affine
    arr = np.asarray(data)
    if arr.dtype == np.float64:
        arr = arr.astype(np.float32)
    nib.save(nib.Nifti1Image(arr, affine), str(path))
    if sidecar is not None:
        name = path.name.removesuffix(".gz").removesuffix(".nii")
        (path.parent / f"{name}.json").write_text(json.dumps(sidecar))
    return path


def rician(signal, sigma, rng):
    """Magnitude of signal plus complex Gaussian noise (Gudbjartsson & Patz 1995)."""
    signal = np.asarray(signal, float)
    return np.abs(signal + rng.normal(0, sigma, signal.shape) + 1j * rng.normal(0, sigma, signal.shape))


def decay_phantom(shape=(32, 32, 3), te=None, *, sigma=5.0, seed=0, t2_range=(0.01, 0.06), m0=1000.0):
    """A disc of decaying signal (T2* rising along x) with a noise-only background."""
    rng = np.random.default_rng(seed)
    te = np.arange(1, 9) * 0.005 if te is None else np.asarray(te)
    x, y, _ = np.indices(shape)
    cx, cy = (shape[0] - 1) / 2, (shape[1] - 1) / 2
    obj = (x - cx) ** 2 + (y - cy) ** 2 < (0.3 * min(shape[:2])) ** 2
    t2 = np.where(obj, t2_range[0] + (t2_range[1] - t2_range[0]) * x / (shape[0] - 1), np.nan)
    sig = np.where(obj[..., None], m0 * np.exp(-te / np.where(obj, t2, 1.0)[..., None]), 0.0)
    data = rician(sig, sigma, rng) if sigma else sig
    return data, te, t2, obj


@pytest.fixture
def megre(tmp_path):
    """A 4D multi-echo GRE series with a list sidecar; returns (path, te, truth T2*, object mask)."""
    data, te, t2, obj = decay_phantom()
    path = write_nifti(tmp_path / "sub-01_MEGRE.nii.gz", data, sidecar={"EchoTime": te.tolist()})
    return path, te, t2, obj


def snapshot(folder: Path) -> dict:
    """File name -> bytes of every file below ``folder`` (to assert nothing changed)."""
    folder = Path(folder)
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def refused(argv: list, out: Path, capsys) -> str:
    """Run ``qmap ARGV -o OUT -q``: exit code 2, one line ``qmap: error: ...``, no traceback, OUT not created.

    Returns the error line.
    """
    from qmap.cli import main

    code = main([*map(str, argv), "-o", str(out), "-q"])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and err.startswith("qmap: error:") and "Traceback" not in err
    assert not out.exists()  # no output folder, no contents
    return err
