"""``qmap t1-mp2rage``: T1 maps from the combined MP2RAGE image, optionally B1-corrected."""

from __future__ import annotations

from ..models.mp2rage import DEFAULT_EFFICIENCY
from ..units import parse_time
from ..workflows.mp2rage import run_t1_mp2rage
from .common import add_b1, angles, common_from_args, end_fitting_parser, finish, positive_int, times


def add_parser(sub) -> None:
    p = sub.add_parser(
        "t1-mp2rage",
        help="T1 / R1 from an MP2RAGE UNI image by a lookup of the signal model (with B1 correction)",
        description="Turn the combined MP2RAGE image UNI = Re(S1* S2)/(|S1|^2 + |S2|^2) into T1 by a lookup over "
        "T1 (and B1) of the steady-state signal model of the sequence (inversion with efficiency e, two "
        "gradient-echo blocks of NumberShots excitations; Marques et al. 2010). UNI may be a float image in "
        "[-0.5, 0.5] or the 12-bit integer export 0..4095 (UNI = value/4095 - 0.5), recognised by its range. With "
        "--b1 both readout angles are B1 x nominal (Marques & Gruetter 2013). With the inversion images --inv1/"
        "--inv2 it also writes M0 and standard errors (image noise propagated through UNI). Status 9 marks voxels "
        "whose UNI the lookup cannot invert (outside the range where UNI is monotonic in T1).",
        epilog="Examples: qmap t1-mp2rage sub-01_UNIT1.nii.gz -o out (protocol from the sidecar);  "
        "qmap t1-mp2rage uni.nii.gz --ti 700ms,2500ms --fa 4,5 --tr-prep 5s --tr-exc 7ms --shots 176 "
        "--inv1 inv1.nii.gz --inv2 inv2.nii.gz --b1 tb1.nii.gz -o out",
    )
    p.add_argument("uni", metavar="UNI", help="the combined MP2RAGE image (3D NIfTI; float or 12-bit integer)")
    g = p.add_argument_group("inversion images (optional: M0 and standard errors)")
    g.add_argument("--inv1", metavar="FILE", help="first inversion image: magnitude or complex NIfTI, UNI's grid")
    g.add_argument("--inv2", metavar="FILE", help="second inversion image: magnitude or complex NIfTI")
    g.add_argument("--inv1-phase", metavar="FILE", help="phase (radians) of a magnitude --inv1")
    g.add_argument("--inv2-phase", metavar="FILE", help="phase (radians) of a magnitude --inv2")
    g.add_argument("--sigma", default="auto", metavar="auto|local|VALUE|FILE",
                   help="noise sd of the inversion images per real/imaginary channel, as for the other commands: "
                        "auto (default) from their background (or inside the object); local for a smooth noise map; "
                        "a value in signal units; or a NIfTI noise map")
    q = p.add_argument_group("protocol (default: the BIDS sidecar of UNI, completed from those of --inv1/--inv2)")
    q.add_argument("--ti", metavar="T1,T2", help="inversion times to the k-space-centre excitation, e.g. 700ms,2500ms "
                   "(sidecar InversionTime)")
    q.add_argument("--fa", metavar="A1,A2", help="nominal flip angles of the two blocks, degrees, e.g. 4,5 "
                   "(sidecar FlipAngle)")
    q.add_argument("--tr-prep", metavar="T", help="time between two inversions, e.g. 5s "
                   "(sidecar RepetitionTimePreparation)")
    q.add_argument("--tr-exc", metavar="T", help="spacing of the excitations in a block, e.g. 7ms "
                   "(sidecar RepetitionTimeExcitation)")
    q.add_argument("--shots", type=_shots, metavar="N", help="excitations per block; N // 2 precede the k-space "
                   "centre (sidecar NumberShots)")
    q.add_argument("--inversion-efficiency", type=float, default=None, metavar="E",
                   help=f"Mz after / before the inversion, sign removed, in (0, 1]; default {DEFAULT_EFFICIENCY:g} "
                        f"(adiabatic inversion)")
    add_b1(p, into="the standard errors (with --inv1/--inv2)")
    end_fitting_parser(p, run)  # the registry: a table lookup, nothing to fit (no --engine)


def _shots(text: str) -> int:
    return positive_int(text, "excitations")


def run(args) -> int:
    common = common_from_args(args)
    report = run_t1_mp2rage(
        args.uni, common=common, inv1=args.inv1, inv2=args.inv2, inv1_phase=args.inv1_phase,
        inv2_phase=args.inv2_phase, ti=times(args.ti, "InversionTime", "--ti"), fa=angles(args.fa),
        tr_prep=None if args.tr_prep is None else parse_time(args.tr_prep, key="RepetitionTime", what="--tr-prep"),
        tr_exc=None if args.tr_exc is None else parse_time(args.tr_exc, key="RepetitionTimeSpoiled",
                                                            what="--tr-exc"),
        shots=args.shots, efficiency=args.inversion_efficiency, b1=args.b1, b1_scale=args.b1_scale,
        b1_smooth=args.b1_smooth, b1_stderr=args.b1_stderr, sigma_spec=args.sigma,
    )
    return finish(report, args)
