"""``qmap simulate``: synthetic series with known ground truth."""

from __future__ import annotations

from ..errors import UsageError
from ..simulate import PHANTOMS, PROTOCOLS, Protocols, simulate
from ..units import parse_angle_list, parse_time, parse_time_list

_EPILOG = """\
output layout (S = --subject, default the phantom name):
  DIR/simulation.json                     what was simulated: settings, files, noise sigma per series, truth
  DIR/sub-S/anat/sub-S_inv-<i>_IRT1.nii.gz, _flip-<i>_VFA, _echo-<i>_MESE, _echo-<i>_MEGRE
                                          one 3D image + BIDS sidecar (InversionTime / FlipAngle / EchoTime,
                                          RepetitionTime, ...) per volume
  DIR/sub-S/anat/sub-S_desc-truth_{T1,T2,T2star,PD,TB1}map.nii.gz   ground truth (s, fraction)
  DIR/sub-S/anat/sub-S_desc-<phantom>_dseg.nii.gz (+ .tsv)           labels (vials: label 1-9 = vial, fill = 0)
  DIR/sub-S/fmap/sub-S_flip-<i>_TB1DAM.nii.gz (or _acq-tr<i>_TB1AFI), sub-S_TB1map.nii.gz
                                          B1-mapping inputs and the true B1 on a coarser grid (own affine)
  DIR/sub-S/anat/sub-S_inv-<i>_MP2RAGE.nii.gz, sub-S_UNIT1.nii.gz
                                          MP2RAGE inversion magnitudes and UNI (12-bit integer export)
  DIR/phantom_reference.csv               vials: truth at 20 and 24 C (for qmap phantom --reference)
  DIR/phantom_layout.csv                  vials: vial positions in mm (for qmap phantom --layout)

noise: complex Gaussian noise, magnitude taken (Rician; noncentral chi with --coils N); sigma = the series'
reference signal (95th percentile over the object of each voxel's largest noise-free sample) / --snr.
The vial phantom and its temperature dependence are invented; the head slab uses published relaxation times
at 3 T (Stanisz et al. 2005; Wansapura et al. 1999; see qmap.simulate.phantoms).

example:
  qmap simulate -o sim --phantom vials --protocol ir,vfa,mese,megre,b1 --snr 100 --seed 1
  qmap simulate -o pools --phantom pools --protocol mese --snr 300 --shape 32,32,1   (for t2-spectrum)
"""


def _ints(text: str, what: str) -> tuple[int, ...]:
    try:
        return tuple(int(t) for t in text.split(","))
    except ValueError:
        raise UsageError(f"{what} {text!r}: expected comma separated integers, e.g. 48,48,4") from None


def _floats(text: str, what: str, n: int) -> tuple[float, ...]:
    try:
        vals = tuple(float(t) for t in text.split(","))
    except ValueError:
        vals = ()
    if len(vals) != n:
        raise UsageError(f"{what} {text!r}: expected {n} comma separated numbers")
    return vals


