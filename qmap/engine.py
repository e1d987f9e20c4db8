"""The one engine for every model: chunks of voxels, fitted in parallel.

Masked voxels are cut into chunks of a fixed size (independent of the number
of workers), each chunk is fitted by :func:`qmap.fitting.solver.fit_chunk`,
and the results are put back in place. Local runs use a thread pool (numpy
releases the GIL in the array operations; no pickling of the series) with
BLAS pinned to one thread per worker; ``scheduler=`` runs the chunks on a Dask
distributed cluster through joblib's Dask backend -- the same code path. The
result is identical for any number of workers, chunk size and backend.
"""

from __future__ import annotations

import itertools
import os
import sys
import threading
import time
from dataclasses import dataclass
from typing import Protocol

import numpy as np

from . import status as st
from .defaults import DEFAULT_CHUNK
from .fitting.noise_floor import NoiseFloor
from .fitting.problem import FitProblem
from .fitting.solver import ChunkFit, fit_chunk

__all__ = ["DEFAULT_CHUNK", "Progress", "dask_client", "fit_voxels", "resolve_jobs", "worker_pool"]


class SampleRows(Protocol):
    """(n, m) samples that hand out a block of rows at a time: an ndarray, or a lazy gatherer."""

    @property
    def shape(self) -> tuple[int, ...]: ...

    def __getitem__(self, rows: slice, /) -> np.ndarray: ...


def resolve_jobs(n_jobs: int | None) -> int:
    """Number of local workers: ``None``/0 -> all cores, negative -> cores + 1 + n."""
    cores = os.cpu_count() or 1
    if not n_jobs:
        return cores
    if n_jobs < 0:
        return max(1, cores + 1 + n_jobs)
    return int(n_jobs)


class Progress:
    """The one progress display of qmap (chunks of a fit, series of a batch), on stderr.

    On a terminal: one updating line ``label [#####   ]  42.0%  3.1 s  detail``. Elsewhere (logs,
    pipes): nothing, or with ``log=True`` the ``line`` of each :meth:`update` as a line of its own.
    ``quiet`` silences both.
    """

    def __init__(self, total: int, label: str, *, quiet: bool = False, stream=None, log: bool = False):
        self.total = max(int(total), 1)
        self.done = 0
        self.label = label
        self.stream = stream or sys.stderr
        try:
            self.tty = bool(self.stream.isatty())
        except (AttributeError, ValueError):  # no isatty, or a closed stream
            self.tty = False
        # a progress bar is for a person at a terminal; logs and pipelines get none (or the log lines)
        self.quiet = quiet or not (self.tty or log)
        self.t0 = time.perf_counter()
        self._last = -1.0
        self._lock = threading.Lock()  # updated by the fits of two slabs at a time (PreparedRun.fit)

    def finish(self) -> None:
        """Show the display complete (e.g. when fewer items than announced were left to do)."""
        if self.done < self.total:
            self.update(self.total - self.done)

    def update(self, k: int = 1, *, detail: str = "", line: str | None = None) -> None:
        """``k`` more items done; ``detail`` follows the bar, ``line`` is the log line (``log=True``, no terminal)."""
        with self._lock:
            self.done += k
        if self.quiet:
            return
        if not self.tty:
            if line is not None:
                self.stream.write(line + "\n")
                self.stream.flush()
            return
        now = time.perf_counter()
        if self.done < self.total and now - self._last < 0.25:
            return
        self._last = now
        frac = min(self.done / self.total, 1.0)
        bar = "#" * int(28 * frac)
        tail = f"  {detail}" if detail else ""
        self.stream.write(f"\r{self.label} [{bar:<28}] {100 * frac:5.1f}%  {now - self.t0:6.1f} s{tail}")
        if self.done >= self.total:
            self.stream.write("\n")
        self.stream.flush()


