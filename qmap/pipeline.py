"""From a loaded series to written maps: mask, noise level, fit, outputs, provenance.

Every fitting command ends in :func:`run_fit`; the command-specific part (which
series key, which model, which per-voxel inputs) lives in :mod:`qmap.workflows`.
"""

from __future__ import annotations

import functools
import re
import sys
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from . import __version__
from .checks import check_series_shape, clip_small_negatives, warn_fit_quality
from .errors import InputError, OutputExistsError, UsageError, warn
from .fitting import status as st
from .fitting.noise_floor import NoiseFloor
from .io.nifti import check_same_grid, image_data, load_image, split_bids_stem
from .io.series import Series
from .io.writer import AtomicWriter, OutputFile, existing_outputs, map_filename, sha256_file
from .maps import EXACTLY_DETERMINED, QUALITY_DESCRIPTIONS, QUALITY_UNITS, MapSet, fit_volume
from .noise_level import object_mask
from .record import run_record
from .streaming import MapStream, StreamedMaps

#: voxels per slab of a run whose series is in memory: its maps are fitted and written one slab at a time
#: (peak memory: the series, the slab's maps and the fit's work arrays; results do not depend on it)
AUTO_SLAB_VOXELS = 1 << 17
#: voxels per slab (at most) of a run that reads its series slab by slab in file order (``slab_lazy``: one open
#: stream, nothing read twice): smaller slabs hold fewer work arrays (1M-voxel t1-mp2rage --b1: peak RSS above
#: the imports about 30 MB in 131k-voxel slabs, 16 MB in 32k-voxel slabs, the same time)
LAZY_SLAB_VOXELS = 1 << 15
#: a fit (:meth:`PreparedRun.fit`) of a series with fewer volumes than this has proportionally smaller slabs,
#: down to half of AUTO_SLAB_VOXELS: the maps of two slabs are held at once (the one being written, the one
#: being fitted: ~10 float32 maps each), so that their share of the peak memory stays about that of a
#: series of this many volumes (measured: 1M-voxel t1-vfa with 4 flip angles, peak RSS 8 MB lower, same time)
FIT_SLAB_VOLUMES = 8

__all__ = ["QMRI_SUFFIXES", "RESIDUAL_FALLBACK", "CommonOptions", "PreparedRun", "RunReport", "Slab",
           "check_outputs_free", "check_signal", "default_prefix", "prepare_run", "resolve_mask", "resolve_sigma",
           "run_fit", "sigma_for_stderr", "write_run"]


@dataclass
class CommonOptions:
    """Options shared by every fitting command (see the command-line reference)."""

    out_dir: Path
    prefix: str | None = None
    mask: str = "auto"
    n_jobs: int | None = None
    scheduler: str | None = None
    overwrite: bool = False
    units: str = "s"
    quiet: bool = True
    preview: bool = False
    engine: str = "fast"
    chunk_size: int | None = None  # None: the fit's own default (FitProblem.default_chunk)
    command_line: list | None = None
    max_memory: float | None = None  # bytes; larger inputs are read in slabs
    stderr: str = "noise"  # covariance convention with a known noise level (qmap.fitting.uncertainty)
    series_check: bool = True  # False: --no-series-check (fit a series that does not behave like the model)

    def __post_init__(self):
        self.out_dir = Path(self.out_dir)
        if self.stderr not in ("noise", "residual"):
            raise UsageError(f"stderr={self.stderr!r}: expected noise or residual")
        if self.units not in ("s", "ms"):
            raise UsageError(f"units={self.units!r}: expected s or ms")
        if self.engine not in ("fast", "lmfit"):
            raise UsageError(f"engine={self.engine!r}: expected fast or lmfit")
        if self.prefix is not None and (not self.prefix or "/" in self.prefix or self.prefix.startswith(".")):
            raise UsageError(f"prefix={self.prefix!r}: give a plain file-name stem such as sub-01_T2star")

    def as_dict(self) -> dict:
        return {
            "out_dir": str(self.out_dir.absolute()),
            "prefix": self.prefix,
            "mask": self.mask,
            "jobs": self.n_jobs,
            "scheduler": self.scheduler,
            "overwrite": self.overwrite,
            "units": self.units,
            "preview": self.preview,
            "engine": self.engine,
            "chunk_size": self.chunk_size,
            "max_memory_bytes": self.max_memory,
            "stderr": self.stderr,
            "series_check": self.series_check,
        }


@dataclass
class RunReport:
    """What a fitting command did: the maps, the files written and the provenance."""

    maps: MapSet
    written: list
    provenance: dict
    prefix: str
    out_dir: Path
    notes: list = field(default_factory=list)

    def summary(self) -> str:
        lines = []
        counts = self.provenance["status_counts"]
        total = sum(counts.values())
        fitted = counts.get("0", 0)
        lines.append(f"fitted {fitted} of {total} voxels ({self.maps.info['n_fitted']} in the mask)")
        for code, k in counts.items():
            if code not in ("0", str(st.MASKED)) and k:
                lines.append(f"  {k} voxels: status {code} = {st.STATUS_CODES[int(code)]}")
        good = self.maps.status == 0
        for name in self.maps.names:
            v = self.maps.estimates[name][good]
            if v.size and name in self.maps.time_params:
                f = 1e3 if self.provenance["options"].get("units") == "ms" else 1.0
                unit = "ms" if f == 1e3 else "s"
                q = np.percentile(v, [5, 50, 95]) * f
                lines.append(f"  {name}: median {q[1]:.4g} {unit} (5-95%: {q[0]:.4g}-{q[2]:.4g} {unit})")
        lines.extend(f"  note: {n}" for n in self.notes)
        lines.append(f"wrote {len(self.written)} files to {self.out_dir} (prefix {self.prefix}); main map: "
                     f"{self.main_map}")
        return "\n".join(lines)

    @property
    def main_map(self) -> Path:
        """The map of the fitted quantity (T1, T2, T2star, TB1 ...): the first time map, else the first estimate."""
        names = list(self.maps.names)
        main = next((n for n in names if n in self.maps.time_params), names[0] if names else "status")
        return self.out_dir / map_filename(self.prefix, main, "estimate" if names else "status")


