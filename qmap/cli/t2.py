"""``qmap t2``: T2 maps from multi-echo spin-echo (CPMG) trains."""

from __future__ import annotations

import math

from ..defaults import DEFAULT_REFOCUS, DEFAULT_T1
from ..errors import InputError, UsageError
from .common import (
    add_model_option,
    add_series,
    check_model_settings,
    common_from_args,
    end_fitting_parser,
    finish,
    times,
)

#: a bare --t1 above this many seconds is taken to be milliseconds by mistake
_T1_PLAUSIBLE_MAX_S = 10.0


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t2",
        help="T2 / R2 from multi-echo spin echo (mono-exponential or EPG with stimulated echoes)",
        description="Fit T2 in every voxel of a multi-echo spin-echo (CPMG) magnitude series. By default "
        "S(TE) = M0 exp(-TE/T2). With imperfect refocusing (B1 error, slice profile) the later echoes carry "
        "stimulated echoes and that fit overestimates T2; --epg instead models the whole echo train by extended "
        "phase graphs and fits M0, T2 and the refocusing angle per voxel. Writes T2, R2 and M0 maps (and "
        "RefocusScale with --epg) with standard errors, R-squared / RMS-residual maps, a status map and provenance.",
    )
    add_series(p, " (one per echo)")
    p.add_argument("--te", metavar="LIST", help="echo times, e.g. 10ms,20ms,30ms (default: sidecar EchoTime)")
    p.add_argument("--drop-first", action="store_true",
                   help="do not fit the first echo. With imperfect refocusing the first echo of a CPMG train has no "
                        "stimulated-echo contribution while the later echoes do, so it lies below the exponential "
                        "trend of the rest and biases a mono-exponential fit; dropping it is common practice for "
                        "mono-exponential T2. Not with --epg, which models the first echo and needs it")
    g = p.add_argument_group("stimulated-echo correction (extended phase graphs)")
    add_model_option(g, "t2")  # --epg, from the model registry
    g.add_argument("--refocus", metavar="DEG",
                   help=f"nominal refocusing flip angle in degrees (default {DEFAULT_REFOCUS:g}); the fitted angle is "
                        "this times RefocusScale, at most 180")
    g.add_argument("--t1", metavar="T",
                   help=f"fixed T1 of the EPG model (default {DEFAULT_T1:g}s; e.g. 1.2s or 1200ms). It only affects the "
                        "stimulated-echo pathways: none at 180 deg refocusing, and a T1 off by a factor of two changes "
                        "the fitted T2 by less than 1%% for refocusing scales 0.8-1 (32 echoes, 10 ms spacing)")
    end_fitting_parser(p, run)


def _refocus(text) -> float:
    if text is None:
        return DEFAULT_REFOCUS
    from ..units import parse_angle_list

    values = parse_angle_list(text, what="--refocus")
    if values.size != 1:
        raise UsageError(f"--refocus {text}: give one nominal refocusing angle in degrees, e.g. --refocus 160")
    if values[0] < 60:
        raise UsageError(f"--refocus {text}: a nominal refocusing angle below 60 deg is implausible for a CPMG train "
                         f"(radians? {text} rad = {math.degrees(float(values[0])):.0f} deg); give degrees, e.g. 160")
    return float(values[0])


def _t1(text) -> float:
    if text is None:
        return DEFAULT_T1
    from ..units import parse_time_list

    values = parse_time_list(text, key="T1", what="--t1")
    if values.size != 1:
        raise UsageError(f"--t1 {text}: give one T1, e.g. --t1 1.2s")
    value = float(values[0])
    if value > _T1_PLAUSIBLE_MAX_S:
        raise InputError(f"--t1 {text}: {value:g} s is implausible for a tissue T1; bare numbers are seconds -- "
                         f"if you meant milliseconds write {text.strip()}ms")
    return value


def run(args) -> int:
    check_model_settings(args, "t2", {"--refocus": args.refocus, "--t1": args.t1})
    from ..workflows.t2 import run_t2

    common = common_from_args(args)
    report = run_t2(
        args.series, common=common, te=times(args.te, "EchoTime", "--te"), epg=args.epg,
        refocus_deg=_refocus(args.refocus), t1=_t1(args.t1), noise_floor=args.noise_floor, sigma=args.sigma,
        coils=args.coils, drop_first=args.drop_first,
    )
    return finish(report, args)
