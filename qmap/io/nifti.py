"""Reading NIfTI images and their BIDS sidecars, grid checks and resampling."""

from __future__ import annotations

import gzip
import json
import re
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np

from ..errors import InputError
from . import gz as _gz  # noqa: F401  (registers ISA-L as nibabel's .gz opener)

__all__ = [
    "check_same_grid",
    "image_data",
    "load_image",
    "read_sidecar",
    "resample_blocks",
    "resample_to_grid",
    "same_grid",
    "sidecar_path",
    "split_bids_stem",
]

#: Affines may differ by this much (mm, and unitless for the rotation part)
#: and still count as the same grid (rounding in DICOM converters).
AFFINE_TOL = 1e-3

#: a BIDS label (the value of an entity): alphanumeric
_BIDS_LABEL = re.compile(r"^[0-9a-zA-Z]+$")


def sidecar_path(path: str | Path) -> Path:
    """The BIDS JSON sidecar next to a NIfTI file (``x.nii.gz`` -> ``x.json``)."""
    p = Path(path)
    name = p.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            return p.with_name(name[: -len(ext)] + ".json")
    return p.with_suffix(".json")


def split_bids_stem(stem: str) -> tuple[list[tuple[str, str]], str] | None:
    """Entities (in name order) and suffix of a BIDS file name without extension; None when it is not one.

    ``sub-01_ses-1_echo-2_MEGRE`` -> ``([("sub", "01"), ("ses", "1"), ("echo", "2")], "MEGRE")``: every
    part but the last is ``key-label`` (alphanumeric), no key twice.
    """
    parts = stem.split("_")
    if len(parts) < 2:
        return None
    entities = []
    for part in parts[:-1]:
        key, sep, value = part.partition("-")
        if not sep or not key.isalnum() or not _BIDS_LABEL.match(value):
            return None
        entities.append((key, value))
    if len({k for k, _ in entities}) != len(entities):
        return None
    return entities, parts[-1]


def read_sidecar(path: str | Path) -> dict:
    """Read the JSON sidecar of ``path`` if it exists (``{}`` otherwise)."""
    sc = sidecar_path(path)
    if not sc.exists():
        return {}
    try:
        with open(sc, encoding="utf-8") as fh:
            meta = json.load(fh)
    except (OSError, ValueError) as exc:
        raise InputError(f"{sc}: not a readable JSON sidecar ({exc}); fix or remove the file") from None
    if not isinstance(meta, dict):
        raise InputError(f"{sc}: a BIDS sidecar must hold a JSON object, found {type(meta).__name__}")
    return meta


def load_image(path: str | Path, *, what: str = "input") -> nib.spatialimages.SpatialImage:
    """Open a NIfTI image lazily, turning every failure into a one-line :class:`InputError`.

    ``what`` names the file in messages: an option (``"--b1"``: ``--b1 PATH: ...``) or a library
    argument (``"b1="``: ``b1=PATH: ...``, which the command line shows as its option).
    """
    p = Path(path)
    what = what if what.endswith("=") else f"{what} "
    if not p.exists():
        raise InputError(f"{what}{p}: no such file; check the path")
    if p.is_dir():
        raise InputError(f"{what}{p}: is a folder, expected a NIfTI file (.nii or .nii.gz)")
    try:
        img = nib.load(str(p))
    except Exception as exc:  # noqa: BLE001 -- nibabel raises many types for unreadable files
        raise InputError(
            f"{what}{p}: not a readable NIfTI file ({_short(exc)}); qmap reads .nii / .nii.gz "
            f"(convert DICOM first)"
        ) from None
    if not isinstance(img, (nib.Nifti1Image, nib.Nifti2Image)):
        raise InputError(f"{what}{p}: is a {type(img).__name__}, expected NIfTI (.nii / .nii.gz)")
    return img


def image_data(img, path: str | Path, *, dtype=np.float64, allow_complex: bool = False) -> np.ndarray:
    """Read the voxel data (scaling slopes honoured), with clear errors for corrupt files."""
    try:
        raw = np.asanyarray(img.dataobj)
    except (EOFError, OSError, ValueError, zlib.error, gzip.BadGzipFile) as exc:
        raise InputError(f"{path}: the image data cannot be read ({_short(exc)}); the file is truncated or corrupt") from None
    if np.iscomplexobj(raw):
        if not allow_complex:
            raise InputError(
                f"{path}: holds complex data but this fit expects magnitude images; "
                f"pass the magnitude (abs) series, or use a command that accepts complex data (t1-ir --signal complex)"
            )
        return raw.astype(np.complex128 if dtype == np.float64 else np.complex64, copy=False)
    if raw.dtype.fields is not None:
        raise InputError(f"{path}: holds structured (e.g. RGB) voxels, expected scalar intensities")
    return raw.astype(dtype, copy=False)


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return (text[0] if text else type(exc).__name__)[:160]


def same_grid(shape_a, affine_a, shape_b, affine_b, tol: float = AFFINE_TOL) -> bool:
    """True when two images share a voxel grid (3D shape and affine within ``tol``)."""
    return tuple(shape_a[:3]) == tuple(shape_b[:3]) and np.allclose(affine_a, affine_b, atol=tol, rtol=0)


