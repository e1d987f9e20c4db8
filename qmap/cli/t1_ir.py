"""``qmap t1-ir``: T1 maps from an inversion-recovery series."""

from __future__ import annotations

from ..defaults import IR_SIGNALS as SIGNALS
from .common import add_series, common_from_args, end_fitting_parser, finish, one_time, times


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t1-ir",
        help="T1 / R1 from inversion recovery",
        description="Fit S(TI) = a + b exp(-TI/T1) in every voxel of an inversion-recovery series (one image per "
        "inversion time). The three-parameter model allows for an imperfect inversion and for incomplete recovery "
        "between inversions. Writes T1, R1, M0 (= a, the fully recovered signal) and InversionEfficiency "
        "(k = -b/a - 1; 1 = perfect inversion) maps with standard errors, R-squared / RMS-residual maps, a status "
        "map and provenance. Magnitude images have lost the sign of the samples before the null: it is restored "
        "per voxel by fitting both sign patterns around the smallest sample and keeping the better fit.",
    )
    add_series(p, ", one per inversion time (at least 4)")
    p.add_argument("--ti", metavar="LIST",
                   help="inversion times, e.g. 50ms,150ms,400ms,1.2s (bare numbers are seconds; "
                        "default: sidecar InversionTime)")
    p.add_argument("--tr", metavar="T",
                   help="repetition time between inversions, e.g. 6s or 6000ms (default: sidecar RepetitionTime, "
                        "if any); recorded and checked against the TIs, not needed by the fit")
    p.add_argument("--signal", choices=SIGNALS, default="magnitude",
                   help="what the images hold: magnitude (default; sign restored before the null), real "
                        "(phase-corrected, signed; fitted as is), complex (a complex NIfTI, or magnitude SERIES "
                        "with --phase; each voxel is phase-corrected by its longest-TI sample, then the real part "
                        "is fitted)")
    p.add_argument("--phase", nargs="+", metavar="FILE",
                   help="with --signal complex: phase images in radians, in the same order and number of volumes "
                        "as SERIES (put this option after SERIES)")
    p.add_argument("--look-locker", action="store_true",
                   help="Look-Locker (continuous readout) series: the fitted recovery time is the apparent T1*; "
                        "report T1 = T1* (B/A - 1) for S = A - B exp(-TI/T1*) (Deichmann & Haase 1992) and "
                        "ApparentT1 instead of InversionEfficiency")
    end_fitting_parser(p, run)


def run(args) -> int:
    from ..workflows.ir import run_t1_ir

    report = run_t1_ir(
        args.series, common=common_from_args(args), ti=times(args.ti, "InversionTime", "--ti"),
        tr=one_time(args.tr, "RepetitionTime", "--tr"), signal=args.signal, look_locker=args.look_locker,
        phase=args.phase, sigma=args.sigma,
    )
    return finish(report, args)
