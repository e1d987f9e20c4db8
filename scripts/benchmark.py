#!/usr/bin/env python3
"""Speed and memory of qmap on whole-volume data, as ratios measured in one run.

Cases (each ``qmap`` run is a separate process, timed from outside, peak RSS
from the OS):

* ``t2star`` -- 1M voxels x 12 echoes (float32 .nii.gz) with a noise-only
  background: ``--noise-floor none``, the default (``rician`` with ``--sigma
  auto``), and both with ``--mask none``, against (a) a per-voxel
  ``scipy.optimize.curve_fit`` loop on a subsample, extrapolated to the object
  voxels, and (b) the I/O floor: nibabel load of the series + writing the same
  number of gzipped float32 maps with nibabel's default (zlib) writer. Also the
  start-up (``qmap t2star --help``) and a per-stage breakdown of the default
  run in one process (imports, load, mask, noise level, fit, write).
* ``t1-ir`` -- 1M voxels x 10 TIs against a per-voxel curve_fit loop of the same model as qmap's
  (``a + b exp(-TI/T1)`` on both sign patterns around the smallest sample, the better kept).
* ``t1-vfa`` -- 1M voxels x 4 flip angles (one 3D file per angle) against a
  per-voxel curve_fit loop of the spoiled-gradient-echo equation.
* ``b1`` -- double-angle method on a 1M-voxel pair against a per-voxel
  curve_fit loop of the same signal model ``M |sin(k a B1)|``, k = 1, 2 (the
  per-voxel numpy loop of the closed form itself is printed too).
* ``t2 --epg`` -- 1M voxels x 32 echoes against a per-voxel least-squares EPG
  fit (scipy.optimize.least_squares on qmap.epg) on a subsample; and the fit
  stage alone (32k object voxels, Rician, one thread) as voxels/s, with
  ``--baseline DIR`` also with the qmap of another checkout, alternating.
* ``memory`` -- the t2star fit of an uncompressed input read in slabs.
* ``t1-mp2rage`` -- 1M-voxel 12-bit UNI (with a sidecar) against the I/O floor
  (loading UNI + writing the same number of maps), with and without a B1 map.
* ``t2-spectrum`` -- ``--spectrum-voxels`` (default 20k) two-pool voxels x 32
  echoes, ``-j 2``, the whole command (refocusing-angle search, regularised
  NNLS, bootstrap SE calibration, writing), as voxels/s; the fixed cost of a
  run (a 400-voxel series) and the rate beyond it; the fit stage alone on one
  thread; and per voxel in units of one ``scipy.optimize.nnls`` call on the
  same 32 x 40 basis. Its memory on ``--spectrum-memory-voxels`` (default 600k, 73 MB of float32 echoes:
  a whole-brain series' size) voxels. A run has a fixed cost of about 120 MB (the model's imports and
  the two fit workers' arrays), which decides the ratio for small series: 7.4-7.6 at 150k voxels.

Run: ``python scripts/benchmark.py [--voxels 1000000] [--cases t2star,t1-ir,t1-vfa,b1,t2-epg,memory,mp2rage,t2-spectrum]
[--keep DIR]``. Prints one line per measurement and the ratios with their goals (issue "performance
round 2"): t2star default >= 60x the loop and <= 2x the I/O floor; --noise-floor none >= 100x the
loop; with --mask none the default <= 2x the plain fit; t1-ir, t1-vfa, b1 >= 60x their loops;
t2 --epg >= 2000x its loop (every loop runs on a seeded random sample of the object voxels); ``--help`` < 0.3 s;
peak RSS minus the command's fixed cost (the peak of the same command on a copy of its inputs taken every
k-th voxel, about 24 voxels a side: imports, the numpy / scipy code it pages in, its threads' buffers) < 3x
the input series (its voxels in float32, as qmap holds them: the uncompressed size of a float32 file); the
ratio above a process that only imports what the command imports (``EXTRA_IMPORTS``) is printed beside it;
t1-mp2rage within 2x the I/O floor; t2-spectrum >= 5,000 voxels/s on 2 cores
(issue 17). The machine's load is printed first: on a shared
machine absolute seconds are noisy, ratios within one run much less so.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

HERE = Path(__file__).resolve().parent
#: what a fitting run imports before it touches data: the baseline for "memory above the imports"
BASELINE_IMPORTS = ("import qmap.cli.t2star, qmap.workflows.decay, qmap.engine, qmap.fitting.solver, qmap.noise, "
                    "qmap.noise_level, threadpoolctl, nibabel")
#: what a command imports beyond that (checked with sys.modules after a run of each command on the sample data):
#: t1-ir, t2 --epg, t2star, b1 and t1-vfa without a B1 map nothing more (scipy's base package only, which nibabel
#: imports); a B1 map is resampled with scipy.ndimage (which imports scipy.special): t1-mp2rage's larger run here
#: has one; t2-spectrum's model imports scipy.interpolate / optimize / linalg
EXTRA_IMPORTS = {
    "t1-mp2rage": "scipy.ndimage, scipy.special, qmap.workflows.mp2rage",
    "t2-spectrum": "qmap.models.t2_spectrum, qmap.workflows.t2_spectrum",
}


def shape_for(nvox: int) -> tuple[int, int, int]:
    side = round(nvox ** (1 / 3))
    return (side, side, max(1, nvox // (side * side)))


def head_like(shape, rng):
    """An ellipsoidal 'head' filling ~60 % of the volume, with smooth parameter variation, and background."""
    x, y, z = (np.indices(shape).astype(np.float32) / (np.array(shape, np.float32)[:, None, None, None] - 1) - 0.5)
    r = (x / 0.46) ** 2 + (y / 0.46) ** 2 + (z / 0.49) ** 2
    obj = r < 1.0
    smooth = 0.5 + 0.5 * np.sin(6 * x) * np.cos(5 * y)
    return obj, smooth.astype(np.float32)


def _child_usage(cmd: list[str]) -> tuple[float, float, float]:
    """Wall time, peak RSS (MB) and CPU time (user + system, all threads) of one child.

    Measured by a wrapper process, so that runs don't mix.
    """
    wrapper = (
        "import resource,subprocess,sys,time;t=time.perf_counter();"
        "p=subprocess.run(sys.argv[1:],capture_output=True,text=True);dt=time.perf_counter()-t;"
        "u=resource.getrusage(resource.RUSAGE_CHILDREN);"
        "print(f'{dt} {u.ru_maxrss/1024} {u.ru_utime + u.ru_stime} {p.returncode}');"
        "sys.stderr.write(p.stderr if p.returncode else '')"
    )
    out = subprocess.run([sys.executable, "-c", wrapper, *cmd], capture_output=True, text=True, check=False)
    dt, rss, cpu, rc = out.stdout.split()
    if int(rc) != 0:
        sys.exit(f"benchmark: {' '.join(cmd)} failed ({rc}):\n{out.stderr}")
    return float(dt), float(rss), float(cpu)


#: timed runs of each measurement (qmap runs, loops, I/O floors): the fastest is reported (the least disturbed
#: by other work on the machine: the timeit convention), and every qmap run's time is printed
REPEATS = 3


def settle() -> None:
    """Write dirty file pages to disk (the inputs just generated, the outputs of the run before), so that the
    kernel's write-back does not run during the next timed run (it did: the first run after the data were
    written was up to 20 % slower)."""
    if hasattr(os, "sync"):
        os.sync()


def peak_rss_of(cmd: list[str], repeats: int = 1) -> tuple[float, float]:
    """Wall time and peak RSS (MB) of a child: with ``repeats`` > 1 the fastest of that many runs (the output
    folder after ``-o`` is emptied before each) and the largest peak; every run's time is printed."""
    times, peak = [], 0.0
    for _ in range(repeats):
        if "-o" in cmd:
            shutil.rmtree(cmd[cmd.index("-o") + 1], ignore_errors=True)
        settle()
        dt, rss, _ = _child_usage(cmd)
        times.append(dt)
        peak = max(peak, rss)
    if repeats > 1:
        print(f"    ({repeats} runs into {Path(cmd[cmd.index('-o') + 1]).name}/: "
              f"{', '.join(f'{t:.2f}' for t in times)} s; the fastest counts)")
    return min(times), peak