_SERIES_ENTITY = re.compile(r"_(echo|inv|flip|fa|ti|te)-[0-9a-zA-Z]+")
#: entities that number the volumes of a series, or name a non-magnitude part: not part of the output name
_VOLUME_ENTITIES = ("echo", "inv", "flip", "fa", "ti", "te", "part", "mt")
#: BIDS quantitative-MRI suffixes of fitted series: the output name keeps them as the lowercase acq label
QMRI_SUFFIXES = ("IRT1", "VFA", "MESE", "MEGRE", "TB1AFI", "TB1DAM", "MP2RAGE", "UNIT1", "MTS", "MPM")
#: the acq label of a suffix where it is not the lowercase suffix (MP2RAGE's uniform image)
_SUFFIX_METHOD = {"UNIT1": "mp2rage"}
#: converter tokens of one volume: a time or angle (``_TI100``, ``_TE12ms``, ``_FA15``), a dcm2niix echo
#: number (``_e2``) or image part (``_ph``, ``_real``, ``_imaginary``)
_CONVERTER_TOKEN = re.compile(r"_(?:(?:TI|TE|TR|FA|ti|te|tr|fa|flip)[0-9]+(?:[.p][0-9]+)?(?:ms|s|deg)?|e[0-9]+|ph|real|"
                              r"imaginary)(?=_|$)")


def _bids_parts(stem: str) -> tuple[list[tuple[str, str]], str] | None:
    """Entities and suffix of a BIDS name stem starting with ``sub-``; None when it is not one."""
    if not stem.startswith("sub-"):
        return None
    parsed = split_bids_stem(stem)
    if parsed is None or "-" in parsed[1]:
        return None
    return parsed


def default_prefix(path: str | Path, method: str | None = None, *, variant: str = "") -> str:
    """Output stem from the first input of a series.

    - A BIDS name (``sub-01[_ses-1]..._<suffix>``) gets the batch naming:
      ``sub-<s>[_ses-<t>]_acq-<acq><method>[_<other entities>]``, without the
      suffix and the entities that number volumes (``echo``, ``inv``,
      ``flip``, ...) or name a part. ``method`` is the lowercase qMRI suffix
      of the input (``IRT1`` -> ``irt1``) or else the command's ``method``:
      ``sub-01_flip-1_VFA.nii.gz`` -> ``sub-01_acq-vfa``.
    - Any other name loses its extension, per-volume entities and the
      converter tokens of one volume (``_TI100``, ``_TE12``, ``_e2``, ``_ph``)
      together with a trailing series number after them:
      ``T1_IR_TI100_5.nii.gz`` -> ``T1_IR``.
    - ``variant`` tells apart two commands fitting the same series (``t2``
      and ``t2-spectrum`` on one spin-echo train): it is appended to the
      method label of a BIDS name (``acq-mesespectrum``, as ``batch
      --t2-spectrum`` names it) and as ``_<variant>`` to any other stem
      (``T2_MESE_spectrum``).

    Parameters
    ----------
    path : path-like
        First input file.
    method : str, optional
        The command's method label (``irt1``, ``vfa``, ``mese``, ``megre``, ``tb1dam``, ...).
    variant : str, optional
        Lowercase letters and digits appended as described above (default: none).
    """
    name = Path(path).name
    for ext in (".nii.gz", ".nii"):
        name = name.removesuffix(ext)
    bids = _bids_parts(name)
    if bids is not None:
        ents, suffix = bids
        label = _SUFFIX_METHOD.get(suffix, suffix.lower()) if suffix in QMRI_SUFFIXES or method is None else method
        d = dict(ents)
        if label == "tb1afi" and re.fullmatch(r"tr[0-9]+", d.get("acq", "")):
            d.pop("acq")  # BIDS numbers the two AFI images by acq-tr1, acq-tr2
        head = [f"sub-{d['sub']}"] + ([f"ses-{d['ses']}"] if "ses" in d else [])
        rest = [f"{k}-{v}" for k, v in ents if k not in ("sub", "ses", "acq", *_VOLUME_ENTITIES)]
        return "_".join(head + [f"acq-{d.get('acq', '')}{label}{variant}"] + rest)
    stem = _SERIES_ENTITY.sub("", name)
    cut = _CONVERTER_TOKEN.sub("", stem)
    if cut != stem:
        cut = re.sub(r"_[0-9]+[a-z]?$", "", cut)  # the series number a converter appends after such tokens
    out = cut or stem or "qmap"
    return f"{out}_{variant}" if variant else out


def resolve_mask(spec, series: Series, max_bytes: float | None = None) -> tuple[np.ndarray, str]:
    """The voxels to fit: ``"auto"``, ``"none"`` or a NIfTI file name. Returns (mask, description)."""
    spec = "auto" if spec is None else str(spec)
    if spec == "none":
        return np.ones(series.shape, bool), "none (every voxel)"
    if spec == "auto":
        return (object_mask(series, max_bytes),
                "auto (0.5 x Otsu threshold of the per-voxel maximum, opened, holes filled)")
    img = load_image(spec, what="mask=")
    check_same_grid(series.shape, series.affine, img.shape, img.affine, ref_name="the series", name=f"mask={spec}")
    data = image_data(img, spec)
    if data.ndim != 3:
        raise InputError(f"mask={spec}: expected a 3D image, got shape {data.shape}")
    mask = np.isfinite(data) & (data > 0)
    if not mask.any():
        raise InputError(f"mask={spec}: no voxel is > 0; the mask selects nothing")
    return mask, f"file {Path(spec).absolute()}"


