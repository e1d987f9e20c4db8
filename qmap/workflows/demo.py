"""``qmap demo``: every fit on the bundled sample data, then the phantom QA -- showing each command.

The sample data (``sample_data/`` in the source tree, ``qmap/sample_data``
in an installed package) are a synthetic, invented nine-vial phantom made by
``scripts/make_sample_data.py`` with :func:`qmap.simulate.simulate`; their
``simulation.json`` lists the series, the acquisition, the phantom
temperature and the true relaxation times. The demo

1. copies them to ``DIR/data`` (so that every command it prints can be run
   again as printed, and the inputs lie beside the outputs);
2. runs the fits of :data:`FITS` in order -- T1 by inversion recovery, B1 by
   the double-angle method, T1 by variable flip angle with that B1 map (on a
   coarser grid with its own affine, resampled), T1 from the MP2RAGE UNI
   image (12-bit export) and its inversion images with the same B1 map, T2 by
   extended phase graphs, T2* with the Rician noise floor -- each with PNG
   previews, into
   ``DIR/maps``, printing each command before it runs it (the very command
   line it runs, through the same parser as ``qmap``) and writing them all to
   ``DIR/commands.sh``; the maps are in the commands' default unit (seconds);
3. runs one phantom QA of every compared map (the T1 maps, tagged ``ir``,
   ``vfa`` and ``mp2rage``, T2 and T2*) against the bundled reference table at the phantom's
   temperature into ``DIR/phantom``;
4. simulates a small invented multi-pool disc (:func:`qmap.simulate.phantoms.pools_phantom`:
   two pools in one half, three in the other, SNR 300, 32 echoes) into
   ``DIR/pools-data`` and fits T2 spectra (``qmap t2-spectrum``) into
   ``DIR/maps`` with the prefix ``pools``;
5. prints, per vial, the median of each map in the phantom QA's ROI (the
   vial's label eroded by 1 voxel, fitted voxels only -- the numbers of the
   QA report) and its error against the true value the data were simulated
   with, and the median short-T2 fraction per half of the disc against the
   truth.

Another fit joins the demo by adding a :class:`DemoFit` to :data:`FITS`
(and its series to the sample data).
"""

from __future__ import annotations

import glob
import json
import os
import shlex
import shutil
import time
from collections.abc import Callable
from contextlib import ExitStack
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import numpy as np

from ..errors import InputError, OutputExistsError
from ..io.nifti import load_image
from ..plots import _fmt

__all__ = ["FITS", "DemoFit", "DemoReport", "run_demo", "sample_data_dir"]


@dataclass(frozen=True)
class DemoFit:
    """One fit of the demo: a qmap command on one series of the sample data.

    Attributes
    ----------
    prefix : str
        Output prefix, and the series' name in ``simulation.json`` (``series``).
    command : str
        The qmap command (``t1-ir``, ...).
    title : str
        What the step does (printed before the command).
    options : tuple of str
        Further options; ``{maps}`` stands for the maps folder, ``{data}`` for the copied sample data,
        ``{refocus}`` for the spin-echo series' sidecar ``RefocusingFlipAngle``.
    param : str or None
        The map compared with the truth and the reference (None: not compared).
    column : str
        Its column title in the printed table.
    inputs : tuple of str
        The positional inputs (formatted like ``options``); default: the series' files.
    """

    prefix: str
    command: str
    title: str
    options: tuple = ()
    param: str | None = None
    column: str = ""
    inputs: tuple = ()


#: the fits, in the order they run (a later one may use an earlier one's map)
FITS = [
    DemoFit("ir", "t1-ir", "T1 by inversion recovery", (), "T1", "T1 IR"),
    DemoFit("b1", "b1", "relative B1 by the double-angle method", ("--method", "dam")),
    DemoFit("vfa", "t1-vfa", "T1 by variable flip angle, B1-corrected with the map of the previous step",
            ("--b1", "{maps}/b1_TB1map.nii.gz"), "T1", "T1 VFA+B1"),
    DemoFit("mp2rage", "t1-mp2rage", "T1 from the MP2RAGE UNI image (12-bit export) and its inversion images, "
            "B1-corrected", ("--inv1", "{data}/sub-phantom/anat/sub-phantom_inv-1_MP2RAGE.nii.gz", "--inv2",
                             "{data}/sub-phantom/anat/sub-phantom_inv-2_MP2RAGE.nii.gz", "--b1",
                             "{maps}/b1_TB1map.nii.gz"), "T1", "T1 MP2RAGE+B1",
            inputs=("{data}/sub-phantom/anat/sub-phantom_UNIT1.nii.gz",)),
    DemoFit("mese", "t2", "T2 by extended phase graphs (refocusing angle fitted)", ("--epg", "--refocus", "{refocus}"),
            "T2", "T2 EPG"),
    DemoFit("megre", "t2star", "T2* with the Rician noise floor", (), "T2star", "T2*"),
]
#: what the table says about its ROIs
ROI_NOTE = "ROI = the phantom QA's: each vial's label eroded by 1 voxel, fitted voxels (status 0) only"