def dask_client(scheduler: str, *, timeout: float = 20):
    """A client of the Dask distributed scheduler at ``scheduler`` (the one place qmap connects to one).

    Raises :class:`~qmap.errors.UsageError` (one line) when the cluster extra is not installed or the
    scheduler cannot be reached within ``timeout`` seconds. The client is not made the default; close it.
    Messages name the argument (``scheduler='tcp://...'``); the command line shows its ``--scheduler``.
    """
    from .errors import UsageError

    try:
        from dask.distributed import Client
    except ImportError:
        raise UsageError(f"scheduler={scheduler!r}: needs the cluster extra: pip install 'qmap[cluster]' "
                         f"(dask[distributed])") from None
    try:
        return Client(scheduler, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(f"scheduler={scheduler!r}: cannot reach the Dask scheduler ({exc}); check the address") from None


def _fit_one(problem: FitProblem, y, ctx, sigma):
    """Fit one chunk of ``problem`` (checked once by :meth:`FitProblem.create`, never again here)."""
    model, noise, max_iter, stderr = problem.model, problem.noise, problem.max_iter, problem.stderr
    own = getattr(model, "fit_chunk", None)  # a model with its own chunk fitter (e.g. the T2 spectrum)
    if own is not None:
        return own(y, ctx=ctx, sigma=sigma)
    if problem.method == "linear":
        from .fitting.linearised import fit_chunk_linear

        return fit_chunk_linear(model, y, ctx=ctx, sigma=sigma, stderr=stderr)
    if problem.method == "lmfit":
        from .fitting.lmfit_engine import fit_chunk_lmfit

        return fit_chunk_lmfit(model, y, ctx=ctx, noise=noise, sigma=sigma, max_iter=max_iter, stderr=stderr)
    # fast path: voxels with no signal above the noise floor are recognised and not fitted
    quiet = noise.noise_only(y, sigma) if noise is not None else np.zeros(y.shape[0], bool)
    if not quiet.any():
        return fit_chunk(model, y, ctx=ctx, noise=noise, sigma=sigma, max_iter=max_iter, stderr=stderr)
    keep = np.flatnonzero(~quiet)
    if keep.size == 0:
        part = _concat([], model, noise, 0, y.shape[1])
    else:
        part = fit_chunk(model, y[keep], ctx=None if not ctx else {k: v[keep] for k, v in ctx.items()}, noise=noise,
                         sigma=None if sigma is None or np.ndim(sigma) == 0 else np.asarray(sigma)[keep],
                         max_iter=max_iter, stderr=stderr)
    out = {}
    for f in ChunkFit.__dataclass_fields__:
        a = getattr(part, f)
        full = np.full((y.shape[0],) + a.shape[1:], np.nan if a.dtype.kind == "f" else 0, a.dtype)
        full[keep] = a
        out[f] = full
    res = ChunkFit(**out)
    res.status[quiet] = st.NOISE_ONLY
    res.n_used[quiet] = y.shape[1]
    return res


@dataclass
class _Chunk:
    start: int
    stop: int


def fit_voxels(
    model,
    y: SampleRows,
    *,
    ctx: dict | None = None,
    noise: NoiseFloor | None = None,
    sigma: np.ndarray | None = None,
    n_jobs: int | None = None,
    chunk_size: int | None = None,
    scheduler: str | None = None,
    quiet: bool = True,
    label: str = "fitting",
    max_iter: int = 60,
    method: str = "fast",
    on_chunk=None,
    stderr: str = "noise",
    progress: Progress | None = None,
) -> ChunkFit | None:
    """Fit every row of ``y`` (n, m) with ``model``; returns a :class:`ChunkFit` over all rows.

    Parameters
    ----------
    model : SeparableModel
    y : (n, m) ndarray, or an object with ``shape`` that returns ``y[a:b]`` as an ndarray
        Samples of the voxels to fit (finite; float32 or float64).
    ctx : dict, optional
        Per-voxel model inputs, each (n,).
    noise : NoiseFloor, optional
    sigma : (n,) ndarray, optional
        Noise sd per voxel.
    n_jobs : int, optional
        Local worker threads (default: all cores). Ignored with ``scheduler``.
    chunk_size : int, optional
        Voxels per chunk (default: :attr:`FitProblem.default_chunk <qmap.fitting.problem.FitProblem.default_chunk>`).
        Results do not depend on it.
    scheduler : str, optional
        Address of a Dask distributed scheduler (``tcp://host:8786``).
    quiet : bool
        No progress display.
    method : {"fast", "lmfit", "linear"}
        The vectorised solver, or the per-voxel lmfit reference engine.
    on_chunk : callable, optional
        ``on_chunk(start, stop, ChunkFit)`` receives each chunk's result as it
        arrives (in order) instead of collecting them: the caller keeps only
        what it needs (bounded memory); ``fit_voxels`` then returns None.
    stderr : {"noise", "residual"}
        Covariance convention when ``sigma`` is given (see
        :mod:`qmap.fitting.uncertainty`); without ``sigma``: residual.
    progress : Progress, optional
        A display shared by several calls (the slabs of one run), advanced by the voxels of each chunk;
        ``quiet`` and ``label`` are then not used.
    """
    problem = FitProblem.create(model, noise=noise, sigma=sigma, stderr=stderr, method=method, max_iter=max_iter)
    noise = problem.noise
    n = y.shape[0]
    chunks = split_chunks(n, problem.default_chunk if chunk_size is None else chunk_size,
                          1 if scheduler else resolve_jobs(n_jobs))
    sig = None if sigma is None else np.broadcast_to(np.asarray(sigma, float), (n,))
    shared = progress is not None
    progress = progress if progress is not None else Progress(len(chunks), label, quiet=quiet)

    def args(c: _Chunk):
        sl = slice(c.start, c.stop)
        cctx = None if not ctx else {k: np.asarray(v[sl], float) for k, v in ctx.items()}
        return (problem, np.asarray(y[sl], float), cctx, None if sig is None else np.array(sig[sl]))

    results: list[ChunkFit] = []

    def consume(c: _Chunk, res: ChunkFit) -> None:
        if on_chunk is None:
            results.append(res)
        else:
            on_chunk(c.start, c.stop, res)
        progress.update(c.stop - c.start if shared else 1)

    if n == 0:
        pass
    elif scheduler:
        _run_dask(chunks, args, scheduler, consume)
    else:
        _run_local(chunks, args, min(resolve_jobs(n_jobs), len(chunks)), consume)
    return _concat(results, model, noise, n, y.shape[1]) if on_chunk is None else None


#: fewest rows per chunk when rows are split between workers
MIN_SPLIT = 512


def split_chunks(n: int, chunk_size: int, jobs: int = 1) -> list[_Chunk]:
    """``n`` rows in chunks of at most ``chunk_size``, for ``jobs`` local workers.

    One worker: chunks of ``chunk_size`` (the last one shorter). Several: a multiple of ``jobs`` chunks of
    nearly equal size, so that the workers finish together instead of one fitting the short last chunk
    while the others wait (a call fits one slab of a run; every slab would end with that wait).
    Results do not depend on the chunks (every voxel's arithmetic is its own).
    """
    chunk_size = max(1, int(chunk_size))
    if jobs <= 1 or n < jobs * MIN_SPLIT:
        return [_Chunk(i, min(i + chunk_size, n)) for i in range(0, n, chunk_size)]
    count = jobs * -(-n // (jobs * chunk_size))
    bounds = [n * k // count for k in range(count + 1)]
    return [_Chunk(a, b) for a, b in itertools.pairwise(bounds) if b > a]


_POOLS: dict = {}


def worker_pool(jobs: int):
    """The fit's thread pool of ``jobs`` workers (:func:`_pool`), for other work of a run that can use it."""
    return _pool(jobs)


def _pool(jobs: int):
    """One thread pool per worker count, kept for the life of the process.

    Reusing the same threads across calls (e.g. the slabs of a ``--max-memory``
    run) keeps glibc from creating a new malloc arena per new thread, each
    holding on to freed memory.
    """
    from concurrent.futures import ThreadPoolExecutor

    if jobs not in _POOLS:
        _limit_malloc_arenas(jobs)
        _POOLS[jobs] = ThreadPoolExecutor(max_workers=jobs, thread_name_prefix="qmap-fit")
    return _POOLS[jobs]


def _limit_malloc_arenas(jobs: int) -> None:
    """glibc only: at most ``jobs`` malloc arenas (measured: ~40 MB less peak memory, same speed)."""
    if not sys.platform.startswith("linux") or "MALLOC_ARENA_MAX" in os.environ:
        return
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").mallopt(-8, max(2, int(jobs)))  # M_ARENA_MAX
    except (OSError, AttributeError):
        return


def _run_local(chunks, args, jobs, consume):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        if jobs <= 1:
            for c in chunks:
                consume(c, _fit_one(*args(c)))
            return
        pool = _pool(jobs)
        # chunks in flight: one queued beside those being fitted (a free worker always finds one), which
        # bounds the memory of queued inputs and finished results (measured: 2 x jobs held 1.4 MB more on
        # a 1M-voxel t1-ir run, no faster)
        window = jobs + 1
        pending = []
        try:
            for c in chunks:
                pending.append((c, pool.submit(_fit_one, *args(c))))
                if len(pending) >= window:
                    c0, f0 = pending.pop(0)
                    consume(c0, f0.result())
            for c0, f0 in pending:
                consume(c0, f0.result())
        except BaseException:
            for _, f in pending:
                f.cancel()
            raise


def _run_dask(chunks, args, scheduler, consume):
    from joblib import Parallel, delayed, parallel_config

    client = dask_client(scheduler, timeout=10)
    try:
        with client.as_current(), parallel_config(backend="dask", wait_for_workers_timeout=60):
            par = Parallel(return_as="generator")
            for c, res in zip(chunks, par(delayed(_fit_one)(*args(c)) for c in chunks)):
                consume(c, res)
    finally:
        client.close()


def _concat(results: list[ChunkFit], model, noise, n: int, m: int) -> ChunkFit:
    P = len(noise.wrap(model).param_names)
    if not results:
        return ChunkFit(
            params=np.zeros((0, P)), cov=np.zeros((0, P, P)), rss=np.zeros(0), r2=np.zeros(0), rmse=np.zeros(0),
            n_used=np.zeros(0, int), status=np.zeros(0, np.uint8), n_iter=np.zeros(0, int),
        )
    fields = ChunkFit.__dataclass_fields__
    return ChunkFit(**{f: np.concatenate([getattr(r, f) for r in results], axis=0) for f in fields})


def status_counts(status: np.ndarray) -> dict[str, int]:
    """Voxel count per status code (code as a string), only codes that occur."""
    flat = np.asarray(status, np.uint8).reshape(-1)
    counts = np.zeros(256, np.int64)
    # no sort (np.unique sorts); in parts: bincount casts its input to intp, 8 bytes a voxel
    for i in range(0, flat.size, 1 << 16):
        counts += np.bincount(flat[i:i + (1 << 16)], minlength=256)
    return {str(c): int(counts[c]) for c in np.flatnonzero(counts)}


STATUS_CODES = st.STATUS_CODES
