"""From a loaded series to written maps: mask, noise level, fit, outputs, provenance.

Every fitting command ends in :func:`run_fit`; the command-specific part (which
series key, which model, which per-voxel inputs) lives in :mod:`qmap.workflows`.
"""

from __future__ import annotations

import logging
import re
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import __version__
from .engine import DEFAULT_CHUNK
from .errors import InputError, OutputExistsError, UsageError
from .fitting import status as st
from .fitting.noise_floor import NoiseFloor
from .io.nifti import check_same_grid, image_data, load_image
from .io.series import Series
from .io.writer import AtomicWriter, OutputFile, existing_outputs, map_filename, sha256_file
from .maps import EXACTLY_DETERMINED, QUALITY_DESCRIPTIONS, QUALITY_UNITS, MapSet, fit_volume, place_slab
from .noise_level import background_sigma, object_mask
from .record import run_record

__all__ = ["QMRI_SUFFIXES", "CommonOptions", "RunReport", "check_outputs_free", "check_signal", "default_prefix", "resolve_mask", "resolve_sigma", "run_fit", "sigma_for_stderr", "write_run"]

log = logging.getLogger("qmap")


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
    chunk_size: int = DEFAULT_CHUNK
    command_line: list | None = None
    max_memory: float | None = None  # bytes; larger inputs are read in slabs
    stderr: str = "noise"  # covariance convention with a known noise level (qmap.fitting.uncertainty)

    def __post_init__(self):
        self.out_dir = Path(self.out_dir)
        if self.stderr not in ("noise", "residual"):
            raise UsageError(f"--stderr {self.stderr!r}: expected noise or residual")
        if self.units not in ("s", "ms"):
            raise UsageError(f"--units {self.units!r}: expected s or ms")
        if self.engine not in ("fast", "lmfit"):
            raise UsageError(f"--engine {self.engine!r}: expected fast or lmfit")
        if self.prefix is not None and (not self.prefix or "/" in self.prefix or self.prefix.startswith(".")):
            raise UsageError(f"--prefix {self.prefix!r}: give a plain file-name stem such as sub-01_T2star")

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
_BIDS_LABEL = re.compile(r"^[0-9a-zA-Z]+$")


def _bids_parts(stem: str) -> tuple[list[tuple[str, str]], str] | None:
    """Entities and suffix of a BIDS name stem starting with ``sub-``; None when it is not one."""
    parts = stem.split("_")
    if len(parts) < 2 or not parts[0].startswith("sub-"):
        return None
    ents = []
    for part in parts[:-1]:
        key, sep, value = part.partition("-")
        if not sep or not key.isalnum() or not _BIDS_LABEL.match(value):
            return None
        ents.append((key, value))
    if len({k for k, _ in ents}) != len(ents) or "-" in parts[-1]:
        return None
    return ents, parts[-1]


def default_prefix(path: str | Path, method: str | None = None) -> str:
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

    Parameters
    ----------
    path : path-like
        First input file.
    method : str, optional
        The command's method label (``irt1``, ``vfa``, ``mese``, ``megre``, ``tb1dam``, ...).
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
        return "_".join(head + [f"acq-{d.get('acq', '')}{label}"] + rest)
    stem = _SERIES_ENTITY.sub("", name)
    cut = _CONVERTER_TOKEN.sub("", stem)
    if cut != stem:
        cut = re.sub(r"_[0-9]+[a-z]?$", "", cut)  # the series number a converter appends after such tokens
    return cut or stem or "qmap"