def resolve_sigma(
    spec,
    series,
    *,
    coils: int | None = 1,
    max_bytes: float | None = None,
    model=None,
    mask: np.ndarray | None = None,
    ctx_maps: dict | None = None,
    n_jobs: int | None = None,
) -> tuple[object, dict]:
    """The noise sd of a series: ``"auto"``, ``"local"``, a number, or a NIfTI noise map.

    The one entry point every command uses for its noise level.

    Parameters
    ----------
    spec : str, float or None
        ``"auto"`` (None): the chain of :func:`qmap.noise_level.estimate_noise` (background, then the
        residuals of a plain fit of ``model``); ``"local"``: a smooth noise map from the same sources;
        a positive number (signal units); or the path of a NIfTI noise map.
    series : Series or qmap.noise_level.ArraySource
    coils : int or None
        Sum-of-squares coils; None lets the background's moments decide.
    max_bytes : float, optional
        Memory budget for reading.
    model : SeparableModel, optional
        The command's model (enables the residual source and ``local``).
    mask : (X, Y, Z) ndarray of bool, optional
        The fit mask (voxels the residual source may use).
    ctx_maps : dict, optional
        Per-voxel model inputs (e.g. B1).
    n_jobs : int, optional
        Workers for the local map's fit.

    Returns
    -------
    sigma : float or (X, Y, Z) ndarray
    info : dict
        Provenance entries: ``sigma_mode`` (auto / local / value / map), ``sigma`` (the value, or the
        median of the map), ``source``, ``n_voxels``, ``relative_precision``, ``sigma_source`` (in words),
        ``coils``, and ``notes`` (list of str, for the run summary; to be removed before recording).
    """
    from .noise_level import estimate_noise

    spec = "auto" if spec is None else str(spec)
    if spec in ("auto", "local"):
        est = estimate_noise(series, model=model, mask=mask, ctx_maps=ctx_maps, coils=coils, max_bytes=max_bytes,
                             local=spec == "local", n_jobs=n_jobs)
        info = est.provenance(spec)
        for w in est.warnings:
            warn(w)
        words = {"background": "image background", "residuals": "residuals of a first fit inside the object",
                 "local": "local noise map"}[est.source]
        info.update(value=est.value, sigma_source=f"{spec} ({words})", coils=est.coils, notes=list(est.notes))
        prec = "" if est.relative_precision is None else f" +/- {100 * est.relative_precision:.1f} %"
        head = (f"noise sigma {est.value:.4g}{prec} from the {words} ({est.n_voxels} voxels)" if spec == "auto" else
                f"noise sigma: local map, median {est.value:.4g}{prec} ({est.n_voxels} voxels)")
        info["notes"].insert(0, head)
        sigma = est.sigma if spec == "local" else float(est.sigma)
        return sigma, info
    try:
        value = float(spec)
    except ValueError:
        value = None
    if value is not None:
        if not np.isfinite(value) or value <= 0:
            raise InputError(f"sigma={spec}: must be a positive number in signal units, or auto, local, "
                             "or a NIfTI noise map")
        return value, {"sigma_mode": "value", "sigma": value, "source": "command line", "value": value,
                       "sigma_source": "command line", "n_voxels": None, "relative_precision": None, "notes": []}
    img = load_image(spec, what="sigma=")
    check_same_grid(series.shape, series.affine, img.shape, img.affine, ref_name="the series",
                    name=f"sigma={spec}")
    data = image_data(img, spec)
    if data.ndim != 3:
        raise InputError(f"sigma={spec}: expected a 3D noise map, got shape {data.shape}")
    usable = np.isfinite(data) & (data > 0)
    if not usable.any():
        raise InputError(f"sigma={spec}: holds no positive value; a noise map holds the noise sd (> 0) of each voxel "
                         f"in signal units (where it is not positive the standard errors are NaN, and a fit that "
                         f"models the noise floor skips the voxel: status 2)")
    med = float(np.median(data[usable]))
    return data.astype(float), {"sigma_mode": "map", "sigma": med, "source": "noise map", "value": med,
                                "sigma_source": f"noise map {Path(spec).absolute()}", "n_voxels": int(usable.sum()),
                                "relative_precision": None, "path": str(Path(spec).absolute()), "notes": []}


#: ``--sigma`` values that ask qmap to estimate the noise level (a failure falls back, see sigma_for_stderr)
ESTIMATED_SIGMA = ("auto", "local")


#: what happens to the standard errors without a noise level (most commands: the residual variance)
RESIDUAL_FALLBACK = ("the standard errors use the per-voxel residual variance instead",
                     ("standard errors from the per-voxel residual variance: the noise level could not be "
                      "estimated (give sigma=VALUE)"))


def sigma_for_stderr(spec, series: Series, *, coils: int = 1, max_bytes: float | None = None,
                     notes: list | None = None, magnitude: bool = True,
                     fallback: tuple[str, str] = RESIDUAL_FALLBACK, warn_fallback: bool = True, model=None,
                     mask: np.ndarray | None = None, ctx_maps: dict | None = None,
                     n_jobs: int | None = None) -> tuple[object, dict]:
    """The noise level for the standard errors of a command that does not model the noise floor.

    Resolved as ``--sigma`` (:func:`resolve_sigma`, with ``model`` / ``mask`` / ``ctx_maps`` for its
    residual source). When it is to be estimated (``auto``, ``local``) and cannot be, the command
    still runs: the standard errors fall back to the per-voxel residual variance, with a warning (and
    a note in ``notes``); ``fallback`` is the (warning, note) pair saying what happens instead. A given
    value or file that is wrong is an error as usual.

    Returns
    -------
    sigma : float, (X, Y, Z) ndarray or None
        None when the fallback applies.
    info : dict
        As :func:`resolve_sigma` (its ``notes`` go to ``notes``) and, for the fallback,
        ``stderr_fallback`` (the reason), for the provenance's ``noise`` entry.
    """
    spec = "auto" if spec is None else spec
    if not magnitude and str(spec) in ESTIMATED_SIGMA:
        # signed (phase-corrected) data: the background is Gaussian, not Rayleigh, and the magnitude
        # statistics of the estimator would give about 0.57 sigma -- too small standard errors
        reason = "the noise of signed (real / phase-corrected) data is not estimated from the background"
        warn(f"{reason}; the standard errors use the per-voxel residual variance (give sigma=VALUE for "
             "noise-based ones)")
        if notes is not None:
            notes.append("standard errors from the per-voxel residual variance (signed data: give sigma=VALUE)")
        return None, {"sigma": None, "stderr_fallback": reason}
    fallback_text, fallback_note = fallback
    try:
        sigma, sinfo = resolve_sigma(spec, series, coils=coils, max_bytes=max_bytes, model=model, mask=mask,
                                     ctx_maps=ctx_maps, n_jobs=n_jobs)
    except InputError as exc:
        if str(spec) not in ESTIMATED_SIGMA:
            raise
        reason = str(exc)
        if warn_fallback:
            warn(f"{reason.rstrip('.')} -- {fallback_text}")
        if notes is not None:
            notes.append(fallback_note)
        return None, {"sigma": None, "stderr_fallback": reason}
    if notes is not None:
        notes.extend(sinfo.pop("notes", []))
        notes.append(f"standard errors from the noise sd {sinfo['value']:.4g} ({sinfo['sigma_source']})")
    return sigma, sinfo


