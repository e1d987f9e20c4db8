"""Loading the phantom inputs: parameter maps (parameter and unit) and integer label images."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.nifti import image_data, load_image, read_sidecar, resample_to_grid, same_grid
from .quantities import PARAMETERS, canonical_param, default_unit, sidecar_unit

__all__ = ["MapInput", "labels_on_grid", "load_labels", "load_map", "param_from_name"]

_SUFFIX = re.compile(r"(?:^|[_-])(" + "|".join(sorted(PARAMETERS, key=len, reverse=True)) + r")map\.nii(?:\.gz)?$")


@dataclass
class MapInput:
    """One parameter map.

    Attributes
    ----------
    path : Path
    param : str
        ``T1``, ``T2``, ``T2star``, ``R1``, ...
    unit : str
        Canonical unit of the voxel values (``s``, ``ms``, ``1/s``, ...).
    unit_source : str
        ``"sidecar"`` or ``"default"`` (no sidecar ``Units``: seconds for times).
    param_source : str
        ``"--param"``, ``"file name"`` or ``"sidecar"``.
    data : (X, Y, Z) ndarray of float64
    affine : (4, 4) ndarray
    sidecar : dict
    """

    path: Path
    param: str
    unit: str
    unit_source: str
    param_source: str
    data: np.ndarray
    affine: np.ndarray
    sidecar: dict = field(default_factory=dict)

    @property
    def zooms(self) -> np.ndarray:
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))


def param_from_name(path: str | Path) -> str | None:
    """The parameter named by a BIDS-style suffix: ``sub-01_T1map.nii.gz`` -> ``T1``; else None."""
    m = _SUFFIX.search(Path(path).name)
    return m.group(1) if m else None


def _volume(img, path, what) -> np.ndarray:
    shape = img.shape
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    if len(shape) == 2:
        shape = shape + (1,)
    if len(shape) != 3:
        raise InputError(f"{what} {path}: has shape {img.shape}; expected one 3D volume")
    return shape


def load_map(path: str | Path, param: str | None = None) -> MapInput:
    """Load one parameter map; the parameter from ``param``, the file name or the sidecar ``Parameter``."""
    p = Path(path)
    img = load_image(p, what="--map")
    shape = _volume(img, p, "--map")
    side = read_sidecar(p)
    if "desc-stderr" in p.name or str(side.get("Kind", "")).lower() == "stderr":
        raise InputError(f"--map {p}: is a standard-error map; give the estimate map ({p.name.replace('desc-stderr_', '')})")
    if param is not None:
        canon, source = canonical_param(param), "--param"
        if canon is None:
            raise InputError(f"--param {param!r}: unknown parameter; use one of {', '.join(PARAMETERS)}")
    else:
        canon, source = param_from_name(p), "file name"
        if canon is None and isinstance(side.get("Parameter"), str):
            canon, source = canonical_param(side["Parameter"]), "sidecar"
        if canon is None:
            raise InputError(f"--map {p}: cannot tell which parameter it holds from its name; name it like "
                             f"sub-01_T1map.nii.gz or give --param T1 right after this --map")
    if "Units" in side:
        unit, usource = sidecar_unit(canon, side["Units"], where=f"--map {p}"), "sidecar"
    else:
        unit, usource = default_unit(canon), "default"
    data = image_data(img, p).reshape(shape)
    return MapInput(p, canon, unit, usource, source, data, np.asarray(img.affine, float), side)


def load_labels(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """Load an integer label image (0 = background).

    Returns
    -------
    labels : (X, Y, Z) ndarray of int64
    affine : (4, 4) ndarray

    Raises
    ------
    InputError
        Non-integer, negative or non-finite values, or no label at all.
    """
    p = Path(path)
    img = load_image(p, what="--labels")
    shape = _volume(img, p, "--labels")
    raw = image_data(img, p).reshape(shape)
    if not np.all(np.isfinite(raw)):
        raise InputError(f"--labels {p}: contains NaN or infinite values; a label image holds integers (0 = background)")
    rounded = np.rint(raw)
    bad = np.abs(raw - rounded) > 1e-3
    if bad.any():
        example = float(raw[bad][0])
        raise InputError(f"--labels {p}: holds non-integer values (e.g. {example:.4g} in {int(bad.sum())} voxels); "
                         f"expected an integer label image (0 = background, 1..N = vials), not a probability or "
                         f"parameter map")
    if rounded.min() < 0:
        raise InputError(f"--labels {p}: holds negative values (min {int(rounded.min())}); labels are 0 (background) "
                         f"or positive integers")
    labels = rounded.astype(np.int64)
    if not labels.any():
        raise InputError(f"--labels {p}: holds no label (every voxel is 0)")
    return labels, np.asarray(img.affine, float)


def labels_on_grid(labels: np.ndarray, affine: np.ndarray, shape, target_affine) -> tuple[np.ndarray, bool]:
    """The label image on a map's grid (nearest neighbour through the affines); also whether it was resampled."""
    if same_grid(labels.shape, affine, shape, target_affine):
        return labels, False
    out = resample_to_grid(labels, affine, tuple(shape[:3]), target_affine, order=0, cval=0)
    return np.asarray(out).astype(np.int64), True
