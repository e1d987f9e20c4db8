"""Reading NIfTI images and their BIDS sidecars, grid checks and resampling."""

from __future__ import annotations

import contextlib
import gzip
import json
import re
import weakref
import zlib
from pathlib import Path
from typing import Any

import nibabel as nib
import numpy as np

from ..errors import InputError
from . import gz as _gz  # noqa: F401  (registers ISA-L as nibabel's .gz opener)

__all__ = [
    "SlabReader",
    "check_same_grid",
    "image_data",
    "load_image",
    "read_sidecar",
    "resample_blocks",
    "resample_blocks_of",
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
    from . import readahead

    try:
        content = readahead.take(path)  # the file decompressed while the process started, or None
        raw = None if content is None else _scaled_from(img, content)
        if raw is None:
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


def _scaled_from(img, content: bytes) -> np.ndarray | None:
    """The voxel data of ``img`` from its file's decompressed ``content``: what ``np.asanyarray(img.dataobj)`` gives.

    The array is a read-only view of ``content`` (no copy) when no scaling applies, with the header's
    scaling applied otherwise exactly as nibabel's ``ArrayProxy`` applies it (the same steps, through
    nibabel's ``apply_read_scaling``; tested equal for integer data with slopes, floats and complex).
    None when nibabel would not read the data this way (not a plain array proxy) or ``content`` does
    not hold them all: the caller then reads the file as usual.
    """
    from nibabel.arrayproxy import ArrayProxy
    from nibabel.volumeutils import apply_read_scaling

    proxy = img.dataobj
    if type(proxy) is not ArrayProxy:
        return None
    shape, dtype, offset = proxy.shape, np.dtype(proxy.dtype), int(proxy.offset)
    n_bytes = int(np.prod(shape, dtype=np.int64)) * dtype.itemsize
    if len(content) < offset + n_bytes:  # not the whole image (the first of several gzip members): nibabel reads
        return None
    unscaled = np.ndarray(shape, dtype, buffer=content, offset=offset, order=proxy.order)
    # nibabel's ArrayProxy._get_scaled(dtype=None): scale factors cast to their own dtype where they fit
    slope, inter = np.asanyarray(proxy.slope), np.asanyarray(proxy.inter)
    if np.can_cast(slope, slope.dtype):
        slope = slope.astype(slope.dtype)
    if np.can_cast(inter, slope.dtype):
        inter = inter.astype(slope.dtype)
    return apply_read_scaling(unscaled, slope, inter)


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
                    order: int = 1, cval: float = np.nan, z: tuple[int, int] | None = None):
    """:func:`resample_to_grid` (``order`` >= 1) block by block: yields ``(start, values)``.

    ``values`` (float64, flat) are the resampled image's C-order elements ``start:start + values.size``: whole
    planes of the first axis, about :data:`RESAMPLE_BLOCK` voxels a block, so that the coordinates
    ((3, voxels) float64, 24 bytes a voxel) are never those of the whole grid. The values are the same as
    those of one call on the whole grid.

    With ``z = (z0, z1)`` only the destination slices ``z0:z1`` are resampled: the blocks are then the C-order
    elements of the (X, Y, z1 - z0) slab, each value the same as that voxel's in the whole grid (the
    resampling is pointwise: each voxel's source coordinates, then trilinear interpolation at them).
    """
    for start, (values,) in resample_blocks_of([data], src_affine, dst_shape, dst_affine, order=order, cval=cval, z=z):
        yield start, values


