"""``qmap batch``: every relaxometry series of a BIDS dataset, into a derivatives folder."""

from __future__ import annotations

import sys

from ..defaults import DEFAULT_NOISE_MODE as DEFAULT_MODE
from ..defaults import NOISE_MODES as MODES
from ..errors import warn
from . import as_options
from .common import add_execution


def add_parser(sub) -> None:
    p = sub.add_parser(
        "batch",
        help="fit every relaxometry series of a BIDS dataset",
        description="Find the relaxometry series of a BIDS dataset (anat/*_inv-<i>_IRT1, *_flip-<i>_VFA, "
        "*_echo-<i>_MESE, *_echo-<i>_MEGRE, *_UNIT1 with *_inv-<i>_MP2RAGE, and fmap/*_TB1map) per subject and "
        "session, and fit them: IRT1 -> t1-ir (magnitude), VFA -> t1-vfa (nonlinear, B1-corrected when a TB1map is "
        "there), MESE -> t2 (EPG), MEGRE -> t2star, UNIT1 -> t1-mp2rage (with the inversion images and the TB1map "
        "when there). Outputs go to DERIV_DIR/sub-<s>[/ses-<t>]/anat/ as "
        "sub-<s>[_ses-<t>]_acq-<acq><method>_*. A failing series does not stop the others (exit code 4 when any "
        "failed). A rerun skips the series whose outputs were made from the same inputs (SHA-256) with the same "
        "options, refits those whose inputs changed, and retries the failed ones.",
    )
    p.add_argument("bids_dir", metavar="BIDS_DIR", help="root of the BIDS dataset (the folder holding sub-*)")
    p.add_argument("-o", "--out-dir", required=True, metavar="DERIV_DIR",
                   help="derivatives folder (created if missing), e.g. BIDS_DIR/derivatives/qmap")
    p.add_argument("--dry-run", action="store_true",
                   help="print the plan (one line per series: subject, session, fit, action) and stop; "
                        "creates nothing")
    add_execution(p, workers="local worker processes, each fitting one series at a time", scheduler="the series",
                  cluster_note="its workers must see BIDS_DIR and DERIV_DIR at the same paths",
                  overwrite="refit every series, even those up to date")
    p.add_argument("--t2-spectrum", action="store_true",
                   help="also fit every MESE series by t2-spectrum (multi-component T2, short-T2 fraction); outputs "
                        "with the prefix ..._acq-mesespectrum")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress display and no summary (warnings and "
                   "failures still go to stderr)")
    g = p.add_argument_group("fit options (applied to every series type they concern; a --config file sets them "
                             "per type)")
    g.add_argument("--noise-floor", choices=MODES, default=None, help="MEGRE / MESE: noise-floor handling "
                   f"(default {DEFAULT_MODE})")
    g.add_argument("--sigma", metavar="auto|local|VALUE|NOISEMAP", default=None,
                   help="MEGRE / MESE: the noise level (default auto: from the data)")
    g.add_argument("--coils", metavar="N", default=None, help="MEGRE / MESE: sum-of-squares coils")
    g.add_argument("--mask", metavar="auto|none|FILE", default=None, help="voxels to fit (default auto)")
    g.add_argument("--units", choices=("s", "ms"), default=None, help="units of the written time maps (default s)")
    g.add_argument("--config", metavar="FILE.toml",
                   help="per-series-type options: a TOML file with tables [MEGRE], [MESE], [IRT1], [VFA] (and "
                        "[all]) of the options above, e.g. [MEGRE] sigma = \"local\"; command-line options win")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..batch import run_batch

    if args.scheduler and args.jobs is not None and not args.dry_run:
        warn("-j is ignored with --scheduler (the cluster's workers do the work)")
    try:
        options = {"noise-floor": args.noise_floor, "sigma": args.sigma, "coils": args.coils, "mask": args.mask,
                   "units": args.units}
        report = run_batch(args.bids_dir, args.out_dir, dry_run=args.dry_run, scheduler=args.scheduler,
                           n_jobs=args.jobs, overwrite=args.overwrite, quiet=args.quiet,
                           t2_spectrum=args.t2_spectrum, options=options, config=args.config)
    except KeyboardInterrupt as exc:
        from . import Terminated

        term = isinstance(exc, Terminated)
        sys.stderr.write(f"qmap: {'terminated (SIGTERM)' if term else 'interrupted'}; the series completed so far "
                         f"keep their outputs, a rerun continues with the others\n")
        return 143 if term else 130
    if args.dry_run:
        print(report.plan_table())
        return 0
    for _, res in report.failed:
        if res.traceback:
            sys.stderr.write(res.traceback)
    if args.quiet:
        for p, res in report.failed:
            sys.stderr.write(f"qmap: series failed: sub-{p.subject}"
                             f"{' ses-' + p.session if p.session else ''} {p.label}: {res.reason}\n")
    else:
        print(as_options(report.summary()))  # the library's notes name arguments
    return report.exit_code