def add_parser(sub) -> None:
    p = sub.add_parser(
        "simulate",
        help="write synthetic series with known ground truth (phantom + protocols + noise)",
        description="Simulate magnitude MRI series of a digital phantom -- inversion recovery, variable flip angle, "
        "multi-echo spin echo (extended phase graphs, imperfect refocusing from the B1 field), multi-echo gradient "
        "echo, low-resolution B1-mapping inputs and MP2RAGE -- in a smooth transmit field with Rician noise, and write them "
        "as a BIDS-style folder with sidecars, the true maps and a label image. Times are seconds unless a unit is "
        "given (12ms); angles are degrees.",
        epilog=_EPILOG,
    )
    p.add_argument("-o", "--out-dir", required=True, metavar="DIR", help="folder to create (must be empty or absent)")
    p.add_argument("--phantom", choices=PHANTOMS, default="vials",
                   help="vials: nine invented vials (T1 0.1-2 s, T2 0.02-0.5 s) in a fill; head: CSF/GM/WM slab; "
                        "pools: multi-pool disc for t2-spectrum -- two pools (T2 20 ms + 80 ms) in one half, three "
                        "(+ free water, T2 1 s, 20 %%) in the other, the 20 ms fraction rising 0-0.3 across "
                        "(truth in desc-truth_MWFmap) (default vials)")
    p.add_argument("--protocol", default=",".join(PROTOCOLS), metavar="LIST",
                   help=f"series to simulate, comma separated from {','.join(PROTOCOLS)} (default all)")
    p.add_argument("--shape", default="48,48,4", metavar="X,Y,Z", help="matrix size (default 48,48,4)")
    p.add_argument("--voxel-size", default="2,2,4", metavar="DX,DY,DZ", help="voxel size in mm (default 2,2,4)")
    p.add_argument("--snr", type=float, default=100.0, help="reference signal / noise sd per series (default 100)")
    p.add_argument("--b1-snr", type=float, default=None, help="the same for the B1 inputs (default 2 x --snr)")
    p.add_argument("--coils", type=int, default=1, metavar="N",
                   help="receive channels combined by root sum of squares (default 1: Rician noise)")
    p.add_argument("--seed", type=int, default=1, help="random seed; equal seeds give equal data (default 1)")
    p.add_argument("--b1-range", default="0.85,1.15", metavar="MIN,MAX",
                   help="extremes of the smooth relative transmit field (default 0.85,1.15; 1,1 = uniform)")
    p.add_argument("--temperature", type=float, default=20.0, metavar="C",
                   help="vial phantom temperature in degrees C (invented linear dependence; default 20)")
    p.add_argument("--subject", metavar="LABEL", help="BIDS subject label (default the phantom name)")
    p.add_argument("--overwrite", action="store_true", help="replace a non-empty output folder")
    g = p.add_argument_group("protocol settings (defaults suit the vial phantom at 3 T)")
    d = Protocols()
    g.add_argument("--ti", metavar="LIST", help="inversion times (default " + ",".join(f"{t * 1e3:g}ms" for t in d.ir_ti) + ")")
    g.add_argument("--ir-tr", metavar="T", help=f"time between inversions (default {d.ir_tr:g}s)")
    g.add_argument("--fa", metavar="LIST", help="VFA flip angles, degrees (default " + ",".join(f"{a:g}" for a in d.vfa_fa) + ")")
    g.add_argument("--vfa-tr", metavar="T", help=f"VFA repetition time (default {d.vfa_tr * 1e3:g}ms)")
    g.add_argument("--esp", metavar="T", help=f"spin-echo echo spacing (default {d.mese_esp * 1e3:g}ms)")
    g.add_argument("--echoes", type=int, default=d.mese_echoes, help=f"spin-echo echoes (default {d.mese_echoes})")
    g.add_argument("--refocus", type=float, default=d.mese_refocus, metavar="DEG",
                   help=f"nominal refocusing angle (default {d.mese_refocus:g}); the B1 field scales it")
    g.add_argument("--megre-te", metavar="LIST", help="gradient-echo echo times (default 2.5ms + 4ms steps, 12 echoes)")
    g.add_argument("--b1-method", choices=("dam", "afi"), default=d.b1_method,
                   help="B1 inputs: dam (60/120 deg, TR 12 s) or afi (60 deg, TR 20/100 ms) (default dam)")
    p.set_defaults(run=run)


def run(args) -> int:
    d = Protocols()
    settings = Protocols(
        ir_ti=tuple(parse_time_list(args.ti, key="InversionTime", what="--ti")) if args.ti else d.ir_ti,
        ir_tr=parse_time(args.ir_tr, key="RepetitionTime", what="--ir-tr") if args.ir_tr else d.ir_tr,
        vfa_fa=tuple(parse_angle_list(args.fa, what="--fa")) if args.fa else d.vfa_fa,
        vfa_tr=parse_time(args.vfa_tr, key="RepetitionTimeSpoiled", what="--vfa-tr") if args.vfa_tr else d.vfa_tr,
        mese_esp=parse_time(args.esp, key="EchoTime", what="--esp") if args.esp else d.mese_esp,
        mese_echoes=args.echoes, mese_refocus=float(parse_angle_list(str(args.refocus), what="--refocus")[0]),
        megre_te=tuple(parse_time_list(args.megre_te, key="EchoTime", what="--megre-te")) if args.megre_te else d.megre_te,
        b1_method=args.b1_method,
    )
    manifest = simulate(
        args.out_dir, phantom=args.phantom, protocols=[t.strip() for t in args.protocol.split(",")],
        shape=_ints(args.shape, "--shape"), voxel_size=_floats(args.voxel_size, "--voxel-size", 3), snr=args.snr,
        b1_snr=args.b1_snr, coils=args.coils, seed=args.seed, b1_range=_floats(args.b1_range, "--b1-range", 2),
        temperature_c=args.temperature, settings=settings, subject=args.subject, overwrite=args.overwrite,
        command_line=args.argv,
    )
    n = sum(len(s["files"]) for s in manifest["series"].values())
    print(f"simulated the {manifest['phantom']} phantom: {n} volumes in {len(manifest['series'])} series "
          f"({', '.join(manifest['series'])}), SNR {manifest['snr']:g}, seed {manifest['seed']}")
    print(f"wrote {args.out_dir} (see simulation.json; ground truth in *_desc-truth_*map.nii.gz)")
    return 0
