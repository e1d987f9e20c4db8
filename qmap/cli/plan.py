"""``qmap plan``: choose inversion times, flip angles or echo times by the Cramér–Rao bound."""

from __future__ import annotations

import argparse

from ..errors import UsageError
from ..units import parse_angle_list, parse_time_list

#: BIDS key whose plausibility rules apply to the times of each method (range, limits, evaluated samples)
_RANGE_KEY = {"ir": "InversionTime", "vfa": "InversionTime", "t2": "EchoTime", "t2star": "EchoTime"}
_SAMPLE_KEY = {"ir": "InversionTime", "t2": "EchoTime", "t2star": "EchoTime"}


def add_parser(sub) -> None:
    p = sub.add_parser(
        "plan",
        help="design or evaluate a protocol (TIs, flip angles, echo times) by the Cramer-Rao bound",
        description="Choose the samples of a relaxometry protocol so that the worst coefficient of variation "
        "(sd/value) of T1, T2 or T2* over the range you care about is as small as possible, predicted by the "
        "Cramer-Rao bound of the model the matching fitting command fits (every parameter free; Gaussian noise of "
        "sd M0/SNR on every sample, M0 being the fully relaxed signal). ir: TIs for t1-ir (S = a + b exp(-TI/T1); "
        "TR = time between inversions, default full recovery); vfa: flip angles for t1-vfa (needs --tr); t2: a "
        "uniform echo train for t2 (echo spacing and count, at most --samples echoes); t2star: free echo times "
        "for t2star. With --evaluate the given protocol is scored instead. Writes DIR/plan.json and DIR/plan.png "
        "(predicted CV against the relaxation time, beside an evenly spread protocol with the same number of "
        "samples) and prints the protocol and the table.",
        epilog="example: qmap plan ir --range 0.3s,2s --samples 5 --tr 5s --snr 50 --limits 50ms,4s -o plan_ir",
    )
    p.add_argument("method", choices=("ir", "vfa", "t2", "t2star"), help="the fitting command to plan for")
    p.add_argument("--range", required=True, metavar="LO[,HI]",
                   help="T1 (T2, T2*) range the protocol must serve, e.g. 0.3s,2s or 20ms,100ms; one value allowed")
    p.add_argument("--samples", type=int, default=None, metavar="N",
                   help="number of samples (default: ir 5, vfa 2, t2 32 = the most echoes, t2star 8)")
    p.add_argument("--tr", metavar="T", default=None,
                   help="repetition time: ir, time between inversions (default: full recovery); vfa, required")
    p.add_argument("--snr", type=float, default=50.0, metavar="S",
                   help="M0 / noise sd on every sample (default 50)")
    p.add_argument("--limits", metavar="LO,HI", default=None,
                   help="where samples may lie: times (ir, t2star; t2: LO = shortest echo spacing, HI = latest echo) "
                        "or degrees (vfa). Defaults: ir 10ms to min(5 x range, TR); vfa 1,90; t2 5ms to 4 x range; "
                        "t2star 2ms to 4 x range")
    p.add_argument("--evaluate", metavar="LIST", default=None,
                   help="evaluate this protocol instead of designing one (times, or degrees for vfa)")
    p.add_argument("--simulate", type=int, default=0, metavar="N",
                   help="also fit N simulated voxels per table row with qmap's solver and show their spread")
    p.add_argument("-o", "--out-dir", required=True, metavar="DIR", help="where plan.json and plan.png go")
    p.add_argument("--overwrite", action="store_true", help="replace an earlier plan in DIR")
    p.add_argument("-q", "--quiet", action="store_true", help="print nothing (errors still go to stderr)")
    p.set_defaults(run=run)


def _times(text: str, key: str, option: str):
    return parse_time_list(text, key=key, what=option)


def run(args: argparse.Namespace) -> int:
    from ..planning import plan
    from ..workflows.plan import write_plan

    m = args.method
    value_range = _times(args.range, _RANGE_KEY[m], "--range")
    if value_range.size > 2:
        raise UsageError(f"--range {args.range}: give one value or LO,HI")
    tr = None
    if args.tr is not None:
        key = "RepetitionTimeSpoiled" if m == "vfa" else "RepetitionTime"
        tr = float(_times(args.tr, key, "--tr")[0])
    limits = evaluate = None
    if args.limits is not None:
        limits = (parse_angle_list(args.limits, what="--limits") if m == "vfa"
                  else _times(args.limits, _SAMPLE_KEY[m], "--limits"))
        if limits.size != 2:
            raise UsageError(f"--limits {args.limits}: give LO,HI")
    if args.evaluate is not None:
        evaluate = (parse_angle_list(args.evaluate, what="--evaluate") if m == "vfa"
                    else _times(args.evaluate, _SAMPLE_KEY[m], "--evaluate"))
    if args.simulate < 0:
        raise UsageError("--simulate N: give a positive number of voxels (or leave it out)")
    result = plan(m, value_range, samples=args.samples, snr=args.snr, tr=tr, limits=limits, evaluate=evaluate,
                  simulate=args.simulate)
    write_plan(result, args.out_dir, overwrite=args.overwrite, command_line=args.argv)
    if not args.quiet:
        print(result.table())
        print(f"wrote {args.out_dir}/plan.json and {args.out_dir}/plan.png")
    return 0
