"""Writing a simulated data set: BIDS-style series with sidecars, ground truth, labels, manifest.

Layout under the output folder (``S`` = subject label, default the phantom name)::

    dataset_description.json
    simulation.json                       what was simulated (the manifest)
    phantom_reference.csv                 vials only: truth at two temperatures
    phantom_layout.csv                    vials only: vial positions for qmap phantom --layout
    sub-S/anat/sub-S_inv-<i>_IRT1.nii.gz  one 3D file + sidecar per volume
    sub-S/anat/sub-S_flip-<i>_VFA.nii.gz
    sub-S/anat/sub-S_echo-<i>_MESE.nii.gz
    sub-S/anat/sub-S_echo-<i>_MEGRE.nii.gz
    sub-S/anat/sub-S_desc-truth_<P>map.nii.gz   ground truth: T1, T2, T2star, PD, TB1
    sub-S/anat/sub-S_desc-<phantom>_dseg.nii.gz (+ .tsv)   label image
    sub-S/fmap/sub-S_flip-<i>_TB1DAM.nii.gz     (or acq-tr1/acq-tr2 _TB1AFI) low resolution
    sub-S/fmap/sub-S_TB1map.nii.gz              the true B1 field on the low-resolution grid

The folder is assembled under a temporary name next to the target and
renamed into place at the end, so a failed run leaves nothing behind.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import nibabel as nib
import numpy as np

from ..errors import OutputError, OutputExistsError
from ..io.writer import json_default

__all__ = ["StagedFolder", "save_json", "save_nifti", "volume_names"]


class StagedFolder:
    """A folder built under a temporary name and moved to ``target`` on :meth:`commit`."""

    def __init__(self, target: str | Path, *, overwrite: bool = False):
        self.target = Path(target).absolute()
        if self.target.exists() and not self.target.is_dir():
            raise OutputError(f"out_dir={self.target}: exists and is not a folder; choose another folder")
        if self.target.is_dir() and any(self.target.iterdir()) and not overwrite:
            raise OutputExistsError(f"out_dir={self.target}: the folder is not empty; pass overwrite=True to replace "
                                    f"it, or choose another folder")
        self.tmp = self.target.with_name(f".{self.target.name}.qmap-tmp-{os.getpid()}")
        self._created: list[Path] = []  # parent folders this run made (removed again unless committed)
        self._committed = False

    def __enter__(self):
        try:
            p = self.target.parent
            while not p.exists():
                self._created.append(p)
                p = p.parent
            self.target.parent.mkdir(parents=True, exist_ok=True)
            if self.tmp.exists():
                shutil.rmtree(self.tmp)
            self.tmp.mkdir()
        except OSError as exc:
            raise OutputError(f"cannot create {self.target} ({exc.strerror}); choose another -o") from None
        return self

    def __exit__(self, exc_type, exc, tb):
        if self.tmp.exists():
            shutil.rmtree(self.tmp, ignore_errors=True)
        if not self._committed:
            for d in self._created:  # deepest first
                try:
                    d.rmdir()
                except OSError:
                    break
        return False

    def path(self, rel: str) -> Path:
        p = self.tmp / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        return p

    def commit(self) -> Path:
        old = None
        if self.target.exists():
            old = self.target.with_name(f".{self.target.name}.qmap-old-{os.getpid()}")
            os.replace(self.target, old)
        os.replace(self.tmp, self.target)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
        self._committed = True
        return self.target


def save_nifti(path: Path, data: np.ndarray, affine: np.ndarray, *, dtype=np.float32, intent: str | None = None) -> None:
    """Write ``data`` with ``affine`` (qform and sform, mm and s units) to ``path``."""
    img = nib.Nifti1Image(np.asarray(data, dtype=dtype), affine)
    img.set_qform(affine, code=1)
    img.set_sform(affine, code=1)
    img.header.set_xyzt_units("mm", "sec")
    if intent:
        img.header.set_intent(intent)
    try:
        nib.save(img, str(path))
    except OSError as exc:
        raise OutputError(f"cannot write {path} ({exc.strerror}); check free space and permissions") from None


def save_json(path: Path, obj) -> None:
    try:
        with open(path, "w", encoding="utf-8") as fh:
            json.dump(obj, fh, indent=2, default=json_default)
            fh.write("\n")
    except OSError as exc:
        raise OutputError(f"cannot write {path} ({exc.strerror}); check free space and permissions") from None




def volume_names(n: int, labels: list | None = None) -> list[str]:
    """Entity values of ``n`` volumes: ``1..n``, zero-padded so that file names sort in order."""
    if labels is not None:
        return list(labels)
    width = len(str(n)) if n >= 10 else 1
    return [f"{k:0{width}d}" for k in range(1, n + 1)]
