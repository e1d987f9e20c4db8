"""Options shared by every fitting command, and small parsing helpers."""

from __future__ import annotations

import argparse
from typing import TYPE_CHECKING

from ..defaults import B1_SCALES, DEFAULT_CHUNK, EXPONENTIAL_CHUNK
from ..defaults import DEFAULT_NOISE_MODE as DEFAULT_MODE
from ..defaults import NOISE_MODES as MODES
from ..errors import UsageError, warn
from . import as_options

if TYPE_CHECKING:
    from ..pipeline import CommonOptions

__all__ = ["add_b1", "add_common", "add_execution", "add_model_option", "add_noise", "add_series", "add_sigma",
           "add_stderr", "angles", "check_model_settings", "common_from_args", "end_fitting_parser", "finish",
           "one_time", "times"]


def add_series(p: argparse.ArgumentParser, per: str) -> None:
    """The positional SERIES of a fitting command: one 4D NIfTI or several 3D NIfTIs, ``per`` saying of what."""
    p.add_argument("series", nargs="+", metavar="SERIES", help=f"one 4D NIfTI or several 3D NIfTIs{per}")
    p.set_defaults(read_ahead=True)  # read while the command starts up (qmap.io.readahead)


def add_model_option(p, command: str) -> None:
    """The option that chooses the model of ``command`` (``t2 --epg``, ``t1-vfa --method``, ``b1 --method``).

    Its choices, default and help come from the model registry (:data:`qmap.models.COMMAND_MODELS`);
    a command with one model gets no option. ``p``: the parser or an argument group.
    """
    from ..models import COMMAND_MODELS

    m = COMMAND_MODELS[command]
    if m.option is None:
        return
    if m.flag:
        p.add_argument(m.option, action="store_true", help=m.help())
    else:
        p.add_argument(m.option, choices=m.values, help=m.help(),
                       **({"required": True} if m.required else {"default": m.default}))


def check_model_settings(args, command: str, given: dict) -> None:
    """Refuse options that set a model ``command`` did not choose (``--refocus`` without ``--epg``).

    ``given``: option -> its value (None when not given); the registry says which choice takes which.
    """
    from ..models import COMMAND_MODELS

    m = COMMAND_MODELS[command]
    owner, got = m.foreign_settings(getattr(args, m.dest) if m.dest else None, given)
    if owner is not None:
        verb, it = ("apply", "them") if len(got) > 1 else ("applies", "it")
        how = f"add {m.option}" if m.flag else f"choose {m.option} {owner.value}"
        raise UsageError(f"{' and '.join(got)} {verb} only to {owner.label}; {how} or leave {it} out")


def end_fitting_parser(p: argparse.ArgumentParser, run) -> None:
    """The options every fitting command ends with, as its models in the registry need them, and ``run``.

    From :data:`qmap.models.COMMAND_MODELS` (the command is the parser's name): the noise options
    (``noise="sigma"``: ``--sigma`` and ``--stderr``; ``"floor"``: with the noise-floor handling; ``"own"``:
    the command has its own), then :func:`add_common` -- with ``--engine`` only where every model is
    fitted by least squares and ``--units`` only where one writes a time map.
    """
    from ..models import COMMAND_MODELS

    m = COMMAND_MODELS[p.prog.split()[-1]]
    if m.noise != "own":
        (add_sigma if m.noise == "sigma" else add_noise)(p)
    add_common(p, time_maps=m.time_maps, engine=m.engine_choice)
    p.set_defaults(run=run)


