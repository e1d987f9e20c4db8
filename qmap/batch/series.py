"""One series of a batch: is it up to date, and if not, fit it -- in whatever process runs this.

:func:`run_series` is the unit of work shipped to local worker processes or
to Dask workers (possibly on other machines): it takes a plain
:class:`~qmap.batch.plan.SeriesPlan` with absolute paths, never raises for a
failing series (the failure and its reason are the result), and fits with one
thread so that many series can run side by side.
"""

from __future__ import annotations

import importlib
import json
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path

from .. import __version__
from ..errors import InputError, QmapError, collecting_warnings
from ..io.writer import existing_outputs, sha256_file
from .plan import SeriesPlan

__all__ = ["SeriesResult", "equivalent_argv", "fit_call", "positional", "run_series", "series_state"]


@dataclass
class SeriesResult:
    """What happened to one series.

    ``status`` is ``"fitted"``, ``"skipped"`` (outputs up to date) or
    ``"failed"`` (``reason`` says why). ``replaced`` says why outputs of an
    earlier run were replaced, when they were.
    """

    key: str
    status: str
    reason: str | None = None
    seconds: float = 0.0
    written: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    replaced: str | None = None
    traceback: str | None = None


def fit_call(plan: SeriesPlan) -> tuple[dict, list[str]]:
    """Keyword arguments of the workflow function, and the same choices as command-line options.

    The user's per-series-type options (``plan.options``) are included; ``mask`` and ``units`` are
    shared options (:class:`~qmap.pipeline.CommonOptions`) and appear only in the command line.
    """
    suffix = plan.suffix
    kwargs: dict = {}
    opts: list[str] = []
    if suffix == "IRT1":
        kwargs, opts = {"signal": "magnitude"}, ["--signal", "magnitude"]
    elif suffix == "VFA":
        kwargs = {"method": "nonlinear"}
        opts = ["--method", "nonlinear"]
        _add_b1(plan, kwargs, opts)
    elif plan.spectrum:
        pass
    elif suffix == "MESE":
        kwargs, opts = {"epg": True}, ["--epg"]
    elif suffix == "MP2RAGE":
        if plan.inputs:
            kwargs.update(inv1=plan.inputs[0], inv2=plan.inputs[1])
            opts += ["--inv1", plan.inputs[0], "--inv2", plan.inputs[1]]
        _add_b1(plan, kwargs, opts)
    for name, value in sorted(plan.options.items()):
        opts += [f"--{name}", str(value)]
        if name == "noise-floor":
            kwargs["noise_floor"] = str(value)
        elif name == "sigma":
            kwargs["sigma"] = str(value)
        elif name == "coils":
            kwargs["coils"] = int(value)
    return kwargs, opts


def _add_b1(plan: SeriesPlan, kwargs: dict, opts: list[str]) -> None:
    """The B1 map (and its units) of a fit that corrects for B1, as keyword arguments and as options."""
    if plan.b1:
        kwargs["b1"] = plan.b1
        opts += ["--b1", plan.b1]
        if plan.b1_scale:
            kwargs["b1_scale"] = plan.b1_scale
            opts += ["--b1-scale", plan.b1_scale]


def positional(plan: SeriesPlan) -> list[str]:
    """The positional inputs of the fit command: the series files, or MP2RAGE's UNIT1 image."""
    return [plan.uni or ""] if plan.suffix == "MP2RAGE" else list(plan.inputs)


def equivalent_argv(plan: SeriesPlan) -> list[str]:
    """The single-series ``qmap`` command doing the same fit (recorded as the provenance command line).

    It names the fit, its options, every input and the output place, so two
    runs with the same command line and the same input hashes made the same maps.
    """
    _, opts = fit_call(plan)
    return ["qmap", plan.kind.command, *positional(plan), *opts, "-o", plan.out_dir, "--prefix", plan.prefix]