def check_signal(series: Series, *, magnitude: bool = True, max_bytes: float | None = None) -> None:
    """Reject series with no signal at all, and negative 'magnitudes'."""
    lo, hi = np.inf, -np.inf
    n_negative = 0
    for z0, z1 in series.slabs(max_bytes):
        block = series.read(z0, z1)
        d = np.abs(block) if np.iscomplexobj(block) else block
        with np.errstate(invalid="ignore"):
            blo, bhi = float(np.fmin.reduce(d, axis=None)), float(np.fmax.reduce(d, axis=None))  # skip NaN, no copy
        if not (np.isfinite(blo) and np.isfinite(bhi)):
            finite = d[np.isfinite(d)]
            if finite.size == 0:
                continue
            blo, bhi = float(finite.min()), float(finite.max())
        if blo < 0:  # counted only where there is a negative sample (a pass over the data saved otherwise)
            n_negative += int(np.count_nonzero(d < 0))
        lo, hi = min(lo, blo), max(hi, bhi)
    if not np.isfinite(lo):
        raise InputError(f"{series.paths[0]}: every sample is NaN or infinite; nothing to fit")
    if hi == lo:
        raise InputError(
            f"{series.paths[0]}: the series holds no signal (every sample is {hi:g}); check the export"
        )
    if magnitude and not series._allow_complex and lo < 0:
        clip_small_negatives(series, lo, hi, n_negative)  # small undershoot: clipped with a warning; else refused


def _outputs_for(maps: MapSet, prefix: str, units: str, *, data: bool = True) -> list[OutputFile]:
    """The NIfTI outputs of ``maps`` (``data=False``: descriptions only, the maps are not read)."""
    outs = []

    def of(group, name):
        return group[name] if data else None

    for name in maps.names:
        f = 1e3 if (units == "ms" and name in maps.time_params) else 1.0
        u = "ms" if f == 1e3 else maps.units[name]
        outs.append(OutputFile(map_filename(prefix, name, "estimate"), of(maps.estimates, name), name, "estimate", u,
                               maps.descriptions[name], scale=f))
        if name in maps.stderr:  # a map without any noise information (e.g. a lookup) has no stderr file
            outs.append(OutputFile(map_filename(prefix, name, "stderr"), of(maps.stderr, name), name, "stderr", u,
                                   f"standard error (1 sigma) of {name}{_convention_note(maps)}", scale=f))
    for q in maps.quality:
        outs.append(OutputFile(map_filename(prefix, q, "quality"), of(maps.quality, q), q, "quality",
                               QUALITY_UNITS[q], QUALITY_DESCRIPTIONS[q]))
    used = sorted(int(c) for c in maps.status_counts)
    outs.append(OutputFile(map_filename(prefix, "status", "status"), maps.status, "status", "status", "code",
                           "per-voxel fit status (0 = fitted); the codes this map uses are listed in StatusCodes, "
                           "every code in the provenance file (status_codes)",
                           sidecar={"StatusCodes": {str(c): st.STATUS_CODES[c] for c in used}}))
    return outs


def _convention_note(maps: MapSet) -> str:
    conv = (maps.info.get("stderr") or {}).get("convention")
    if conv == "noise":
        holes = (maps.info.get("stderr") or {}).get("no_noise_level_voxels")
        return "; from the noise sd (inverse Fisher information)" + (
            f"; NaN in the {holes} fitted voxels where the noise map has no positive value" if holes else "")
    if conv == "residual":
        return "; from the per-voxel residual variance RSS/(m-P)"
    return ""


def check_outputs_free(common: CommonOptions, prefix: str) -> None:
    if common.overwrite:
        return
    found = existing_outputs(common.out_dir, prefix)
    if found:
        raise OutputExistsError(
            f"{found[0]} exists already (and {len(found) - 1} more outputs with prefix {prefix}); "
            f"pass overwrite=True to replace them, or choose another out_dir= / prefix="
        )


@dataclass
class Slab:
    """The part ``z0:z1`` of a series read at once (all of it without ``--max-memory``)."""

    data: np.ndarray  #: (X, Y, z1 - z0, m) samples
    mask: np.ndarray  #: (X, Y, z1 - z0) bool
    sigma: float | np.ndarray | None  #: noise sd (a map is cut to the slab)
    z0: int
    z1: int
    index: int  #: 0-based position among the slabs
    count: int  #: number of slabs
    progress: Any = None  #: the run's progress display (qmap.engine.Progress), shared by its slabs

    @property
    def label(self) -> str:
        """Progress-bar label."""
        return "fitting" if self.count == 1 else f"fitting slab {self.index + 1}/{self.count}"


