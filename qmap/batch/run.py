"""``qmap batch``: fit every relaxometry series of a BIDS dataset into a derivatives folder.

The plan (:mod:`qmap.batch.plan`) lists the series; each is one unit of work
(:func:`qmap.batch.series.run_series`), run in this process (``n_jobs=1``), in
local worker processes (joblib's loky backend, one single-threaded fit per
process), or on a Dask distributed cluster (``scheduler=``; workers may be on
other machines: they get absolute paths and need nothing from this process's
working directory, but must see the dataset and the derivatives folder at the
same paths).

Semantics: a failing series never stops the others (the report lists each
failure with its reason); a rerun skips every series whose outputs are up to
date (same fit command, same input SHA-256, all outputs present), refits the
ones whose inputs or fit options changed, and retries the failed ones;
``overwrite`` refits everything; ``dry_run`` only plans and touches nothing.
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path

from .. import __version__
from ..errors import OutputError, UsageError
from .plan import FIT_KINDS, BatchPlan, SeriesPlan, discover
from .series import SeriesResult, run_series, series_state

__all__ = ["BATCH_OPTIONS", "BIDS_VERSION", "BatchReport", "dataset_description", "fit_options", "run_batch"]

#: BIDS version the derivative layout follows (qMRI suffixes and derivative
#: dataset_description fields exist since 1.5 / 1.4; memory)
BIDS_VERSION = "1.9.0"


def dataset_description() -> dict:
    """Content of ``DERIV_DIR/dataset_description.json`` (deterministic: no dates, no paths)."""
    return {
        "Name": "qmap relaxometry maps",
        "BIDSVersion": BIDS_VERSION,
        "DatasetType": "derivative",
        "GeneratedBy": [{
            "Name": "qmap",
            "Version": __version__,
            "Description": "T1, T2 and T2* maps with standard errors, fit quality and per-voxel status",
        }],
    }


@dataclass
class BatchReport:
    """What a batch did (or, with ``dry_run``, would do).

    Attributes
    ----------
    plan : BatchPlan
    results : list of SeriesResult
        One per planned series, same order (empty for a dry run).
    actions : list of str
        Dry run: what would happen to each series.
    dry_run : bool
    wall_time_s : float
    notes : list of str
    """

    plan: BatchPlan
    results: list = field(default_factory=list)
    actions: list = field(default_factory=list)
    dry_run: bool = False
    wall_time_s: float = 0.0
    notes: list = field(default_factory=list)

    def _with(self, status: str) -> list[tuple[SeriesPlan, SeriesResult]]:
        return [(p, r) for p, r in zip(self.plan.series, self.results) if r.status == status]

    @property
    def fitted(self):
        return self._with("fitted")

    @property
    def skipped(self):
        return self._with("skipped")

    @property
    def failed(self):
        return self._with("failed")

    @property
    def exit_code(self) -> int:
        """0, or 4 when any series failed."""
        return 4 if self.failed else 0

    def plan_table(self) -> str:
        """The plan: one line per series with its subject/session labels, the fit chosen and the action."""
        rows = [("sub", "ses", "series", "files", "fit", "action", "output prefix")]
        for p, action in zip(self.plan.series, self.actions or [""] * len(self.plan.series)):
            rows.append((p.subject, p.session or "-", p.label, str(len(p.inputs)), p.fit_description(), action,
                         p.prefix))
        widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
        lines = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in rows]
        lines.insert(1, "  ".join("-" * w for w in widths))
        n = len(self.plan.series)
        lines.append(f"{n} series in {self.plan.n_sessions} subject/session folders of {self.plan.bids_dir}; "
                     f"outputs to {self.plan.deriv_dir}")
        for p in self.plan.series:
            if p.error:
                lines.append(f"  cannot fit {_who(p)}: {p.error}")
            lines.extend(f"  note {_who(p)}: {n}" for n in p.notes)
        lines.extend(f"  ignored {path}: {why}" for path, why in self.plan.ignored)
        return "\n".join(lines)

    def summary(self) -> str:
        """Counts, then each failure with its reason, replaced outputs and warnings."""
        n = len(self.plan.series)
        head = (f"qmap batch: {n} series in {self.plan.n_sessions} subject/session folders: "
                f"{len(self.fitted)} fitted, {len(self.skipped)} skipped (up to date), {len(self.failed)} failed "
                f"({self.wall_time_s:.1f} s)")
        lines = [head]
        for p, r in self.failed:
            lines.append(f"  FAILED {_who(p)}: {r.reason}")
        for p, r in self.fitted:
            if r.replaced:
                lines.append(f"  refitted {_who(p)}: {r.replaced}")
        for p, r in zip(self.plan.series, self.results):
            lines.extend(f"  warning {_who(p)}: {w}" for w in r.warnings)
        if self.plan.ignored:
            lines.append(f"  {len(self.plan.ignored)} files not fitted (see --dry-run)")
        lines.extend(f"  note: {x}" for x in self.notes)
        lines.append(f"derivatives in {self.plan.deriv_dir}")
        return "\n".join(lines)


def _who(p: SeriesPlan) -> str:
    ses = f" ses-{p.session}" if p.session else ""
    return f"sub-{p.subject}{ses} {p.suffix} ({p.label})"


class BatchProgress:
    """Series done / failed, shown by :class:`qmap.engine.Progress`: one updating line on a terminal, one
    line per series otherwise."""

    def __init__(self, total: int, *, quiet: bool = True, stream=None):
        from ..engine import Progress

        self.total = total
        self.counts = {"fitted": 0, "skipped": 0, "failed": 0}
        self.bar = Progress(total, "qmap batch", quiet=quiet, stream=stream, log=True)

    def update(self, plan: SeriesPlan, res: SeriesResult) -> None:
        self.counts[res.status] += 1
        c = self.counts
        what = res.status if res.status != "failed" else f"FAILED: {res.reason}"
        self.bar.update(detail=f"{sum(c.values())}/{self.total} series ({c['fitted']} fitted, {c['skipped']} "
                               f"skipped, {c['failed']} failed)",
                        line=f"qmap batch: [{sum(c.values())}/{self.total}] {_who(plan)}: {what} ({res.seconds:.1f} s)")


def _write_description(deriv: Path, overwrite: bool) -> str | None:
    """Create ``dataset_description.json`` if missing (or, with overwrite, if it differs); a note or None."""
    path = deriv / "dataset_description.json"
    want = dataset_description()
    if path.exists():
        try:
            have = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            have = None
        if have == want or not overwrite:
            if have != want and (not isinstance(have, dict) or have.get("DatasetType") != "derivative"):
                return f"{path} was kept as found although it does not describe a derivative dataset"
            return None
    tmp = deriv / f".qmap-tmp-{os.getpid()}-dataset_description.json"
    try:
        deriv.mkdir(parents=True, exist_ok=True)
        tmp.write_text(json.dumps(want, indent=2) + "\n", encoding="utf-8")
        os.replace(tmp, path)
    except OSError as exc:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:  # e.g. -o below a regular file: there is no temporary file to remove
            pass
        raise OutputError(f"cannot write {path} ({exc.strerror}); choose another -o or fix permissions") from None
    return None


def _make_dirs(dirs: list[Path]) -> list[Path]:
    """Create the output folders up front (no races between workers); returns those created, deepest first."""
    created: list[Path] = []
    for d in dirs:
        missing = []
        p = d
        while not p.exists():
            missing.append(p)
            p = p.parent
        try:
            d.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise OutputError(f"cannot create {d} ({exc.strerror}); choose another -o or fix permissions") from None
        created.extend(missing)
    return sorted(set(created), key=lambda q: len(q.parts), reverse=True)


def _remove_empty(created: list[Path]) -> None:
    for d in created:
        try:
            d.rmdir()  # only when empty
        except OSError:
            pass


def _run_local(todo, *, n_jobs, overwrite, progress):
    from ..engine import resolve_jobs

    jobs = min(resolve_jobs(n_jobs), len(todo))
    if jobs <= 1:
        for p in todo:
            res = run_series(p, overwrite=overwrite)
            progress.update(p, res)
            yield res
        return
    from joblib import Parallel, delayed

    by_key = {p.key: p for p in todo}
    par = Parallel(n_jobs=jobs, backend="loky", return_as="generator_unordered")
    for res in par(delayed(run_series)(p, overwrite=overwrite) for p in todo):
        progress.update(by_key[res.key], res)
        yield res


def _run_dask(todo, *, client, overwrite, progress):
    from dask.distributed import as_completed

    futures = {}
    try:
        with client.as_current():
            for p in todo:
                fut = client.submit(run_series, p, overwrite=overwrite, pure=False)
                futures[fut] = p
            for fut in as_completed(list(futures)):
                p = futures[fut]
                try:
                    res = fut.result()
                except Exception as exc:  # noqa: BLE001 -- the worker died or could not run qmap: this series failed
                    res = SeriesResult(key=p.key, status="failed",
                                       reason=f"the Dask cluster could not run it ({type(exc).__name__}: {exc})")
                progress.update(p, res)
                yield res
    finally:
        pending = [f for f in futures if not f.done()]
        if pending:
            client.cancel(pending)


def run_batch(
    bids_dir,
    deriv_dir,
    *,
    dry_run: bool = False,
    scheduler: str | None = None,
    n_jobs: int | None = None,
    overwrite: bool = False,
    quiet: bool = True,
    stream=None,
    t2_spectrum: bool = False,
    options: dict | None = None,
    config=None,
) -> BatchReport:
    """Fit every relaxometry series of a BIDS dataset; see the module docstring.

    Parameters
    ----------
    bids_dir : path-like
        Root of the raw BIDS dataset.
    deriv_dir : path-like
        Derivatives folder (created when something is fitted).
    dry_run : bool
        Only plan: report what would be done, create and write nothing.
    scheduler : str, optional
        Address of a Dask distributed scheduler; the series run on its workers.
    n_jobs : int, optional
        Local worker processes (default: all cores; 1 = in this process). Ignored with ``scheduler``.
    overwrite : bool
        Refit series whose outputs are up to date.
    quiet : bool
        No progress display.
    stream : file-like, optional
        Where the progress goes (default stderr).
    t2_spectrum : bool
        Also fit every MESE series by ``t2-spectrum`` (multi-component T2; outputs with the
        method label ``mesespectrum``).
    options : dict, optional
        Fit options for every series (command-line spelling without dashes: ``noise-floor``,
        ``sigma``, ``coils``, ``mask``, ``units``); see :func:`fit_options`.
    config : path-like, optional
        A TOML file with per-series-type options (see :func:`fit_options`).

    Returns
    -------
    BatchReport
        ``report.exit_code`` is 4 when a series failed.
    """
    t0 = time.perf_counter()
    if n_jobs is not None and n_jobs == 0:
        raise UsageError("-j 0: give a positive number of worker processes (or leave -j out for all cores)")
    per_suffix = fit_options(options, config)
    plan = discover(bids_dir, deriv_dir, t2_spectrum=t2_spectrum)
    for p in plan.series:
        p.options = dict(per_suffix.get(p.suffix, {})) if not p.spectrum else {}
    report = BatchReport(plan=plan, dry_run=dry_run)
    if dry_run:
        report.actions = [_planned_action(p, overwrite) for p in plan.series]
        report.wall_time_s = round(time.perf_counter() - t0, 3)
        return report
    todo = [p for p in plan.series if not p.error]
    from ..engine import dask_client

    client = dask_client(scheduler) if scheduler and todo else None  # before anything is written
    try:
        note = _write_description(Path(plan.deriv_dir), overwrite)
        if note:
            report.notes.append(note)
        results: list = [None] * len(plan.series)
        index = {p.key: i for i, p in enumerate(plan.series) if not p.error}  # keys are unique among these
        progress = BatchProgress(len(plan.series), quiet=quiet, stream=stream)
        for i, p in enumerate(plan.series):
            if p.error:
                results[i] = SeriesResult(key=p.key, status="failed", reason=p.error)
                progress.update(p, results[i])
        created = _make_dirs(sorted({Path(p.out_dir) for p in todo}))
        try:
            if todo:
                runner = (_run_dask(todo, client=client, overwrite=overwrite, progress=progress) if client
                          else _run_local(todo, n_jobs=n_jobs, overwrite=overwrite, progress=progress))
                for res in runner:
                    results[index[res.key]] = res
        finally:
            _remove_empty(created)
    finally:
        if client is not None:
            client.close()
    report.results = results
    report.wall_time_s = round(time.perf_counter() - t0, 3)
    return report


#: fit options a batch may set, and the series types they apply to
BATCH_OPTIONS = {
    "noise-floor": ("MEGRE", "MESE"),
    "sigma": ("MEGRE", "MESE"),
    "coils": ("MEGRE", "MESE"),
    "mask": ("IRT1", "VFA", "MESE", "MEGRE"),
    "units": ("IRT1", "VFA", "MESE", "MEGRE"),
}


def fit_options(options: dict | None = None, config=None) -> dict:
    """Per-series-type fit options from the command line and a TOML configuration file.

    Parameters
    ----------
    options : dict, optional
        Options for every series type they apply to (e.g. ``{"sigma": "local"}``).
    config : path-like, optional
        A TOML file (read with :mod:`tomllib`) with one table per series suffix (``MEGRE``, ``MESE``,
        ``IRT1``, ``VFA``) and an optional ``all`` table, e.g.::

            [all]
            mask = "none"

            [MEGRE]
            sigma = "local"

            [MESE]
            noise-floor = "rician"
            sigma = 12.5
            coils = 8

        The suffix tables win over ``all``; the command-line ``options`` win over both.

    Returns
    -------
    dict
        suffix -> {option: value as text}.

    Raises
    ------
    UsageError
        An unreadable file, an unknown table or option, or an option that does not apply to a series type.
    """
    import tomllib

    layers: list[tuple[str, dict]] = []
    if config is not None:
        try:
            with open(config, "rb") as fh:
                doc = tomllib.load(fh)
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise UsageError(f"config={config}: cannot read it as TOML ({exc})") from None
        for name in doc:
            if name != "all" and name not in FIT_KINDS:
                raise UsageError(f"config={config}: unknown table [{name}]; expected all, "
                                 f"{', '.join(sorted(FIT_KINDS))}")
            if not isinstance(doc[name], dict):
                raise UsageError(f"config={config}: {name} must be a table ([{name}]) of options")
        if "all" in doc:
            layers.append(("all", doc["all"]))
        layers += [(t, v) for t, v in doc.items() if t != "all"]
    if options:
        layers.append(("all", {k: v for k, v in options.items() if v is not None}))
    out: dict = {s: {} for s in FIT_KINDS}
    for target, table in layers:
        for name, value in table.items():
            if name not in BATCH_OPTIONS:
                raise UsageError(f"batch option {name!r}: expected one of {', '.join(BATCH_OPTIONS)}")
            text = _option_text(name, value)
            suffixes = BATCH_OPTIONS[name] if target == "all" else (target,)
            if target != "all" and target not in BATCH_OPTIONS[name]:
                raise UsageError(f"batch option {name!r} does not apply to {target} series "
                                 f"(only {', '.join(BATCH_OPTIONS[name])})")
            for s in suffixes:
                out[s][name] = text
    return {s: v for s, v in out.items() if v}


def _option_text(name: str, value) -> str:
    from ..defaults import NOISE_MODES as MODES

    text = str(value)
    if name == "noise-floor" and text not in MODES:
        raise UsageError(f"batch option noise-floor {text!r}: expected one of {', '.join(MODES)}")
    if name == "units" and text not in ("s", "ms"):
        raise UsageError(f"batch option units {text!r}: expected s or ms")
    if name == "coils" and (isinstance(value, bool) or not text.isdigit() or int(text) < 1):
        raise UsageError(f"batch option coils {text!r}: expected a positive whole number")
    if name == "mask" and text not in ("auto", "none"):
        path = Path(text).absolute()
        if not path.is_file():
            raise UsageError(f"batch option mask {text!r}: no such file (or give auto / none)")
        text = str(path)
    return text


def _planned_action(p: SeriesPlan, overwrite: bool) -> str:
    if p.error:
        return "cannot fit (see below)"
    if overwrite:
        return "fit (overwrite)"
    try:
        state, why = series_state(p)
    except OSError as exc:
        return f"fit ({exc.strerror})"
    return {"missing": "fit", "current": "skip (up to date)"}.get(state, f"refit: {why}")
