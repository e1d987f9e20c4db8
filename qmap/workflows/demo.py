"""``qmap demo``: every fit on the bundled sample data, then the phantom QA.

The sample data (``sample_data/`` in the source tree, ``qmap/sample_data``
in an installed package) are a synthetic, invented nine-vial phantom made by
``scripts/make_sample_data.py`` with :func:`qmap.simulate.simulate`; their
``simulation.json`` lists the series, the acquisition, the phantom
temperature and the true relaxation times. The demo

1. fits T1 by inversion recovery, B1 by the double-angle method, T1 by
   variable flip angle with that B1 map (it lies on a coarser grid with its
   own affine and is resampled), T1 from the MP2RAGE UNI image (12-bit
   export) and its inversion images with the same B1 map, T2 by extended
   phase graphs and T2* by the mono-exponential with the Rician noise floor
   -- each with PNG previews -- into ``DIR/maps``;
2. runs the phantom QA of every relaxation map against the bundled reference
   table (at the phantom's temperature): IR T1, T2 and T2* into
   ``DIR/phantom``, VFA T1 into ``DIR/phantom-vfa``, MP2RAGE T1 into
   ``DIR/phantom-mp2rage`` (one map per parameter and report);
3. prints, per vial, the median of each map and its error against the true
   value the data were simulated with;
4. simulates a small invented multi-pool disc (:func:`qmap.simulate.phantoms.pools_phantom`:
   two pools in one half, three in the other, SNR 300, 32 echoes) into
   ``DIR/pools-data`` and fits T2 spectra (``qmap t2-spectrum``) into
   ``DIR/maps`` with the prefix ``pools``, printing the median short-T2
   fraction per half against the truth.
"""

from __future__ import annotations

import json
import time
from contextlib import ExitStack
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path

import nibabel as nib
import numpy as np

from ..errors import InputError
from ..pipeline import CommonOptions
from ..plots import _fmt

__all__ = ["FITS", "DemoReport", "run_demo", "sample_data_dir"]

#: (prefix, map parameter, column title) of the maps compared with the truth, in print order
FITS = (("ir", "T1", "T1 IR"), ("vfa", "T1", "T1 VFA+B1"), ("mp2rage", "T1", "T1 MP2RAGE+B1"),
        ("mese", "T2", "T2 EPG"), ("megre", "T2star", "T2*"))
#: phantom QA runs (output subfolder -> map prefixes); one map per parameter in each
QA_RUNS = {"phantom": ("ir", "mese", "megre"), "phantom-vfa": ("vfa",), "phantom-mp2rage": ("mp2rage",)}


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
    fits: dict = field(default_factory=dict)  # prefix -> RunReport
    wall_time_s: float = 0.0
    temperature_c: float | None = None
    spectrum_rows: list = field(default_factory=list)  # (region, voxels, median MWF, median true MWF)

    @property
    def exit_code(self) -> int:
        return 0 if self.phantom_passed else 3

    def text(self) -> str:
        cols = [c for _, _, c in FITS]
        head = f"{'vial':<8}" + "".join(f"{c + ' [ms]':>22}" for c in cols)
        sub = f"{'':<8}" + "".join(f"{'median':>12}{'err %':>10}" for _ in cols)
        lines = [f"qmap demo: synthetic nine-vial phantom at {self.temperature_c:g} C (invented sample data)",
                 "median per vial of each map, error against the true value the data were simulated with:",
                 head, sub]
        for label, name, vals in self.table:
            cells = "".join(f"{_fmt(vals[c][0]):>12}{vals[c][2]:>+10.2f}" if c in vals else f"{'-':>22}" for c in cols)
            lines.append(f"{name:<8}" + cells)
        worst = max((abs(v[2]) for _, _, vals in self.table for v in vals.values()), default=float("nan"))
        lines.append(f"largest |error|: {worst:.2f} %")
        lines.append(f"phantom QA (tolerance 10 %): {'PASSED' if self.phantom_passed else 'FAILED'} -- reports: "
                     + ", ".join(str(p) for p in self.phantom_reports))
        if self.spectrum_rows:
            lines.append("multi-component T2 (t2-spectrum) on a simulated multi-pool disc (invented, SNR 300): "
                         "short-T2 fraction (MWF), median per region")
            for region, n, est, truth in self.spectrum_rows:
                lines.append(f"  {region:<11} {n:>5} voxels  MWF {est:.3f}  true {truth:.3f}  "
                             f"error {est - truth:+.3f}")
        lines.append(f"maps and previews (*.png): {self.out_dir / 'maps'}")
        lines.append(f"look at one voxel: qmap inspect {self.out_dir / 'maps'} --prefix vfa --voxel 24,24,2")
        lines.append(f"done in {self.wall_time_s:.1f} s")
        return "\n".join(lines)


def _files(data: Path, manifest: dict, name: str) -> list[Path]:
    try:
        return [data / f for f in manifest["series"][name]["files"]]
    except KeyError:
        raise InputError(f"the sample data lack the {name} series; regenerate them with "
                         f"scripts/make_sample_data.py") from None


