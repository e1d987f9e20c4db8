"""Writing maps, sidecars and provenance -- atomically.

Every file is first written under a temporary name in the output folder and
re-read to check it (shape, affine, finite where the status is 0). Only when
all of them succeeded are they renamed to their final names; existing files
(with ``overwrite``) are moved aside first and restored if anything fails, so
an interrupted or failed run leaves the output folder exactly as it was.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
import shutil
import time
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import nibabel as nib
import numpy as np
from nibabel.openers import ImageOpener

from ..errors import OutputError, OutputExistsError
from .nifti import sidecar_path

if TYPE_CHECKING:
    from concurrent.futures import Executor

__all__ = ["AtomicWriter", "NiftiStream", "OutputFile", "existing_outputs", "is_output_of", "map_filename", "nifti_for",
           "nifti_header", "sha256_file"]

#: number of successful commits in this process (lets the command line tell an interrupt that came
#: after the outputs were in place from one that left the output folder untouched)
COMMITS = 0

#: lock file that serialises the writing of outputs by several qmap processes into one folder
LOCK_NAME = ".qmap-lock"
#: seconds a run waits for another qmap process to finish writing into the same folder before giving up
LOCK_WAIT_S = 60.0

NIFTI_INTENT = {"estimate": "estimate", "stderr": "estimate", "quality": "none", "status": "label"}


def map_filename(prefix: str, param: str, kind: str) -> str:
    """File name of a map: ``{prefix}_{P}map``, ``{prefix}_desc-stderr_{P}map``, ``{prefix}_desc-{q}_fitmap``."""
    if kind == "estimate":
        return f"{prefix}_{param}map.nii.gz"
    if kind == "stderr":
        return f"{prefix}_desc-stderr_{param}map.nii.gz"
    if kind == "quality":
        return f"{prefix}_desc-{param}_fitmap.nii.gz"
    if kind == "status":
        return f"{prefix}_desc-status_fitmap.nii.gz"
    raise ValueError(kind)


def stderr_map_beside(path) -> Path | None:
    """The standard-error map written beside a map, if there is one.

    A fitting command writes ``{prefix}_{P}map.nii.gz`` and
    ``{prefix}_desc-stderr_{P}map.nii.gz``; for any map named
    ``{stem}_{suffix}.nii[.gz]`` this looks for
    ``{stem}_desc-stderr_{suffix}.nii[.gz]``.
    """
    path = Path(path)
    name = path.name
    for ext in (".nii.gz", ".nii"):
        if name.endswith(ext):
            base = name[: -len(ext)]
            break
    else:
        return None
    stem, sep, suffix = base.rpartition("_")
    if not sep or "desc-" in base:
        return None
    for ext in (".nii.gz", ".nii"):
        cand = path.with_name(f"{stem}_desc-stderr_{suffix}{ext}")
        if cand.exists():
            return cand
    return None


@dataclass
class OutputFile:
    """One NIfTI output: data plus what provenance and the sidecar say about it."""

    name: str
    data: np.ndarray | None  # None: a map streamed into its file slab by slab (NiftiStream)
    parameter: str
    kind: str
    units: str
    description: str
    scale: float = 1.0  # applied on writing (e.g. 1000 for s -> ms), so no scaled copy is held
    sidecar: dict | None = None  # extra sidecar fields (e.g. the T2 grid of a spectrum)
    allow_nonfinite: bool = False  # NaN is a valid value in fitted voxels (e.g. the mean T2 of an empty part)


def sha256_file(path: str | Path, bufsize: int = 1 << 20) -> str:
    """SHA-256 (hex) of the file ``path`` (an input read ahead was hashed meanwhile: :mod:`qmap.io.readahead`)."""
    from . import readahead

    known = readahead.sha256(path)
    if known is not None:
        return known
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(bufsize), b""):
            h.update(block)
    return h.hexdigest()


def existing_outputs(out_dir: str | Path, prefix: str) -> list[Path]:
    """Files in ``out_dir`` that a run with ``prefix`` would replace."""
    d = Path(out_dir)
    if not d.is_dir():
        return []
    return sorted(p for p in d.glob(f"{prefix}_*") if is_output_of(p.name, prefix))


#: what follows ``{prefix}_`` in the name of a file a run writes: ``{P}map``, ``desc-{d}_{P}map`` (NIfTI, JSON
#: sidecar, PNG preview) or ``provenance.json``; P and d are alphanumeric, so another prefix that merely starts
#: with this one (``vfa_b1`` for ``vfa``) never matches
_OUTPUT_REST = re.compile(r"^(?:(?:desc-[0-9A-Za-z]+_)?[0-9A-Za-z]+map\.(?:nii\.gz|json|png)|provenance\.json)$")


def is_output_of(name: str, prefix: str) -> bool:
    """Whether the file name ``name`` is one that a run with ``prefix`` writes.

    Examples
    --------
    >>> is_output_of("vfa_T1map.nii.gz", "vfa"), is_output_of("vfa_desc-stderr_T1map.json", "vfa")
    (True, True)
    >>> is_output_of("vfa_b1_T1map.nii.gz", "vfa"), is_output_of("vfa_b1_T1map.nii.gz", "vfa_b1")
    (False, True)
    """
    return name.startswith(f"{prefix}_") and _OUTPUT_REST.match(name[len(prefix) + 1:]) is not None


def nifti_header(shape: tuple, affine: np.ndarray, ref_header, *, kind: str, parameter: str,
                 units: str) -> nib.Nifti1Header:
    """The NIfTI-1 header of a map of ``shape`` on the grid of ``ref_header`` (no display range set).

    ``kind`` ``"status"`` stores uint8, any other float32; no scaling (the stored values are the values).
    """
    dtype = np.uint8 if kind == "status" else np.float32
    img = nib.Nifti1Image(np.zeros((1,) * len(shape), dtype), affine)
    img.header.set_data_shape(tuple(int(s) for s in shape))
    img.set_data_dtype(dtype)
    qcode = sform_code = 1
    if ref_header is not None:
        try:
            qcode = int(ref_header["qform_code"]) or 1
            sform_code = int(ref_header["sform_code"]) or 1
            zooms = tuple(ref_header.get_zooms()[:3])
            zooms += (1.0,) * (3 - len(zooms))  # a single-slice 2D input: one slice of unit thickness
            img.header.set_zooms(zooms + tuple(img.header.get_zooms()[3:]))
        except (KeyError, TypeError, ValueError, IndexError):
            pass
    img.set_qform(affine, code=qcode)
    img.set_sform(affine, code=sform_code)
    img.header.set_xyzt_units("mm", "sec")
    img.header.set_intent(NIFTI_INTENT[kind], name=parameter[:16])
    img.header["descrip"] = f"qmap {parameter} {kind} [{units}]"[:79].encode()
    img.header.set_slope_inter(None, None)  # no scaling: the stored values are the values
    return img.header


def nifti_for(data: np.ndarray, affine: np.ndarray, ref_header, *, kind: str, parameter: str, units: str):
    """A NIfTI-1 image of ``data`` on the grid of ``ref_header`` with a sensible header."""
    dtype = np.uint8 if kind == "status" else np.float32
    arr = np.asarray(data, dtype=dtype)
    header = nifti_header(arr.shape, affine, ref_header, kind=kind, parameter=parameter, units=units)
    img = nib.Nifti1Image(arr, affine, header)
    if kind != "status":
        finite = np.isfinite(arr)  # the display range of the finite values, without a copy of them
        if finite.any():
            img.header["cal_min"] = float(np.min(arr, where=finite, initial=np.inf))
            img.header["cal_max"] = float(np.max(arr, where=finite, initial=-np.inf))
    return img


#: the start of a gzip stream as the streamed outputs write it: magic, deflate, no flags, mtime 0, no extra
#: flags, OS unknown (RFC 1952; as Python's gzip with mtime 0 and no file name)
_GZIP_HEAD = b"\x1f\x8b\x08\x00\x00\x00\x00\x00\x00\xff"
#: bytes of a NIfTI-1 single-file header with no extensions: 348 + the 4-byte extension flag
NIFTI1_OFFSET = 352


class NiftiStream:
    """One NIfTI-1 map written slab by slab along the last axis, as the slabs are fitted.

    NIfTI stores x fastest, so the slab ``z0:z1`` of an (X, Y, Z) map is one contiguous byte range of the
    data block: the slabs are appended in z order. The header comes first in the file but its display range
    (``cal_min`` / ``cal_max``, the finite values' range) is known only at the end, so a ``.nii.gz`` is laid
    out as one ordinary gzip member (RFC 1951/1952) whose first deflate block is a *stored* block holding
    the 352 header bytes (fixed size, so they are rewritten in place at the end), followed by the data
    compressed with ISA-L (raw deflate, level 1) and the trailer (CRC-32 of header and data, joined with
    ``crc32_combine``; length). Any gzip reader reads it. A ``.nii`` is written raw, its header likewise
    rewritten at the end. :meth:`finish` completes the file; the AtomicWriter owns the temporary name.

    Parameters
    ----------
    path : Path
        The temporary file.
    out : OutputFile
        What is written (name, kind, parameter, units, scale); its ``data`` is not used.
    shape : (X, Y, Z) or (X, Y, Z, n) tuple
        A 4D image is written along its last axis (whole 3D volumes: NIfTI stores each one contiguously).
    affine : (4, 4) ndarray
    ref_header : nibabel header or None
        The input's header (qform / sform codes, voxel sizes).
    """

    def __init__(self, path: Path, out: OutputFile, shape: tuple, affine: np.ndarray, ref_header):
        self.path = Path(path)
        self.out = out
        self.shape = tuple(int(s) for s in shape)
        self.affine = np.asarray(affine, float)
        self.header = nifti_header(self.shape, self.affine, ref_header, kind=out.kind, parameter=out.parameter,
                                   units=out.units)
        self.header.set_data_offset(NIFTI1_OFFSET)
        self.header.set_slope_inter(1.0, 0.0)  # as nibabel writes an unscaled float32 / uint8 array
        self.dtype = np.dtype(self.header.get_data_dtype())
        self.gz = self.path.name.endswith(".gz")
        self.z = 0  # slices written so far
        self.finished = False
        self._lo, self._hi = np.inf, -np.inf
        self._crc = 0
        self._size = 0
        self._fh = open(self.path, "wb")  # noqa: SIM115 - closed by finish / close
        self._at = 0  # offset of the header bytes in the file
        if self.gz:
            from isal import isal_zlib

            self._zlib = isal_zlib
            self._fh.write(_GZIP_HEAD)
            # a stored, not final, deflate block (BFINAL 0, BTYPE 00, padded to the byte) of LEN bytes, NLEN = ~LEN
            self._fh.write(bytes([0]) + NIFTI1_OFFSET.to_bytes(2, "little") + (NIFTI1_OFFSET ^ 0xFFFF).to_bytes(2, "little"))
            self._at = self._fh.tell()
            self._deflate = isal_zlib.compressobj(1, isal_zlib.DEFLATED, -15)
        self._fh.write(bytes(NIFTI1_OFFSET))  # the header's place

    def append(self, block: np.ndarray) -> None:
        """Write the next slab (X, Y, k) of the map (values as the fit gives them; ``out.scale`` applied here).

        A 4D image (X, Y, Z, n) is appended along its last axis likewise: blocks (X, Y, Z, k), or (X, Y, Z).
        """
        block = np.asarray(block)
        if block.ndim == len(self.shape) - 1:
            block = block[..., None]
        if block.shape[:-1] != self.shape[:-1] or self.z + block.shape[-1] > self.shape[-1]:
            raise ValueError(f"{self.out.name}: slab {block.shape} does not continue a map of shape {self.shape}")
        data = block if self.out.scale == 1.0 else block * self.out.scale
        arr = np.asarray(data, dtype=self.dtype)
        if self.out.kind != "status" and arr.size:
            # the display range of the finite values: NaN-skipping reductions (no mask), which are that unless
            # an infinity is the extreme (then the masked reductions)
            lo, hi = float(np.fmin.reduce(arr, axis=None)), float(np.fmax.reduce(arr, axis=None))
            if not (math.isfinite(lo) and math.isfinite(hi)):
                finite = np.isfinite(arr)
                lo = float(np.min(arr, where=finite, initial=np.inf)) if finite.any() else np.inf
                hi = float(np.max(arr, where=finite, initial=-np.inf)) if finite.any() else -np.inf
            self._lo = min(self._lo, lo)
            self._hi = max(self._hi, hi)
        try:
            self._put(arr.tobytes(order="F"))
        except OSError as exc:
            raise OutputError(f"cannot write {self.path.parent / self.out.name} ({exc.strerror}); check free space "
                              f"and permissions") from None
        self.z += block.shape[-1]

    def _put(self, raw: bytes) -> None:
        """Compress (``.gz``) and write bytes of the data block."""
        self._size += len(raw)
        if self.gz:
            self._crc = self._zlib.crc32(raw, self._crc)
            raw = self._deflate.compress(raw)
        self._fh.write(raw)

    def finish(self) -> None:
        """Complete the file: the rest of the deflate stream, the header (with the display range), the trailer."""
        if self.finished:
            return
        if self.z != self.shape[-1]:
            raise ValueError(f"{self.out.name}: {self.z} of {self.shape[-1]} slices written")
        if self._lo <= self._hi:
            self.header["cal_min"] = self._lo
            self.header["cal_max"] = self._hi
        head = self.header.binaryblock + bytes(NIFTI1_OFFSET - 348)
        try:
            if self.gz:
                crc = self._zlib.crc32_combine(self._zlib.crc32(head), self._crc, self._size)
                self._fh.write(self._deflate.flush())
                self._fh.write(crc.to_bytes(4, "little") + ((NIFTI1_OFFSET + self._size) & 0xFFFFFFFF).to_bytes(4, "little"))
            self._fh.seek(self._at)
            self._fh.write(head)
            self._fh.close()
            self.finished = True
        except OSError as exc:
            raise OutputError(f"cannot write {self.path.parent / self.out.name} ({exc.strerror}); check free space "
                              f"and permissions") from None

    def close(self) -> None:
        """Close the file without completing it (the writer removes the temporary)."""
        self._fh.close()


class AtomicWriter:
    """Collects outputs under temporary names and commits them all at once.

    Use as a context manager: on any exception (including KeyboardInterrupt)
    the temporary files are removed, replaced files restored, and a folder the
    writer created is removed again.

    While it is open the writer holds an exclusive lock on the output folder
    (``.qmap-lock``, an advisory ``flock``; removed on exit), so two qmap
    processes writing into one folder take turns: the second waits up to
    :data:`LOCK_WAIT_S` seconds and is then refused with an
    :class:`~qmap.errors.OutputError`. Outputs that already exist are
    re-checked under the lock (``overwrite``), so a run never mixes its files
    with another run's.
    """

    def __init__(self, out_dir: str | Path, *, overwrite: bool = False, lock_at_commit: bool = False):
        self.out_dir = Path(out_dir)
        self.overwrite = overwrite
        self._pending: list[tuple[Path, Path]] = []  # (tmp, final)
        self._created: list[Path] = []
        self._committed = False
        self._lock_fd: int | None = None
        # a writer that stages its files while a fit runs (streamed maps) locks the folder only to commit
        self.lock_at_commit = lock_at_commit
        self._streams: list[NiftiStream] = []

    # -- context management -------------------------------------------------
    def __enter__(self):
        missing = []
        p = self.out_dir.absolute()
        while not p.exists():
            missing.append(p)
            p = p.parent
        if not p.is_dir():
            raise OutputError(f"cannot use {self.out_dir} as the output folder: {p} is a file, not a folder; "
                              f"choose another out_dir=")
        self._created = missing  # deepest first; removed again if anything fails, even mkdir half-way
        try:
            self.out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            self._remove_created()
            raise OutputError(f"cannot create the output folder {self.out_dir} ({exc.strerror}); choose another out_dir=") from None
        if not os.access(self.out_dir, os.W_OK | os.X_OK):
            self._remove_created()
            raise OutputError(f"the output folder {self.out_dir} is not writable; choose another out_dir= or fix permissions")
        if self.lock_at_commit:
            return self
        try:
            self._lock()
        except BaseException:
            self._unlock()
            self._remove_created()
            raise
        return self

    def __exit__(self, exc_type, exc, tb):
        try:
            if exc_type is not None or not self._committed:
                self.abort()
        finally:
            self._unlock()
        return False

    # -- one writer per folder ----------------------------------------------
    def _lock(self) -> None:
        try:
            import fcntl
        except ImportError:  # pragma: no cover - no advisory locks on this platform
            return
        path = self.out_dir / LOCK_NAME
        deadline = time.monotonic() + LOCK_WAIT_S
        while True:
            try:
                fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
            except OSError as exc:
                raise OutputError(f"cannot write {path} ({exc.strerror}); check free space and permissions") from None
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                if time.monotonic() >= deadline:
                    raise OutputError(
                        f"another qmap process{_lock_owner(path)} is writing into {self.out_dir} and did not finish "
                        f"within {LOCK_WAIT_S:g} s; wait for it to finish, or choose another out_dir="
                    ) from None
                time.sleep(0.05)
                continue
            # the holder before us may have removed the file after we opened it: lock the file that is there now
            try:
                same = os.fstat(fd).st_ino == os.stat(path).st_ino
            except OSError:
                same = False
            if not same:
                os.close(fd)
                continue
            try:  # the owner's pid, for the message of a run that waits in vain (informative only)
                os.ftruncate(fd, 0)
                os.write(fd, f"{os.getpid()}\n".encode())
            except OSError:
                pass
            self._lock_fd = fd
            return

    def _unlock(self) -> None:
        fd, self._lock_fd = self._lock_fd, None
        if fd is None:
            return
        try:
            (self.out_dir / LOCK_NAME).unlink()  # removed while still locked: no one locks a stale file
        except OSError:
            pass
        os.close(fd)

    # -- staging ------------------------------------------------------------
    def _tmp(self, name: str) -> Path:
        return self.out_dir / f".qmap-tmp-{os.getpid()}-{name}"

    def _final(self, name: str) -> Path:
        final = self.out_dir / name
        if final.exists() and not self.overwrite:
            raise OutputExistsError(f"{final} exists already; pass overwrite=True to replace it, or choose another out_dir=")
        return final

    def stage_bytes(self, name: str, payload: bytes) -> Path:
        final = self._final(name)
        tmp = self._tmp(name)
        self._pending.append((tmp, final))
        try:
            with open(tmp, "wb") as fh:
                fh.write(payload)
        except OSError as exc:
            raise OutputError(f"cannot write {final} ({exc.strerror}); check free space and permissions") from None
        return final

    def stage_json(self, name: str, obj) -> Path:
        return self.stage_bytes(name, (json.dumps(obj, indent=2, sort_keys=False, default=json_default) + "\n").encode())

    def stage_with(self, name: str, write_fn) -> Path:
        """Stage a file written by ``write_fn(path)`` (e.g. a PNG figure)."""
        final = self._final(name)
        tmp = self._tmp(name)
        self._pending.append((tmp, final))
        try:
            write_fn(tmp)
        except OSError as exc:
            raise OutputError(f"cannot write {final} ({exc.strerror}); check free space and permissions") from None
        return final

    def stage_nifti(self, out: OutputFile, affine, ref_header, status: np.ndarray | None = None) -> Path:
        final = self._final(out.name)
        tmp = self._tmp(out.name)
        self._pending.append((tmp, final))
        if out.data is None:
            raise ValueError(f"{out.name}: no data to write (a streamed map is completed by finish_stream)")
        data = out.data if out.scale == 1.0 else np.asarray(out.data) * out.scale
        img = nifti_for(data, affine, ref_header, kind=out.kind, parameter=out.parameter, units=out.units)
        try:
            nib.save(img, str(tmp))  # the temporary name keeps the .nii.gz ending
        except OSError as exc:
            raise OutputError(f"cannot write {final} ({exc.strerror}); check free space and permissions") from None
        self._verify(tmp, out, np.shape(img.dataobj), affine, status)
        self.stage_json(sidecar_path(out.name).name, {"Units": out.units, "Description": out.description,
                                                      "Parameter": out.parameter, "Kind": out.kind,
                                                      **(out.sidecar or {})})
        return final

    def open_stream(self, out: OutputFile, shape: tuple, affine, ref_header) -> NiftiStream:
        """Start a NIfTI output written slab by slab (:class:`NiftiStream`) under a temporary name.

        Complete it with :meth:`finish_stream`; an abort removes it like any staged file.
        """
        final = self._final(out.name)
        tmp = self._tmp(out.name)
        self._pending.append((tmp, final))
        try:
            stream = NiftiStream(tmp, out, shape, affine, ref_header)
        except OSError as exc:
            raise OutputError(f"cannot write {final} ({exc.strerror}); check free space and permissions") from None
        self._streams.append(stream)
        return stream

    def finish_stream(self, stream: NiftiStream, out: OutputFile, status: np.ndarray | None = None) -> Path:
        """Complete a streamed output, re-read it (as :meth:`stage_nifti` does) and stage its sidecar.

        ``out`` describes the file as the run ends (the sidecar's description may name what was learnt
        during the fit, e.g. the standard-error convention).
        """
        self.complete_streams([(stream, out)], status, workers=1)
        return self.out_dir / out.name

    def check_streams(self, items: list[tuple[NiftiStream, OutputFile]], status: np.ndarray | None,
                      fitted: np.ndarray | None = None) -> None:
        """Complete and re-read streamed files one after the other (:meth:`complete_streams` without the sidecars).

        ``fitted``: ``status == 0`` in the files' (Fortran) voxel order, when the caller has it.
        """
        if fitted is None and status is not None:
            fitted = (np.asarray(status) == 0).ravel(order="F")
        for stream, out in items:
            stream.finish()
            self._verify(stream.path, out, stream.shape, stream.affine, status, fitted=fitted)

    def complete_streams(self, items: list[tuple[NiftiStream, OutputFile]], status: np.ndarray | None = None, *,
                         workers: int = 2, pool: Executor | None = None, checked: bool = False) -> None:
        """:meth:`finish_stream` for several streams; the files are completed and re-read ``workers`` at a time.

        Completing (the last deflate block and the gzip trailer) and re-reading (inflating the whole file)
        release the GIL: two files at a time take about half as long on two cores. The sidecars are staged
        afterwards, in order. With ``pool`` (a one-thread executor the run already has, e.g. its background
        writer) every second file is done there while this thread does the others: two at a time without
        new threads (each new thread gets its own C-library memory arena, which keeps what it freed: about
        8 MB more peak memory on a 1M-voxel run).
        """
        if checked:  # completed and re-read already (check_streams): the sidecars only
            for _, out in items:
                self._stage_sidecar(out)
            return
        # the fitted voxels in the files' voxel order, once for all the files (not one copy per file and thread)
        fitted = None if status is None else (np.asarray(status) == 0).ravel(order="F")

        def complete(item: tuple[NiftiStream, OutputFile]) -> None:
            stream, out = item
            stream.finish()
            self._verify(stream.path, out, stream.shape, stream.affine, status, fitted=fitted)

        if workers > 1 and len(items) > 1 and pool is not None:
            from concurrent.futures import wait

            futures = [pool.submit(complete, item) for item in items[1::2]]
            try:
                for item in items[::2]:
                    complete(item)
            except BaseException:
                for fut in futures:
                    fut.cancel()
                raise
            finally:
                wait(futures)  # the others end first
            for fut in futures:
                fut.result()  # the first failure is raised
        elif workers > 1 and len(items) > 1:
            from concurrent.futures import ThreadPoolExecutor

            with ThreadPoolExecutor(max_workers=min(workers, len(items)), thread_name_prefix="qmap-check") as checkers:
                for _ in checkers.map(complete, items):  # the first failure is raised (after the others ended)
                    pass
        else:
            for item in items:
                complete(item)
        for _, out in items:
            self._stage_sidecar(out)

    def _stage_sidecar(self, out: OutputFile) -> None:
        self.stage_json(sidecar_path(out.name).name, {"Units": out.units, "Description": out.description,
                                                      "Parameter": out.parameter, "Kind": out.kind,
                                                      **(out.sidecar or {})})

    def _verify(self, path: Path, out: OutputFile, shape: tuple, affine, status, fitted: np.ndarray | None = None):
        """Re-read the written file: header (shape, affine), the whole stream, and the estimates of fitted voxels.

        The voxel values are read back in blocks of 256 kB and checked against the status (finite where it
        is 0) without holding the map: re-reading every map as an array doubled the memory of the writing
        stage. A gzip stream's CRC-32 and length are checked at its end.
        """
        img = nib.load(str(path), mmap=False)
        if not isinstance(img, nib.spatialimages.SpatialImage):
            raise OutputError(f"{out.name}: the written file does not read back as an image (internal check failed)")
        if tuple(img.shape) != tuple(shape) or not np.allclose(img.affine, affine, atol=1e-4):
            raise OutputError(f"{out.name}: the written file does not read back as written (shape/affine)")
        proxy: Any = img.dataobj  # an array proxy: where (offset) and how (dtype) the voxel values are stored
        dtype = np.dtype(proxy.dtype)
        good = None
        if status is not None and out.kind == "estimate" and not out.allow_nonfinite:
            good = (np.asarray(status) == 0).ravel(order="F") if fitted is None else fitted  # the file's voxel order
        count = 0
        try:
            with ImageOpener(str(path), "rb") as fh:
                fh.seek(int(proxy.offset))
                step = (1 << 18) // dtype.itemsize * dtype.itemsize
                while block := fh.read(step):
                    values = np.frombuffer(block, dtype, count=len(block) // dtype.itemsize)
                    if good is not None and (good[count:count + values.size] & ~np.isfinite(values)).any():
                        raise OutputError(f"{out.name}: a fitted voxel has a non-finite estimate (internal check "
                                          f"failed)")
                    count += values.size
        except (OSError, EOFError, zlib.error) as exc:
            raise OutputError(f"{out.name}: the written file does not read back ({exc})") from None
        if count < int(np.prod(img.shape)):
            raise OutputError(f"{out.name}: the written file is shorter than its header says (internal check failed)")

    # -- commit / abort -------------------------------------------------------
    def commit(self) -> list[Path]:
        """Rename every staged file to its final name; on any failure restore the folder as it was.

        Each rename is recorded *before* it is made, so an interruption at any
        point between two renames is rolled back completely (a rollback step
        for a rename that did not happen fails harmlessly). An ``OSError``
        (disk full, I/O error, folder removed) becomes an :class:`OutputError`.
        """
        backups: list[tuple[Path, Path]] = []
        done: list[Path] = []
        if self._lock_fd is None and self.lock_at_commit:
            self._lock()
            if not self.overwrite:  # staged while the folder was not locked: another run may have written since
                for _, final in self._pending:
                    if final.exists():
                        raise OutputExistsError(f"{final} exists already; pass overwrite=True to replace it, or "
                                                f"choose another out_dir=")
        try:
            for tmp, final in self._pending:
                if final.exists():
                    bak = final.with_name(f".{final.name}.qmap-bak-{os.getpid()}")
                    backups.append((bak, final))
                    os.replace(final, bak)
                done.append(final)
                os.replace(tmp, final)
        except BaseException as exc:
            for f in done:
                try:
                    f.unlink()
                except OSError:
                    pass
            for bak, final in backups:
                try:
                    os.replace(bak, final)
                except OSError:
                    pass
            if isinstance(exc, OSError):
                raise OutputError(
                    f"cannot move the outputs into place in {self.out_dir} ({exc.strerror or exc}); nothing was "
                    f"changed -- check free space and permissions, then run again"
                ) from None
            raise
        # the outputs are in place: from here on the run has succeeded. An interrupt while the
        # replaced files are deleted is held back until they are all gone (no stray backups).
        global COMMITS
        self._committed = True
        self._pending = []
        COMMITS += 1
        interrupted = None
        for bak, _ in backups:
            for _attempt in range(3):
                try:
                    bak.unlink()
                except OSError:
                    pass
                except KeyboardInterrupt as exc:
                    interrupted = exc
                    continue
                break
        if interrupted is not None:
            raise interrupted
        return done

    def abort(self) -> None:
        for stream in self._streams:
            stream.close()
        self._streams = []
        for tmp, _ in self._pending:
            try:
                tmp.unlink()
            except OSError:
                pass
        self._pending = []
        self._unlock()
        self._remove_created()

    def _remove_created(self):
        for d in self._created:
            try:
                if d.exists() and not any(d.iterdir()):
                    d.rmdir()
                elif d.exists() and all(p.name.startswith(".qmap-tmp-") for p in d.iterdir()):
                    shutil.rmtree(d)  # only our own leftovers are there
            except OSError:
                pass


def _lock_owner(path: Path) -> str:
    """`` (pid N)`` from a lock file, or nothing when it cannot be read."""
    try:
        pid = int(path.read_text().strip())
    except (OSError, ValueError):
        return ""
    return f" (pid {pid})"


def json_default(o):
    """``json.dump(default=...)`` for numpy scalars/arrays and paths."""
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, Path):
        return str(o)
    raise TypeError(f"not JSON serialisable: {type(o).__name__}")