def add_execution(g, *, workers: str, scheduler: str, overwrite: str, cluster_note: str = "") -> None:
    """``-j``, ``--scheduler`` and ``--overwrite`` (every fitting command, and ``batch`` in its own words).

    ``workers``: what ``-j`` counts; ``scheduler``: what runs on the cluster; ``cluster_note``: what the
    cluster needs besides; ``overwrite``: the help of ``--overwrite``.
    """
    g.add_argument("-j", "--jobs", type=int, default=None, metavar="N", help=f"{workers} (default: all cores)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help=f"run {scheduler} on an existing Dask distributed cluster (e.g. tcp://10.0.0.5:8786); "
                        f"{cluster_note + '; ' if cluster_note else ''}-j is then ignored")
    g.add_argument("--overwrite", action="store_true", help=overwrite)


def add_common(p: argparse.ArgumentParser, *, time_maps: bool = True, engine: bool = True) -> None:
    """The options of every fitting command; ``time_maps=False`` leaves out ``--units`` and ``engine=False``
    ``--engine`` (``b1``: a fraction computed in closed form; ``t1-mp2rage``: a table lookup; ``t2-spectrum``:
    its own NNLS solver). The command line then refuses them saying why."""
    g = p.add_argument_group("output and execution (every fitting command)")
    g.add_argument("-o", "--out-dir", required=True, metavar="DIR", help="where outputs go (created if missing)")
    g.add_argument("--prefix", metavar="NAME", help="output name stem (default: from the first input's file name)")
    g.add_argument("--mask", default="auto", metavar="auto|none|FILE",
                   help="voxels to fit: auto (default) thresholds the signal at half the Otsu level of each "
                        "voxel's maximum; none fits every voxel; or a NIfTI mask (> 0 = fit)")
    add_execution(g, workers="local worker threads", scheduler="the voxel chunks", overwrite="replace existing outputs")
    if time_maps:
        g.add_argument("--units", choices=("s", "ms"), default="s",
                       help="units of the written time maps (default s, the BIDS convention); rate maps stay in 1/s")
    g.add_argument("-q", "--quiet", action="store_true",
                   help="no progress bar and no summary on stdout (warnings and errors still go to stderr)")
    g.add_argument("--preview", action="store_true", help="also write a PNG montage of every estimate map")
    if engine:
        g.add_argument("--engine", choices=("fast", "lmfit"), default="fast",
                       help="fast: vectorised solver (default); lmfit: per-voxel reference fits (slow, small jobs)")
    g.add_argument("--chunk-size", type=int, default=None, metavar="N",
                   help=f"at most N voxels per work unit (default {DEFAULT_CHUNK}, {EXPONENTIAL_CHUNK} for a "
                        f"one-exponential fit); results do not depend on it")
    g.add_argument("--no-series-check", dest="series_check", action="store_false",
                   help="fit even when the series does not behave like the model (a decay that does not fall with "
                        "echo time, ...); qmap refuses such a series by default, naming the likely cause")
    g.add_argument("--max-memory", metavar="SIZE",
                   help="memory budget for the input series, e.g. 500MB or 2GB: a larger series is read from disk in "
                        "slabs (fastest from uncompressed .nii); results are identical")
    refused = {}  # options of the other fitting commands that this one leaves out, and why (cli.main says so)
    name = p.prog.split()[-1]
    if not time_maps:
        refused["--units"] = (f"--units does not apply to {name}: it writes no time map (its map is a fraction, "
                              f"not a time); leave --units out")
    if not engine:
        refused["--engine"] = (f"--engine does not apply to {name}: it has one way of computing its maps (closed "
                               f"form, table lookup or its own solver), nothing to choose; leave --engine out")
    if refused:
        p.set_defaults(_refused_options=refused)


SIGMA_HELP = ("noise sd in signal units: auto (default) estimates it from the data (the image background, else the "
              "residuals of a first fit in voxels well above the noise); local: a smooth noise map for noise that "
              "varies over the image (written as _desc-noise_sigmamap); a value; or a NIfTI map of per-voxel sigma")
STDERR_HELP = ("convention of the standard-error maps: noise (default) = from the noise sd, sigma^2 (J^T J)^-1, so "
               "that +/-1.96 SE covers the truth ~95%% of the time; residual = from each voxel's residual variance "
               "RSS/(m-P) (t-distributed with few samples). Without a usable noise level: residual, with a warning")


def add_stderr(g) -> None:
    """``--stderr noise|residual`` (every command that fits a model)."""
    g.add_argument("--stderr", choices=("noise", "residual"), default="noise", help=STDERR_HELP)


def add_sigma(p: argparse.ArgumentParser) -> None:
    """``--sigma`` and ``--stderr`` for commands without a noise-floor model (t1-ir, t1-vfa)."""
    g = p.add_argument_group("noise level and standard errors")
    g.add_argument("--sigma", default="auto", metavar="auto|local|VALUE|FILE", help=SIGMA_HELP)
    add_stderr(g)


def common_from_args(args) -> CommonOptions:
    from ..pipeline import CommonOptions  # imported on use: `--help` stays fast

    if args.jobs is not None and args.jobs == 0:
        raise UsageError("-j 0: give a positive number of workers (or leave -j out for all cores)")
    if args.chunk_size is not None and args.chunk_size < 1:
        raise UsageError("--chunk-size must be a positive number of voxels")
    if args.scheduler and args.jobs is not None:
        warn("-j is ignored with --scheduler (the cluster's workers do the work)")
    return CommonOptions(
        out_dir=args.out_dir, prefix=args.prefix, mask=args.mask, n_jobs=args.jobs, scheduler=args.scheduler,
        overwrite=args.overwrite, units=getattr(args, "units", "s"), quiet=args.quiet, preview=args.preview,
        engine=getattr(args, "engine", "fast"),
        chunk_size=args.chunk_size, command_line=args.argv, max_memory=parse_size(args.max_memory),
        stderr=getattr(args, "stderr", "noise"),
        series_check=getattr(args, "series_check", True),
    )


def parse_size(text: str | None) -> float | None:
    """``500MB``, ``2GB``, ``1.5G``, ``800M`` or a bare number of megabytes -> bytes."""
    if text is None:
        return None
    t = str(text).strip().upper().removesuffix("B")
    mult = {"K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}
    factor = mult.get(t[-1:], None)
    num = t[:-1] if factor else t
    try:
        value = float(num) * (factor or 2**20)
    except ValueError:
        raise UsageError(f"--max-memory {text!r}: give a size such as 500MB or 2GB") from None
    if not value > 0:
        raise UsageError(f"--max-memory {text!r}: must be positive")
    return value


def add_noise(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("noise floor of magnitude data")
    g.add_argument("--noise-floor", choices=MODES, default=DEFAULT_MODE,
                   help=f"default {DEFAULT_MODE}: fit the Rician expectation of the magnitude (unbiased at low SNR; "
                        "needs sigma); offset: add a constant C >= 0; truncate: drop echoes near the floor; "
                        "none: plain exponential (biased where the decay reaches the floor)")
    g.add_argument("--sigma", default="auto", metavar="auto|local|VALUE|FILE", help=SIGMA_HELP)
    add_stderr(g)
    g.add_argument("--coils", type=positive_int, default=None, metavar="N",
                   help="rician: the magnitude is a sum of squares over N coils (noncentral chi); default 1, or "
                        "what the background's moments show")


def positive_int(text: str, what: str = "") -> int:
    """argparse type: a whole number >= 1 (a bad value is a one-line usage error, exit 2).

    ``what`` names the unit in the message (``positive_int(text, "excitations")``).
    """
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"{text!r} is not a positive whole number{' of ' + what if what else ''}")
    return value


def add_b1(p: argparse.ArgumentParser, *, into: str) -> None:
    """The transmit-field (B1) correction options; ``into``: what the B1 map's standard error is propagated into."""
    g = p.add_argument_group("transmit field (B1) correction")
    g.add_argument("--b1", metavar="B1MAP", help="relative B1 map (actual / nominal angle) on any grid, e.g. the "
                   "TB1map written by qmap b1, resampled through the affines; voxels outside its field of view get "
                   "status 6")
    g.add_argument("--b1-scale", choices=B1_SCALES, default=None,
                   help="units of the B1 map: fraction (1.0 = nominal) or percent (100 = nominal); default: the "
                        "map's sidecar Units, else fraction")
    g.add_argument("--b1-smooth", type=float, default=None, metavar="FWHM_MM",
                   help="Gaussian smoothing of the B1 map before resampling, FWHM in mm (default: none)")
    g.add_argument("--b1-stderr", default="auto", metavar="auto|none|FILE",
                   help=f"standard error of the B1 map, propagated into {into} (first order): auto (default) uses "
                        f"the desc-stderr map that qmap b1 writes beside its TB1map when present; none switches the "
                        f"propagation off; or a NIfTI map in the B1 map's units")


def times(text, key, option):
    from ..units import parse_time_list

    return None if text is None else parse_time_list(text, key=key, what=option)


def one_time(text, key, option):
    """One time (``--tr 15ms``) in seconds, None when the option was not given."""
    from ..units import parse_time

    return None if text is None else parse_time(text, key=key, what=option)


def angles(text, option="--fa"):
    from ..units import parse_angle_list

    return None if text is None else parse_angle_list(text, what=option)


def finish(report, args) -> int:
    """Print the run summary (unless quiet) and return exit code 0."""
    if not args.quiet:
        print(as_options(report.summary()))  # the library's notes name arguments
    return 0