def resolve_mask(spec, series: Series, max_bytes: float | None = None) -> tuple[np.ndarray, str]:
    """The voxels to fit: ``"auto"``, ``"none"`` or a NIfTI file name. Returns (mask, description)."""
    spec = "auto" if spec is None else str(spec)
    if spec == "none":
        return np.ones(series.shape, bool), "none (every voxel)"
    if spec == "auto":
        return (object_mask(series, max_bytes),
                "auto (0.5 x Otsu threshold of the per-voxel maximum, opened, holes filled)")
    img = load_image(spec, what="--mask")
    check_same_grid(series.shape, series.affine, img.shape, img.affine, ref_name="the series", name=f"--mask {spec}")
    data = image_data(img, spec)
    if data.ndim != 3:
        raise InputError(f"--mask {spec}: expected a 3D image, got shape {data.shape}")
    mask = np.isfinite(data) & (data > 0)
    if not mask.any():
        raise InputError(f"--mask {spec}: no voxel is > 0; the mask selects nothing")
    return mask, f"file {Path(spec).absolute()}"


def resolve_sigma(spec, series: Series, *, coils: int = 1, max_bytes: float | None = None) -> tuple[object, dict]:
    """Noise sd from ``"auto"`` (image background), a number, or a NIfTI noise map."""
    spec = "auto" if spec is None else str(spec)
    if spec == "auto":
        sigma, nvox = background_sigma(series, coils=coils, max_bytes=max_bytes)
        return float(sigma), {"source": "auto (image background)", "value": float(sigma), "background_voxels": int(nvox)}
    try:
        value = float(spec)
    except ValueError:
        value = None
    if value is not None:
        if not np.isfinite(value) or value <= 0:
            raise InputError(f"--sigma {spec}: must be a positive number in signal units, or auto, or a NIfTI noise map")
        return value, {"source": "command line", "value": value}
    img = load_image(spec, what="--sigma")
    check_same_grid(series.shape, series.affine, img.shape, img.affine, ref_name="the series",
                    name=f"--sigma {spec}")
    data = image_data(img, spec)
    if data.ndim != 3:
        raise InputError(f"--sigma {spec}: expected a 3D noise map, got shape {data.shape}")
    usable = np.isfinite(data) & (data > 0)
    if not usable.any():
        raise InputError(f"--sigma {spec}: holds no positive value; a noise map holds the noise sd (> 0) of each voxel "
                         f"in signal units (voxels where it is not positive get status 2)")
    return data.astype(float), {"source": f"noise map {Path(spec).absolute()}", "value": float(np.median(data[usable])),
                                "path": str(Path(spec).absolute())}


#: ``--sigma`` values that ask qmap to estimate the noise level (a failure falls back, see sigma_for_stderr)
ESTIMATED_SIGMA = ("auto", "local")


def sigma_for_stderr(spec, series: Series, *, coils: int = 1, max_bytes: float | None = None,
                     notes: list | None = None, magnitude: bool = True) -> tuple[object, dict]:
    """The noise level for the standard errors of a command that does not model the noise floor.

    Resolved as ``--sigma`` (:func:`resolve_sigma`). When it is to be
    estimated (``auto``, ``local``) and cannot be, the command still runs:
    the standard errors fall back to the per-voxel residual variance, with a
    warning (and a note in ``notes``). A given value or file that is wrong is
    an error as usual.

    Returns
    -------
    sigma : float, (X, Y, Z) ndarray or None
        None when the fallback applies.
    info : dict
        ``sigma``, ``sigma_source`` and, for the fallback, ``stderr_fallback``
        (the reason), for the provenance's ``noise`` entry.
    """
    spec = "auto" if spec is None else spec
    if not magnitude and str(spec) in ESTIMATED_SIGMA:
        # signed (phase-corrected) data: the background is Gaussian, not Rayleigh, and the magnitude
        # statistics of the estimator would give about 0.57 sigma -- too small standard errors
        reason = "the noise of signed (real / phase-corrected) data is not estimated from the background"
        log.warning("%s; the standard errors use the per-voxel residual variance (give --sigma VALUE for "
                    "noise-based ones)", reason)
        if notes is not None:
            notes.append("standard errors from the per-voxel residual variance (signed data: give --sigma VALUE)")
        return None, {"sigma": None, "stderr_fallback": reason}
    try:
        sigma, sinfo = resolve_sigma(spec, series, coils=coils, max_bytes=max_bytes)
    except InputError as exc:
        if str(spec) not in ESTIMATED_SIGMA:
            raise
        reason = str(exc)
        log.warning("%s -- the standard errors use the per-voxel residual variance instead", reason.rstrip("."))
        if notes is not None:
            notes.append("standard errors from the per-voxel residual variance: the noise level could not be "
                         "estimated (give --sigma VALUE)")
        return None, {"sigma": None, "stderr_fallback": reason}
    info = {"sigma": sinfo["value"], "sigma_source": sinfo["source"]}
    if notes is not None:
        notes.append(f"standard errors from the noise sd {sinfo['value']:.4g} ({sinfo['source']})")
    for k, v in sinfo.items():
        if k not in ("value", "source"):
            info[k] = v
    return sigma, info


