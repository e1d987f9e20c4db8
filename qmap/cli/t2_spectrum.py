"""``qmap t2-spectrum``: multi-component T2 (short-T2 fraction, T2 spectra) from multi-echo spin echo."""

from __future__ import annotations

from ..errors import UsageError
from ..models.t2_spectrum import (
    DEFAULT_CHI2_FACTOR,
    DEFAULT_MIN_SNR,
    DEFAULT_N_T2,
    DEFAULT_T2_RANGE,
    DEFAULT_WINDOW,
)
from ..units import parse_time_list
from ..workflows.t2 import DEFAULT_REFOCUS, DEFAULT_T1
from ..workflows.t2_spectrum import MIN_ECHOES, SE_SUBSAMPLE, run_t2_spectrum
from .common import common_from_args, end_fitting_parser, finish, times
from .t2 import _refocus, _t1


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t2-spectrum",
        help="multi-component T2: regularised NNLS T2 spectrum, short-T2 (myelin water) fraction",
        description="Decompose a multi-echo spin-echo (CPMG) magnitude train into a non-negative spectrum of "
        f"amplitudes over {DEFAULT_N_T2} log-spaced T2 values ({1e3 * DEFAULT_T2_RANGE[0]:g} ms - "
        f"{DEFAULT_T2_RANGE[1]:g} s by default) with an extended-phase-graph basis and a refocusing angle fitted per "
        "voxel (Whittall & MacKay 1989; Prasloski et al. 2012). The spectrum is regularised by letting chi-squared "
        f"grow to --chi2-factor (default {DEFAULT_CHI2_FACTOR:g}) times its minimum. Writes the short-T2 fraction "
        "(MWF map) with its standard error, the geometric-mean T2 inside and above the window (desc-short / "
        "desc-long T2 maps), the refocusing angle, the spectrum as a 4D image (T2 grid in its sidecar), quality "
        "maps (R-squared, RMS residual, chi2, regularisation weight, SNR), a status map and provenance. "
        f"Needs at least {MIN_ECHOES} equally spaced echoes (TE_k = k x ESP) and a high SNR (>= 100 is common "
        "practice).",
    )
    p.add_argument("series", nargs="+", metavar="SERIES", help="one 4D NIfTI or several 3D NIfTIs (one per echo)")
    p.set_defaults(read_ahead=True)  # read while the command starts up (qmap.io.readahead)
    p.add_argument("--te", metavar="LIST", help="echo times, e.g. 10ms,20ms,...,320ms (default: sidecar EchoTime)")
    p.add_argument("--refocus", metavar="DEG",
                   help=f"nominal refocusing angle in degrees (default: the sidecar's RefocusingFlipAngle, else "
                        f"{DEFAULT_REFOCUS:g}); the angle is searched per voxel from half of it (at least 60) to 180 "
                        "degrees")
    p.add_argument("--window", metavar="LO,HI",
                   help=f"short-T2 window of the fraction (default {1e3 * DEFAULT_WINDOW[0]:g}ms,"
                        f"{1e3 * DEFAULT_WINDOW[1]:g}ms)")
    g = p.add_argument_group("spectrum")
    g.add_argument("--chi2-factor", type=float, default=DEFAULT_CHI2_FACTOR, metavar="F",
                   help=f"regularisation: chi-squared may grow to F times its minimum (default {DEFAULT_CHI2_FACTOR:g};"
                        " 1 = no regularisation)")
    g.add_argument("--n-t2", type=int, default=DEFAULT_N_T2, metavar="N",
                   help=f"number of log-spaced T2 values (default {DEFAULT_N_T2})")
    g.add_argument("--t2-range", metavar="LO,HI",
                   help=f"range of the T2 grid (default {1e3 * DEFAULT_T2_RANGE[0]:g}ms,{DEFAULT_T2_RANGE[1]:g}s)")
    g.add_argument("--t1", metavar="T", help=f"fixed T1 of the EPG basis (default {DEFAULT_T1:g}s)")
    g.add_argument("--min-snr", type=float, default=DEFAULT_MIN_SNR, metavar="S",
                   help=f"voxels whose first-echo SNR is below S get status 10 (default {DEFAULT_MIN_SNR:g})")
    g.add_argument("--se-subsample", type=int, default=SE_SUBSAMPLE, metavar="N",
                   help=f"voxels of the bootstrap that calibrates the standard error of the fraction (default "
                        f"{SE_SUBSAMPLE})")
    g.add_argument("--sigma", default="auto", metavar="auto|local|VALUE|NOISEMAP",
                   help="noise sd: auto (default) from the image background, else from the fit residuals; local: a "
                        "smooth map from the fit residuals and the background, for noise that varies over the image "
                        "(written as _desc-noise_sigmamap); a value in signal units; or a NIfTI noise map")
    end_fitting_parser(p, run)  # the registry: one solver (batched NNLS), no --engine choice


def _pair(text, option, default):
    if text is None:
        return default
    key = "T2" if option == "--t2-range" else "EchoTime"
    values = parse_time_list(text, key=key, what=option)
    if values.size != 2:
        raise UsageError(f"{option} {text}: give two times LO,HI, e.g. {option} 10ms,40ms")
    return float(values[0]), float(values[1])


def run(args) -> int:
    if args.se_subsample < 0:
        raise UsageError("--se-subsample must be >= 0")
    common = common_from_args(args)
    report = run_t2_spectrum(
        args.series, common=common, te=times(args.te, "EchoTime", "--te"), refocus_deg=None if args.refocus is None else _refocus(args.refocus),
        t1=_t1(args.t1), window=_pair(args.window, "--window", DEFAULT_WINDOW), chi2_factor=args.chi2_factor,
        n_t2=args.n_t2, t2_range=_pair(args.t2_range, "--t2-range", DEFAULT_T2_RANGE), min_snr=args.min_snr,
        sigma=args.sigma, se_subsample=args.se_subsample,
    )
    return finish(report, args)
