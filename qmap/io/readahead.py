"""Reading the input series while the process is still starting up.

A fitting command spends its first few tenths of a second importing numpy,
nibabel, scipy and its own modules, all of which holds the interpreter lock,
and then decompresses its ``.nii.gz`` series, which does not (ISA-L releases
the lock while it inflates). :func:`start` begins the decompression in a
background thread as soon as the command line is parsed (this module and that
thread import nothing but the standard library and ``isal``), so the two
overlap; the loader (:func:`qmap.io.nifti.image_data`) then makes the voxel
array from the decompressed bytes (:func:`take`; no copy, so the array is
read-only: the one change a run makes to its series, clipping small negative
values, makes a copy) instead of reading the file again. A run with one coil
does not import ``scipy.special`` at all (:mod:`qmap.special`): its import
holds the interpreter lock for ~0.1 s, which stalled the imports and the
loading beside it wherever it was placed (measured).

Measured on the 1M-voxel x 12-echo series of ``scripts/benchmark.py`` with the
machine otherwise idle: the series is in memory 0.2 s after the start instead
of 0.55 s, and a default ``qmap t2star`` run takes 1.6 s instead of 1.75 s.

Nothing changes for the user: the voxel array is bit for bit the one nibabel
returns, scaling included (tested); a file the thread cannot read is read by
the loader as before, which reports the problem in the same words at the same
point of the run; and with a memory budget (``--max-memory``) nothing is read
ahead.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path

__all__ = ["discard", "start", "take"]

#: absolute path -> its read-ahead (one per file)
_PENDING: dict[str, _ReadAhead] = {}
#: absolute path -> its read-ahead, kept after the data were taken (for :func:`sha256`)
_HASHED: dict[str, _ReadAhead] = {}
_LOCK = threading.Lock()


class _ReadAhead:
    """One ``.nii.gz`` file decompressed whole in a daemon thread (its bytes, or None if that failed)."""

    def __init__(self, path: str):
        self.path = path
        self.stat = _stat(path)
        self.done = threading.Event()
        self.data: bytes | None = None
        self.cancelled = False
        self.digest: str | None = None  # SHA-256 of the file (for the provenance), once ``hashed``
        self.hashed = threading.Event()

    def read(self) -> None:
        """Map the file once: inflate it (then the loader may take the bytes), then hash it for the provenance."""
        import hashlib
        import mmap

        try:
            with open(self.path, "rb") as fh, mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ) as packed:
                try:
                    data = _inflate(packed)
                    if not self.cancelled:
                        self.data = data
                finally:
                    self.done.set()
                if not self.cancelled:  # hashlib releases the lock too; the loader does not wait for this
                    self.digest = hashlib.sha256(packed).hexdigest()
        except (OSError, ValueError):  # unreadable, or empty (cannot be mapped): the loader reads it itself
            pass
        finally:
            self.done.set()
            self.hashed.set()


def _inflate(packed) -> bytes | None:
    """The decompressed content of the mapped gzip file ``packed`` (its first member; CRC-32 and length checked).

    One call inflates the whole file with the interpreter lock released throughout (ISA-L's one-shot
    ``isal_zlib.decompress``, its output allocated once at the size the gzip trailer gives): a gzip file
    object, or a decompressor fed in blocks, takes the lock back for every piece, and then waits behind
    the import threads' long-held locks (measured: 0.3-0.5 s instead of 0.2 s for a 50 MB series at
    start-up). None when the file cannot be read this way (corrupt, truncated, not gzip): the loader
    then reads it as usual and reports any problem in its usual words. A file of several gzip members
    gives its first member (the loader reads the file as usual when that does not hold the whole image).
    """
    from isal import isal_zlib

    try:
        isize = int.from_bytes(packed[-4:], "little")  # the uncompressed length modulo 2**32
        return isal_zlib.decompress(packed, 31, max(isize, 1 << 16))
    except Exception:  # noqa: BLE001 -- any failure: the loader reads the file itself
        return None


def _stat(path: str) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def _key(path) -> str:
    return str(Path(path).expanduser().absolute())


def start(paths, *, max_bytes: float | None = None) -> None:
    """Begin decompressing the series' ``.nii.gz`` file in a background thread.

    Parameters
    ----------
    paths : list of path-like
        The series' files (one 4D NIfTI or several 3D NIfTIs), in order. Of several files only the
        first is read ahead: the loader copies the files one by one into the series, and a second file
        decompressed beside them would raise the memory of the loading (by one file). An uncompressed
        ``.nii`` is not read ahead (nibabel maps it into memory: nothing to gain).
    max_bytes : float, optional
        The run's memory budget (``--max-memory``): with a budget nothing is read ahead (the series may
        be read in slabs, and the read-ahead would be held beside them).
    """
    paths = list(paths)[:1]
    if max_bytes is not None or not paths:
        return
    key = _key(paths[0])
    with _LOCK:
        if key in _PENDING or not key.endswith(".gz") or not os.path.isfile(key):
            return
        _PENDING[key] = _HASHED[key] = ahead = _ReadAhead(key)
    threading.Thread(target=ahead.read, name="qmap-readahead", daemon=True).start()


def take(path) -> bytes | None:
    """The decompressed content of ``path`` read ahead (waiting for the reading to finish), or None.

    None when nothing was read ahead for the file, the reading failed (the loader then reads the file
    and reports what is wrong in its usual words), or the file changed since. Each read-ahead is given
    out once.
    """
    with _LOCK:
        ahead = _PENDING.pop(_key(path), None)
    if ahead is None:
        return None
    if not ahead.done.is_set():  # the main thread has time on its hands: import what the run needs later
        _import_while_waiting(ahead.done)
    ahead.done.wait()
    if ahead.stat is None or _stat(ahead.path) != ahead.stat:
        return None
    data, ahead.data = ahead.data, None  # kept for its digest (sha256) only: the bytes are the caller's now
    return data


#: modules a fitting run imports later anyway, imported by the loader while it waits for the inflating (which
#: releases the interpreter lock): numpy's median and percentile import numpy.ma on first use (~10 ms that
#: would otherwise come after the loading; measured on the benchmark's 1M-voxel series, the main thread had
#: finished its imports ~35 ms before the series was inflated); threadpoolctl, which the fit's engine imports
#: (4 ms)
IMPORT_WHILE_WAITING = ("numpy.ma", "threadpoolctl")


def _import_while_waiting(done: threading.Event) -> None:
    import importlib
    import sys

    for name in IMPORT_WHILE_WAITING:
        if done.is_set():
            return
        if name not in sys.modules:
            importlib.import_module(name)


def sha256(path) -> str | None:
    """SHA-256 (hex) of ``path`` as the read-ahead hashed it (waiting for it), or None (then hash the file).

    None when the file was not read ahead or has changed since.
    """
    with _LOCK:
        ahead = _HASHED.get(_key(path))
    if ahead is None:
        return None
    ahead.hashed.wait()
    if ahead.stat is None or _stat(ahead.path) != ahead.stat:
        return None
    return ahead.digest


def discard() -> None:
    """Forget every read-ahead not taken (its data are freed; a reading still running drops its result)."""
    with _LOCK:
        for ahead in _PENDING.values():
            ahead.cancelled = True
        for ahead in _HASHED.values():
            ahead.cancelled = True
        _PENDING.clear()
        _HASHED.clear()
