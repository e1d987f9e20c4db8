#!/usr/bin/env python
"""Regenerate qmap's bundled sample data (``sample_data/``) with ``qmap simulate``.

The sample data are synthetic: the invented nine-vial phantom of
:mod:`qmap.simulate.phantoms` at 21.5 C, scanned with every protocol qmap fits
(inversion recovery, variable flip angle, multi-echo spin echo, multi-echo
gradient echo, double-angle B1 inputs on a coarser grid, MP2RAGE), Rician noise at SNR
150, seed 20240611. The same qmap version and seed give byte-identical images.

Usage::

    python scripts/make_sample_data.py            # rewrites sample_data/ (keeps README.md)
    python scripts/make_sample_data.py --out DIR  # writes elsewhere
"""

from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
from pathlib import Path

from qmap.simulate import simulate

#: the settings of the shipped data (see sample_data/README.md)
SETTINGS = {
    "phantom": "vials",
    "protocols": ("ir", "vfa", "mese", "megre", "b1", "mp2rage"),
    "shape": (48, 48, 4),
    "voxel_size": (2.0, 2.0, 4.0),
    "snr": 150.0,
    "coils": 1,
    "seed": 20240611,
    "b1_range": (0.85, 1.15),
    "temperature_c": 21.5,
    "subject": "phantom",
}

KEEP = ("README.md",)


def main(argv=None) -> int:
    repo = Path(__file__).resolve().parents[1]
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=repo / "sample_data", help="target folder (default sample_data/)")
    args = ap.parse_args(argv)
    out: Path = args.out
    with tempfile.TemporaryDirectory(prefix="qmap-sample-") as tmp:
        new = Path(tmp) / "data"
        simulate(new, command_line=["python", "scripts/make_sample_data.py"], **SETTINGS)
        out.mkdir(parents=True, exist_ok=True)
        for p in out.iterdir():  # remove the old data, keep the hand-written README
            if p.name in KEEP:
                continue
            shutil.rmtree(p) if p.is_dir() else p.unlink()
        for p in new.iterdir():
            shutil.move(str(p), out / p.name)
    total = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    print(f"wrote {out} ({total / 1e6:.2f} MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