def check_same_grid(ref_shape, ref_affine, shape, affine, *, ref_name: str, name: str) -> None:
    """Raise :class:`InputError` when ``name`` is not on the grid of ``ref_name``."""
    if tuple(shape[:3]) != tuple(ref_shape[:3]):
        raise InputError(
            f"{name}: grid {tuple(shape[:3])} differs from {ref_name} {tuple(ref_shape[:3])}; "
            f"all inputs of a series must share one voxel grid (resample them first)"
        )
    if not np.allclose(affine, ref_affine, atol=AFFINE_TOL, rtol=0):
        d = float(np.max(np.abs(np.asarray(affine) - np.asarray(ref_affine))))
        raise InputError(
            f"{name}: affine differs from {ref_name} by up to {d:.3g} mm; all inputs of a series must "
            f"share one voxel grid (were they acquired or converted separately?)"
        )


def resample_to_grid(
    data: np.ndarray,
    src_affine: np.ndarray,
    dst_shape: tuple[int, ...],
    dst_affine: np.ndarray,
    *,
    order: int = 1,
    cval: float = np.nan,
) -> np.ndarray:
    """Resample a 3D array onto another voxel grid through the two affines.

    Parameters
    ----------
    data : (X, Y, Z) ndarray
        Source image.
    src_affine, dst_affine : (4, 4) ndarray
        Voxel-to-world affines of the source and the destination grid.
    dst_shape : tuple
        Shape of the destination grid (the first three entries are used).
    order : int
        0 = nearest neighbour (labels), 1 = trilinear (B1 maps).
    cval : float
        Value given to destination voxels outside the source field of view.

    Returns
    -------
    (X', Y', Z') ndarray
        The resampled image; voxels whose centre lies outside the source field
        of view (more than half a voxel beyond its edge) get ``cval``.
    """
    data = np.asarray(data)
    if data.ndim != 3:
        raise InputError(f"expected a 3D image to resample, got shape {data.shape}")
    dst_shape = tuple(int(s) for s in dst_shape[:3])
    # destination voxel -> world -> source voxel
    mat = np.linalg.inv(np.asarray(src_affine, float)) @ np.asarray(dst_affine, float)
    if order == 0:  # (labels: small images; the output's dtype depends on the whole grid)
        return _resample_block(data, mat, dst_shape, 0, dst_shape[0], order, cval).reshape(dst_shape)
    out = np.empty(int(np.prod(dst_shape)), float)
    for start, block in resample_blocks(data, src_affine, dst_shape, dst_affine, order=order, cval=cval):
        out[start:start + block.size] = block
    return out.reshape(dst_shape)


def resample_blocks(data: np.ndarray, src_affine: np.ndarray, dst_shape: tuple[int, ...], dst_affine: np.ndarray, *,
                    order: int = 1, cval: float = np.nan):
    """:func:`resample_to_grid` (``order`` >= 1) block by block: yields ``(start, values)``.

    ``values`` (float64, flat) are the resampled image's C-order elements ``start:start + values.size``: whole
    planes of the first axis, about :data:`RESAMPLE_BLOCK` voxels a block, so that the coordinates
    ((3, voxels) float64, 24 bytes a voxel) are never those of the whole grid. The values are the same as
    those of one call on the whole grid.
    """
    data = np.asarray(data, float)
    if data.ndim != 3:
        raise InputError(f"expected a 3D image to resample, got shape {data.shape}")
    dst_shape = tuple(int(s) for s in dst_shape[:3])
    mat = np.linalg.inv(np.asarray(src_affine, float)) @ np.asarray(dst_affine, float)
    plane = dst_shape[1] * dst_shape[2]
    step = max(1, RESAMPLE_BLOCK // max(1, plane))
    for x0 in range(0, dst_shape[0], step):
        yield x0 * plane, _resample_block(data, mat, dst_shape, x0, min(x0 + step, dst_shape[0]), order, cval)


#: destination voxels resampled at a time by :func:`resample_to_grid` (its coordinates: 24 bytes a voxel)
RESAMPLE_BLOCK = 1 << 18


def _resample_block(data: np.ndarray, mat: np.ndarray, dst_shape: tuple[int, ...], x0: int, x1: int,
                    order: int, cval: float) -> np.ndarray:
    """The destination planes ``x0:x1`` (first axis) of :func:`resample_to_grid`, flat in C order."""
    idx = np.indices((x1 - x0, dst_shape[1], dst_shape[2]), dtype=float)
    idx[0] += x0
    idx = idx.reshape(3, -1)
    src = mat[:3, :3] @ idx
    del idx
    src += mat[:3, 3:4]  # in place
    src_shape = np.array(data.shape, float)[:, None]
    inside = np.all((src >= -0.5) & (src <= src_shape - 0.5), axis=0)
    # clamp to the edge voxel centres so edge voxels are not blended with cval
    srcc = np.clip(src, 0, src_shape - 1, out=src)
    if order == 0:
        ii = np.rint(srcc).astype(np.intp)
        out = data[ii[0], ii[1], ii[2]]
    else:
        from scipy import ndimage  # imported on use (start-up time)

        out = ndimage.map_coordinates(data, srcc, order=order, mode="nearest")
    if not inside.all():
        if np.isnan(cval) and not np.issubdtype(out.dtype, np.floating):
            out = out.astype(float)
        out[~inside] = cval
    return out
