"""``qmap inspect``: samples, fitted curve, residuals and numbers of one voxel of a finished fit."""

from __future__ import annotations


def add_parser(sub) -> None:
    p = sub.add_parser(
        "inspect",
        help="plot and print one voxel of a finished fit",
        description="Re-read the series named in OUT_DIR/{prefix}_provenance.json, fit the chosen voxel again with "
        "the recorded model, acquisition values and noise handling, and write a PNG with the measured samples, the "
        "fitted curve on a fine grid and the residuals (inversion recovery: signed, on a log TI axis; B1: the two "
        "images and the relation the closed form inverts). Prints the parameter values from the maps (same units), "
        "rounded to their standard errors, the fit quality and the voxel's status. Example: qmap inspect out "
        "--voxel 24,24,2 (or --world -3,12.5,4 in mm)",
    )
    p.add_argument("out_dir", metavar="OUT_DIR", help="the -o folder of a fitting command")
    where = p.add_mutually_exclusive_group(required=True)
    where.add_argument("--voxel", metavar="I,J,K", help="0-based voxel indices in NIfTI array order")
    where.add_argument("--world", metavar="X,Y,Z", help="scanner coordinates in mm (the NIfTI affine of the maps); "
                       "the nearest voxel is shown")
    p.add_argument("--prefix", metavar="NAME", help="which fit, when OUT_DIR holds several")
    p.add_argument("-o", "--output", metavar="FILE.png",
                   help="plot file (default OUT_DIR/{prefix}_voxel-I-J-K.png)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..workflows.inspect import inspect_voxel

    report = inspect_voxel(args.out_dir, args.voxel, world=args.world, prefix=args.prefix, out_png=args.output)
    print(report.text())
    return 0
