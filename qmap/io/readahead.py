"""Reading the input series while the process is still starting up.

A fitting command spends its first few tenths of a second importing numpy,
nibabel, scipy and its own modules, all of which holds the interpreter lock,
and then decompresses its ``.nii.gz`` series, which does not (ISA-L releases
the lock while it inflates). :func:`start` begins the decompression in a
background thread as soon as the command line is parsed (this module and that
thread import nothing but the standard library and ``isal``), so the two
overlap; the loader (:func:`qmap.io.nifti.image_data`) then makes the voxel
array from the decompressed bytes (:func:`take`, no copy) instead of reading
the file again. Another thread imports ``scipy.special`` (the noise-level
estimate and Rician fits need it) meanwhile.

Nothing changes for the user: the voxel array is bit for bit the one nibabel
returns, scaling included (tested), an unreadable file gives the same one-line
message at the same point of the run (the thread keeps the exception and the
loader raises it), and with a memory budget (``--max-memory``) nothing is read
ahead.
"""

from __future__ import annotations

import importlib
import os
import sys
import threading
from pathlib import Path

__all__ = ["discard", "start", "take"]

#: absolute path -> its read-ahead (one per file)
_PENDING: dict[str, _ReadAhead] = {}
_LOCK = threading.Lock()


class _ReadAhead:
    """One ``.nii.gz`` file decompressed whole in a daemon thread: its bytes, or the exception reading raised."""

    def __init__(self, path: str):
        self.path = path
        self.stat = _stat(path)
        self.done = threading.Event()
        self.data: bytearray | None = None
        self.error: BaseException | None = None
        self.cancelled = False

    def read(self) -> None:
        try:
            data = _decompress(self.path)
            if not self.cancelled:
                self.data = data
        except BaseException as exc:  # noqa: BLE001 -- kept for the loader, which raises it where it reads
            if not self.cancelled:
                self.error = exc
        finally:
            self.done.set()


def _read_all(todo: list[_ReadAhead]) -> None:
    for ahead in todo:
        ahead.read()


def _decompress(path: str) -> bytearray | None:
    """The whole decompressed content of the gzip file ``path`` (gzip's CRC-32 and length checked).

    None when the trailer's length (the size modulo 2**32) does not hold the content (a file of 4 GiB or
    more): the loader then reads the file itself.
    """
    from isal import igzip

    with open(path, "rb") as fh:
        size = fh.seek(0, 2)
        if size < 18:  # not even a gzip header and trailer: the loader reports what the file is
            return None
        fh.seek(size - 4)
        isize = int.from_bytes(fh.read(4), "little")
        fh.seek(0)
        buf = bytearray(isize + 1)  # one byte more: a longer stream is noticed, not cut
        with igzip.IGzipFile(fileobj=fh, mode="rb") as gz, memoryview(buf) as view:
            done = 0
            while done < len(buf):  # in blocks: the lock is released while each block inflates
                k = gz.readinto(view[done:done + READ_BLOCK])
                if not k:
                    break
                done += k
            if done > isize:
                return None
            while gz.read(READ_BLOCK):  # to the end of the stream (a no-op after the last member): checks the CRC
                pass
    del buf[done:]
    return buf


#: bytes inflated at a time
READ_BLOCK = 1 << 22


def _stat(path: str) -> tuple[int, int] | None:
    try:
        st = os.stat(path)
    except OSError:
        return None
    return st.st_size, st.st_mtime_ns


def _key(path) -> str:
    return str(Path(path).expanduser().absolute())


def start(paths, *, max_bytes: float | None = None, imports: tuple[str, ...] = ("scipy.special",)) -> None:
    """Begin decompressing the ``.nii.gz`` files ``paths`` in a background thread, and importing ``imports``.

    Parameters
    ----------
    paths : list of path-like
        The series' files (one 4D NIfTI or several 3D NIfTIs), in order. Uncompressed ``.nii`` files
        are not read ahead (nibabel maps them into memory: nothing to gain).
    max_bytes : float, optional
        The run's memory budget (``--max-memory``): with a budget nothing is read ahead (the series may
        be read in slabs, and the read-ahead would be held beside them).
    imports : tuple of str
        Modules the run will import after reading (imported meanwhile, in their own thread).
    """
    todo = []
    if max_bytes is None:
        with _LOCK:
            for p in paths:
                key = _key(p)
                if key not in _PENDING and key.endswith(".gz") and os.path.isfile(key):
                    _PENDING[key] = ahead = _ReadAhead(key)
                    todo.append(ahead)
    if todo:
        threading.Thread(target=_read_all, args=(todo,), name="qmap-readahead", daemon=True).start()
    for module in imports:
        if module not in sys.modules:
            # not a daemon (as the loader's own import thread): a run that fails early waits for the import to
            # finish instead of exiting under it; the reading thread is one (an exit does not wait for a large file)
            threading.Thread(target=_import_quietly, args=(module,), name=f"qmap-import-{module}").start()


def _import_quietly(module: str) -> None:
    try:
        importlib.import_module(module)
    except ImportError:  # the run imports it again where it is needed and reports the problem there
        pass


def take(path) -> bytearray | None:
    """The decompressed content of ``path`` read ahead (waiting for the reading to finish), or None.

    None when nothing was read ahead for the file (or it changed since). An exception the reading
    raised is raised here. Each read-ahead is given out once.
    """
    with _LOCK:
        ahead = _PENDING.pop(_key(path), None)
    if ahead is None:
        return None
    ahead.done.wait()
    if ahead.stat is None or _stat(ahead.path) != ahead.stat:
        return None
    if ahead.error is not None:
        raise ahead.error
    return ahead.data


def discard() -> None:
    """Forget every read-ahead not taken (its data are freed; a reading still running drops its result)."""
    with _LOCK:
        for ahead in _PENDING.values():
            ahead.cancelled = True
        _PENDING.clear()