def sample_data_dir(stack: ExitStack | None = None) -> Path:
    """Folder of the bundled sample data.

    Installed: the package resource ``qmap/sample_data`` (found with
    :mod:`importlib.resources`); in a source checkout (editable install):
    ``sample_data/`` next to the ``qmap`` package.
    """
    res = resources.files("qmap") / "sample_data"
    if res.is_dir() and (res / "simulation.json").is_file():
        if stack is None:
            return Path(str(res))
        return stack.enter_context(resources.as_file(res))
    here = Path(__file__).resolve().parents[2] / "sample_data"
    if (here / "simulation.json").is_file():
        return here
    raise InputError("the bundled sample data were not found (qmap/sample_data/simulation.json); reinstall qmap, "
                     "or regenerate them with scripts/make_sample_data.py")


@dataclass
class DemoReport:
    """What the demo ran and found."""

    out_dir: Path
    table: list = field(default_factory=list)  # rows: vial label, name, {column: (median, truth, error %)}
    phantom_passed: bool = False
    phantom_reports: list = field(default_factory=list)
    commands: list = field(default_factory=list)  # the shell lines run, in order
    wall_time_s: float = 0.0
    temperature_c: float | None = None
    tolerance_pct: float | None = None
    spectrum_rows: list = field(default_factory=list)  # (region, voxels, median MWF, median true MWF)

    @property
    def exit_code(self) -> int:
        return 0 if self.phantom_passed else 3

    def text(self) -> str:
        cols = [f.column for f in FITS if f.param]
        head = f"{'vial':<8}" + "".join(f"{c + ' [ms]':>22}" for c in cols)
        sub = f"{'':<8}" + "".join(f"{'median':>12}{'err %':>10}" for _ in cols)
        lines = [f"qmap demo: synthetic nine-vial phantom at {self.temperature_c:g} C (invented sample data)",
                 "median per vial of each map, error against the true value the data were simulated with",
                 f"({ROI_NOTE}):", head, sub]
        for _label, name, vals in self.table:
            cells = "".join(f"{_fmt(vals[c][0]):>12}{vals[c][2]:>+10.2f}" if c in vals else f"{'-':>22}" for c in cols)
            lines.append(f"{name:<8}" + cells)
        worst = max((abs(v[2]) for _, _, vals in self.table for v in vals.values()), default=float("nan"))
        lines.append(f"largest |error|: {worst:.2f} %")
        tol = "" if self.tolerance_pct is None else f"default tolerance {self.tolerance_pct:g} %"
        lines.append(f"phantom QA ({tol}): {'PASSED' if self.phantom_passed else 'FAILED'} -- report: "
                     + ", ".join(str(p) for p in self.phantom_reports))
        if self.spectrum_rows:
            lines.append("multi-component T2 (t2-spectrum) on a simulated multi-pool disc (invented, SNR 300): "
                         "short-T2 fraction (MWF), median per region")
            for region, n, est, truth in self.spectrum_rows:
                lines.append(f"  {region:<11} {n:>5} voxels  MWF {est:.3f}  true {truth:.3f}  "
                             f"error {est - truth:+.3f}")
        lines.append(f"inputs (a copy of the sample data): {self.out_dir / 'data'}")
        lines.append(f"maps (seconds) and previews (*.png): {self.out_dir / 'maps'}")
        lines.append(f"the commands run: {self.out_dir / 'commands.sh'}")
        lines.append(f"look at one voxel: qmap inspect {self.out_dir / 'maps'} --prefix vfa --voxel 24,24,2")
        lines.append(f"done in {self.wall_time_s:.1f} s")
        return "\n".join(lines)


