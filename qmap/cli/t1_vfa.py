"""``qmap t1-vfa``: T1 maps from variable-flip-angle spoiled gradient echo, optionally B1-corrected."""

from __future__ import annotations

from ..defaults import T1_TYPICAL
from ..defaults import VFA_METHODS as METHODS
from .common import add_b1, add_common, add_sigma, angles, common_from_args, finish


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
    p.add_argument("series", nargs="+", metavar="SERIES",
                   help="one 4D NIfTI or several 3D NIfTIs (one per flip angle)")
    p.add_argument("--fa", metavar="LIST", help="nominal flip angles in degrees, e.g. 3,8,15,25 "
                   "(default: sidecar FlipAngle)")
    p.add_argument("--tr", metavar="T", help="repetition time, e.g. 15ms (default: sidecar RepetitionTime)")
    p.add_argument("--method", choices=METHODS, default="nonlinear",
                   help="nonlinear (default): least squares on the signals (M0 closed form, T1 iterative); "
                        "linear: the reweighted linearised regression (Deoni et al. 2003) S/sin a = E1 S/tan a + M0 (1-E1)")
    add_b1(p, into="the T1 standard error")
    p.add_argument("--t1-typical", metavar="T", default=None,
                   help=f"T1 assumed by the protocol note (Ernst angle and optimal angle pair), default "
                        f"{T1_TYPICAL:g}s")
    add_sigma(p)
    add_common(p)
    p.set_defaults(run=run)


def run(args) -> int:
    from ..units import parse_time
    from ..workflows.vfa import run_t1_vfa

    common = common_from_args(args)
    tr = None if args.tr is None else parse_time(args.tr, key="RepetitionTimeSpoiled", what="--tr")
    t1_typical = T1_TYPICAL if args.t1_typical is None else parse_time(args.t1_typical, key="InversionTime",
                                                                        what="--t1-typical")
    report = run_t1_vfa(
        args.series, common=common, fa=angles(args.fa), tr=tr, b1=args.b1, b1_scale=args.b1_scale,
        b1_smooth=args.b1_smooth, method=args.method, t1_typical=t1_typical, sigma=args.sigma,
        b1_se=args.b1_stderr,
    )
    return finish(report, args)
