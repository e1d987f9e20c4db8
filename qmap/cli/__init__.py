"""The ``qmap`` command line: parse, call the library, map errors to exit codes.

Exit codes: 0 success; 2 bad usage or bad input (one line on stderr, no
traceback, no outputs left behind); 3 ``phantom``: an ROI out of tolerance;
4 ``batch``: a session or series failed; 130 interrupted (Ctrl-C), 143
terminated (SIGTERM) -- both leave the outputs as they were; 1 an unexpected
internal error.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import os
import re
import signal
import sys
import threading
import traceback
import warnings

from .. import __version__
from ..errors import QmapError, QmapWarning

__all__ = ["get_parser", "main"]

#: subcommand -> module in qmap.cli defining ``add_parser(subparsers)`` and ``run(args) -> int``
COMMANDS = {  # in the order `qmap --help` lists them: fits, then checks and tools
    "t1-ir": "t1_ir",
    "t1-vfa": "t1_vfa",
    "t1-mp2rage": "t1_mp2rage",
    "t2": "t2",
    "t2star": "t2star",
    "t2-spectrum": "t2_spectrum",
    "b1": "b1",
    "batch": "batch",
    "phantom": "phantom",
    "roi": "roi",
    "inspect": "inspect_voxel",
    "plan": "plan",
    "simulate": "simulate",
    "demo": "demo",
}


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised in the main thread: handled exactly like Ctrl-C (every clean-up runs), exit code 143."""


def _on_sigterm(signum, frame):
    raise Terminated


def _catch_sigterm():
    """Install the SIGTERM handler for the run (main thread only); returns the previous handler or None."""
    if threading.current_thread() is not threading.main_thread():
        return None
    try:
        return signal.signal(signal.SIGTERM, _on_sigterm)
    except (ValueError, OSError):  # pragma: no cover - no signals here
        return None


#: one example per command, shown at the end of ``qmap COMMAND --help`` (a command may set its own epilog)
EXAMPLES = {
    "t1-ir": "qmap t1-ir sub-01_inv-*_IRT1.nii.gz -o out     (InversionTime from the BIDS sidecars)\n"
             "  qmap t1-ir ir.nii.gz --ti 50ms,150ms,400ms,800ms,1.5s,3s -o out\n"
             "  qmap t1-ir mag.nii.gz --signal complex --phase phase.nii.gz --ti 50ms,150ms,400ms,800ms -o out",
    "t1-vfa": "qmap t1-vfa sub-01_flip-*_VFA.nii.gz --b1 b1/sub-01_acq-tb1dam_TB1map.nii.gz -o out",
    "t2": "qmap t2 sub-01_echo-*_MESE.nii.gz --epg -o out",
    "t2star": "qmap t2star gre.nii.gz --te 2ms,4ms,6ms,8ms,10ms,12ms -o out",
    "b1": "qmap b1 fa60.nii.gz fa120.nii.gz --method dam --fa 60,120 -o b1",
    "phantom": "qmap phantom --labels vials.nii.gz --reference reference.csv --temperature 20 -o qa \\\n"
               "      --map out/sub-01_acq-irt1_T1map.nii.gz --map out/sub-01_acq-mese_T2map.nii.gz",
    "batch": "qmap batch /data/bids -o /data/bids/derivatives/qmap --dry-run",
    "demo": "qmap demo -o qmap-demo",
    "inspect": "qmap inspect out --voxel 24,24,2",
    "t2-spectrum": "qmap t2-spectrum sub-01_echo-*_MESE.nii.gz --window 10ms,40ms -o out",
}


class _HelpFormatter(argparse.HelpFormatter):
    """Wraps prose paragraphs; keeps paragraphs with indented lines (examples, file lists) as written."""

    def _fill_text(self, text, width, indent):
        blocks = text.split("\n\n")
        out = []
        for block in blocks:
            if any(line.startswith(" ") for line in block.splitlines()):
                out.append("\n".join(indent + line for line in block.splitlines()))
            else:
                out.append(super()._fill_text(block, width, indent))
        return "\n\n".join(out)


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit code 2) and help text that keeps examples as written."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)

    def error(self, message):
        raise SystemExit(_usage_error(f"{self.prog}: {message} (see {self.prog} --help)"))