def series_state(plan: SeriesPlan) -> tuple[str, str]:
    """``("missing", "")``, ``("current", "")`` or ``("stale", why)`` for the outputs of ``plan``.

    Current means: the provenance file exists, records the same command
    (fit, options, inputs, outputs) and the same SHA-256 of every input as
    the files have now, and every output it lists is there.
    """
    out = Path(plan.out_dir)
    if not existing_outputs(out, plan.prefix):
        return "missing", ""
    prov_path = out / f"{plan.prefix}_provenance.json"
    if not prov_path.is_file():
        return "stale", f"outputs {plan.prefix}_* exist without {prov_path.name}"
    try:
        prov = json.loads(prov_path.read_text(encoding="utf-8"))
        recorded = {i["path"]: i["sha256"] for i in prov["inputs"]}
        outputs = list(prov["outputs"])
        command = prov["command_line"]
    except (OSError, ValueError, KeyError, TypeError):
        return "stale", f"{prov_path.name} is unreadable"
    if command != equivalent_argv(plan):
        return "stale", "the earlier outputs were made with other fit options"
    wanted = plan.all_inputs
    if set(recorded) != set(wanted):
        return "stale", "the earlier outputs were made from other input files"
    for p in wanted:
        try:
            digest = sha256_file(p)
        except OSError:
            return "stale", f"{Path(p).name} cannot be read"
        if digest != recorded[p]:
            return "stale", f"{Path(p).name} changed since the earlier outputs were made"
    missing = [n for n in outputs if not (out / n).is_file()]
    if not outputs or missing:
        return "stale", f"the earlier outputs are incomplete ({missing[0] if missing else 'none listed'})"
    return "current", ""


def _workflow(plan: SeriesPlan):
    kind = plan.kind
    try:
        module = importlib.import_module(kind.module)
        return getattr(module, kind.function)
    except ModuleNotFoundError as exc:
        if exc.name != kind.module:
            raise
    except AttributeError:
        pass
    raise InputError(f"{plan.label}: qmap {__version__} cannot fit {plan.suffix} series ({kind.command} is not "
                     f"available in this installation); update qmap")


def run_series(plan: SeriesPlan, *, overwrite: bool = False) -> SeriesResult:
    """Skip, fit or fail one series; never raises for a failure of the series itself.

    Parameters
    ----------
    plan : SeriesPlan
    overwrite : bool
        Fit even when the outputs are up to date (and replace them).

    Returns
    -------
    SeriesResult
    """
    from ..pipeline import CommonOptions

    t0 = time.perf_counter()
    res = SeriesResult(key=plan.key, status="failed")
    with collecting_warnings(emit=False) as warnings:
        try:
            if plan.error:
                raise InputError(plan.error)
            state, why = ("missing", "") if overwrite else series_state(plan)
            if state == "current":
                res.status = "skipped"
            else:
                fn = _workflow(plan)
                kwargs, _ = fit_call(plan)
                common = CommonOptions(out_dir=Path(plan.out_dir), prefix=plan.prefix, n_jobs=1,
                                       overwrite=overwrite or state == "stale", quiet=True,
                                       command_line=equivalent_argv(plan),
                                       mask=str(plan.options.get("mask", "auto")),
                                       units=str(plan.options.get("units", "s")))
                args = positional(plan)
                report = fn(args[0] if plan.suffix == "MP2RAGE" else args, common=common, **kwargs)
                res.written = [Path(p).name for p in report.written]
                res.status = "fitted"
                res.replaced = why or None
        except QmapError as exc:
            res.reason = " ".join(str(exc).split())
        except MemoryError:
            res.reason = "out of memory while fitting this series; run fewer series at a time (-j)"
        except Exception as exc:  # noqa: BLE001 -- a bug: keep it to this series, with the traceback for the report
            res.reason = f"internal error (a bug in qmap {__version__}): {type(exc).__name__}: {exc}"
            res.traceback = traceback.format_exc()
    res.warnings = list(warnings)
    res.seconds = round(time.perf_counter() - t0, 3)
    return res