def run_demo(out_dir, *, n_jobs: int | None = None, overwrite: bool = False, quiet: bool = True,
             command_line: list | None = None) -> DemoReport:
    """Run every fit and the phantom QA on the sample data; see the module docstring.

    Parameters
    ----------
    out_dir : path-like
        Output folder (``maps/`` and ``phantom/`` are created in it).
    n_jobs : int, optional
        Local workers per fit (default: all cores).
    overwrite : bool
        Replace the outputs of an earlier demo in ``out_dir``.
    quiet : bool
        No progress bars.

    Returns
    -------
    DemoReport
        ``exit_code`` 0 when the phantom passes (every fit ran, or an error was raised).
    """
    from .b1 import run_b1
    from .decay import run_t2star
    from .ir import run_t1_ir
    from .mp2rage import run_t1_mp2rage
    from .phantom import run_phantom
    from .t2 import run_t2
    from .vfa import run_t1_vfa

    t0 = time.perf_counter()
    out = Path(out_dir)
    maps_dir = out / "maps"
    with ExitStack() as stack:
        data = sample_data_dir(stack)
        manifest = json.loads((data / "simulation.json").read_text(encoding="utf-8"))
        temp = manifest.get("temperature_C")
        rep = DemoReport(out_dir=out, temperature_c=temp)

        def common(prefix: str) -> CommonOptions:
            return CommonOptions(out_dir=maps_dir, prefix=prefix, n_jobs=n_jobs, overwrite=overwrite,
                                 quiet=quiet, preview=True, command_line=command_line)

        rep.fits["ir"] = run_t1_ir(_files(data, manifest, "ir"), common=common("ir"))
        rep.fits["b1"] = run_b1(_files(data, manifest, "b1"), common=common("b1"), method="dam")
        rep.fits["vfa"] = run_t1_vfa(_files(data, manifest, "vfa"), common=common("vfa"),
                                     b1=maps_dir / "b1_TB1map.nii.gz")
        inv = _files(data, manifest, "mp2rage")
        rep.fits["mp2rage"] = run_t1_mp2rage(data / manifest["series"]["mp2rage"]["uni"], common=common("mp2rage"),
                                             inv1=inv[0], inv2=inv[1], b1=maps_dir / "b1_TB1map.nii.gz")
        refocus = manifest["series"]["mese"]["sidecar"].get("RefocusingFlipAngle", 180.0)
        rep.fits["mese"] = run_t2(_files(data, manifest, "mese"), common=common("mese"), epg=True,
                                refocus_deg=refocus)
        rep.fits["megre"] = run_t2star(_files(data, manifest, "megre"), common=common("megre"))
        passed = []
        for sub, prefixes in QA_RUNS.items():  # one map per parameter and QA run
            map_files = [maps_dir / f"{prefix}_{param}map.nii.gz" for prefix, param, _ in FITS if prefix in prefixes]
            ph = run_phantom(map_files, reference=data / manifest["reference"], labels=data / manifest["labels"],
                             out_dir=out / sub, temperature=temp, overwrite=overwrite, command_line=command_line)
            passed.append(bool(ph.passed))
            rep.phantom_reports.append(out / sub / "phantom_report.html")
        rep.phantom_passed = all(passed)
        rep.table = _truth_table(data, manifest, maps_dir)
    rep.fits["pools"], rep.spectrum_rows = _spectrum_demo(out, common("pools"), overwrite=overwrite)
    rep.wall_time_s = time.perf_counter() - t0
    return rep


def _truth_table(data: Path, manifest: dict, maps_dir: Path) -> list:
    """Median of each map per vial (the full vial label) against the simulated truth, in ms."""
    labels = np.asarray(nib.load(str(data / manifest["labels"])).dataobj)
    loaded = {}
    for prefix, param, col in FITS:
        img = nib.load(str(maps_dir / f"{prefix}_{param}map.nii.gz"))
        units = json.loads((maps_dir / f"{prefix}_{param}map.json").read_text(encoding="utf-8")).get("Units", "s")
        loaded[col] = (np.asarray(img.dataobj, float) * (1.0 if units == "ms" else 1e3), param)
    rows = []
    for lab, truth in sorted(manifest["truth_values"].items(), key=lambda kv: int(kv[0])):
        roi = labels == int(lab)
        vals = {}
        for col, (arr, param) in loaded.items():
            v = arr[roi]
            v = v[np.isfinite(v)]
            if not v.size:
                continue
            ref = truth[f"{param}_s"] * 1e3
            med = float(np.median(v))
            vals[col] = (med, ref, 100.0 * (med - ref) / ref)
        rows.append((int(lab), truth["name"], vals))
    return rows


def _spectrum_demo(out: Path, common: CommonOptions, *, overwrite: bool):
    """Simulate the invented multi-pool disc and fit its T2 spectra; returns (RunReport, rows per region)."""
    from ..simulate import Protocols, simulate
    from .t2_spectrum import run_t2_spectrum

    data = out / "pools-data"
    man = simulate(data, phantom="pools", protocols=["mese"], shape=(24, 24, 1), snr=300.0, seed=17,
                   b1_range=(0.85, 1.0), settings=Protocols(mese_echoes=32), overwrite=overwrite)
    files = [data / f for f in man["series"]["mese"]["files"]]
    report = run_t2_spectrum(files, common=common, se_subsample=40)
    truth = np.asarray(nib.load(str(data / man["truth"]["MWF"])).dataobj, float)
    regions = np.asarray(nib.load(str(data / man["labels"])).dataobj)
    fitted = report.maps.status == 0
    rows = []
    for lab, name in ((1, "two-pool"), (2, "three-pool")):
        sel = (regions == lab) & fitted & np.isfinite(truth)
        if sel.any():
            rows.append((name, int(sel.sum()), float(np.median(report.maps["MWF"][sel])),
                         float(np.median(truth[sel]))))
    return report, rows