def check_signal(series: Series, *, magnitude: bool = True, max_bytes: float | None = None) -> None:
    """Reject series with no signal at all, and negative 'magnitudes'."""
    lo, hi = np.inf, -np.inf
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
        lo, hi = min(lo, blo), max(hi, bhi)
    if not np.isfinite(lo):
        raise InputError(f"{series.paths[0]}: every sample is NaN or infinite; nothing to fit")
    if hi == lo:
        raise InputError(
            f"{series.paths[0]}: the series holds no signal (every sample is {hi:g}); check the export"
        )
    if magnitude and not series._allow_complex and lo < 0:
        raise InputError(
            f"{series.paths[0]}: holds negative values (min {lo:g}) but magnitude images are >= 0; "
            f"is this a real/phase image? (t1-ir takes real data with --signal real)"
        )


def _outputs_for(maps: MapSet, prefix: str, units: str) -> list[OutputFile]:
    outs = []
    for name in maps.names:
        f = 1e3 if (units == "ms" and name in maps.time_params) else 1.0
        u = "ms" if f == 1e3 else maps.units[name]
        outs.append(OutputFile(map_filename(prefix, name, "estimate"), maps.estimates[name], name, "estimate", u,
                               maps.descriptions[name], scale=f))
        if name in maps.stderr:  # a map without any noise information (e.g. a lookup) has no stderr file
            outs.append(OutputFile(map_filename(prefix, name, "stderr"), maps.stderr[name], name, "stderr", u,
                                   f"standard error (1 sigma) of {name}{_convention_note(maps)}", scale=f))
    for q, arr in maps.quality.items():
        outs.append(OutputFile(map_filename(prefix, q, "quality"), arr, q, "quality", QUALITY_UNITS[q],
                               QUALITY_DESCRIPTIONS[q]))
    used = sorted(int(c) for c in maps.status_counts)
    outs.append(OutputFile(map_filename(prefix, "status", "status"), maps.status, "status", "status", "code",
                           "per-voxel fit status (0 = fitted); the codes this map uses are listed in StatusCodes, "
                           "every code in the provenance file (status_codes)",
                           sidecar={"StatusCodes": {str(c): st.STATUS_CODES[c] for c in used}}))
    return outs


