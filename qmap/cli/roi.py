"""``qmap roi``: statistics of any maps inside the labels of a label image (no reference needed)."""

from __future__ import annotations

from . import as_options
from .phantom import _MapAction, _ParamAction

EXAMPLE = """example:
  qmap roi --labels sub-01_dseg.nii.gz --map out/sub-01_acq-vfa_T1map.nii.gz \\
           --map out/sub-01_acq-mese_T2map.nii.gz -o roi
  (names from sub-01_dseg.tsv beside the labels when it exists; writes roi/roi_stats.csv and .json)"""


def add_parser(sub) -> None:
    p = sub.add_parser(
        "roi",
        help="statistics of maps inside the labels of a label image (CSV, JSON and a printed table)",
        description="For every non-zero label of an integer label image and every --map: the number of voxels, "
        "mean, median, sd, robust sd (1.4826 x MAD), 5th and 95th percentiles, in the map's unit (its sidecar "
        "Units). The labels are resampled (nearest neighbour) onto each map's grid when the grids differ. "
        "Where qmap's status map ({prefix}_desc-status_fitmap.nii.gz) lies beside a map, only fitted voxels "
        "(status 0) are used and the others are counted (n_excluded). Label names come from a BIDS dseg.tsv-style "
        "table (columns index, name) beside the label image with the same stem, or --names. Writes "
        "roi_stats.csv and roi_stats.json into -o and prints the table.",
        epilog=EXAMPLE,
    )
    g = p.add_argument_group("inputs")
    g.add_argument("--labels", required=True, metavar="LABELS", help="integer label image (0 = background)")
    g.add_argument("--map", dest="maps", action=_MapAction, metavar="MAP",
                   help="a map (repeatable): the parameter from the file name (..._T1map.nii.gz -> T1) or from "
                        "--param after it; the unit from its JSON sidecar Units (default s for times)")
    g.add_argument("--param", action=_ParamAction, metavar="NAME",
                   help="parameter name of the preceding --map (any name; T1, T2, T2star, ... are recognised)")
    g.add_argument("--names", metavar="TSV",
                   help="label names: tab-separated table with columns index and name (default: "
                        "<labels stem>.tsv beside the label image, when it exists)")
    a = p.add_argument_group("analysis")
    a.add_argument("--erode", type=int, default=0, metavar="N",
                   help="remove N voxel layers (face neighbours) from each label first (default 0)")
    a.add_argument("--per-slice", action="store_true",
                   help="also one row per label x map x slice (third array axis; column slice)")
    a.add_argument("--all-voxels", action="store_true",
                   help="ignore qmap status maps beside the maps (use every finite voxel)")
    o = p.add_argument_group("output")
    o.add_argument("-o", "--out-dir", required=True, metavar="DIR", help="where outputs go (created if missing)")
    o.add_argument("--overwrite", action="store_true", help="replace existing roi_stats.csv / .json in DIR")
    o.add_argument("-q", "--quiet", action="store_true",
                   help="print nothing on success (warnings still go to stderr)")
    p.set_defaults(run=run, maps=None)


def run(args) -> int:
    from ..workflows.roi import run_roi  # on use: --help loads no numerical library

    maps = args.maps or []
    report = run_roi([m[0] for m in maps], params=[m[1] for m in maps], labels=args.labels, out_dir=args.out_dir,
                     names=args.names, erode=args.erode, per_slice=args.per_slice, use_status=not args.all_voxels,
                     overwrite=args.overwrite, command_line=getattr(args, "argv", None))
    if not args.quiet:
        print(as_options(report.summary()))  # the library's notes name arguments
    return 0
