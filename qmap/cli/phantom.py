"""``qmap phantom``: phantom QA -- ROI statistics against reference relaxation times, verdict, report."""

from __future__ import annotations

import argparse

from ..errors import UsageError
from . import as_options


class _MapAction(argparse.Action):
    """``--map PATH`` appends a map; its parameter is unknown until a following ``--param``."""

    def __call__(self, parser, namespace, values, option_string=None):
        maps = list(getattr(namespace, self.dest) or [])
        maps.append([values, None, None])
        setattr(namespace, self.dest, maps)


class _MapAttribute(argparse.Action):
    """An option that describes the ``--map`` just before it, stored in slot ``slot`` of that map's entry."""

    slot = 1
    verb = "describes"
    example = "--map FILE --param T1"

    def check(self, values) -> None:
        """Refuse a value this option cannot take."""

    def __call__(self, parser, namespace, values, option_string=None):
        maps = getattr(namespace, "maps", None) or []
        opt = option_string or self.option_strings[0]
        if not maps:
            raise UsageError(f"{opt} {values}: give it right after the --map it {self.verb} ({self.example})")
        if maps[-1][self.slot] is not None:
            raise UsageError(f"{opt} {values}: the map {maps[-1][0]} has a {opt} already ({maps[-1][self.slot]})")
        self.check(values)
        maps[-1][self.slot] = values


class _ParamAction(_MapAttribute):
    """``--param P`` names the parameter of the ``--map`` just before it."""


class _TagAction(_MapAttribute):
    """``--tag NAME`` labels the ``--map`` just before it (two maps of one parameter: ``--tag ir``, ``--tag vfa``)."""

    slot = 2
    verb = "labels"
    example = "--map FILE --tag ir"

    def check(self, values) -> None:
        if not str(values).replace("-", "").isalnum():
            raise UsageError(f"--tag {values!r}: use letters, digits and '-' only (e.g. ir, vfa)")


def add_parser(sub) -> None:
    p = sub.add_parser(
        "phantom",
        help="phantom QA: ROI statistics of maps against reference values, verdict and HTML report",
        description="Measure every vial of a relaxometry phantom on one or more parameter maps, compare the ROI "
        "medians with the reference table, and write phantom_results.csv / .json and phantom_report.html (with PNG "
        "figures) into -o. Exit code 0: every ROI within tolerance; 3: at least one out of tolerance (outputs "
        "written); 2: bad input (nothing written).",
    )
    g = p.add_argument_group("inputs")
    g.add_argument("--map", dest="maps", action=_MapAction, metavar="MAP",
                   help="a parameter map (repeatable); the parameter from the file name (..._T1map.nii.gz -> T1) "
                        "or from --param after it; the unit from its JSON sidecar Units (default s for times)")
    g.add_argument("--param", action=_ParamAction, metavar="P",
                   help="parameter of the preceding --map: T1, T2, T2star, R1, R2, R2star, M0, PD or TB1")
    g.add_argument("--tag", action=_TagAction, metavar="NAME",
                   help="a short label of the preceding --map, to compare two maps of one parameter in one report "
                        "(--map ir_T1map.nii.gz --tag ir --map vfa_T1map.nii.gz --tag vfa); rows read T1 (ir)")
    g.add_argument("--reference", required=True, metavar="REF.csv",
                   help="reference table: label, optional name and temperature_C, and one column per parameter "
                        "with its unit in the name (T1_ms, T2_s); optional T1_tolerance_pct / tolerance_pct")
    g.add_argument("--labels", metavar="LABELS",
                   help="integer label image (0 = background); resampled (nearest neighbour) onto each map's grid "
                        "when the affines differ")
    g.add_argument("--layout", metavar="FILE",
                   help="instead of --labels: CSV of vial centres in the phantom's frame (label, x_mm, y_mm, "
                        "[z_mm,] radius_mm); the vials are detected and the ROIs drawn and saved as "
                        "phantom_labels.nii.gz. Example: phantom_layout.csv of the sample data (qmap demo copies it "
                        "to DIR/data)")
    g.add_argument("--layout-image", metavar="IMG",
                   help="image on which to detect the vials for --layout, where they are brighter than their "
                        "surroundings (e.g. an M0 map when the vials sit in a darker fill); default: the first --map")
    a = p.add_argument_group("analysis")
    a.add_argument("--temperature", type=float, metavar="C",
                   help="phantom temperature in degrees C; required when the table has several temperatures per "
                        "vial (values are interpolated linearly, never extrapolated)")
    a.add_argument("--tolerance", type=float, default=None, metavar="PCT",
                   help="allowed |error| of the ROI median in percent of the reference (default 10); per-vial "
                        "tolerance columns of the table take precedence")
    a.add_argument("--erode", type=int, default=None, metavar="N",
                   help="remove N voxel layers from each ROI against partial volume at the vial walls (default 1 "
                        "with --labels; 0 with --layout, whose radius_mm is the ROI radius already)")
    a.add_argument("--min-voxels", type=int, default=10, metavar="N",
                   help="an ROI with fewer voxels (with a value) is not judged and counts as failed (default 10)")
    h = p.add_argument_group("history (drift over sessions)")
    h.add_argument("--history", metavar="FILE",
                   help="CSV to append this session's results to (created if missing); the report then plots each "
                        "vial's error over time and flags drifts")
    h.add_argument("--scanner", metavar="NAME", help="scanner label (default: from the sidecar, else 'unspecified')")
    h.add_argument("--protocol", metavar="NAME", help="protocol label (default: sidecar ProtocolName)")
    h.add_argument("--date", metavar="YYYY-MM-DD", help="session date (default: sidecar acquisition date, else today)")
    o = p.add_argument_group("output")
    o.add_argument("-o", "--out-dir", required=True, metavar="DIR", help="where outputs go (created if missing)")
    o.add_argument("--overwrite", action="store_true", help="replace existing phantom outputs in DIR")
    o.add_argument("-q", "--quiet", action="store_true", help="no summary on stdout (warnings still go to stderr)")
    p.set_defaults(run=run, maps=None)


def run(args) -> int:
    from ..workflows.phantom import run_phantom

    maps = args.maps or []
    report = run_phantom(
        [m[0] for m in maps], params=[m[1] for m in maps], tags=[m[2] for m in maps], reference=args.reference, out_dir=args.out_dir,
        labels=args.labels, layout=args.layout, layout_image=args.layout_image, temperature=args.temperature,
        tolerance=args.tolerance, erode=args.erode, min_voxels=args.min_voxels, history=args.history,
        scanner=args.scanner, protocol=args.protocol, date=args.date, overwrite=args.overwrite,
        command_line=getattr(args, "argv", None),
    )
    if not args.quiet:
        print(as_options(report.summary()))  # the library's notes name arguments
    return report.exit_code
