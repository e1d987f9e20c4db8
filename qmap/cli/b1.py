"""``qmap b1``: relative B1 (transmit field) maps from AFI or double-angle images."""

from __future__ import annotations

from .common import add_model_option, angles, common_from_args, end_fitting_parser, finish, times


def add_parser(sub) -> None:
    p = sub.add_parser(
        "b1",
        help="relative B1 map (TB1, fraction) from AFI or double-angle images",
        description="Compute the relative transmit field B1 = actual / nominal flip angle from two images. "
        "afi (actual flip-angle imaging, Yarnykh 2007): two echoes of interleaved repetition times TR1 < TR2, "
        "a = arccos((r n - 1)/(n - r)) with r = S2/S1, n = TR2/TR1. dam (double-angle method, Insko & Bolinger "
        "1993): images at a and 2a with full recovery, a = arccos(S(2a) / (2 S(a))). Writes {prefix}_TB1map "
        "(fraction, 1.0 = nominal) with its standard error, a status map (8 = the signal ratio gives no valid "
        "angle) and provenance.",
    )
    p.add_argument("series", nargs="+", metavar="SERIES",
                   help="two 3D NIfTIs or one 4D NIfTI with two volumes: afi in the order TR1, TR2; dam at a, 2a")
    p.set_defaults(read_ahead=True)  # read while the command starts up (qmap.io.readahead)
    add_model_option(p, "b1")  # --method afi|dam, from the model registry
    p.add_argument("--fa", metavar="DEG[,DEG]",
                   help="nominal flip angle in degrees: afi one angle; dam a or a,2a (default: sidecar FlipAngle)")
    p.add_argument("--tr", metavar="TR1,TR2",
                   help="afi: the two repetition times, e.g. 20ms,100ms; dam: optionally the one TR "
                        "(default: sidecar RepetitionTime)")
    p.add_argument("--sigma", default="auto", metavar="auto|local|VALUE|FILE",
                   help="image noise sd for the standard errors (first-order propagation through the closed form): "
                        "auto (default) estimates it from the images, local a smooth noise map; when it cannot be "
                        "estimated the standard errors are NaN, with a warning; or a value, or a NIfTI noise map")
    end_fitting_parser(p, run)  # the registry: TB1 is a fraction (no --units), in closed form (no --engine)


def run(args) -> int:
    from ..workflows.b1 import run_b1

    common = common_from_args(args)
    report = run_b1(args.series, common=common, method=args.method, fa=angles(args.fa),
                    tr=times(args.tr, "RepetitionTime", "--tr"), sigma=args.sigma)
    return finish(report, args)