def _convention_note(maps: MapSet) -> str:
    conv = (maps.info.get("stderr") or {}).get("convention")
    if conv == "noise":
        return "; from the noise sd (inverse Fisher information)"
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
            f"pass --overwrite to replace them, or choose another -o / --prefix"
        )


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
) -> RunReport:
    """Mask, (noise level,) fit and write the outputs of one series; see the module docstring.

    ``method`` is the command's label for the default output prefix (see :func:`default_prefix`).
    """
    t0 = time.perf_counter() if t0 is None else t0
    prefix = common.prefix or default_prefix(series.paths[0], method)
    check_outputs_free(common, prefix)
    budget = common.max_memory
    check_signal(series, magnitude=magnitude, max_bytes=budget)
    notes = list(notes or [])
    mask, mask_desc = resolve_mask(common.mask, series, budget)
    # files that shape the result are inputs too (provenance lists them with their SHA-256)
    file_inputs = list(extra_inputs or [])
    if common.mask is not None and str(common.mask) not in ("auto", "none"):
        file_inputs.append(common.mask)
    sigma = None
    noise_info = None
    if noise is not None:
        noise_info = {"mode": noise.mode, "sigma": None}
        if noise.needs_sigma:
            sigma, sinfo = resolve_sigma(sigma_spec, series, coils=noise.coils, max_bytes=budget)
            noise_info.update(sigma=sinfo["value"], sigma_source=sinfo["source"])
            if "path" in sinfo:
                file_inputs.append(sinfo["path"])
            if "background_voxels" in sinfo:
                noise_info["background_voxels"] = sinfo["background_voxels"]
                notes.append(f"noise sigma {sinfo['value']:.4g} from {sinfo['background_voxels']} background voxels")
        if noise.mode == "truncate":
            noise_info.update(truncate_factor=noise.factor, min_samples=noise.min_samples)
        if noise.mode == "rician":
            noise_info["coils"] = noise.coils
    if sigma is None and common.stderr == "noise":  # no noise-floor model: the noise level is for the SEs only
        sigma, sinfo = sigma_for_stderr(sigma_spec, series, max_bytes=budget, notes=notes, magnitude=magnitude)
        noise_info = dict(noise_info or {"mode": "none"}, **sinfo)
        if "path" in sinfo:
            file_inputs.append(sinfo["path"])
    series._peak = None  # only the mask and the noise estimate needed it
    slabs = series.slabs(budget)
    if len(slabs) > 1:
        notes.append(f"read in {len(slabs)} slabs to stay within --max-memory")
    maps = None
    for k, (z0, z1) in enumerate(slabs):  # magnitude data were checked to be >= 0 (check_signal): no abs() copy
        part = fit_volume(
            model, series.read(z0, z1), mask=mask[:, :, z0:z1],
            ctx_maps=None if not ctx_maps else {k: np.asarray(v)[:, :, z0:z1] for k, v in ctx_maps.items()},
            noise=noise, sigma=sigma if np.ndim(sigma) < 3 else sigma[:, :, z0:z1], n_jobs=common.n_jobs,
            chunk_size=common.chunk_size, scheduler=common.scheduler, quiet=common.quiet, method=common.engine,
            label="fitting" if len(slabs) == 1 else f"fitting slab {k + 1}/{len(slabs)}",
            dtype=np.float32,  # held in the precision they are written in
            stderr=common.stderr,
        )
        maps = part if len(slabs) == 1 else place_slab(maps, part, series.shape, z0, z1)
    return write_run(series, maps, common=common, prefix=prefix, noise_info=noise_info, options=options,
                     model_info={"parameters": list(model.param_names), **(model_info or {"name": model.name})},
                     extra_inputs=file_inputs, notes=notes, t0=t0, mask_desc=mask_desc)


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
    outs = _outputs_for(maps, prefix, common.units) + list(extra_outputs or [])
    notes = list(notes or [])
    good = maps.status == st.FITTED
    if "rsquared" in maps.quality and good.any() and not np.isfinite(maps.quality["rsquared"][good]).any():
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
    provenance = {
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
    stderr_info = maps.info.get("stderr")
    if stderr_info and provenance["noise"] is not None:
        provenance["noise"] = dict(provenance["noise"], stderr=stderr_info)
    with AtomicWriter(common.out_dir, overwrite=common.overwrite) as w:
        _stage_all(w, outs, series, maps.status, common.n_jobs)
        if common.preview:
            from .plots import stage_previews

            stage_previews(w, maps, prefix, units=common.units, mask=maps.status != st.MASKED)
        provenance["wall_time_s"] = round(time.perf_counter() - t0, 3)
        w.stage_json(f"{prefix}_provenance.json", provenance)
        written = w.commit()
    return RunReport(maps=maps, written=written, provenance=provenance, prefix=prefix, out_dir=common.out_dir,
                     notes=notes)
