#!/usr/bin/env python
"""Calibration of qmap's standard errors on Monte-Carlo truth (the README's calibration table).

For each model and two SNRs: simulate a volume whose object voxels hold known parameters (drawn at
random) and whose background holds noise only, add complex Gaussian noise and take the magnitude,
fit with qmap, and measure how often estimate +/- 1.0 SE and +/- 1.96 SE cover the truth (68 % and
95 % if the standard errors are right) and the robust SD of z = (estimate - truth) / SE
(IQR / 1.349; 1 if right). Three ways of getting the standard errors:

* ``sigma given``: the true noise sd passed in (qmap's default ``noise`` convention);
* ``sigma estimated``: the noise sd estimated from the volume (``--sigma auto``);
* ``residual``: the old per-voxel residual-variance convention (``--stderr residual``), for contrast.

The signals are written out here from the published equations (and, for the spin-echo train, the
brute-force isochromat simulation in tests/reference), not taken from qmap's models.

SNR is the largest noise-free sample of a voxel's series divided by sigma (M0 / sigma for T2*, T2 and
IR). Cases: T2* 12 echoes 4-48 ms, T2* 10-60 ms, Rician noise-floor model; EPG T2 16 echoes 10 ms,
T2 40-140 ms, refocusing 130-180 deg; magnitude IR, 10 TIs 50 ms-5 s, T1 0.3-3 s, inversion efficiency
0.9-1; VFA 3/8/15/25 deg, TR 15 ms, T1 0.5-2.5 s, B1 0.8-1.2 from a B1 map with its own standard
error 0.01 (propagated).

Usage: python scripts/calibration.py [--voxels-side 56] [--seed 1] [--markdown]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from qmap.fitting import status as st
from qmap.fitting.noise_floor import NoiseFloor
from qmap.maps import fit_volume
from qmap.models.epg_t2 import EpgT2
from qmap.models.ir import InversionRecovery
from qmap.models.monoexp import MonoExponential
from qmap.models.vfa import SpoiledGRE
from qmap.noise_level import ArraySource
from qmap.pipeline import resolve_sigma
from tests.reference.isochromat import cpmg_isochromats

M0 = 1000.0


def rician(s, sigma, rng):
    return np.hypot(s + rng.normal(0.0, sigma, s.shape), rng.normal(0.0, sigma, s.shape))


def volume(signals, sigma, rng, obj):
    """(side, side, 1, m) magnitudes: ``signals`` (obj*obj, m) in a central square, noise elsewhere."""
    side = obj + 40
    m = signals.shape[1]
    vol = np.zeros((side, side, 1, m))
    mask = np.zeros((side, side, 1), bool)
    mask[20 : 20 + obj, 20 : 20 + obj] = True
    vol[mask] = signals
    return rician(vol, sigma, rng), mask


def coverage(est, truth, se):
    z = (est - truth) / se
    z = z[np.isfinite(z)]
    q25, q75 = np.percentile(z, [25, 75])
    return float(np.mean(np.abs(z) <= 1.0)), float(np.mean(np.abs(z) <= 1.96)), float((q75 - q25) / 1.3489795)


def case_t2star(snr, rng, obj):
    te = np.arange(1, 13) * 0.004
    t2 = rng.uniform(0.010, 0.060, obj * obj)
    s = M0 * np.exp(-te / t2[:, None])
    return {"model": MonoExponential(te), "noise": NoiseFloor("rician"), "signals": s, "truth": t2,
            "param": "T2star", "sigma": M0 / snr}


def case_epg(snr, rng, obj):
    esp, n_echoes, t1 = 0.01, 16, 1.0
    pairs = [(t2, ang) for t2 in np.geomspace(0.04, 0.14, 6) for ang in (130.0, 145.0, 160.0, 170.0, 180.0)]
    trains = np.array([cpmg_isochromats(t2, t1, esp, n_echoes, ang, n_iso=512) for t2, ang in pairs])
    pick = rng.integers(0, len(pairs), obj * obj)
    truth = np.array([p[0] for p in pairs])[pick]
    return {"model": EpgT2(esp * np.arange(1, n_echoes + 1), refocus_deg=180.0, t1=t1),
            "noise": NoiseFloor("rician"), "signals": M0 * trains[pick], "truth": truth, "param": "T2",
            "sigma": M0 / snr}


def case_ir(snr, rng, obj):
    ti = np.array([0.05, 0.1, 0.2, 0.4, 0.7, 1.0, 1.5, 2.2, 3.2, 5.0])
    t1 = rng.uniform(0.3, 3.0, obj * obj)
    k = rng.uniform(0.9, 1.0, obj * obj)
    s = np.abs(M0 - M0 * (1 + k)[:, None] * np.exp(-ti / t1[:, None]))  # S = a + b exp(-TI/T1), magnitude
    return {"model": InversionRecovery(ti), "noise": None, "signals": s, "truth": t1, "param": "T1", "sigma": M0 / snr}


def case_vfa(snr, rng, obj):
    fa, tr = np.array([3.0, 8.0, 15.0, 25.0]), 0.015
    n = obj * obj
    t1 = rng.uniform(0.5, 2.5, n)
    b1 = rng.uniform(0.8, 1.2, n)
    a = np.deg2rad(b1[:, None] * fa)
    e1 = np.exp(-tr / t1)[:, None]
    s = M0 * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))  # Ernst & Anderson 1966, actual angle B1 x nominal
    b1_se = 0.01
    return {"model": SpoiledGRE(fa, tr), "noise": None, "signals": s, "truth": t1, "param": "T1",
            "sigma": float(s.max()) / snr, "b1": b1 + rng.normal(0.0, b1_se, n), "b1_se": b1_se}


CASES = [
    ("T2* (12 echoes, Rician floor model)", case_t2star, (50, 20)),
    ("EPG T2 (16 echoes, refocusing 130-180 deg)", case_epg, (80, 40)),
    ("IR magnitude (10 TIs, T1 0.3-3 s)", case_ir, (30, 15)),
    ("VFA 4 angles + B1 map (B1 SE 0.01 propagated)", case_vfa, (200, 100)),
]


def run_case(make, snr, seed, obj):
    rng = np.random.default_rng(seed)
    c = make(snr, rng, obj)
    vol, mask = volume(c["signals"], c["sigma"], rng, obj)
    kw = {}
    if "b1" in c:
        b1 = np.ones(mask.shape)
        b1[mask] = c["b1"]
        kw = {"ctx_maps": {"b1": b1}, "input_se": {"b1": np.full(mask.shape, c["b1_se"])}}
    est_sigma, _ = resolve_sigma("auto", ArraySource(vol))
    rows = {}
    for label, sigma, conv in (("sigma given", c["sigma"], "noise"), ("sigma estimated", float(est_sigma), "noise"),
                               ("residual", c["sigma"], "residual")):
        maps = fit_volume(c["model"], vol, mask=mask, noise=c["noise"], sigma=sigma, stderr=conv, **kw)
        ok = maps.status[mask] == st.FITTED
        rows[label] = coverage(maps[c["param"]][mask][ok], c["truth"][ok], maps.stderr[c["param"]][mask][ok])
        rows[label] += (float(ok.mean()),)
    return rows, float(est_sigma) / c["sigma"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--voxels-side", type=int, default=56, help="object is SIDE x SIDE voxels (default 56: 3136)")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    t0 = time.perf_counter()
    print("| model | SNR | SE from | 68 % coverage | 95 % coverage | robust SD of z | fitted |")
    print("| --- | ---: | --- | ---: | ---: | ---: | ---: |")
    for k, (name, make, snrs) in enumerate(CASES):
        for j, snr in enumerate(snrs):
            rows, ratio = run_case(make, snr, args.seed + 10 * k + j, args.voxels_side)
            for label, (c68, c95, rsd, fitted) in rows.items():
                shown = label if label != "sigma estimated" else f"sigma estimated ({ratio:.3f} x true)"
                print(f"| {name} | {snr} | {shown} | {100 * c68:.1f} % | {100 * c95:.1f} % | {rsd:.2f} | "
                      f"{100 * fitted:.1f} % |")
    print(f"\n{args.voxels_side ** 2} voxels per case, seed {args.seed}, {time.perf_counter() - t0:.0f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