def _usage_error(line: str) -> int:
    sys.stderr.write(f"qmap: error: {line.removeprefix('qmap: ')}\n")
    return 2


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """:func:`warnings.showwarning` for the command line: a qmap warning is one line on stderr."""
    if issubclass(category, QmapWarning):  # a library warning names arguments; the command line, options
        sys.stderr.write(f"qmap: warning: {as_options(' '.join(str(message).split()))}\n")
    else:
        sys.stderr.write(warnings.formatwarning(message, category, filename, lineno, line))


def _modules(only: str | None = None):
    mods = {}
    for cmd, modname in COMMANDS.items():
        if only is not None and cmd != only:
            continue
        mods[cmd] = importlib.import_module(f"qmap.cli.{modname}")
    return mods


def get_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The argument parser; with ``only``, just that subcommand is loaded (fast start-up)."""
    parser = _Parser(
        prog="qmap",
        description="Quantitative MRI relaxometry: T1, T2, T2* and B1 maps with standard errors, fit quality and "
        "phantom QA. Times are seconds unless a unit is given (12ms); angles are degrees.",
        epilog="Run 'qmap COMMAND --help' for the options of a command. Research tool, not a medical device: "
        "results need review by qualified staff.",
    )
    parser.add_argument("--version", action="version", version=f"qmap {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    for cmd, mod in _modules(only).items():
        mod.add_parser(sub)
        p = sub.choices[cmd]
        if p.epilog is None and cmd in EXAMPLES:
            p.epilog = f"example:\n  {EXAMPLES[cmd]}"
        if "quiet" not in {a.dest for a in p._actions}:  # every command accepts -q
            p.add_argument("-q", "--quiet", action="store_true",
                           help="print nothing on stdout (warnings and errors still go to stderr)")
            p.set_defaults(_silence_stdout=True)
    return parser


def _unrecognized(parser: argparse.ArgumentParser, args, extra: list[str]) -> None:
    """Refuse arguments the command does not take, in the command's own words (exit 2 via its ``error``)."""
    cmd = getattr(args, "command", None)
    sub = next((a for a in parser._actions if isinstance(a, argparse._SubParsersAction)), None)
    target = sub.choices[cmd] if cmd and sub is not None else parser
    refused = getattr(args, "_refused_options", None) or {}
    for tok in extra:
        reason = refused.get(tok.split("=", 1)[0])
        if reason:
            target.error(reason)
    target.error(f"unrecognized arguments: {' '.join(extra)}")


def _commits() -> int:
    """Output sets committed so far in this process (without importing the writer for ``--version``)."""
    writer = sys.modules.get("qmap.io.writer")
    return int(getattr(writer, "COMMITS", 0))


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    with warnings.catch_warnings():
        warnings.simplefilter("always", QmapWarning)  # each one, as it happens, whatever the caller's filters
        warnings.showwarning = _show_warning
        return _main(argv)


def console() -> None:
    """The ``qmap`` program: :func:`main`, then exit with its code.

    After a successful run every output is written, committed and closed, so the process ends at once
    (``os._exit`` after flushing stdout and stderr) instead of tearing the interpreter down module by
    module: numpy's, scipy's and nibabel's teardown took 0.05-0.1 s of a 1.6 s run on the 2-core
    development machine. A failed run exits the ordinary way (its clean-up handlers run), and so does a
    run under a profiler or a tracer (``python -m cProfile -m qmap ...``, coverage: they write at exit).
    """
    _one_blas_thread()
    rc = main()
    if rc == 0 and sys.getprofile() is None and sys.gettrace() is None:  # a profiler or coverage writes at exit
        try:
            sys.stdout.flush()
            sys.stderr.flush()
        except (BrokenPipeError, OSError):  # a reader that went away: not an error of ours
            pass
        os._exit(0)
    sys.exit(rc)