@dataclass
class PreparedRun:
    """A fitting command's inputs, checked up front (:func:`prepare_run`), and the steps that follow.

    Every fitting command goes ``load_series`` -> :func:`prepare_run` -> :meth:`fit` (or
    :meth:`map_slabs` for closed forms) -> :meth:`write`, so that output naming, the mask, the noise
    level, the memory budget (slab reading), the provenance inputs and the writing are the same for all.

    Attributes
    ----------
    series : Series
    common : CommonOptions
    prefix : str
        Output name stem.
    mask : (X, Y, Z) bool ndarray
    mask_desc : str
        How the mask was made (recorded in the provenance options).
    sigma : float or (X, Y, Z) ndarray or None
        Noise sd in signal units, when the run uses one.
    noise_info : dict or None
        The provenance ``noise`` entry.
    inputs : list of path-like
        Files read besides the series (mask, noise map, B1 map, phase, ...): the provenance lists them
        all with their SHA-256.
    notes : list of str
        Lines for the command's summary.
    t0 : float
        Start time (``time.perf_counter``) for the wall time.
    """

    series: Series
    common: CommonOptions
    prefix: str
    mask: np.ndarray
    mask_desc: str
    sigma: float | np.ndarray | None
    noise_info: dict | None
    inputs: list
    notes: list
    t0: float
    extra_outputs: list = field(default_factory=list)  # e.g. the --sigma local noise map
    noise: NoiseFloor | None = None  # the noise floor as resolved (coils from the background)
    #: a lazy series whose reader reads the z ranges of a pass in file order cheaply (e.g. one 3D image through
    #: :class:`qmap.io.nifti.SlabReader`): fitted and written in slabs of at most :data:`AUTO_SLAB_VOXELS` and
    #: :data:`LAZY_SLAB_VOXELS` voxels also without ``--max-memory``
    slab_lazy: bool = False

    @property
    def slabs(self) -> list[tuple[int, int]]:
        """The z ranges read one at a time within ``--max-memory`` (one range without it)."""
        return self.series.slabs(self.common.max_memory)

    @property
    def fit_slabs(self) -> list[tuple[int, int]]:
        """The z ranges fitted and written one at a time: ``--max-memory`` slabs for a series read in slabs,
        else slabs of about :data:`AUTO_SLAB_VOXELS` voxels (:data:`LAZY_SLAB_VOXELS` for ``slab_lazy``; one range
        on a Dask cluster)."""
        return self._slabs_of(AUTO_SLAB_VOXELS)

    def fit_slabs_for(self, volumes: int) -> list[tuple[int, int]]:
        """:attr:`fit_slabs` for maps made from ``volumes`` volumes: smaller slabs below
        :data:`FIT_SLAB_VOLUMES` volumes (down to half of :data:`AUTO_SLAB_VOXELS`)."""
        return self._slabs_of(max(AUTO_SLAB_VOXELS // 2,
                                  min(AUTO_SLAB_VOXELS, AUTO_SLAB_VOXELS * volumes // FIT_SLAB_VOLUMES)))

    def _slabs_of(self, voxels: int) -> list[tuple[int, int]]:
        """:attr:`fit_slabs` with slabs of about ``voxels`` voxels where the slab size is free."""
        if self.common.scheduler or (self.series.lazy and not (self.slab_lazy and self.common.max_memory is None)):
            return self.slabs
        nx, ny, nz = self.series.shape
        voxels = min(voxels, LAZY_SLAB_VOXELS) if self.slab_lazy else voxels
        k = max(1, voxels // max(1, nx * ny))
        return [(z, min(z + k, nz)) for z in range(0, nz, k)]

    def for_slabs(self, fn, slabs: list[tuple[int, int]] | None = None, progress=None) -> list:
        """Call ``fn(slab)`` for each :class:`Slab` in turn (read one at a time); returns the results in z order."""
        return list(self._each_slab(fn, self.slabs if slabs is None else slabs, progress))

    def _each_slab(self, fn, slabs: list[tuple[int, int]], progress=None, ahead: bool = False):
        """``fn(slab)`` for each slab, in z order, each read when it is its turn.

        (Reading slab k + 1 in a thread while slab k fits was measured: no gain on 2 cores, whose both
        cores the fit uses, and one more slab in memory; so the slabs are read in turn.)

        ``ahead`` (a series in memory, whose slabs are views): ``fn`` of the next slab starts in a helper
        thread while the current one finishes, so that a fit's workers do not wait at the end of each slab
        for its last chunk and the next slab's preparation (measured on a 1M-voxel t2star run in 8 slabs:
        the two workers were busy 60-70 % of the fit). The results come in z order as without it.
        """
        if len(slabs) > 1 and self.series.lazy and self.common.max_memory is not None:
            # (a slab_lazy run is read in slabs whatever the budget: nothing to say without one)
            self.notes.append(f"read in {len(slabs)} slabs to stay within max_memory=")

        def slab(k: int) -> Slab:  # magnitude data were checked to be >= 0 (check_signal): no abs() copy
            z0, z1 = slabs[k]
            sigma = self.sigma
            if isinstance(sigma, np.ndarray) and sigma.ndim == 3:  # a noise map: the slab's part
                sigma = sigma[:, :, z0:z1]
            return Slab(self.series.read(z0, z1), self.mask[:, :, z0:z1], sigma, z0, z1, k, len(slabs), progress)

        if not ahead or len(slabs) < 2 or self.series.lazy:
            for k in range(len(slabs)):
                yield fn(slab(k))
            return
        from collections import deque
        from concurrent.futures import ThreadPoolExecutor

        from threadpoolctl import threadpool_limits

        # the BLAS limit of the two slabs' fits set once around both (each fit's own would restore the
        # other's setting when it ends while the other runs)
        with threadpool_limits(limits=1), ThreadPoolExecutor(2, thread_name_prefix="qmap-slab") as helper:
            running = deque(helper.submit(fn, slab(k)) for k in range(2))
            try:
                for k in range(len(slabs)):
                    part = running.popleft().result()
                    if k + 2 < len(slabs):
                        running.append(helper.submit(fn, slab(k + 2)))
                    yield part
                    del part
            finally:
                for f in running:
                    f.cancel()

    def map_slabs(self, fn, *, progress=None, slabs: list[tuple[int, int]] | None = None,
                  ahead: bool = False) -> MapSet:
        """Apply ``fn(slab) -> MapSet`` to each :class:`Slab` in turn, streaming the maps into the output files.

        The slabs are :attr:`fit_slabs`; each slab's maps are appended to the run's output files (in a
        background thread, while the next slab is fitted) and dropped, so the maps are never held whole.
        Returns a :class:`~qmap.streaming.StreamedMaps` (the status map held, the others read from the files
        on access); :meth:`write` completes and commits the files. ``slabs``: other z ranges (default
        :attr:`fit_slabs`). ``ahead``: two slabs in ``fn`` at a time (see :meth:`_each_slab`).
        """
        slabs = self.fit_slabs if slabs is None else slabs
        if not slabs:
            raise InputError(f"{self.series.paths[0]}: the series has no slice to fit")
        stream = self.map_stream()
        try:
            for (z0, z1), part in zip(slabs, self._each_slab(fn, slabs, progress, ahead), strict=True):
                stream.add(part, z0, z1)
                del part
            if slabs[0][0] == 0 and slabs[-1][1] == self.series.shape[2]:
                self.series.release()  # every slice fitted: the end of the run holds maps, not the series
            maps = stream.maps()
            release_freed_memory()  # the fit's work arrays, before the files are completed and checked
        except BaseException:
            stream.abort()
            raise
        finally:
            if progress is not None:
                progress.finish()
        return maps

    def map_stream(self, extra: Callable[[MapSet], list[OutputFile]] | None = None) -> MapStream:
        """The stream of this run's maps into their output files (what :meth:`map_slabs` fills).

        For a command that makes each slab's maps itself: ``stream.add(part, z0, z1)`` slab by slab, then
        ``stream.maps()`` (:meth:`write` commits; ``stream.abort()`` on failure). ``extra(part)`` gives other
        files streamed with each slab (e.g. maps with names of their own); :meth:`write` must describe them
        (``extra_outputs``).
        """
        series = self.series

        def specs(m: MapSet) -> list[OutputFile]:
            return _outputs_for(m, self.prefix, self.common.units) + (extra(m) if extra is not None else [])

        return MapStream(self.common.out_dir, overwrite=self.common.overwrite, specs=specs, shape=series.shape,
                         affine=series.affine, ref_header=series.header)

    def discard(self, maps: MapSet) -> None:
        """Remove the files a :meth:`map_slabs` run streamed, when it stops before :meth:`write`."""
        if isinstance(maps, StreamedMaps) and maps.stream is not None:
            maps.stream.abort()

    def fit(self, model, *, noise: NoiseFloor | None = None, ctx_maps: dict | None = None,
            method: str | None = None, input_se: dict | None = None) -> MapSet:
        """Fit ``model`` in the masked voxels, slab by slab (maps held as float32, the written precision).

        ``method``: ``"fast"``, ``"lmfit"`` (default: ``common.engine``) or ``"linear"`` (the model's
        closed-form linearised estimator, where it has one). ``ctx_maps`` (per-voxel model inputs such
        as B1) and ``input_se`` (their standard errors, propagated to first order) are volumes cut to
        each slab. The maps are streamed into the output files (:meth:`map_slabs`).
        """
        from .engine import Progress, resolve_jobs
        from .fitting.problem import lean_fit

        common = self.common
        check_series_shape(self.series, model, self.mask, enabled=common.series_check, max_bytes=common.max_memory)
        progress = Progress(int(np.count_nonzero(self.mask)), "fitting", quiet=common.quiet)

        def one(slab: Slab) -> MapSet:
            return fit_volume(
                model, slab.data, mask=slab.mask,
                ctx_maps=_cut(ctx_maps, slab),
                noise=noise, sigma=slab.sigma, n_jobs=common.n_jobs, chunk_size=common.chunk_size,
                scheduler=common.scheduler, quiet=common.quiet, method=method or common.engine, label=slab.label,
                dtype=np.float32, stderr=common.stderr, input_se=_cut(input_se, slab), progress=slab.progress,
            )

        # two slabs at a time for a lean fit spread over local workers (a scheduler's cluster has its own queue):
        # 1M-voxel t2star 3 % faster over alternating runs, for 15 MB more (the maps of one more slab)
        lean = lean_fit(model, method or common.engine, noise)
        ahead = lean and common.scheduler is None and resolve_jobs(common.n_jobs) > 1
        return self.map_slabs(one, progress=progress, slabs=self.fit_slabs_for(self.series.n), ahead=ahead)

    def write(self, maps: MapSet, *, options: dict | None = None, model_info: dict) -> RunReport:
        """Write the maps and the provenance (see :func:`write_run`)."""
        return write_run(self.series, maps, common=self.common, prefix=self.prefix, noise_info=self.noise_info,
                         options=options, model_info=model_info, extra_inputs=self.inputs, notes=self.notes,
                         t0=self.t0, mask_desc=self.mask_desc, extra_outputs=self.extra_outputs)


def release_freed_memory() -> None:
    """Give memory freed by the last stage back to the system (glibc's ``malloc_trim``; elsewhere nothing).

    glibc keeps the pages of freed arrays below its (adaptive, up to 32 MB) mmap threshold in its heaps, so a
    stage's temporaries stay resident after it and the next stage's add to them. Trimming between the stages
    of a run (after the mask and noise estimate, after the fit) keeps the peak at the largest stage rather
    than their sum: 1M-voxel b1 and t1-vfa peak 2-3 MB lower (measured; a few milliseconds). The data are
    untouched.
    """
    trim = _malloc_trim()
    if trim is not None:
        trim(0)


@functools.lru_cache(maxsize=1)
def _malloc_trim():
    """glibc's ``malloc_trim`` through ctypes, or None (another C library or platform)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        import ctypes

        return ctypes.CDLL("libc.so.6").malloc_trim
    except (OSError, AttributeError):
        return None


def _cut(volumes: dict | None, slab: Slab) -> dict | None:
    """The slab's part of each (X, Y, Z) volume in ``volumes``."""
    return None if not volumes else {k: np.asarray(v)[:, :, slab.z0:slab.z1] for k, v in volumes.items()}


def prepare_run(
    series: Series,
    common: CommonOptions,
    *,
    noise: NoiseFloor | None = None,
    sigma_spec=None,
    sigma_for_se: bool | None = None,
    fallback: tuple[str, str] = RESIDUAL_FALLBACK,
    warn_fallback: bool = True,
    extra_inputs: list | None = None,
    notes: list | None = None,
    magnitude: bool = True,
    t0: float | None = None,
    method: str | None = None,
    variant: str = "",
    model=None,
    ctx_maps: dict | None = None,
    coils_auto: bool = False,
    auto_mask: tuple[np.ndarray, str] | None = None,
    auto_mask_desc: str | None = None,
) -> PreparedRun:
    """Check everything a fit needs before any work: outputs free, signal present, mask, noise level.

    Parameters
    ----------
    series : Series
        The loaded series (lazy when it exceeds ``common.max_memory``).
    common : CommonOptions
    noise : NoiseFloor, optional
        The noise-floor handling of the fit (recorded in the provenance; a mode that needs sigma gets
        it, and a failure to find it is an error).
    sigma_spec : None, "auto", "local", float or path
        Where the noise level comes from (see :func:`resolve_sigma`).
    sigma_for_se : bool, optional
        Find the noise level for the standard errors alone when the noise floor does not need it
        (:func:`sigma_for_stderr`: an estimate that fails falls back, with a warning). Default:
        ``common.stderr == "noise"``.
    fallback : (str, str)
        The warning and the summary note saying what the standard errors become without a noise level.
    warn_fallback : bool
        Issue that warning (False: only the note and the provenance say it).
    extra_inputs : list of path-like, optional
        Other files the result depends on (their SHA-256 go into the provenance).
    notes : list of str, optional
    magnitude : bool
        The series holds magnitudes (negative values are refused).
    t0 : float, optional
        Start time (default: now).
    method : str, optional
        The command's label for the default output prefix (see :func:`default_prefix`).
    variant : str, optional
        Tells the default prefix apart from another command's on the same series (see
        :func:`default_prefix`; ``t2-spectrum``: ``"spectrum"``).
    model : SeparableModel, optional
        The command's model: the residual source of the noise level and ``--sigma local`` fit it.
    ctx_maps : dict, optional
        Per-voxel model inputs (X, Y, Z) for that fit (e.g. B1).
    coils_auto : bool
        The number of coils was not given: the background's moments may set it (``run.noise``).
    auto_mask : ((X, Y, Z) bool ndarray, str), optional
        The command's own mask for ``--mask auto`` and its description (default: the object of
        ``series``, :func:`qmap.noise_level.object_mask`).
    auto_mask_desc : str, optional
        Another description of the default automatic mask (e.g. which images it is the object of).

    Returns
    -------
    PreparedRun
    """
    t0 = time.perf_counter() if t0 is None else t0
    prefix = common.prefix or default_prefix(series.paths[0], method, variant=variant)
    check_outputs_free(common, prefix)
    budget = common.max_memory
    check_signal(series, magnitude=magnitude, max_bytes=budget)
    notes = list(notes or [])
    if str(common.mask or "auto") == "auto" and auto_mask is not None:
        mask, mask_desc = np.asarray(auto_mask[0], bool), auto_mask[1]
    else:
        mask, mask_desc = resolve_mask(common.mask, series, budget)
        if str(common.mask or "auto") == "auto" and auto_mask_desc:
            mask_desc = auto_mask_desc
        release_freed_memory()  # the mask's temporaries, before the noise estimate's
    # files that shape the result are inputs too (provenance lists them with their SHA-256)
    file_inputs = list(extra_inputs or [])
    if common.mask is not None and str(common.mask) not in ("auto", "none"):
        file_inputs.append(common.mask)
    sigma: Any = None
    noise_info: dict | None = None
    extra_outputs: list = []

    def record(sinfo: dict, sigma) -> dict:
        """Move the notes and input paths out of ``sinfo``; write a local noise map as an output."""
        notes.extend(sinfo.pop("notes", []))
        if "path" in sinfo:
            path = sinfo.pop("path")
            file_inputs.append(path)
            sinfo["noise_map"] = noise_map_entry(path)
        sinfo.pop("value", None)
        if sinfo.get("sigma_mode") == "local":
            name = f"{prefix}_desc-noise_sigmamap.nii.gz"
            sinfo["sigma_source"] = f"noise map {(common.out_dir / name).absolute()}"
            sinfo["noise_map"] = noise_map_entry(common.out_dir / name, written=True)
            extra_outputs.append(OutputFile(name, np.asarray(sigma, np.float32), "sigma", "quality", "a.u.",
                                            "local noise standard deviation per real channel (--sigma local)"))
        return sinfo

    if noise is not None:
        noise_info = {"mode": str(noise.mode), "sigma": None}
        if noise.needs_sigma:
            sigma, sinfo = resolve_sigma(sigma_spec, series, coils=None if coils_auto else noise.coils,
                                         max_bytes=budget, model=model, mask=mask, ctx_maps=ctx_maps,
                                         n_jobs=common.n_jobs)
            sinfo = record(sinfo, sigma)
            noise = noise.with_coils(sinfo.pop("coils", None))
            noise_info.update(sinfo)
        noise_info.update(noise.provenance())
    if sigma_for_se is None:
        sigma_for_se = common.stderr == "noise"
    if sigma is None and sigma_for_se:  # no noise-floor model: the noise level is for the SEs only
        sigma, sinfo = sigma_for_stderr(sigma_spec, series, max_bytes=budget, notes=notes, magnitude=magnitude,
                                        fallback=fallback, warn_fallback=warn_fallback, model=model, mask=mask,
                                        ctx_maps=ctx_maps, n_jobs=common.n_jobs)
        noise_info = dict(noise_info or {"mode": "none"}, **record(sinfo, sigma))
    release_freed_memory()  # the mask's and the noise estimate's temporaries, before the fit
    return PreparedRun(series=series, common=common, prefix=prefix, mask=mask, mask_desc=mask_desc,
                       sigma=None if sigma is None else sigma if isinstance(sigma, np.ndarray) else float(sigma),
                       noise_info=noise_info, inputs=file_inputs, notes=notes, t0=t0, extra_outputs=extra_outputs,
                       noise=noise)


def noise_map_entry(path, *, written: bool = False) -> dict:
    """The provenance ``noise.noise_map`` entry: where the run's noise map is, for re-creating a voxel's fit.

    ``role`` is ``"input"`` (a noise map given as ``sigma``; its ``sha256`` is added on writing, as in
    ``inputs``) or ``"output"`` (the smooth map of ``sigma='local'``, written by the run beside the maps).
    """
    return {"path": str(Path(path).absolute()), "role": "output" if written else "input"}


def run_fit(
    series: Series,
    model,
    *,
    common: CommonOptions,
    noise: NoiseFloor | None = None,
    sigma_spec=None,
    ctx_maps: dict | None = None,
    options: dict | None = None,
    model_info: dict | None = None,
    extra_inputs: list | None = None,
    notes: list | None = None,
    magnitude: bool = True,
    t0: float | None = None,
    method: str | None = None,
    coils_auto: bool = False,
) -> RunReport:
    """:func:`prepare_run`, :meth:`PreparedRun.fit` and :meth:`PreparedRun.write` in one call.

    ``method`` is the command's label for the default output prefix (see :func:`default_prefix`).
    ``coils_auto``: the number of coils was not given; the background's moments may set it.
    """
    run = prepare_run(series, common, noise=noise, sigma_spec=sigma_spec, extra_inputs=extra_inputs, notes=notes,
                      magnitude=magnitude, t0=t0, method=method, model=model, ctx_maps=ctx_maps,
                      coils_auto=coils_auto)
    maps = run.fit(model, noise=run.noise if run.noise is not None else noise, ctx_maps=ctx_maps)
    return run.write(maps, options=options,
                     model_info={"parameters": list(model.param_names), **(model_info or {"name": model.name})})


def _output_entry(o: OutputFile, maps: MapSet) -> dict:
    """The provenance ``outputs`` entry of one file; standard-error maps also name their convention."""
    entry = {"parameter": o.parameter, "kind": o.kind, "units": o.units}
    conv = (maps.info.get("stderr") or {}).get("convention")
    if o.kind == "stderr" and conv:
        entry["convention"] = conv
    return entry


def _stage_all(w: AtomicWriter, outs: list, series: Series, status, n_jobs) -> None:
    """Compress and stage the NIfTI outputs, several at a time (zlib releases the GIL)."""
    from concurrent.futures import ThreadPoolExecutor

    from .engine import resolve_jobs

    workers = min(len(outs), resolve_jobs(n_jobs), 2)
    if workers <= 1:
        for o in outs:
            w.stage_nifti(o, series.affine, series.header, status=status)
        return
    with ThreadPoolExecutor(max_workers=workers) as pool:
        futures = [pool.submit(w.stage_nifti, o, series.affine, series.header, status=status) for o in outs]
        for f in futures:
            f.result()  # re-raises the first failure (the writer then rolls everything back)


def write_run(
    series: Series,
    maps: MapSet,
    *,
    common: CommonOptions,
    prefix: str,
    noise_info: dict | None,
    options: dict | None,
    model_info: dict,
    extra_inputs: list | None = None,
    notes: list | None = None,
    t0: float,
    mask_desc: str,
    extra_outputs: list | None = None,
) -> RunReport:
    """Write the maps of ``maps`` (NIfTI + sidecars, previews) and the provenance, atomically.

    ``extra_outputs`` (list of :class:`~qmap.io.writer.OutputFile`) are written beside the maps of
    ``maps`` (e.g. a 4D spectrum or maps with their own names) and listed in the provenance too.
    """
    stream = maps.stream if isinstance(maps, StreamedMaps) else None
    try:
        return _write_run(series, maps, stream, common=common, prefix=prefix, noise_info=noise_info, options=options,
                          model_info=model_info, extra_inputs=extra_inputs, notes=notes, t0=t0, mask_desc=mask_desc,
                          extra_outputs=extra_outputs)
    except BaseException:
        if stream is not None:  # the streamed maps go with the rest (a no-op once committed)
            stream.abort()
        raise


def _write_run(series, maps, stream, *, common, prefix, noise_info, options, model_info, extra_inputs, notes, t0,
               mask_desc, extra_outputs) -> RunReport:
    r2 = maps.quality.get("rsquared")  # read once (a streamed map is read from its file on each access)
    warn_fit_quality(maps, maps.status != st.MASKED, common.mask, r2=r2)
    outs = _outputs_for(maps, prefix, common.units, data=stream is None) + list(extra_outputs or [])
    notes = list(notes or [])
    good = maps.status == st.FITTED
    if r2 is not None and good.any() and not np.isfinite(np.asarray(r2)[good]).any():
        model_info = dict(model_info, quality=f"R-squared and RMS residual: {EXACTLY_DETERMINED}")
        notes.append("R-squared and RMS residual are NaN: as many samples as free parameters, the fit is exactly "
                     "determined and its quality is not measurable")
    paths = dict.fromkeys(str(Path(p).absolute()) for p in list(series.paths) + list(extra_inputs or []))
    inputs = [{"path": p, "sha256": sha256_file(p)} for p in paths]
    acquisition = {k: (np.asarray(v).tolist() if np.ndim(v) else float(v)) for k, v in series.acquisition.items()}
    opts = dict(common.as_dict())
    opts.update(options or {})
    opts["mask"] = mask_desc
    opts["run"] = run_record()  # date, versions, warnings (qmap.record)
    provenance: dict[str, Any] = {
        "qmap_version": __version__,
        "command_line": list(common.command_line if common.command_line is not None else sys.argv),
        "inputs": inputs,
        "acquisition": acquisition,
        "options": opts,
        "model": dict(model_info, engine=common.engine),
        "noise": noise_info,
        "status_counts": maps.status_counts,
        "status_codes": {str(k): v for k, v in st.STATUS_CODES.items()},
        "wall_time_s": None,
        "outputs": {o.name: _output_entry(o, maps) for o in outs},
    }
    noise_map = (noise_info or {}).get("noise_map")
    if noise_map and noise_map.get("role") == "input":  # the hash of the noise map as read (one hash per file)
        digest = next((e["sha256"] for e in inputs if e["path"] == noise_map["path"]), None)
        provenance["noise"] = dict(noise_info, noise_map=dict(noise_map, sha256=digest))
    stderr_info = maps.info.get("stderr")
    if stderr_info and provenance["noise"] is not None:
        provenance["noise"] = dict(provenance["noise"], stderr=stderr_info)

    def stage(w: AtomicWriter, files: list) -> None:
        _stage_all(w, files, series, maps.status, common.n_jobs)
        if common.preview:
            from .plots import stage_previews

            stage_previews(w, maps, prefix, units=common.units, mask=maps.status != st.MASKED)
        provenance["wall_time_s"] = round(time.perf_counter() - t0, 3)
        w.stage_json(f"{prefix}_provenance.json", provenance)

    if stream is None:
        with AtomicWriter(common.out_dir, overwrite=common.overwrite) as w:
            stage(w, outs)
            written = w.commit()
    else:  # the maps are in their files already: complete them, stage the rest, commit
        written = stream.write([o for o in outs if o.name in stream.streams],
                               lambda w: stage(w, [o for o in outs if o.name not in stream.streams]))
    return RunReport(maps=maps, written=written, provenance=provenance, prefix=prefix, out_dir=common.out_dir,
                     notes=notes)