def _files(data: Path, manifest: dict, name: str) -> list[Path]:
    try:
        return [data / f for f in manifest["series"][name]["files"]]
    except KeyError:
        raise InputError(f"the sample data lack the {name} series; regenerate them with "
                         f"scripts/make_sample_data.py") from None


def _shell(argv: list) -> str:
    """The command as one copyable shell line; a run of files becomes a glob when it expands to them, in order."""
    out, i = ["qmap"], 0
    while i < len(argv):
        j = i
        while j < len(argv) and isinstance(argv[j], Path):
            j += 1
        if j - i > 2:
            files = [str(f) for f in argv[i:j]]
            pre = os.path.commonprefix(files)
            suf = os.path.commonprefix([f[::-1] for f in files])[::-1]
            pattern = pre + "*" + suf
            if len(pre) + len(suf) < min(map(len, files)) and sorted(glob.glob(pattern)) == files:
                out.append(shlex.quote(pre) + "*" + shlex.quote(suf))
                i = j
                continue
        if j > i:
            out += [shlex.quote(str(f)) for f in argv[i:j]]
            i = j
        else:
            out.append(shlex.quote(str(argv[i])))
            i += 1
    return " ".join(out)


def _run_command(argv: list) -> int:
    """Run one qmap command line through the command-line parser (what the printed line does)."""
    from ..cli import get_parser

    words = [str(a) for a in argv]
    args = get_parser(words[0]).parse_args(words)
    args.argv = ["qmap", *words]
    return int(args.run(args) or 0)


def run_demo(out_dir, *, n_jobs: int | None = None, overwrite: bool = False, quiet: bool = True,
             command_line: list[str] | None = None, echo=print) -> DemoReport:
    """Run every fit and the phantom QA on the sample data; see the module docstring.

    Parameters
    ----------
    out_dir : path-like
        Output folder (``data/``, ``maps/``, ``phantom/`` and ``commands.sh`` are created in it).
    n_jobs : int, optional
        Local workers per fit (default: all cores).
    overwrite : bool
        Replace the outputs of an earlier demo in ``out_dir``.
    quiet : bool
        No progress bars, no per-step output (the commands are still written to ``commands.sh``).
    echo : callable
        Where the step headings and commands go (default: print).

    Returns
    -------
    DemoReport
        ``exit_code`` 0 when every fit ran and the phantom passes, 3 when the phantom fails (a failing
        fit raises).
    """
    t0 = time.perf_counter()
    out = Path(out_dir)
    maps_dir, data = out / "maps", out / "data"
    if not overwrite:
        found = [p for p in (data, maps_dir, out / "phantom", out / "pools-data", out / "commands.sh") if p.exists()]
        if found:
            raise OutputExistsError(f"{found[0]} exists already (an earlier demo); pass overwrite=True to replace it, or "
                                    f"choose another -o")
    with ExitStack() as stack:
        bundled = sample_data_dir(stack)
        manifest = json.loads((bundled / "simulation.json").read_text(encoding="utf-8"))
        if data.exists():
            shutil.rmtree(data)
        shutil.copytree(bundled, data, ignore=shutil.ignore_patterns("__pycache__", "*.py", "*.pyc"))
    temp = manifest.get("temperature_C")
    rep = DemoReport(out_dir=out, temperature_c=temp)
    values = {"maps": str(maps_dir), "data": str(data),
              "refocus": f"{manifest['series'].get('mese', {}).get('sidecar', {}).get('RefocusingFlipAngle', 180.0):g}"}
    common = (["--overwrite"] if overwrite else []) + (["-j", str(n_jobs)] if n_jobs else []) + (["-q"] if quiet else [])
    steps: list[tuple[str, list | Callable[[], list]]] = []
    for f in FITS:
        opts = [o.format(**values) for o in f.options]
        inputs = [Path(i.format(**values)) for i in f.inputs] or _files(data, manifest, f.prefix)
        steps.append((f.title, [f.command, *inputs, *opts, "-o", maps_dir, "--prefix",
                                f.prefix, "--preview", *common]))
    compared = [f for f in FITS if f.param]
    shared = {p for p in (f.param for f in compared) if sum(g.param == p for g in compared) > 1}
    qa = ["phantom", "--labels", data / manifest["labels"], "--reference", data / manifest["reference"],
          "--temperature", f"{temp:g}", "-o", out / "phantom"]
    for f in compared:
        qa += ["--map", maps_dir / f"{f.prefix}_{f.param}map.nii.gz"] + (["--tag", f.prefix] if f.param in shared else [])
    steps.append(("phantom QA of " + ", ".join(f.column for f in compared) + " against the reference table",
                  qa + [a for a in common if a in ("--overwrite", "-q")]))
    pools = out / "pools-data"
    steps.append(("simulate an invented multi-pool disc (two and three T2 pools) for multi-component T2",
                  ["simulate", "-o", pools, "--phantom", "pools", "--protocol", "mese", "--shape", "24,24,1", "--snr",
                   "300", "--seed", "17", "--b1-range", "0.85,1.0", "--echoes", "32"]
                  + [a for a in common if a in ("--overwrite", "-q")]))

    def spectrum_argv() -> list:
        man = json.loads((pools / "simulation.json").read_text(encoding="utf-8"))
        return ["t2-spectrum", *[pools / f for f in man["series"]["mese"]["files"]], "-o", maps_dir, "--prefix",
                "pools", "--preview", "--se-subsample", "40", *common]

    steps.append(("multi-component T2 spectra (short-T2 fraction) of the disc", spectrum_argv))
    for k, (title, make) in enumerate(steps, start=1):
        argv = make() if callable(make) else make
        line = _shell(argv)
        rep.commands.append(line)
        if not quiet:
            echo(f"\n[{k}/{len(steps)}] {title}\n$ {line}")
        _run_command(argv)
    result = json.loads((out / "phantom" / "phantom_results.json").read_text(encoding="utf-8"))
    rep.phantom_passed = result["verdict"] == "pass"
    rep.tolerance_pct = result["settings"].get("tolerance_pct")
    rep.phantom_reports.append(out / "phantom" / "phantom_report.html")
    rep.table = _truth_table(manifest, result["rows"])
    rep.spectrum_rows = _spectrum_rows(pools, maps_dir)
    script = ["#!/bin/sh", "# the commands qmap demo ran (from the folder it was started in)", "set -e",
              *rep.commands]
    tmp = out / f".commands.sh.qmap-tmp-{os.getpid()}"
    tmp.write_text("\n".join(script) + "\n", encoding="utf-8")
    os.replace(tmp, out / "commands.sh")
    if not quiet:
        echo("")
    rep.wall_time_s = time.perf_counter() - t0
    return rep


