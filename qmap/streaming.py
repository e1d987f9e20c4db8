"""Maps written as they are fitted: the slabs of a run streamed into the output files.

A fitting run (:meth:`qmap.pipeline.PreparedRun.map_slabs`) fits the volume one slab of slices
(along z) at a time. Each finished slab of every output map is appended to that map's file
(:class:`qmap.io.writer.NiftiStream`: NIfTI stores x fastest, so a z-slab is one contiguous byte range
of the data block) by one background thread -- compressing slab k while slab k + 1 is fitted -- under
the temporary names of the run's :class:`~qmap.io.writer.AtomicWriter`. Only the status map (one byte per
voxel) is held whole; the other maps are read back from their files when asked for
(:class:`FileMaps`), e.g. for the run's summary. The writer commits (renames) the files when the run
writes its provenance, or removes them when anything fails: all or nothing, as before.
"""

from __future__ import annotations

import collections
import dataclasses
import os
import threading
import weakref
from collections.abc import Callable, Iterable, Iterator, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .io.writer import AtomicWriter, NiftiStream, OutputFile
from .maps import MapSet, join_info

__all__ = ["BACKGROUND_WRITES", "FileMaps", "MapStream", "StreamedMaps"]

#: compress and write the slabs in a background thread while the next slab is fitted (default of MapStream)
BACKGROUND_WRITES = True


class FileMaps(Mapping):
    """Maps of a run read from their files on access, in the units the fit gives them (seconds for times).

    A map written with a scale (``--units ms``: x 1000) is divided by it again in float32 (within one
    unit in the last place of the value the fit gave). Each access reads the file (nothing is cached).
    """

    def __init__(self, files: dict[str, tuple[Callable[[], Path], float]]):
        self._files = files

    def __getitem__(self, name: str) -> np.ndarray:
        import nibabel as nib

        where, scale = self._files[name]
        img: Any = nib.load(str(where()))
        arr = np.asarray(img.dataobj, dtype=np.float32)
        return arr if scale == 1.0 else (arr / np.float32(scale)).astype(np.float32)

    def __contains__(self, name: object) -> bool:  # without reading the map (Mapping's default reads it)
        return name in self._files

    def __iter__(self) -> Iterator[str]:
        return iter(self._files)

    def __len__(self) -> int:
        return len(self._files)


@dataclass
class StreamedMaps(MapSet):
    """A :class:`~qmap.maps.MapSet` whose maps went to the output files slab by slab (:class:`MapStream`).

    ``estimates``, ``stderr`` and ``quality`` are :class:`FileMaps`; ``status`` is held.
    """

    stream: MapStream | None = field(default=None, repr=False)