def _one_blas_thread() -> None:
    """One BLAS thread for the program, unless the user chose (``OPENBLAS_NUM_THREADS``, ``OMP_NUM_THREADS``).

    qmap spreads its work over its own workers (``-j``, each fit's BLAS limited to one thread); BLAS threads
    of their own only compete with them, and OpenBLAS's idle threads spin for a while after every threaded
    call. Measured on a 1M-voxel ``t2star`` run on 2 cores: the vector products of the noise estimate left
    OpenBLAS's thread spinning through the fit, ~150 ms of CPU (9 %) and 40-60 ms of the run's 0.85 s;
    the results are the same to the bit. Set before numpy is first imported (it reads the variable once).
    """
    if "numpy" not in sys.modules and not any(v in os.environ for v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")):
        os.environ["OPENBLAS_NUM_THREADS"] = "1"


#: library argument -> command-line option: the array API's messages name arguments (``sigma=``), the
#: command line shows the option the user typed (``--sigma``)
ARGUMENT_OPTIONS = {
    "refocus_deg": "--refocus",
    "t1": "--t1",
    "sigma": "--sigma",
    "value_range": "--range",
    "snr": "--snr",
    "samples": "--samples",
    "tr": "--tr",
    "limits": "--limits",
    "evaluate": "--evaluate",
    # B1 maps (qmap.b1.load_b1_map / load_b1_stderr and the workflows of t1-vfa and t1-mp2rage)
    "b1": "--b1",
    "b1_scale": "--b1-scale",
    "b1_smooth": "--b1-smooth",
    "b1_se": "--b1-stderr",
    # qmap.simulate.simulate and its Protocols
    "protocols": "--protocol",
    "phantom": "--phantom",
    "shape": "--shape",
    "b1_snr": "--b1-snr",
    "coils": "--coils",
    "subject": "--subject",
    "b1_range": "--b1-range",
    "b1_method": "--b1-method",
    "ir_tr": "--ir-tr",
    "mese_echoes": "--echoes",
    "out_dir": "-o",
    "overwrite": "--overwrite",
    # the Dask cluster (qmap.engine.dask_client: the array API's scheduler=, fitting commands and batch)
    "scheduler": "--scheduler",
    # phantom QA and ROI statistics (qmap.workflows.phantom / roi and their loaders in qmap.qa); one map of
    # maps= is map=, with its param= and tag=
    "maps": "--map",
    "map": "--map",
    "param": "--param",
    "tag": "--tag",
    "labels": "--labels",
    "names": "--names",
    "layout": "--layout",
    "layout_image": "--layout-image",
    "reference": "--reference",
    "history": "--history",
    "temperature": "--temperature",
    "tolerance": "--tolerance",
    "erode": "--erode",
    "min_voxels": "--min-voxels",
    "date": "--date",
    # the T2 model choice (qmap.workflows.t2.fit_t2 / run_t2 and qmap.models.epg_t2)
    "epg": "--epg",
    "drop_first": "--drop-first",
    # the shared options of the fitting commands (qmap.pipeline.CommonOptions, resolve_mask / resolve_sigma)
    # and the noise level's estimation (qmap.noise_level)
    "mask": "--mask",
    "stderr": "--stderr",
    "units": "--units",
    "engine": "--engine",
    "prefix": "--prefix",
    "noise_floor": "--noise-floor",
    "max_memory": "--max-memory",
    # qmap.workflows.inspect (inspect_voxel), t1-vfa and b1 (run_t1_vfa, run_b1)
    "voxel": "--voxel",
    "world": "--world",
    "method": "--method",
    "fa": "--fa",
    "t1_typical": "--t1-typical",
    # t2-spectrum (fit_t2_spectrum, run_t2_spectrum), t1-mp2rage (run_t1_mp2rage, resolve_protocol), t1-ir
    "te": "--te",
    "window": "--window",
    "chi2_factor": "--chi2-factor",
    "n_t2": "--n-t2",
    "t2_range": "--t2-range",
    "ti": "--ti",
    "shots": "--shots",
    "tr_exc": "--tr-exc",
    "tr_prep": "--tr-prep",
    "efficiency": "--inversion-efficiency",
    "inv1": "--inv1",
    "inv2": "--inv2",
    "inv1_phase": "--inv1-phase",
    "inv2_phase": "--inv2-phase",
    "signal": "--signal",
    "phase": "--phase",
    # a flag that turns a check off: series_check=False (CommonOptions) is --no-series-check
    "series_check": "--no-series-check",
    # qmap.batch.run_batch
    "config": "--config",
}
_ARGUMENT = re.compile(r"\b(" + "|".join(ARGUMENT_OPTIONS) + r")=('[^']*'|\([^)]*\)|\[[^\]]*\]|True\b|False\b)?")


def as_options(message: str) -> str:
    """A library message as the command line says it: ``name=value`` of an argument -> ``--option value``.

    A quoted string loses its quotes, a tuple or list becomes a comma separated list, and
    ``flag=True`` becomes the bare flag (as does ``check=False`` of a ``--no-...`` option).

    Examples
    --------
    >>> as_options("t1=-1: T1 must be a positive number of seconds; give samples=4 or more")
    '--t1 -1: T1 must be a positive number of seconds; give --samples 4 or more'
    >>> as_options("sigma='local' needs a fitted model")
    '--sigma local needs a fitted model'
    >>> as_options("b1_range=(1.2, 0.8): expected 0 < MIN <= MAX (e.g. b1_range=(0.85, 1.15))")
    '--b1-range 1.2,0.8: expected 0 < MIN <= MAX (e.g. --b1-range 0.85,1.15)'
    >>> as_options("out_dir=sim: the folder is not empty; pass overwrite=True to replace it")
    '-o sim: the folder is not empty; pass --overwrite to replace it'
    """
    def option(m: re.Match) -> str:
        opt, value = ARGUMENT_OPTIONS[m.group(1)], m.group(2)
        if value is None:
            return opt + " "
        if value in ("True", "False"):
            return opt
        if value[0] == "'":
            return f"{opt} {value[1:-1]}"
        items = (t.strip().strip("'\"") for t in value[1:-1].split(","))
        return f"{opt} {','.join(t for t in items if t)}"

    out = _ARGUMENT.sub(option, message)
    out = re.sub(r"(--[a-z0-9-]+ )'([^']*)'", r"\1\2", out)  # and a quoted value after any option
    return re.sub(r"(?<![\w-])(--?[a-z0-9-]+) (?=[\s,;:.)]|$)", r"\1", out)  # a bare name= as the option alone


def _main(argv: list[str]) -> int:
    commits_before = _commits()
    previous_handler = _catch_sigterm()
    try:
        if argv[:1] == ["--version"]:
            print(f"qmap {__version__}")
            return 0
        # only the named command's module is imported (the others pull in matplotlib, scipy.stats, ...)
        parser = get_parser(argv[0] if argv and argv[0] in COMMANDS else None)
        args, extra = parser.parse_known_args(argv)
        if extra:
            _unrecognized(parser, args, extra)
        if not getattr(args, "command", None):
            parser.print_help(sys.stderr)
            return 2
        args.argv = ["qmap"] + argv
        _read_ahead(args)
        if getattr(args, "_silence_stdout", False) and args.quiet:
            with open(os.devnull, "w") as devnull, contextlib.redirect_stdout(devnull):
                return int(args.run(args) or 0)
        return int(args.run(args) or 0)
    except SystemExit as exc:  # argparse: --help/--version (0) or our one-line errors (2)
        return int(exc.code or 0) if isinstance(exc.code, int) or exc.code is None else 2
    except QmapError as exc:
        msg = as_options(" ".join(str(exc).split()))
        return _usage_error(msg)
    except KeyboardInterrupt as exc:
        what = "terminated (SIGTERM)" if isinstance(exc, Terminated) else "interrupted"
        if _commits() == commits_before:
            sys.stderr.write(f"qmap: {what}; no outputs were written (the output folder is as it was)\n")
        else:  # the interrupt came after a complete set of outputs was put in place
            sys.stderr.write(f"qmap: {what} after the outputs were written; they are complete\n")
        return 128 + (signal.SIGTERM if isinstance(exc, Terminated) else signal.SIGINT)
    except BrokenPipeError:  # e.g. `qmap ... | head`: the reader went away; not an error of ours
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the flush at exit
        except OSError:
            pass
        return 0
    except MemoryError:
        sys.stderr.write("qmap: error: out of memory; fitting commands can read the series in slabs (--max-memory) "
                         "and fit fewer voxels at a time (--chunk-size); otherwise use less data or a larger machine\n")
        return 2
    except Exception:  # noqa: BLE001 -- a bug: keep the traceback for the report
        traceback.print_exc()
        sys.stderr.write(f"qmap: internal error (a bug in qmap {__version__}); please report it with the traceback above\n")
        return 1
    finally:
        if "qmap.io.readahead" in sys.modules:  # what the run did not take is freed
            sys.modules["qmap.io.readahead"].discard()
        if previous_handler is not None:
            signal.signal(signal.SIGTERM, previous_handler)


def _read_ahead(args) -> None:
    """Start reading a fitting command's series while the command's modules are imported.

    (:mod:`qmap.io.readahead`; not when ``--max-memory`` cannot be read: the command reports that.)
    """
    if not getattr(args, "read_ahead", False):
        return
    from ..io import readahead
    from .common import parse_size

    try:
        budget = parse_size(getattr(args, "max_memory", None))
    except QmapError:
        return
    readahead.start(args.series, max_bytes=budget)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