def resample_blocks_of(images: list, src_affine: np.ndarray, dst_shape: tuple[int, ...], dst_affine: np.ndarray, *,
                       order: int = 1, cval: float = np.nan, z: tuple[int, int] | None = None):
    """:func:`resample_blocks` of several images on one source grid: yields ``(start, [values of each])``.

    Each block's source coordinates are computed once for all the images (a B1 map and its coverage).
    """
    images = [np.asarray(d, float) for d in images]
    if any(d.ndim != 3 for d in images):
        raise InputError(f"expected a 3D image to resample, got shape {next(d.shape for d in images if d.ndim != 3)}")
    if any(d.shape != images[0].shape for d in images):
        raise ValueError("images resampled together share one grid")
    dst_shape = tuple(int(s) for s in dst_shape[:3])
    z0, z1 = (0, dst_shape[2]) if z is None else (int(z[0]), int(z[1]))
    if not 0 <= z0 <= z1 <= dst_shape[2]:
        raise ValueError(f"z={z}: not a range of slices of a grid of {dst_shape[2]}")
    mat = np.linalg.inv(np.asarray(src_affine, float)) @ np.asarray(dst_affine, float)
    plane = dst_shape[1] * (z1 - z0)
    step = max(1, RESAMPLE_BLOCK // max(1, plane))
    for x0 in range(0, dst_shape[0], step):
        coords, inside = _block_coordinates(mat, images[0].shape, dst_shape, x0, min(x0 + step, dst_shape[0]), z0, z1)
        yield x0 * plane, [_interpolate(d, coords, inside, order, cval) for d in images]


#: destination voxels resampled at a time by :func:`resample_blocks` (their coordinates: 24 bytes a voxel, 1.5 MB)
RESAMPLE_BLOCK = 1 << 16


def _resample_block(data: np.ndarray, mat: np.ndarray, dst_shape: tuple[int, ...], x0: int, x1: int,
                    order: int, cval: float, z0: int = 0, z1: int | None = None) -> np.ndarray:
    """The destination voxels ``[x0:x1, :, z0:z1]`` of :func:`resample_to_grid`, flat in C order."""
    coords, inside = _block_coordinates(mat, data.shape, dst_shape, x0, x1, z0, dst_shape[2] if z1 is None else z1)
    return _interpolate(data, coords, inside, order, cval)


def _block_coordinates(mat: np.ndarray, src_shape: tuple[int, ...], dst_shape: tuple[int, ...], x0: int, x1: int,
                       z0: int, z1: int) -> tuple[np.ndarray, np.ndarray]:
    """The source coordinates of the destination voxels ``[x0:x1, :, z0:z1]`` (C order), clamped to the edge
    voxel centres, and whether each lies inside the source field of view (within half a voxel of it)."""
    idx = np.indices((x1 - x0, dst_shape[1], z1 - z0), dtype=float)
    idx[0] += x0
    idx[2] += z0
    idx = idx.reshape(3, -1)
    src = mat[:3, :3] @ idx
    del idx
    src += mat[:3, 3:4]  # in place
    edge = np.array(src_shape, float)[:, None]
    inside = np.all((src >= -0.5) & (src <= edge - 0.5), axis=0)
    # clamp to the edge voxel centres so edge voxels are not blended with cval
    return np.clip(src, 0, edge - 1, out=src), inside


def _interpolate(data: np.ndarray, coords: np.ndarray, inside: np.ndarray, order: int, cval: float) -> np.ndarray:
    """``data`` at the clamped source coordinates ``coords``; ``cval`` where not ``inside``."""
    if order == 0:
        ii = np.rint(coords).astype(np.intp)
        out = data[ii[0], ii[1], ii[2]]
    else:
        from scipy import ndimage  # imported on use (start-up time)

        out = ndimage.map_coordinates(data, coords, order=order, mode="nearest")
    if not inside.all():
        if np.isnan(cval) and not np.issubdtype(out.dtype, np.floating):
            out = out.astype(float)
        out[~inside] = cval
    return out


class SlabReader:
    """The z slabs of one NIfTI image, read in file order through one open gzip stream.

    nibabel reads each slice range of a ``.nii.gz`` image by opening the file and decompressing it from the
    start up to the range: reading a volume in ``n`` slabs decompresses it about ``n / 2`` times. This reader
    keeps the stream open between calls of :meth:`read` and decompresses forward only, as long as the slabs
    come in file order (a slab before the last one read opens the file again). The values are nibabel's
    (the same :class:`nibabel.arrayproxy.ArrayProxy` slicing and scaling -- ``scl_slope`` / ``scl_inter``,
    integer storage -- on the open stream). Reading the last slice closes the stream, which checks the gzip
    CRC-32 and length (:mod:`qmap.io.gz`): a corrupt or truncated file raises as it does with nibabel.
    Uncompressed files are read through the image's own proxy (a seek is cheap there).

    Parameters
    ----------
    img : nibabel image
        A NIfTI image loaded from a file (:func:`load_image`), 3D or with trailing axes of length 1.

    Examples
    --------
    ``reader.read(z0, z1)`` is ``np.asanyarray(img.dataobj[:, :, z0:z1])`` (with ``[..., 0]`` for each
    trailing axis), decompressed once for a pass over the slabs in z order.
    """

    def __init__(self, img) -> None:
        from nibabel.arrayproxy import ArrayProxy

        self.img = img
        proxy = img.dataobj
        self.nz = int(img.shape[2]) if len(img.shape) > 2 else 1  # a 2D image: one slice
        self._extra = (0,) * max(0, len(img.shape) - 3)  # trailing axes of length 1
        self._flat = len(img.shape) == 2
        file_like = getattr(proxy, "file_like", None)
        self._gz = (type(proxy) is ArrayProxy and isinstance(file_like, str) and file_like.endswith(".gz"))
        self._spec: tuple = ()
        self._order = "F"
        self._path = ""
        if self._gz:
            self._spec = (tuple(proxy.shape), proxy.dtype, proxy.offset, proxy.slope, proxy.inter)
            self._order = proxy.order
            self._path = str(file_like)
        self._stream: tuple[Any, Any] | None = None  # (open gzip file, ArrayProxy on it)
        self._next = 0  # the slice the open stream is at
        self._finalizer: weakref.finalize | None = None

    def read(self, z0: int, z1: int) -> np.ndarray:
        """The slices ``z0:z1`` as nibabel gives them (scaled; shape (X, Y, z1 - z0); a 2D image is one slice).

        Raises what nibabel raises for a corrupt file (``OSError``, ``EOFError``, ``zlib.error``, ...;
        :func:`image_data` turns them into one clear :class:`~qmap.errors.InputError`).
        """
        slicer = (slice(None), slice(None), slice(z0, z1), *self._extra)
        if self._flat:  # (X, Y): its one slice
            slicer = (slice(None), slice(None)) if (z0, z1) == (0, 1) else (slice(None), slice(0, 0))
        if not self._gz:
            raw = np.asanyarray(self.img.dataobj[slicer])
            return raw[:, :, None] if self._flat else raw
        if self._stream is None or z0 < self._next:
            self._reopen()
        assert self._stream is not None
        try:
            raw = np.asanyarray(self._stream[1][slicer])
            if self._flat:
                raw = raw[:, :, None]
            self._next = z1
            if z1 >= self.nz:  # the whole data block was read: closing checks the CRC-32 and length
                self.close()
        except BaseException:
            self._drop()
            raise
        return raw

    def _reopen(self) -> None:
        from nibabel.arrayproxy import ArrayProxy

        from .gz import gzip_open

        self._drop()
        fh = gzip_open(self._path, "rb")
        self._stream = (fh, ArrayProxy(fh, self._spec, mmap=False, order=self._order))
        self._next = 0
        # a reader dropped before its last slab (an error elsewhere) closes its file without a word
        self._finalizer = weakref.finalize(self, _close_quietly, fh)

    def close(self) -> None:
        """Close the stream (after the last slice: checks the gzip CRC-32 and length; raises on a mismatch)."""
        fh = self._forget()
        if fh is not None:
            try:
                fh.close()
            finally:
                if not fh.closed:
                    _close_quietly(fh)

    def _drop(self) -> None:
        """Close the stream without checking anything (a rewind, or after an error)."""
        fh = self._forget()
        if fh is not None:
            _close_quietly(fh)

    def _forget(self):
        """The open file (None if none), no longer the reader's (its finaliser detached)."""
        if self._stream is None:
            return None
        fh = self._stream[0]
        self._stream = None
        if self._finalizer is not None:
            self._finalizer.detach()
            self._finalizer = None
        return fh


def _close_quietly(fh) -> None:
    """Close a gzip file opened for reading and its file, whatever state it is in (no CRC check)."""
    raw = getattr(fh, "myfileobj", None)
    if hasattr(fh, "_isize"):
        fh._isize = -1  # qmap.io.gz: no check of the rest of the stream
    with contextlib.suppress(Exception):  # closing after an error: the first error is the one reported
        fh.close()
    if raw is not None and not raw.closed:
        raw.close()
