"""``qmap t1-vfa``: T1 maps from variable-flip-angle spoiled gradient echo, optionally B1-corrected."""

from __future__ import annotations

from ..defaults import T1_TYPICAL
from .common import add_b1, add_model_option, add_series, angles, common_from_args, end_fitting_parser, finish, one_time


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t1-vfa",
        help="T1 / R1 from variable-flip-angle spoiled gradient echo (with B1 correction)",
        description="Fit S(a) = M0 sin(a) (1-E1)/(1 - E1 cos a), E1 = exp(-TR/T1), in every voxel of a spoiled "
        "gradient-echo magnitude series acquired at two or more flip angles. The actual angle is B1 x nominal: "
        "give a relative B1 map with --b1 (any grid; it is resampled through the affines), otherwise the nominal "
        "angles are assumed and the summary says so. Writes T1, R1 and M0 maps with standard errors, "
        "R-squared / RMS-residual maps, a status map (6 = outside the B1 map) and provenance.",
    )
    add_series(p, " (one per flip angle)")
    p.add_argument("--fa", metavar="LIST", help="nominal flip angles in degrees, e.g. 3,8,15,25 "
                   "(default: sidecar FlipAngle)")
    p.add_argument("--tr", metavar="T", help="repetition time, e.g. 15ms (default: sidecar RepetitionTime)")
    add_model_option(p, "t1-vfa")  # --method nonlinear|linear, from the model registry
    add_b1(p, into="the T1 standard error")
    p.add_argument("--t1-typical", metavar="T", default=None,
                   help=f"T1 assumed by the protocol note (Ernst angle and optimal angle pair), default "
                        f"{T1_TYPICAL:g}s")
    end_fitting_parser(p, run)


def run(args) -> int:
    from ..workflows.vfa import run_t1_vfa

    t1_typical = one_time(args.t1_typical, "InversionTime", "--t1-typical")
    report = run_t1_vfa(
        args.series, common=common_from_args(args), fa=angles(args.fa),
        tr=one_time(args.tr, "RepetitionTimeSpoiled", "--tr"), b1=args.b1, b1_scale=args.b1_scale,
        b1_smooth=args.b1_smooth, method=args.method, t1_typical=T1_TYPICAL if t1_typical is None else t1_typical,
        sigma=args.sigma,
        b1_se=args.b1_stderr,
    )
    return finish(report, args)
