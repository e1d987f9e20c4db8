"""``qmap demo``: every fit on the bundled sample data, then the phantom QA, showing each command."""

from __future__ import annotations


def add_parser(sub) -> None:
    p = sub.add_parser(
        "demo",
        help="run every fit and the phantom QA on the bundled (synthetic) sample data, printing each command",
        description="Copy the bundled sample data -- a synthetic, invented nine-vial phantom -- to DIR/data, then "
        "fit T1 (inversion recovery), B1 (double angle), T1 (variable flip angle, B1-corrected), T1 (MP2RAGE, "
        "B1-corrected), T2 (extended phase graphs) and T2* with PNG previews of every map into DIR/maps (times in "
        "seconds, the default of every command), and check the three T1 maps (tagged ir, vfa, mp2rage), T2 and "
        "T2* against the phantom's reference table in one report, DIR/phantom/phantom_report.html. Then it "
        "simulates a small multi-pool disc into DIR/pools-data and fits its T2 spectra (short-T2 fraction) into "
        "DIR/maps. Each command is printed before it runs (copyable; all of them are also written to "
        "DIR/commands.sh). Prints the median per vial of each map, in the QA's ROIs, with its error against the "
        "true values the data were simulated with. Exit code 0 when every fit ran and the phantom passes, 3 when "
        "the phantom fails.",
    )
    p.add_argument("-o", "--out-dir", required=True, metavar="DIR",
                   help="output folder (data/, maps/, phantom/, pools-data/ and commands.sh are created in it)")
    p.add_argument("-j", "--jobs", type=int, default=None, metavar="N", help="local workers (default: all cores)")
    p.add_argument("--overwrite", action="store_true", help="replace the outputs of an earlier demo in DIR")
    p.add_argument("-q", "--quiet", action="store_true",
                   help="no commands, progress bars or per-fit summaries: print only the summary table (warnings "
                        "and errors still go to stderr)")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..workflows.demo import run_demo

    report = run_demo(args.out_dir, n_jobs=args.jobs, overwrite=args.overwrite, quiet=args.quiet,
                      command_line=args.argv)
    print(report.text())
    return report.exit_code
