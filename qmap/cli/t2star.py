"""``qmap t2star``: T2* maps from multi-echo gradient echo."""

from __future__ import annotations

from .common import add_series, common_from_args, end_fitting_parser, finish, times


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t2star",
        help="T2* / R2* from multi-echo gradient echo",
        description="Fit S(TE) = M0 exp(-TE/T2*) in every voxel of a multi-echo gradient-echo magnitude series. "
        "Writes T2star, R2star and M0 maps with standard errors, R-squared / RMS-residual maps, a status map and "
        "provenance.",
    )
    add_series(p, " (one per echo)")
    p.add_argument("--te", metavar="LIST", help="echo times, e.g. 2.5ms,5ms,7.5ms (default: sidecar EchoTime)")
    p.add_argument("--drop-first", action="store_true", help="ignore the first echo")
    end_fitting_parser(p, run)


def run(args) -> int:
    from ..workflows.decay import run_t2star

    common = common_from_args(args)
    report = run_t2star(
        args.series, common=common, te=times(args.te, "EchoTime", "--te"), noise_floor=args.noise_floor,
        sigma=args.sigma, coils=args.coils, drop_first=args.drop_first,
    )
    return finish(report, args)