def qmap_cmd() -> list[str]:
    exe = shutil.which("qmap")
    return [exe] if exe else [sys.executable, "-m", "qmap"]


def write_series(path: Path, data: np.ndarray, affine, sidecar: dict) -> None:
    nib.save(nib.Nifti1Image(data.astype(np.float32), affine), str(path))
    name = path.name.removesuffix(".gz").removesuffix(".nii")
    (path.parent / f"{name}.json").write_text(json.dumps(sidecar))


def rician(sig, sigma, rng):
    out = np.empty(sig.shape, np.float32)
    # in slabs to keep the generator's memory small
    for k in range(sig.shape[2]):
        s = sig[:, :, k]
        out[:, :, k] = np.abs(s + rng.normal(0, sigma, s.shape) + 1j * rng.normal(0, sigma, s.shape))
    return out


def io_floor(series: Path, n_maps: int, workdir: Path) -> float:
    code = (
        "import nibabel as nib,numpy as np,sys,time;t=time.perf_counter();"
        f"img=nib.load({str(series)!r});d=np.asanyarray(img.dataobj);m=(d[...,0] if d.ndim==4 else d).astype(np.float32);"
        f"[nib.save(nib.Nifti1Image(m*(i+1),img.affine),{str(workdir)!r}+f'/floor{{i}}.nii.gz') for i in range({n_maps})];"
        "print(time.perf_counter()-t)"
    )
    best = np.inf
    for _ in range(REPEATS):  # the fastest, as for the qmap runs
        settle()
        t = time.perf_counter()
        subprocess.run([sys.executable, "-c", code], check=True, capture_output=True)
        best = min(best, time.perf_counter() - t)
    return best


def object_sample(data: np.ndarray, obj: np.ndarray, k: int, rng) -> np.ndarray:
    """``k`` object voxels drawn at random (seeded), (k, ...) float64: the per-voxel loops' sample."""
    idx = np.flatnonzero(obj.ravel())
    pick = np.sort(rng.choice(idx, size=min(k, idx.size), replace=False))
    return data.reshape((-1,) + data.shape[obj.ndim:])[pick].astype(float)


def curve_fit_rate(model, x, y, p0, n=1000, candidates=None) -> float:
    """Voxels per second of a one-process per-voxel curve_fit loop over ``n`` voxels of ``y``: the fastest of
    :data:`REPEATS` passes (as for the qmap runs it is set against).

    ``candidates(v)`` gives the data variants fitted per voxel (the better fit is kept), as qmap does for
    magnitude inversion recovery.
    """
    import warnings

    from scipy.optimize import OptimizeWarning, curve_fit

    n = min(n, y.shape[0])
    best_t = np.inf
    for _ in range(REPEATS):
        t = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", OptimizeWarning)
            for i in range(n):
                best = np.inf
                for v in (candidates(y[i]) if candidates else [y[i]]):
                    try:
                        p, _ = curve_fit(model, x, v, p0=p0(v), maxfev=2000)
                        best = min(best, float(np.sum((model(x, *p) - v) ** 2)))
                    except RuntimeError:
                        pass
        best_t = min(best_t, time.perf_counter() - t)
    return n / best_t


STAGES = """
import json, sys, time
t = time.perf_counter()
import numpy as np
from qmap.fitting.noise_floor import NoiseFloor
from qmap.io.series import load_series
from qmap.models.monoexp import MonoExponential
from qmap.pipeline import CommonOptions, PreparedRun, resolve_mask, resolve_sigma
out = {"imports": time.perf_counter() - t}
t0 = t = time.perf_counter()
series = load_series([sys.argv[1]], key="EchoTime", option="--te")
out["load"] = time.perf_counter() - t
t = time.perf_counter()
mask, desc = resolve_mask("auto", series)
out["mask"] = time.perf_counter() - t
t = time.perf_counter()
sigma, _ = resolve_sigma("auto", series)
out["noise level"] = time.perf_counter() - t
t = time.perf_counter()
model = MonoExponential(series.acquisition["EchoTime"], param="T2star")
common = CommonOptions(out_dir=sys.argv[2], quiet=True, overwrite=True)
noise = NoiseFloor("rician")
run = PreparedRun(series=series, common=common, prefix="stages", mask=mask, mask_desc=desc, sigma=sigma,
                  noise_info=None, inputs=[], notes=[], t0=t0, noise=noise)
maps = run.fit(model, noise=noise)
out["fit (+ streamed writing)"] = time.perf_counter() - t
t = time.perf_counter()
run.write(maps, model_info={"name": "monoexp"})
out["write (complete, check, commit)"] = time.perf_counter() - t
print(json.dumps(out))
"""