def _truth_table(manifest: dict, rows: list) -> list:
    """Median of each compared map per vial (the phantom QA's rows) against the simulated truth, in ms."""
    unit_ms = {"ms": 1.0, "s": 1e3, "us": 1e-3}
    by_key = {}
    for r in rows:
        key = (r["label"], r["parameter"], r.get("source") or "")
        if r.get("median") is not None and r["unit"] in unit_ms:
            by_key[key] = r["median"] * unit_ms[r["unit"]]
    compared = [f for f in FITS if f.param]
    shared = {p for p in (f.param for f in compared) if sum(g.param == p for g in compared) > 1}
    table = []
    for lab, truth in sorted(manifest["truth_values"].items(), key=lambda kv: int(kv[0])):
        vals = {}
        for f in compared:
            med = by_key.get((int(lab), f.param, f.prefix if f.param in shared else ""))
            ref = truth.get(f"{f.param}_s")
            if med is None or ref is None:
                continue
            vals[f.column] = (med, ref * 1e3, 100.0 * (med - ref * 1e3) / (ref * 1e3))
        table.append((int(lab), truth["name"], vals))
    return table


def _spectrum_rows(pools: Path, maps_dir: Path) -> list:
    """Median fitted and true short-T2 fraction (MWF) per half of the multi-pool disc (fitted voxels)."""
    man = json.loads((pools / "simulation.json").read_text(encoding="utf-8"))
    truth = np.asarray(load_image(pools / man["truth"]["MWF"]).dataobj, np.float64)
    regions = np.asarray(load_image(pools / man["labels"]).dataobj)
    mwf = np.asarray(load_image(maps_dir / "pools_MWFmap.nii.gz").dataobj, np.float64)
    fitted = np.asarray(load_image(maps_dir / "pools_desc-status_fitmap.nii.gz").dataobj) == 0
    rows = []
    for lab, name in ((1, "two-pool"), (2, "three-pool")):
        sel = (regions == lab) & fitted & np.isfinite(truth)
        if sel.any():
            rows.append((name, int(sel.sum()), float(np.median(mwf[sel])), float(np.median(truth[sel]))))
    return rows