class MapStream:
    """The maps of one run, streamed slab by slab into the temporary files of an :class:`AtomicWriter`.

    Parameters
    ----------
    out_dir : Path
    overwrite : bool
    specs : callable
        ``specs(maps) -> list of OutputFile``: the NIfTI outputs of a MapSet (names, kinds, units, scale);
        called on the first slab (its ``data`` are not used). It may add other 3D files of each slab (e.g.
        maps with names of their own); those are streamed too but are not among the maps of :meth:`maps`.
    shape : (X, Y, Z) tuple
    affine : (4, 4) ndarray
    ref_header : nibabel header
    background : bool
        Compress and write in a background thread (slab k while slab k + 1 is fitted).
    """

    def __init__(self, out_dir: Path, *, overwrite: bool, specs: Callable[[MapSet], list[OutputFile]], shape: tuple,
                 affine, ref_header, background: bool | None = None):
        self.shape = tuple(shape)
        self.affine = affine
        self.ref_header = ref_header
        self.specs = specs
        self.writer = AtomicWriter(out_dir, overwrite=overwrite, lock_at_commit=True)
        self.streams: dict[str, NiftiStream] = {}
        self.outputs: list[OutputFile] = []  # the streamed files (without data), in the order of specs()
        self.status = np.zeros(self.shape, np.uint8)
        self.first: MapSet | None = None
        self._names: dict[str, set] = {}  # the maps of the MapSet per kind (specs() may give other files too)
        self.info: dict | None = None  # the first slab's, with the counts summed over the slabs
        if background is None:
            background = BACKGROUND_WRITES
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="qmap-write") if background else None
        #: files completed and re-read at a time at the end (:meth:`AtomicWriter.complete_streams`)
        self.workers = min(2, os.cpu_count() or 1) if background else 1
        self._pending: Future | None = None
        self._checked: Future | None = None  # the re-reading of the completed files (maps())
        self._to_check: collections.deque = collections.deque()
        self._check_lock = threading.Lock()
        self._fitted: np.ndarray | None = None
        self._open = False
        self._done = False
        # a run abandoned between its fit and its writing (an error in the command's own checks) leaves nothing
        self._finalizer = weakref.finalize(self, _discard, self.writer, self._pool)

    # -- slabs ----------------------------------------------------------------------------------
    def add(self, part: MapSet, z0: int, z1: int) -> None:
        """The maps of the slices ``z0:z1`` (slabs arrive in z order, each exactly once)."""
        if self.first is None:
            # what the maps are (names, units, descriptions, info), without the first slab's arrays
            self.first = MapSet({}, {}, dict(part.units), dict(part.descriptions), part.time_params, {},
                                np.zeros(0, np.uint8), dict(part.info))
            self._names = {"estimate": set(part.estimates), "stderr": set(part.stderr), "quality": set(part.quality)}
            self.writer.__enter__()
            self._open = True
            for out in self.specs(part):
                self.outputs.append(dataclasses.replace(out, data=None))
                self.streams[out.name] = self.writer.open_stream(out, self.shape, self.affine, self.ref_header)
        self.status[:, :, z0:z1] = part.status
        self.info = join_info(self.info, part)
        self._wait()
        if self._pool is None:
            self._write(part)
        else:
            self._pending = self._pool.submit(self._write, part)

    def add_file(self, out: OutputFile, shape: tuple, blocks: Iterable[np.ndarray]) -> None:
        """Another output of the run written block by block along its last axis (e.g. a 4D image of shape
        (X, Y, Z, n), one (X, Y, Z) volume at a time), after the slabs (:meth:`add`) and before :meth:`maps`.

        ``out`` describes the file (its ``data`` is not used); the run's final descriptions must name it, like
        the maps (:meth:`write`). It is not one of the maps of :meth:`maps`.
        """
        if not self._open:
            raise RuntimeError("add_file() after the first slab (add())")
        self._wait()
        stream = self.writer.open_stream(dataclasses.replace(out, data=None), tuple(shape), self.affine,
                                         self.ref_header)
        self.streams[out.name] = stream
        for block in blocks:
            stream.append(block)
        stream.finish()

    def _write(self, part: MapSet) -> None:
        for out in self.specs(part):
            assert out.data is not None, "specs() gives the slab's maps"
            self.streams[out.name].append(out.data)

    def _wait(self) -> None:
        pending, self._pending = self._pending, None
        if pending is not None:
            pending.result()  # re-raises a failure of the writing thread

    def maps(self) -> StreamedMaps:
        """Complete the files after the last slab; the maps, read from them on access.

        With a background thread, the files are re-read there (the check :meth:`write` needs) while the
        run goes on with what it does before writing (reading maps back for its warnings, the provenance).
        """
        self._wait()
        for stream in self.streams.values():
            stream.finish()
        self._done = True
        if self._pool is not None:
            self._to_check = collections.deque((stream, stream.out) for stream in self.streams.values())
            self._fitted = (self.status == 0).ravel(order="F")
            self._checked = self._pool.submit(self._check_some)
        first = self.first
        assert first is not None, "at least one slab was added"

        groups: dict[str, dict] = {"estimate": {}, "stderr": {}, "quality": {}}
        for out in self.outputs:
            if out.parameter in self._names.get(out.kind, ()):
                groups[out.kind][out.parameter] = (self._where(out.name), out.scale)
        est, se, qual = (FileMaps(groups[k]) for k in ("estimate", "stderr", "quality"))
        return StreamedMaps(est, se, dict(first.units), dict(first.descriptions), first.time_params, qual,
                            self.status, dict(self.info or {}), stream=self)

    def _check_some(self) -> None:
        """Complete and re-read the files not yet taken, one at a time (the writer thread and the main thread)."""
        while True:
            with self._check_lock:
                if not self._to_check:
                    return
                item = self._to_check.popleft()
            self.writer.check_streams([item], self.status, self._fitted)

    def _where(self, name: str) -> Callable[[], Path]:
        stream = self.streams[name]
        final = self.writer.out_dir / name

        def where() -> Path:
            return final if self.writer._committed else stream.path

        return where

    # -- the end --------------------------------------------------------------------------------
    def write(self, outs: list[OutputFile], stage_rest: Callable[[AtomicWriter], None]) -> list[Path]:
        """Check the files against ``outs`` (the run's final descriptions), stage the rest, and commit.

        ``stage_rest(writer)`` stages every other file of the run (other maps, previews, provenance).
        Everything is removed again when anything fails.
        """
        try:
            by_name = {o.name: o for o in outs}
            if set(self.streams) - set(by_name):
                raise ValueError(f"streamed outputs {sorted(set(self.streams) - set(by_name))} not described")
            items = [(stream, by_name[name]) for name, stream in self.streams.items()]
            if self._checked is not None:  # being re-read since maps(): this thread takes the files left
                self._check_some()
                self._checked.result()  # re-raises a failed check
                self.writer.complete_streams(items, self.status, workers=1, checked=True)
            else:
                self.writer.complete_streams(items, self.status, workers=self.workers, pool=self._pool)
            stage_rest(self.writer)
            written = self.writer.commit()
        except BaseException:
            self.abort()
            raise
        self.writer.__exit__(None, None, None)
        self._open = False
        self._close_pool()
        return written

    def abort(self) -> None:
        """Remove every file staged so far (and an output folder the run created)."""
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)  # no slab is written while the files go
        self._pending = None
        if self._open:
            self.writer.__exit__(RuntimeError, None, None)
            self._open = False

    def _close_pool(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True)


def _discard(writer: AtomicWriter, pool: ThreadPoolExecutor | None) -> None:
    """Remove the staged files of a stream that was never written (garbage-collected or at exit)."""
    if pool is not None:
        pool.shutdown(wait=True, cancel_futures=True)
    if not writer._committed:
        writer.abort()
        writer._unlock()