def stage_breakdown(series: Path, work: Path) -> dict:
    """Seconds per stage of the default t2star run, in one fresh process (all cores)."""
    res = subprocess.run([sys.executable, "-c", STAGES, str(series), str(work / "stages")], check=False,
                         capture_output=True, text=True)
    if res.returncode:
        sys.exit(f"benchmark: stage breakdown failed:\n{res.stderr}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def startup_time(repeat: int = 3) -> tuple[float, float]:
    """Best-of wall time of ``qmap t2star --help`` and of a bare ``python -c pass``."""
    best_help = best_py = np.inf
    for _ in range(repeat):
        t = time.perf_counter()
        subprocess.run(qmap_cmd() + ["t2star", "--help"], capture_output=True, check=True)
        best_help = min(best_help, time.perf_counter() - t)
        t = time.perf_counter()
        subprocess.run([sys.executable, "-c", "pass"], capture_output=True, check=True)
        best_py = min(best_py, time.perf_counter() - t)
    return best_help, best_py


def byte_compile() -> str:
    """Byte-compile the qmap being measured, as installing a package does (pip writes the ``.pyc`` files).

    A source checkout installed in editable mode has none until a run writes them, and with
    ``PYTHONDONTWRITEBYTECODE`` set no run does: every process would then compile qmap anew (~0.07 s of
    each run here), a cost an installed qmap does not have.
    """
    import importlib.util

    spec = importlib.util.find_spec("qmap")
    where = Path(next(iter(spec.submodule_search_locations or []))) if spec else None
    if where is None:
        return "qmap not found"
    res = subprocess.run([sys.executable, "-m", "compileall", "-q", str(where)], capture_output=True, text=True,
                         check=False)
    if res.returncode:
        return f"qmap at {where} could not be byte-compiled (runs compile it each time): {res.stderr.strip()[:200]}"
    return f"qmap at {where}, byte-compiled as an installed package is"


def goal(name: str, value: float, target: str) -> str:
    op, num = target.split()
    ok = value >= float(num) if op == ">=" else value <= float(num)
    return f"  {name:<38} = {value:8.2f}   (goal {target}: {'met' if ok else 'NOT met'})"


#: command -> ((peak RSS - the command's fixed cost) / input series, (peak RSS - import baseline) / input series)
MEMORY: dict[str, tuple[float, float]] = {}


def small_run_rss(args: list[str], work: Path, side: int = 24) -> float | None:
    """Peak RSS (MB) of ``qmap ARGS`` on copies of its NIfTI inputs taken every k-th voxel along each axis (about
    ``side`` voxels a side, the same field of view: object and background as in the full input), or None if
    that run fails: the command's fixed cost (imports, the code of numpy / scipy it runs, its threads'
    buffers, lookup tables), which does not grow with the input."""
    small = work / f"small_{len(list(work.glob('small_*')))}"
    small.mkdir()
    out, k = [], None
    for a in args:
        p = Path(a)
        if a.endswith((".nii", ".nii.gz")) and p.is_file():
            img = nib.load(a)
            k = k or max(1, max(img.shape[:3]) // side)  # from the first image (the series); the same for the others
            aff = img.affine.copy()
            aff[:3, :3] *= k
            nib.save(nib.Nifti1Image(np.ascontiguousarray(np.asanyarray(img.dataobj)[::k, ::k, ::k]), aff), str(small / p.name))
            name = p.name.removesuffix(".gz").removesuffix(".nii")
            if (p.parent / f"{name}.json").is_file():
                shutil.copy(p.parent / f"{name}.json", small / f"{name}.json")
            a = str(small / p.name)
        out.append(a)
    out[out.index("-o") + 1] = str(small / "out")
    cmd = qmap_cmd() + out
    wrapper = ("import resource,subprocess,sys;p=subprocess.run(sys.argv[1:],capture_output=True);"
               "print(p.returncode, resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss/1024)")
    res = subprocess.run([sys.executable, "-c", wrapper, *cmd], capture_output=True, text=True, check=False)
    rc, rss = res.stdout.split()
    return float(rss) if rc == "0" else None


def memory_line(rss: float, base_rss: float, in_mb: float, out_dir: Path | None = None, n_vol: int = 1,
                command: str | None = None, fixed_rss: float | None = None) -> str:
    """The memory goal: (peak RSS - the command's fixed cost) / input series.

    "Input series" is the voxel data as qmap holds them: float32 (complex64 for complex data), which is
    also the uncompressed size of a float32 file (an int16 file is half of it on disk). The fixed cost is
    ``fixed_rss``, the peak of the same command on a small copy of its inputs (:func:`small_run_rss`): what
    does not grow with the input. The line also gives the ratio above ``base_rss``, the peak RSS of a process
    that only imports what the command imports (:func:`baseline_rss`), which counts the rest of the fixed
    cost (about 5 MB: the numpy / scipy code a run pages in, the writer thread's buffers) against the input.
    With ``out_dir`` (the run's outputs) and ``n_vol`` (volumes in the input) the line also gives the series
    plus the output maps (float32 maps, uint8 status): the floor of a run that held its maps until written
    (qmap streams them to the files slab by slab). ``command`` records the ratios for the summary at the end.
    """
    fixed = base_rss if fixed_rss is None else fixed_rss
    if command is not None:
        MEMORY[command] = ((rss - fixed) / in_mb, (rss - base_rss) / in_mb)
    text = goal("(peak RSS - fixed cost) / input", (rss - fixed) / in_mb, "<= 3") + \
        (f"  [peak {rss:.0f} MB; the same command on a small copy {fixed_rss:.0f} MB, " if fixed_rss is not None
         else f"  [peak {rss:.0f} MB; (the small copy failed: the import baseline) ") + \
        f"above the import baseline ({base_rss:.0f} MB) {(rss - base_rss) / in_mb:.2f} x; input series {in_mb:.1f} MB float32"
    if out_dir is not None:
        files = [f for f in Path(out_dir).glob("*.nii.gz") if not f.name.startswith("floor")]
        n_maps = sum(1 for f in files if "desc-status" not in f.name)
        maps_mb = in_mb / n_vol * (n_maps + 0.25)
        text += (f"; series + {n_maps} float32 maps + status = {(in_mb + maps_mb) / in_mb:.2f} x input, the floor of a "
                 f"run that held its maps (qmap streams them slab by slab)")
    return text + "]"


def against_loop(title: str, label: str, args: list[str], *, loop: str, rate: float, n_fit: int, in_mb: float,
                 n_vol: int, target: str = ">= 60") -> None:
    """Run ``qmap ARGS`` and print it against a per-voxel loop of ``rate`` voxels/s over the ``n_fit`` voxels.

    ``n_vol``: volumes of the input series (for the memory line's structural part).
    """
    loop_s = n_fit / rate
    t_q, rss = peak_rss_of(qmap_cmd() + args, REPEATS)
    print(title)
    print(f"  {loop}: {rate:.1f} voxels/s -> {loop_s:.1f} s extrapolated")
    print(f"  qmap {label}: {t_q:.2f} s ({n_fit / t_q:.0f} object voxels/s), peak RSS {rss:.0f} MB")
    print(goal(f"loop / qmap {label}", loop_s / t_q, target))
    print(memory_line(rss, baseline_rss(args[0]), in_mb, Path(args[args.index("-o") + 1]), n_vol, command=label,
                      fixed_rss=small_run_rss(args, Path(args[args.index("-o") + 1]).parent)))


def case_t2star(nvox, work: Path, rng):
    shape = shape_for(nvox)
    te = np.arange(1, 13) * 0.0035
    obj, smooth = head_like(shape, rng)
    t2s = np.where(obj, 0.015 + 0.05 * smooth, 0.03).astype(np.float32)
    m0 = np.where(obj, 1000.0, 0.0).astype(np.float32)
    sig = m0[..., None] * np.exp(-te / t2s[..., None]).astype(np.float32)
    data = rician(sig, 12.0, rng)
    del sig
    series = work / "bench_MEGRE.nii.gz"
    write_series(series, data, np.diag([1.0, 1.0, 1.0, 1.0]), {"EchoTime": te.tolist()})
    n_fit = int(obj.sum())
    sub = object_sample(data, obj, 1000, rng)
    rate = curve_fit_rate(lambda t, a, b: a * np.exp(-t / b), te, sub, lambda v: (v[0] * 1.3, 0.03))
    loop_s = n_fit / rate
    in_mb = data.nbytes / 2**20
    del data
    q = qmap_cmd()
    run = q + ["t2star", str(series), "-q"]
    t_none, rss_none = peak_rss_of(run + ["-o", str(work / "none"), "--noise-floor", "none"], REPEATS)
    t_def, rss_def = peak_rss_of(run + ["-o", str(work / "def")], REPEATS)
    t_mn_none, _ = peak_rss_of(run + ["-o", str(work / "mn_none"), "--noise-floor", "none", "--mask", "none"], REPEATS)
    t_mn_def, rss_mn = peak_rss_of(run + ["-o", str(work / "mn_def"), "--mask", "none"], REPEATS)
    n_maps = len(list((work / "def").glob("*.nii.gz")))
    floor = io_floor(series, n_maps, work)
    base_t, base_rss = peak_rss_of([sys.executable, "-c", BASELINE_IMPORTS])
    t_help, t_py = startup_time()
    stages = stage_breakdown(series, work)
    print(f"t2star: {np.prod(shape)} voxels ({n_fit} in the object) x {te.size} echoes, input {in_mb:.0f} MB float32")
    print(f"  curve_fit loop: {rate:.0f} voxels/s -> {loop_s:.1f} s extrapolated")
    print(f"  I/O floor (nibabel load + write {n_maps} maps, standard zlib): {floor:.2f} s;  import-only process "
          f"{base_t:.2f} s, {base_rss:.0f} MB")
    print(f"  qmap t2star --noise-floor none: {t_none:.2f} s, peak RSS {rss_none:.0f} MB")
    print(f"  qmap t2star (default rician, sigma auto): {t_def:.2f} s, peak RSS {rss_def:.0f} MB")
    print(f"  --mask none: plain {t_mn_none:.2f} s, default {t_mn_def:.2f} s (peak RSS {rss_mn:.0f} MB)")
    print(f"  start-up: qmap t2star --help {t_help:.3f} s (bare python -c pass {t_py:.3f} s)")
    print("  stages of the default run (one process): " + ", ".join(f"{k} {v:.2f} s" for k, v in stages.items())
          + f"; total {sum(stages.values()):.2f} s")
    print("    (the stages overlap: the maps are compressed and written slab by slab in a background thread while "
          "the next slab is fitted, so 'fit' includes most of the writing; 'write' is completing the files, "
          "re-reading them and committing)")
    print(goal("loop / default", loop_s / t_def, ">= 60"))
    print(goal("default / I/O floor", t_def / floor, "<= 2"))
    print(goal("loop / --noise-floor none", loop_s / t_none, ">= 100"))
    print(goal("--mask none: default / plain", t_mn_def / t_mn_none, "<= 2"))
    print(goal("qmap t2star --help (s)", t_help, "<= 0.3"))
    peak, extra = max((rss_none, ["--noise-floor", "none"]), (rss_def, []), (rss_mn, ["--mask", "none"]),
                      key=lambda r: r[0])
    print(memory_line(peak, base_rss, in_mb, work / "def", te.size, command="t2star",
                      fixed_rss=small_run_rss(["t2star", str(series), "-q", "-o", str(work / "def"), *extra], work)))
    return series, in_mb, base_rss


_BASELINES: dict[str, float] = {}


def baseline_rss(command: str = "t2star") -> float:
    """Peak RSS (MB) of a process that only imports what ``command`` imports (Python, numpy, scipy parts, nibabel,
    qmap): the fixed cost subtracted from the command's peak."""
    imports = BASELINE_IMPORTS + (f", {EXTRA_IMPORTS[command]}" if command in EXTRA_IMPORTS else "")
    if imports not in _BASELINES:
        _BASELINES[imports] = peak_rss_of([sys.executable, "-c", imports])[1]
    return _BASELINES[imports]


def case_t1_ir(nvox, work: Path, rng):
    shape = shape_for(nvox)
    ti = np.array([0.05, 0.1, 0.2, 0.4, 0.7, 1.0, 1.5, 2.2, 3.2, 4.5])
    obj, smooth = head_like(shape, rng)
    t1 = np.where(obj, 0.6 + 1.4 * smooth, 1.0).astype(np.float32)
    m0 = np.where(obj, 1000.0, 0.0).astype(np.float32)
    sig = m0[..., None] * (1 - 1.95 * np.exp(-ti / t1[..., None])).astype(np.float32)
    data = rician(sig, 10.0, rng)
    del sig
    series = work / "bench_IRT1.nii.gz"
    write_series(series, data, np.eye(4), {"InversionTime": ti.tolist()})
    n_fit = int(obj.sum())
    sub = object_sample(data, obj, 1000, rng)
    in_mb = data.nbytes / 2**20
    del data

    def ir(t, a, b, t1_):
        return a + b * np.exp(-t / t1_)

    def polarity(v):  # qmap's magnitude model: the two sign patterns around the smallest sample, the better kept
        i = int(np.argmin(v))
        k = np.arange(v.size)
        return [np.where(k < i, -v, v), np.where(k <= i, -v, v)]

    rate = curve_fit_rate(ir, ti, sub, lambda v: (v[-1], -2 * v[-1], 1.0), candidates=polarity)
    against_loop(f"t1-ir: {np.prod(shape)} voxels ({n_fit} in the object) x {ti.size} TIs, input {in_mb:.0f} MB",
                 "t1-ir", ["t1-ir", str(series), "-o", str(work / "ir"), "-q"],
                 loop="curve_fit loop (a + b exp(-TI/T1) on both sign patterns, as qmap)", rate=rate, n_fit=n_fit,
                 in_mb=in_mb, n_vol=ti.size)


def case_t1_vfa(nvox, work: Path, rng):
    from qmap.models.vfa import spgr_signal

    shape = shape_for(nvox)
    fa, tr = np.array([3.0, 8.0, 15.0, 25.0]), 0.015
    obj, smooth = head_like(shape, rng)
    t1 = np.where(obj, 0.6 + 1.4 * smooth, 1.0).astype(np.float32)
    m0 = np.where(obj, 5000.0, 0.0).astype(np.float32)
    files, sub = [], []
    for k, a in enumerate(fa):
        clean = np.where(obj, spgr_signal(a, tr, t1, m0=m0), 0.0).astype(np.float32)
        vol = rician(clean[..., None], 5.0, rng)[..., 0]
        f = work / f"bench_flip-{k + 1}_VFA.nii.gz"
        write_series(f, vol, np.eye(4), {"FlipAngle": float(a), "RepetitionTime": tr})
        files.append(str(f))
        sub.append(vol)
    sub = object_sample(np.stack(sub, axis=-1), obj, 1000, rng)
    n_fit = int(obj.sum())
    in_mb = np.prod(shape) * fa.size * 4 / 2**20

    def spgr(a, m, t1_):
        e = np.exp(-tr / t1_)
        r = np.deg2rad(a)
        return m * np.sin(r) * (1 - e) / (1 - e * np.cos(r))

    rate = curve_fit_rate(spgr, fa, sub, lambda v: (v.max() * 10, 1.0))
    against_loop(f"t1-vfa: {np.prod(shape)} voxels ({n_fit} in the object) x {fa.size} flip angles, input "
                 f"{in_mb:.0f} MB", "t1-vfa", ["t1-vfa", *files, "-o", str(work / "vfa"), "-q"],
                 loop="curve_fit loop (SPGR equation)", rate=rate, n_fit=n_fit, in_mb=in_mb, n_vol=fa.size)


def case_b1(nvox, work: Path, rng):
    shape = shape_for(nvox)
    fa = 60.0
    obj, smooth = head_like(shape, rng)
    b1 = np.where(obj, 0.8 + 0.4 * smooth, 1.0).astype(np.float32)
    files, vols = [], []
    for k in (1, 2):
        clean = np.where(obj, 1000.0 * np.abs(np.sin(np.radians(k * fa * b1))), 0.0).astype(np.float32)
        vol = rician(clean[..., None], 5.0, rng)[..., 0]
        f = work / f"bench_dam{k}.nii.gz"
        write_series(f, vol, np.eye(4), {"FlipAngle": k * fa, "RepetitionTime": 5.0})
        files.append(str(f))
        vols.append(vol)
    n_fit = int(obj.sum())
    in_mb = np.prod(shape) * 2 * 4 / 2**20
    sub = object_sample(np.stack(vols, axis=-1), obj, 20000, rng)
    # per-voxel curve_fit of the same signal model, S_k = M |sin(k a B1)| at k = 1, 2 (two samples, two unknowns)
    rate = curve_fit_rate(lambda k, m, b: m * np.abs(np.sin(np.radians(k * fa * b))), np.array([1.0, 2.0]), sub,
                          lambda v: (v[0] / np.sin(np.radians(fa)), 1.0), n=1000)
    # and a per-voxel loop of the closed form itself (double angle method: cos(a) = S(2a) / (2 S(a)))
    t = time.perf_counter()
    for s1, s2 in sub:
        np.degrees(np.arccos(np.clip(s2 / (2.0 * s1), -1.0, 1.0))) / fa
    closed_s = n_fit * (time.perf_counter() - t) / sub.shape[0]
    against_loop(f"b1 (DAM): {np.prod(shape)} voxels ({n_fit} in the object) x 2 images, input {in_mb:.0f} MB; "
                 f"a per-voxel numpy loop of the closed form itself: {closed_s:.1f} s extrapolated",
                 "b1", ["b1", *files, "--method", "dam", "--fa", str(fa), "--tr", "5s", "-o", str(work / "b1"), "-q"],
                 loop="curve_fit loop (M |sin(k a B1)|, k = 1, 2)", rate=rate, n_fit=n_fit, in_mb=in_mb, n_vol=2)


#: the fit stage of ``t2 --epg`` alone, in a fresh process on one thread: the default noise floor (Rician, the
#: sigma of the data given) on chunks of 8192 voxels (the command's default), CPU seconds -> voxels/s. Run with the
#: PYTHONPATH of the tree to measure, so that another checkout (``--baseline``) is timed by the same code; it
#: prints the rate and where qmap came from (checked).
FIT_STAGE_EPG = """
import os, sys, time
import numpy as np
import qmap
from threadpoolctl import threadpool_limits
from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.solver import fit_chunk
from qmap.models.epg_t2 import EpgT2
y = np.load(sys.argv[1]).astype(np.float64)
esp, sigma, chunk = float(sys.argv[2]), float(sys.argv[3]), 8192
model = EpgT2(esp * np.arange(1, y.shape[1] + 1))
with threadpool_limits(1):
    fit_chunk(model, y[:64], noise=NoiseFloor("rician"), sigma=np.full(64, sigma))  # builds the table once
    t = time.process_time()
    for i in range(0, y.shape[0], chunk):
        part = y[i:i + chunk]
        fit_chunk(model, part, noise=NoiseFloor("rician"), sigma=np.full(part.shape[0], sigma))
    print(y.shape[0] / (time.process_time() - t), os.path.dirname(os.path.dirname(qmap.__file__)))
"""


def fit_stage_rate(sample: Path, esp: float, sigma: float, tree: Path | None = None) -> float:
    """Voxels/s of the ``t2 --epg`` fit stage alone (:data:`FIT_STAGE_EPG`) with qmap from ``tree`` (default: this one)."""
    env = dict(os.environ, PYTHONPATH=str(tree or HERE.parent))
    # (run from the sample's folder: ``python -c`` puts the working directory first on the path)
    res = subprocess.run([sys.executable, "-c", FIT_STAGE_EPG, str(sample), str(esp), str(sigma)], env=env,
                         cwd=sample.parent, capture_output=True, text=True, check=False)
    if res.returncode:
        sys.exit(f"benchmark: the t2 --epg fit stage failed with qmap from {tree or HERE.parent}:\n{res.stderr}")
    rate, origin = res.stdout.split()
    if Path(origin).resolve() != Path(tree or HERE.parent).resolve():
        sys.exit(f"benchmark: the fit stage imported qmap from {origin}, not from {tree or HERE.parent}")
    return float(rate)


def case_t2_epg(nvox, work: Path, rng, baseline: Path | None = None):
    from scipy.optimize import least_squares

    from qmap.epg import cpmg_echoes

    shape = shape_for(nvox)
    n_e, esp = 32, 0.01
    obj, smooth = head_like(shape, rng)
    t2 = np.where(obj, 0.04 + 0.08 * smooth, 0.08).astype(np.float64).ravel()
    b1 = np.where(obj, 0.85 + 0.15 * smooth, 1.0).astype(np.float64).ravel()
    data = np.empty(t2.shape + (n_e,), np.float32)
    for s in range(0, t2.size, 65536):
        sl = slice(s, s + 65536)
        data[sl] = 1000.0 * cpmg_echoes(t2[sl], b1[sl], esp=esp, n_echoes=n_e, refocus_deg=180.0)
    data = data.reshape(shape + (n_e,))
    data = np.where(obj[..., None], data, 0.0)
    data = rician(data, 8.0, rng)
    series = work / "bench_MESE.nii.gz"
    te = (np.arange(1, n_e + 1) * esp).tolist()
    write_series(series, data, np.eye(4), {"EchoTime": te})
    n_fit = int(obj.sum())
    # the loop's voxels: 300 (a per-voxel least_squares EPG fit takes 15-900 ms, mean ~125: 60 voxels put the
    # rate anywhere in 5.9-12.3 voxels/s, 5-95 %, 300 within about +-10 %), by their own seeded generator
    # (the sample does not change with the other cases' draws); one pass (~40 s: the timing noise averages out)
    sub = object_sample(data, obj, 300, np.random.default_rng(2))
    sample = work / "bench_MESE_fit_sample.npy"
    # (its own seeded generator: the other cases keep their data)
    np.save(sample, object_sample(data, obj, min(n_fit, 32768), np.random.default_rng(1)).astype(np.float32))
    t = time.perf_counter()
    for v in sub:
        least_squares(lambda p, v=v: p[0] * cpmg_echoes(np.array([p[1]]), np.array([p[2]]), esp=esp,
                                                         n_echoes=n_e)[0] - v,
                      x0=[v[0] * 1.1, 0.08, 0.9], bounds=([0, 0.001, 0.5], [np.inf, 2.0, 1.2]))
    rate = sub.shape[0] / (time.perf_counter() - t)
    in_mb = data.nbytes / 2**20
    del data
    against_loop(f"t2 --epg: {np.prod(shape)} voxels ({n_fit} in the object) x {n_e} echoes, input {in_mb:.0f} MB",
                 "t2 --epg", ["t2", str(series), "-o", str(work / "epg"), "--epg", "-q"],
                 loop="per-voxel least_squares EPG loop", rate=rate, n_fit=n_fit, in_mb=in_mb, n_vol=n_e,
                 target=">= 2000")
    # the fit stage alone (the default Rician objective, one thread), alternating with the baseline checkout if given
    trees = [None] if baseline is None else [None, baseline]
    rates: dict = {t: [] for t in trees}
    for _ in range(2 if baseline is not None else 1):
        for tree in trees:
            rates[tree].append(fit_stage_rate(sample, esp, 8.0, tree))
    mine = max(rates[None])
    print(f"  fit stage alone ({np.load(sample, mmap_mode='r').shape[0]} object voxels, Rician, one thread, chunks "
          f"of 8192): {mine:.0f} voxels/s")
    if baseline is not None:
        base = max(rates[baseline])
        print(f"  the same with qmap from {baseline}: {base:.0f} voxels/s;  this tree / baseline = {mine / base:.2f}x "
              f"(best of two, alternating)")


def _spectrum_data(nvox: int, n_e: int, esp: float, sigma: float, rng) -> np.ndarray:
    """Two-pool CPMG magnitudes (short fraction 0-0.3, B1 0.8-1), about ``nvox`` voxels, Rician noise ``sigma``."""
    from qmap.epg import cpmg_echoes

    side = max(2, round(np.sqrt(nvox / 4)))
    shape = (side, side, max(1, nvox // (side * side)))
    n = int(np.prod(shape))
    f = rng.uniform(0, 0.3, n)
    b1 = rng.uniform(0.8, 1.0, n)
    short = cpmg_echoes(rng.uniform(0.015, 0.025, n), b1, esp=esp, n_echoes=n_e, scale_excitation=False)
    long_ = cpmg_echoes(rng.uniform(0.06, 0.1, n), b1, esp=esp, n_echoes=n_e, scale_excitation=False)
    return rician((1000.0 * (f[:, None] * short + (1 - f)[:, None] * long_)).reshape(shape + (n_e,)), sigma, rng)


def case_t2_spectrum(nvox, work: Path, rng, mem_voxels: int = 600_000):
    """t2-spectrum on two-pool data (short fraction 0-0.3, B1 0.8-1), with the scipy.optimize.nnls unit cost;
    its memory on ``mem_voxels`` voxels (0: on the speed case)."""
    from scipy.optimize import nnls
    from threadpoolctl import threadpool_limits

    from qmap.models.t2_spectrum import spectrum_basis

    n_e, esp, sigma = 32, 0.01, 1000.0 / 300
    data = _spectrum_data(nvox, n_e, esp, sigma, rng)
    n = int(np.prod(data.shape[:3]))
    series = work / "bench_spectrum_MESE.nii.gz"
    te = (np.arange(1, n_e + 1) * esp).tolist()
    write_series(series, data.astype(np.float32), np.eye(4), {"EchoTime": te})
    basis = spectrum_basis(esp, n_e)
    sub = data.reshape(-1, n_e)[:300].astype(float)
    with threadpool_limits(1):  # CPU time, like the qmap figure (the machine may be shared)
        t = time.process_time()
        for v in sub:
            nnls(basis.A[-1], v)
        unit = (time.process_time() - t) / sub.shape[0]
    cmd = qmap_cmd() + ["t2-spectrum", str(series), "-o", str(work / "spectrum"), "-q", "--mask", "none",
                        "--sigma", f"{sigma:g}", "-j", "2"]
    t_q, rss_q, cpu = _child_usage(cmd)
    # the fixed cost of a run (imports, EPG basis, the SE bootstrap on 100 voxels x 10, writing): a 20 x 20 slice
    small = work / "bench_spectrum_small_MESE.nii.gz"
    write_series(small, data[:20, :20, :1].astype(np.float32), np.eye(4), {"EchoTime": te})
    _, cpu0 = _wall_and_cpu(qmap_cmd() + ["t2-spectrum", str(small), "-o", str(work / "spectrum_small"), "-q",
                                          "--mask", "none", "--sigma", f"{sigma:g}", "-j", "2"])
    # the fit stage alone, one thread, in this process (chunks of 4096 voxels as the command uses)
    from qmap.models.t2_spectrum import SpectrumModel
    model = SpectrumModel(basis)
    flat = data.reshape(-1, n_e).astype(float)
    with threadpool_limits(1):
        model.fit_chunk(flat[:64], sigma=np.full(64, sigma))
        t = time.process_time()
        for i in range(0, flat.shape[0], 4096):
            model.fit_chunk(flat[i:i + 4096], sigma=np.full(flat[i:i + 4096].shape[0], sigma))
        cpu1 = time.process_time() - t
    print(f"t2-spectrum: {n} voxels x {n_e} echoes, -j 2 (the whole command: load, fit, SE bootstrap, write)")
    print(f"  wall {t_q:.2f} s = {n / t_q:.0f} voxels/s;  CPU {cpu:.2f} s = {2 * n / cpu:.0f} voxels/s on 2 fully "
          f"available cores (goal >= 5000; the CPU figure is what a loaded machine cannot hide)")
    print(f"  fixed cost of a run (400 voxels): CPU {cpu0:.2f} s; per voxel beyond it: {2 * (n - 400) / (cpu - cpu0):.0f} "
          f"voxels/s on 2 cores (a 500k-voxel mask: {500_000 * (cpu - cpu0) / (n - 400) / 2 + cpu0 / 2:.0f} s)")
    print(f"  fit stage alone, one thread: {n / cpu1:.0f} voxels/s")
    if not mem_voxels:  # (with a memory case below, the memory of this small series is not the measure)
        print(memory_line(rss_q, baseline_rss("t2-spectrum"), n * n_e * 4 / 2**20, work / "spectrum", n_e,
                          command="t2-spectrum", fixed_rss=small_run_rss(cmd[len(qmap_cmd()):], work)))
    if mem_voxels:
        # memory on a case large enough that the fixed cost (the EPG basis) does not decide the ratio
        big = _spectrum_data(mem_voxels, n_e, esp, sigma, np.random.default_rng(3))
        big_series = work / "bench_spectrum_big_MESE.nii.gz"
        write_series(big_series, big.astype(np.float32), np.eye(4), {"EchoTime": te})
        n_big = int(np.prod(big.shape[:3]))
        del big
        t_big, rss_big = peak_rss_of(qmap_cmd() + ["t2-spectrum", str(big_series), "-o", str(work / "spectrum_big"),
                                                   "-q", "--mask", "none", "--sigma", f"{sigma:g}", "-j", "2"])
        print(f"  memory case: {n_big} voxels x {n_e} echoes, -j 2: {t_big:.1f} s, peak RSS {rss_big:.0f} MB")
        big_args = ["t2-spectrum", str(big_series), "-o", str(work / "spectrum_big"), "-q", "--mask", "none",
                    "--sigma", f"{sigma:g}", "-j", "2"]
        print(memory_line(rss_big, baseline_rss("t2-spectrum"), n_big * n_e * 4 / 2**20, work / "spectrum_big", n_e,
                          command="t2-spectrum", fixed_rss=small_run_rss(big_args, work)))
    print(f"  scipy.optimize.nnls (32 x 40, one voxel, one thread): {1e6 * unit:.0f} us CPU;  qmap CPU per voxel = "
          f"{cpu / n / unit:.1f} such calls (the method solves about 11 NNLS problems per voxel: 6 angles, the "
          f"chosen angle, 2-3 for the regularisation)")


def _wall_and_cpu(cmd: list[str]) -> tuple[float, float]:
    """Wall time and CPU time (user + system, all threads) of one child process."""
    dt, _, cpu = _child_usage(cmd)
    return dt, cpu


def case_memory(nvox, work: Path, rng, series_gz: Path, tiles: int = 4):
    """--max-memory on an uncompressed input ``tiles`` times the t2star series (tiled along z)."""
    img = nib.load(str(series_gz))
    data = np.concatenate([np.asanyarray(img.dataobj)] * tiles, axis=2)
    raw = work / "bench_MEGRE_raw.nii"
    nib.save(nib.Nifti1Image(data, img.affine), str(raw))
    (work / "bench_MEGRE_raw.json").write_text((work / "bench_MEGRE.json").read_text())
    shape = data.shape[:3]
    del data
    size_mb = raw.stat().st_size / 2**20
    budget = size_mb / 4
    q = qmap_cmd()
    t_full, rss_full = peak_rss_of(q + ["t2star", str(raw), "-o", str(work / "mem_full"), "--noise-floor", "none",
                                        "--sigma", "12", "-q"])
    t_slab, rss_slab = peak_rss_of(q + ["t2star", str(raw), "-o", str(work / "mem_slab"), "--noise-floor", "none",
                                        "--sigma", "12", "-q", "--max-memory", f"{budget:.0f}MB"])
    same = all(
        np.array_equal(np.asanyarray(nib.load(str(p)).dataobj),
                       np.asanyarray(nib.load(str(work / "mem_slab" / p.name)).dataobj), equal_nan=True)
        for p in (work / "mem_full").glob("*.nii.gz")
    )
    base_rss = baseline_rss()
    n_maps = len(list((work / "mem_full").glob("*.nii.gz")))
    maps_mb = (n_maps - 1) * np.prod(shape) * 4 / 2**20  # the float32 maps (streamed to the files, not held)
    status_mb = np.prod(shape) / 2**20  # the status map (uint8), held
    print(f"memory: {np.prod(shape)} voxels x 12 echoes, uncompressed input {size_mb:.0f} MB, "
          f"--max-memory {budget:.0f}MB")
    print(f"  in memory: {t_full:.2f} s, peak RSS {rss_full:.0f} MB ({(rss_full - base_rss) / size_mb:.2f} x the input "
          f"above the baseline);  slabs: {t_slab:.2f} s, peak RSS {rss_slab:.0f} MB")
    print(f"  import-only baseline {base_rss:.0f} MB; the output maps (float32, written slab by slab, not held) "
          f"{maps_mb:.0f} MB")
    # what --max-memory sizes (qmap.io.series.Series.slabs): slabs whose data x 2.5 (the slab and the fit's
    # work on it) fit the budget; beyond it, the maps of two slabs (the one being compressed and written, the
    # one being fitted) and the whole volume's mask and status map (1 byte a voxel each)
    per_z = shape[0] * shape[1] * 12 * 4
    slab_vox = min(shape[2], max(1, int(budget * 2**20 / (2.5 * per_z)))) * shape[0] * shape[1]
    two_slabs_mb = 2 * (n_maps - 1) * 4 * slab_vox / 2**20
    whole_mb = 2 * status_mb
    print(f"  slab peak above baseline = {rss_slab - base_rss:.0f} MB vs the budget (a slab's data x 2.5: the slab "
          f"and the fit's work) {budget:.0f} MB + the maps of two slabs ({n_maps - 1} float32 maps of {slab_vox} "
          f"voxels each) {two_slabs_mb:.0f} MB + mask and status map {whole_mb:.0f} MB = "
          f"{budget + two_slabs_mb + whole_mb:.0f} MB;  maps identical to the in-memory run: {same}")


def case_mp2rage(nvox, work: Path, rng):
    """t1-mp2rage on a 12-bit UNI (the lookup is interpolation: the goal is within 2x the I/O floor)."""
    from qmap.models.mp2rage import MP2RAGEProtocol, mp2rage_uni

    shape = shape_for(nvox)
    proto = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)
    obj, smooth = head_like(shape, rng)
    t1 = np.where(obj, 0.6 + 2.0 * smooth, 1.0).astype(np.float32)
    b1 = (0.8 + 0.4 * smooth).astype(np.float32)
    uni = np.where(obj, mp2rage_uni(t1, proto, b1), rng.uniform(-0.5, 0.5, shape))
    uni += rng.normal(0, 0.003, shape)
    raw = np.clip(np.round((uni + 0.5) * 4095), 0, 4095).astype(np.uint16)
    path = work / "bench_UNIT1.nii.gz"
    nib.save(nib.Nifti1Image(raw, np.eye(4)), str(path))
    (work / "bench_UNIT1.json").write_text(json.dumps(dict(proto.as_acquisition())))
    b1p = work / "bench_TB1map.nii.gz"
    nib.save(nib.Nifti1Image(b1[::2, ::2, ::2].copy(), np.diag([2.0, 2.0, 2.0, 1.0])), str(b1p))
    q = qmap_cmd()
    t_plain, rss = peak_rss_of(q + ["t1-mp2rage", str(path), "-o", str(work / "mp2"), "-q"], REPEATS)
    t_b1, rss_b1 = peak_rss_of(q + ["t1-mp2rage", str(path), "--b1", str(b1p), "-o", str(work / "mp2b1"), "-q"], REPEATS)
    n_maps = len(list((work / "mp2").glob("*.nii.gz")))
    floor = io_floor(path, n_maps, work)
    print(f"t1-mp2rage: {np.prod(shape)} voxels, 12-bit UNI ({path.stat().st_size / 2**20:.1f} MB gzipped)")
    print(f"  I/O floor (load + write {n_maps} maps): {floor:.2f} s")
    print(f"  qmap t1-mp2rage: {t_plain:.2f} s, peak RSS {rss:.0f} MB;  ratio / I/O floor = {t_plain / floor:.2f}  "
          f"(goal <= 2)")
    print(f"  with --b1 (half-resolution map, resampled): {t_b1:.2f} s, peak RSS {rss_b1:.0f} MB;  ratio / I/O floor "
          f"= {t_b1 / floor:.2f}")
    in_mb = np.prod(shape) * 4 / 2**20  # the UNI as qmap holds it (float32)
    b1_args = ["t1-mp2rage", str(path), "--b1", str(b1p), "-o", str(work / "mp2b1"), "-q"]
    print(memory_line(max(rss, rss_b1), baseline_rss("t1-mp2rage"), in_mb, work / "mp2", 1, command="t1-mp2rage",
                      fixed_rss=small_run_rss(b1_args if rss_b1 >= rss else b1_args[:2] + b1_args[4:], work)))


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--voxels", type=int, default=1_000_000)
    p.add_argument("--cases", default="t2star,t1-ir,t1-vfa,b1,t2-epg,memory,mp2rage,t2-spectrum")
    p.add_argument("--keep", metavar="DIR", help="keep the synthetic data and outputs here")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--repeats", type=int, default=3,
                   help="timed runs of each measurement, the fastest reported (default %(default)s)")
    p.add_argument("--spectrum-voxels", type=int, default=20_000, help="voxels of the t2-spectrum case")
    p.add_argument("--spectrum-memory-voxels", type=int, default=600_000,
                   help="voxels of the t2-spectrum memory case (0: the memory of the speed case)")
    p.add_argument("--baseline", type=Path, metavar="DIR",
                   help="t2-epg: also time the fit stage with the qmap package of this checkout (e.g. an older "
                        "commit's `git worktree`), alternating with this tree")
    args = p.parse_args(argv)
    globals()["REPEATS"] = max(1, args.repeats)
    rng = np.random.default_rng(args.seed)
    cases = set(args.cases.split(","))
    work = Path(args.keep) if args.keep else Path(tempfile.mkdtemp(prefix="qmap-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    print(f"qmap benchmark on {os.cpu_count()} cores, {args.voxels} voxels, work dir {work}; load average at start "
          f"{', '.join(f'{x:.1f}' for x in os.getloadavg())}")
    print(byte_compile())
    try:
        series = None
        if "t2star" in cases or "memory" in cases:
            series, _, _ = case_t2star(args.voxels, work, rng)
        if "memory" in cases:
            case_memory(args.voxels, work, rng, series)
        for name, case in (("t1-ir", case_t1_ir), ("t1-vfa", case_t1_vfa), ("b1", case_b1), ("t2-epg", case_t2_epg),
                           ("mp2rage", case_mp2rage)):
            if name in cases:
                if name == "t2-epg":
                    case_t2_epg(args.voxels, work, rng, args.baseline)
                else:
                    case(args.voxels, work, rng)
        if "t2-spectrum" in cases:
            case_t2_spectrum(args.spectrum_voxels, work, rng, args.spectrum_memory_voxels)
        if MEMORY:
            print("memory, (peak RSS - the command's fixed cost) / input series (goal < 3 for every command): "
                  + ", ".join(f"{k} {v[0]:.2f}" for k, v in MEMORY.items()))
            print("  the same above the import-only baseline: " + ", ".join(f"{k} {v[1]:.2f}" for k, v in MEMORY.items()))
        print(f"load average at the end {', '.join(f'{x:.1f}' for x in os.getloadavg())}")
    finally:
        if not args.keep:
            shutil.rmtree(work, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
