"""``qmap t2-spectrum``: multi-component T2 (short-T2 fraction, T2 distributions) from a CPMG train.

Loads a multi-echo spin-echo series, fits a regularised non-negative T2
spectrum with an extended-phase-graph basis and a per-voxel refocusing angle
in every masked voxel (:mod:`qmap.models.t2_spectrum`), estimates the
standard error of the short fraction by a parametric bootstrap on a subsample
(:func:`qmap.models.t2_spectrum.calibrate_fraction_se`), and writes the maps
through the same machinery as every fitting command.
"""

from __future__ import annotations

import dataclasses
import os
import tempfile
import time
from dataclasses import dataclass
from typing import TypedDict, Unpack

import numpy as np

from .. import status as st
from ..checks import check_series_shape
from ..docstrings import shared_parameters
from ..engine import Progress, fit_voxels, resolve_jobs
from ..errors import InputError, OutputError, UsageError, warn
from ..io.writer import OutputFile
from ..maps import QUALITY_DESCRIPTIONS, MapSet, _Gather
from ..models.epg_t2 import echo_spacing
from ..models.t2_spectrum import (
    DEFAULT_CHI2_FACTOR,
    DEFAULT_MIN_SNR,
    DEFAULT_N_T2,
    DEFAULT_T2_RANGE,
    DEFAULT_WINDOW,
    SpectrumModel,
    calibrate_fraction_se,
    fraction_se,
    spectrum_basis,
)
from ..noise_level import (
    MIN_RESIDUAL_VOXELS,
    ArraySource,
    NoiseEstimate,
    estimate_noise,
    object_mask,
    pooled_relative_se,
    pooled_sigma,
    smooth_noise_map,
)
from ..pipeline import CommonOptions, RunReport, Slab, noise_map_entry, prepare_run
from ..record import recorded
from .decay import load_echoes

__all__ = ["MIN_ECHOES", "SE_SUBSAMPLE", "SpectrumOptions", "SpectrumSettings", "fit_t2_spectrum", "run_t2_spectrum"]

#: fewest echoes a spectrum is fitted from
MIN_ECHOES = 8
#: voxels of the bootstrap subsample that calibrates the standard error of the fraction
SE_SUBSAMPLE = 100
#: largest chunk of voxels per work unit (smaller chunks keep both workers busy on small volumes)
SPECTRUM_CHUNK = 4096
#: noisy replicates per subsample voxel
SE_REPLICATES = 10
#: voxels fitted, and written, per slab of a run (at least one slice): a voxel's results with its spectrum
#: (52 float32 with the default grid) are held for one slab only (results do not depend on it)
SLAB_VOXELS = 1 << 15

#: summary note when the noise level cannot be estimated from the background
_NO_BACKGROUND = "noise level from the fit residuals (no usable image background)"
_KEPT = (st.FITTED, st.AT_BOUND, st.LOW_SNR, st.NOT_CONVERGED)


def _check_protocol(te, window, chi2_factor, n_t2, t2_range) -> float:
    te = np.asarray(te, float).ravel()
    if te.size < MIN_ECHOES:
        raise InputError(f"t2-spectrum needs at least {MIN_ECHOES} echoes to resolve a T2 spectrum, got {te.size}; "
                         f"give the whole echo train (typically 32 echoes)")
    try:
        esp = echo_spacing(te)
    except InputError:
        shown = ",".join(f"{1e3 * t:g}ms" for t in te)
        raise InputError(f"echo times {shown} (te= or the sidecars' EchoTime): t2-spectrum needs equally spaced "
                         f"echoes at TE_k = k x ESP (a CPMG train); give the whole train in acquisition order") from None
    lo, hi = window
    if not (0 < lo < hi):
        raise UsageError(f"window=({lo:g}, {hi:g}) s: give (LO, HI) with 0 < LO < HI, e.g. window=(0.01, 0.04)")
    if not chi2_factor >= 1.0:
        raise UsageError(f"chi2_factor={chi2_factor:g}: must be >= 1 (1.02 allows 2% more misfit; 1 = no "
                         f"regularisation)")
    if int(n_t2) < 10:
        raise UsageError(f"n_t2={n_t2}: use at least 10 T2 values (default {DEFAULT_N_T2})")
    if not (0 < t2_range[0] < t2_range[1]):
        raise UsageError(f"t2_range=({t2_range[0]:g}, {t2_range[1]:g}) s: give (LO, HI) with 0 < LO < HI, e.g. "
                         f"t2_range=(0.01, 2)")
    return esp


def _refocus_angle(series, given: float | None) -> float:
    """The nominal refocusing angle: the command line's, else the sidecars' ``RefocusingFlipAngle``, else 180."""
    found = {float(sc["RefocusingFlipAngle"]) for sc in series.sidecars
             if isinstance(sc, dict) and isinstance(sc.get("RefocusingFlipAngle"), (int, float))}
    if given is not None:
        if found and any(abs(v - given) > 0.5 for v in found):
            warn(f"refocus_deg={given:g} differs from the sidecar RefocusingFlipAngle "
                 f"{', '.join(f'{v:g}' for v in sorted(found))}; using {given:g}")
        return float(given)
    if len(found) > 1:
        raise InputError(f"the sidecars give different RefocusingFlipAngle values ({sorted(found)}); give the nominal "
                         f"angle as refocus_deg=DEG")
    if found:
        value = found.pop()
        if not 60.0 <= value <= 180.0:
            raise InputError(f"sidecar RefocusingFlipAngle {value:g} is not a refocusing angle in degrees (60-180); "
                             f"give the nominal angle as refocus_deg=DEG")
        return value
    return 180.0


class SpectrumOptions(TypedDict, total=False):
    """How the T2 spectra are computed: the keyword arguments shared by ``qmap t2-spectrum``
    (:func:`run_t2_spectrum`) and the array API (:func:`fit_t2_spectrum`). Their defaults are those of
    :class:`SpectrumSettings`.

    Keys
    ----
    t1 : float
        Fixed T1 of the EPG basis, s (default 1).
    window : (float, float)
        Short-T2 window, s (default 10-40 ms).
    chi2_factor : float
        Allowed chi^2 increase of the regularised spectrum (default 1.02).
    n_t2, t2_range
        T2 grid: ``n_t2`` log-spaced values over ``t2_range`` (s) (default 40 over 10 ms - 2 s).
    min_snr : float
        First-echo SNR below which a voxel gets status LOW_SNR (default 50).
    se_subsample : int
        Voxels of the bootstrap that calibrates the standard error of the fraction.
    """

    t1: float
    window: tuple[float, float]
    chi2_factor: float
    n_t2: int
    t2_range: tuple[float, float]
    min_snr: float
    se_subsample: int


@dataclass(frozen=True)
class SpectrumSettings:
    """:class:`SpectrumOptions` with their defaults filled in (the one place they are set)."""

    t1: float = 1.0
    window: tuple[float, float] = DEFAULT_WINDOW
    chi2_factor: float = DEFAULT_CHI2_FACTOR
    n_t2: int = DEFAULT_N_T2
    t2_range: tuple[float, float] = DEFAULT_T2_RANGE
    min_snr: float = DEFAULT_MIN_SNR
    se_subsample: int = SE_SUBSAMPLE

    def model(self, te, refocus_deg: float) -> SpectrumModel:
        """The spectrum model of an echo train ``te`` (s) with nominal refocusing angle ``refocus_deg``."""
        esp = _check_protocol(te, self.window, self.chi2_factor, self.n_t2, self.t2_range)
        basis = spectrum_basis(round(esp, 9), int(np.size(te)), t1=float(self.t1), refocus_deg=float(refocus_deg),
                               t2_range=(float(self.t2_range[0]), float(self.t2_range[1])), n_t2=int(self.n_t2))
        return SpectrumModel(basis, window=self.window, chi2_factor=self.chi2_factor, min_snr=self.min_snr)

    def provenance(self) -> dict:
        """The provenance ``options`` these settings contribute."""
        return {"t1_s": float(self.t1), "window_s": [float(self.window[0]), float(self.window[1])],
                "chi2_factor": float(self.chi2_factor), "n_t2": int(self.n_t2),
                "t2_range_s": [float(self.t2_range[0]), float(self.t2_range[1])], "min_snr": float(self.min_snr),
                "se_subsample": int(self.se_subsample)}


class _Collect:
    """Flat (C-order) per-voxel result arrays filled chunk by chunk; ``spectra=False``: without the spectra;
    ``names``: only these results (default: all)."""

    names: tuple[str, ...] = ("fraction", "angle", "angle_se", "t2_short", "t2_long", "chi2", "mu", "rmse",
                              "rsquared", "snr", "sigma", "dof")

    def __init__(self, nvox: int, n_t2: int, *, spectra: bool = True, names: tuple[str, ...] | None = None):
        if names is not None:
            self.names = names
        self.arr = {k: np.full(nvox, np.nan, np.float32) for k in self.names}
        self.spectrum = np.full((nvox, n_t2), np.nan, np.float32) if spectra else None
        self.status = np.full(nvox, st.MASKED, np.uint8)

    def put(self, sub, fit) -> None:
        self.status[sub] = fit.status
        for k in self.names:
            self.arr[k][sub] = getattr(fit, k)
        if self.spectrum is not None:
            self.spectrum[sub] = fit.spectrum

    def place(self, part: _Collect, shape: tuple, box: tuple[slice, slice, slice]) -> None:
        """Copy ``part`` (the results of the voxels ``box`` of the volume ``shape``, flat over the box) into these
        (the results these hold)."""
        dims = self.status.reshape(shape)[box].shape
        self.status.reshape(shape)[box] = part.status.reshape(dims)
        for name in self.names:
            self.arr[name].reshape(shape)[box] = part.arr[name].reshape(dims)

    def slab(self, shape: tuple, z0: int, z1: int) -> _Collect:
        """The results of the slices ``z0:z1`` of the volume ``shape`` (copies, flat over the slab; no spectra)."""
        part = _Collect(0, 0, spectra=False, names=self.names)
        part.arr = {k: v.reshape(shape)[:, :, z0:z1].reshape(-1) for k, v in self.arr.items()}
        part.status = self.status.reshape(shape)[:, :, z0:z1].reshape(-1)
        return part


#: per-voxel results that no whole-volume step changes (the noise level rescales SNR, chi2 and the angle's SE
#: only): a run keeps them in its temporary file with the spectra, not in memory
_SPILLED = ("fraction", "angle", "t2_short", "t2_long", "mu", "rmse", "rsquared")


class _SpectrumFile:
    """The spectra of a run, (X, Y, Z, n) float32, and the 3D results ``names``, in an unnamed temporary file
    (gone when closed).

    The 4D output cannot be appended slab by slab as the maps are: NIfTI stores the whole 3D volume of
    one T2 value after the other. So each fitted slab's spectra go, uncompressed, to their place in that
    order; the output is compressed from here a volume at a time (:meth:`volumes`), and the standard-error
    bootstrap reads its subsample's spectra (:meth:`rows`). The results ``names`` follow as volumes of
    their own (:meth:`values`, :meth:`slab`). None of it is held whole in memory.
    """

    def __init__(self, shape: tuple, n: int, names: tuple[str, ...] = ()):
        self.shape = tuple(int(v) for v in shape)
        self.n = int(n)
        self.names = tuple(names)
        self._plane = self.shape[0] * self.shape[1]
        self._volume = self._plane * self.shape[2]
        try:
            self._fh = tempfile.TemporaryFile(prefix="qmap-spectra-")  # noqa: SIM115 - closed by close()
        except OSError as exc:
            raise OutputError(self._failed(exc)) from None

    def _failed(self, exc: OSError) -> str:
        return (f"cannot write the spectra's temporary file in {tempfile.gettempdir()} ({exc.strerror}); check "
                f"free space there, or set TMPDIR to a folder with room for "
                f"{4 * self._volume * (self.n + len(self.names)) / 2**20:.0f} MB")

    def put(self, spectra: np.ndarray, kept: np.ndarray, y0: int, z0: int, results: dict | None = None) -> None:
        """The spectra (X, ky, kz, n) of the voxels ``[:, y0:y0 + ky, z0:z0 + kz]`` (whole slices, or rows of
        one slice: one byte range per volume), NaN where not ``kept`` (X, ky, kz); ``results[name]`` (X, ky, kz)
        for each of ``names``."""
        if spectra.shape[1] != self.shape[1] and spectra.shape[2] != 1:
            raise ValueError(f"spectra {spectra.shape}: whole slices or rows of one slice")
        blocks = [np.where(kept, spectra[..., j], np.nan) for j in range(self.n)]
        blocks += [(results or {})[name] for name in self.names]
        try:
            for v, block in enumerate(blocks):
                raw = memoryview(np.asarray(block, np.float32).tobytes(order="F"))
                at = 4 * (v * self._volume + z0 * self._plane + y0 * self.shape[0])
                while raw:
                    done = os.pwrite(self._fh.fileno(), raw, at)
                    raw, at = raw[done:], at + done
        except OSError as exc:
            raise OutputError(self._failed(exc)) from None

    def _read(self, count: int, at: int) -> bytes:
        parts = []
        while count > 0:
            got = os.pread(self._fh.fileno(), count, at)
            if not got:
                raise OutputError("the spectra's temporary file is shorter than written (internal check failed)")
            parts.append(got)
            count -= len(got)
            at += len(got)
        return b"".join(parts)

    def rows(self, idx: np.ndarray) -> np.ndarray:
        """The spectra (len(idx), n) of the voxels ``idx`` (flat C-order indices of the volume)."""
        x, y, z = np.unravel_index(np.asarray(idx, np.intp), self.shape)
        rows = np.empty((x.size, self.n), np.float32)
        for i, at in enumerate(x + self.shape[0] * (y + self.shape[1] * z)):  # NIfTI order within a volume
            for j in range(self.n):
                rows[i, j] = np.frombuffer(self._read(4, 4 * (j * self._volume + int(at))), np.float32)[0]
        return rows

    def values(self, name: str, idx: np.ndarray) -> np.ndarray:
        """The result ``name`` (one of ``names``) of the voxels ``idx`` (flat C-order indices), float32."""
        v = self.n + self.names.index(name)
        x, y, z = np.unravel_index(np.asarray(idx, np.intp), self.shape)
        at = x + self.shape[0] * (y + self.shape[1] * z)
        return np.array([np.frombuffer(self._read(4, 4 * (v * self._volume + int(a))), np.float32)[0] for a in at],
                        np.float32)

    def slab(self, name: str, z0: int, z1: int) -> np.ndarray:
        """The result ``name`` of the slices ``z0:z1``, flat in C order (as :class:`_Collect` holds them)."""
        v = self.n + self.names.index(name)
        raw = self._read(4 * self._plane * (z1 - z0), 4 * (v * self._volume + z0 * self._plane))
        return np.frombuffer(raw, np.float32).reshape((*self.shape[:2], z1 - z0), order="F").reshape(-1)

    def volumes(self):
        """The (X, Y, Z) volume of each T2 value in turn."""
        for j in range(self.n):
            raw = self._read(4 * self._volume, 4 * j * self._volume)
            yield np.frombuffer(raw, np.float32).reshape(self.shape, order="F")

    def close(self) -> None:
        self._fh.close()


@dataclass
class _SlabMaps(MapSet):
    """A slab's maps and its other 3D outputs (``extra``: the desc-short / desc-long T2 maps)."""

    extra: list = dataclasses.field(default_factory=list)


def _fit_flat(model, data, mask, sigma, *, n_jobs, chunk_size, scheduler, quiet, label, out: _Collect,
              progress: Progress | None = None) -> int:
    """Fit the voxels of ``data`` (X, Y, Z, m) inside ``mask`` into ``out`` (flat C-order voxel index)."""
    shape = data.shape[:-1]
    finite = np.ones(shape, bool)
    for k in range(data.shape[-1]):
        finite &= np.isfinite(data[..., k])
    finite = finite.reshape(-1)
    sel = np.asarray(mask, bool).reshape(-1).copy()
    flat = np.arange(sel.size)
    out.status[flat[sel & ~finite]] = st.NONFINITE
    sel &= finite
    sig = None
    if sigma is not None:
        sig = np.broadcast_to(np.asarray(sigma, float), shape).reshape(-1)
        good = np.isfinite(sig) & (sig > 0)
        out.status[flat[sel & ~good]] = st.NONFINITE
        sel &= good
    idx = np.flatnonzero(sel)

    def on_chunk(a, b, fit):
        out.put(flat[idx[a:b]], fit)

    fit_voxels(model, _Gather(data, idx),  # rows gathered a chunk at a time
               sigma=None if sig is None else sig[idx], n_jobs=n_jobs,
               chunk_size=chunk_size, scheduler=scheduler, quiet=quiet, label=label, on_chunk=on_chunk,
               progress=progress)
    return idx.size


def _set_sigma(out: _Collect, sigma: np.ndarray, min_snr: float) -> None:
    """Replace the per-voxel residual sigmas by ``sigma`` (flat, one per voxel), rescaling SNR, chi2, angle SE."""
    sigma = np.asarray(sigma, np.float32)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = out.arr["sigma"] / sigma  # old / new
    out.arr["snr"] *= ratio
    out.arr["chi2"] *= ratio * ratio
    out.arr["angle_se"] /= ratio
    out.arr["sigma"][:] = np.where(np.isfinite(out.arr["sigma"]), sigma, np.nan)
    low = np.isin(out.status, (st.FITTED, st.LOW_SNR))
    out.status[low] = np.where(out.arr["snr"][low] < min_snr, st.LOW_SNR, st.FITTED)


def _fitted(out: _Collect) -> np.ndarray:
    """Voxels with a fitted spectrum and a residual sigma."""
    return np.isin(out.status, (st.FITTED, st.LOW_SNR, st.AT_BOUND)) & np.isfinite(out.arr["sigma"])


def _pool_sigma(out: _Collect, min_snr: float) -> float | None:
    """Replace per-voxel residual sigmas by their median over the fitted voxels (rescaling SNR, chi2, angle SE)."""
    fitted = _fitted(out)
    if not fitted.any():
        return None
    pooled = float(np.median(out.arr["sigma"][fitted]))
    if not pooled > 0:
        return None
    _set_sigma(out, np.full(out.status.size, pooled), min_snr)
    return pooled


def _local_sigma(out: _Collect, series, mask, budget, min_snr: float):
    """``--sigma local``: a smooth noise map from the fitted voxels' unregularised residuals and the background.

    The map is :func:`qmap.noise_level.smooth_noise_map`, the same as every command's ``--sigma local``
    (there, from the residuals of a plain fit of the command's model; here the spectrum's own unregularised
    NNLS residuals, ``RSS_min`` with ``echoes - non-zero amplitudes`` degrees of freedom, so no second fit is
    needed). The first, global level is the background's, else the robust pool of the residuals. The map
    replaces the per-voxel residual sigmas (SNR, chi2 and the angle's SE are rescaled).
    """
    fitted = _fitted(out)
    idx = np.flatnonzero(fitted)
    if idx.size < MIN_RESIDUAL_VOXELS:
        raise InputError(f"sigma='local': only {idx.size} voxels have a fitted spectrum, too few for a noise map; "
                         f"give sigma=VALUE, a noise map, or sigma='auto'")
    dof = out.arr["dof"][idx].astype(float)
    rss = out.arr["sigma"][idx].astype(float) ** 2 * dof
    try:
        first = estimate_noise(series, mask=np.asarray(mask, bool), max_bytes=budget)  # the background
    except InputError:
        first = NoiseEstimate(sigma=pooled_sigma(rss, dof), source="residuals", n_voxels=int(idx.size),
                              relative_precision=pooled_relative_se(dof), coils=1)
    est = smooth_noise_map(series, idx=idx, rss=rss, dof=dof, mask=np.asarray(mask, bool),
                           obj=object_mask(series, budget), first=first, max_bytes=budget)
    sig_map = np.asarray(est.sigma, np.float32)
    _set_sigma(out, sig_map.reshape(-1), min_snr)
    return sig_map, est


def _calibrate(model, out: _Collect, *, n_sub: int, replicates: int, spectra: _SpectrumFile | None = None) -> dict:
    """The standard-error calibration on a subsample of fitted voxels (their spectra from ``out``, or ``spectra``)."""
    good = np.flatnonzero((out.status == st.FITTED) & np.isfinite(out.arr["snr"]) & (out.arr["snr"] > 0))
    if good.size == 0:
        return {"k0": float("nan"), "k1": 0.0, "n_voxels": 0, "replicates": replicates}
    pick = good[np.unique(np.linspace(0, good.size - 1, min(n_sub, good.size)).astype(int))]
    if spectra is not None:
        rows = spectra.rows(pick)
        angle = spectra.values("angle", pick) if "angle" in spectra.names else out.arr["angle"][pick]
    else:
        angle = out.arr["angle"][pick]
        assert out.spectrum is not None, "the spectra are held"
        rows = out.spectrum[pick]
    cal = calibrate_fraction_se(model, rows.astype(float), angle.astype(float),
                                out.arr["sigma"][pick].astype(float), replicates=replicates)
    return cal


def _mapset(model, out: _Collect, shape, se, n_fitted: int) -> MapSet:
    kept = np.isin(out.status, _KEPT)

    def vol(a):
        a = np.where(kept, a, np.nan).astype(np.float32)
        return a.reshape(shape)

    angle_se = np.where(np.isfinite(out.arr["angle_se"]), out.arr["angle_se"], np.nan)
    estimates = {"MWF": vol(out.arr["fraction"]), "RefocusAngle": vol(out.arr["angle"])}
    stderr = {"MWF": vol(se), "RefocusAngle": vol(angle_se)}
    units = {"MWF": "fraction", "RefocusAngle": "deg"}
    lo, hi = model.window
    descriptions = {
        "MWF": f"fraction of the T2 spectrum with T2 in [{1e3 * lo:g}, {1e3 * hi:g}] ms (short-T2 / myelin water "
               f"fraction)",
        "RefocusAngle": "fitted refocusing flip angle of the echo train, degrees",
    }
    quality = {"rsquared": vol(out.arr["rsquared"]), "rmse": vol(out.arr["rmse"]), "chi2": vol(out.arr["chi2"]),
               "regweight": vol(out.arr["mu"]), "snr": vol(out.arr["snr"])}
    info = {"model": model.name, "parameters": list(model.param_names), "noise_floor": "none",
            "n_fitted": int(n_fitted)}
    return MapSet(estimates, stderr, units, descriptions, (), quality, out.status.reshape(shape), info)


def _extra_outputs(model, prefix: str, units: str) -> list[OutputFile]:
    """The desc-short and desc-long T2 maps and the 4D spectrum (descriptions: the files are streamed)."""
    f = 1e3 if units == "ms" else 1.0
    u = "ms" if units == "ms" else "s"
    lo, hi = model.window
    res = []
    texts = (f"geometric-mean T2 of the spectrum inside [{1e3 * lo:g}, {1e3 * hi:g}] ms (NaN where that part is empty)",
             f"geometric-mean T2 of the spectrum above {1e3 * hi:g} ms (NaN where that part is empty)")
    for desc, text in (("short", texts[0]), ("long", texts[1])):
        res.append(OutputFile(f"{prefix}_desc-{desc}_T2map.nii.gz", None, f"T2{desc}", "estimate", u, text, scale=f,
                              allow_nonfinite=True))
    grid = model.basis.t2 * f
    res.append(OutputFile(
        f"{prefix}_desc-spectrum_T2distmap.nii.gz", None, "T2spectrum", "estimate", "a.u.",
        "regularised NNLS T2 spectrum: amplitude (signal units) at each T2 of the grid along the 4th axis",
        sidecar={"T2Values": [float(v) for v in grid], "T2Units": u}, allow_nonfinite=True,
    ))
    return res


def _slab_steps(shape: tuple) -> list[tuple[int, int]]:
    """Ranges of slices of about :data:`SLAB_VOXELS` voxels (at least one slice) of a volume ``shape``."""
    k = max(1, SLAB_VOXELS // max(1, shape[0] * shape[1]))
    return [(z, min(z + k, shape[2])) for z in range(0, shape[2], k)]


def _fit_parts(shape: tuple, nz: int) -> list[tuple[slice, slice, slice]]:
    """Boxes of about :data:`SLAB_VOXELS` voxels over ``nz`` slices of a volume ``shape``: whole slices, or the
    rows of one slice when a slice is larger."""
    nx, ny = shape[0], shape[1]
    if nx * ny <= SLAB_VOXELS:
        k = SLAB_VOXELS // max(1, nx * ny)
        return [(slice(0, nx), slice(0, ny), slice(z, min(z + k, nz))) for z in range(0, nz, k)]
    k = max(1, SLAB_VOXELS // nx)
    return [(slice(0, nx), slice(y, min(y + k, ny)), slice(z, z + 1)) for z in range(nz) for y in range(0, ny, k)]


@shared_parameters(keys=(SpectrumOptions,))
def fit_t2_spectrum(
    data,
    te,
    *,
    refocus_deg: float = 180.0,
    sigma=None,
    mask=None,
    n_jobs: int | None = None,
    chunk_size: int = 2048,
    **options: Unpack[SpectrumOptions],
) -> tuple[MapSet, dict]:
    """Fit T2 spectra in every voxel of a multi-echo spin-echo magnitude series (array API).

    Parameters
    ----------
    data : (X, Y, Z, m) array_like
        Magnitudes of the whole echo train (m >= 8).
    te : (m,) array_like
        Echo times, s, equally spaced at TE_k = k * ESP.
    refocus_deg : float
        Nominal refocusing angle, degrees (searched from half of it to 180).
    sigma : "auto", float or (X, Y, Z) ndarray, optional
        Noise sd, signal units. ``"auto"``: as the command's default, from the image background (a 4D
        ``data`` with background around the object), else the median of the per-voxel residual sd of the
        unregularised spectra. Default (None): per voxel from the unregularised residuals.
    mask : (X, Y, Z) array_like of bool, optional
    n_jobs, chunk_size
        Execution (results do not depend on them).
    **options
        The keyword options of :class:`SpectrumOptions`; see Other Parameters.

    Returns
    -------
    maps : MapSet
        ``maps["MWF"]`` (fraction), ``maps["RefocusAngle"]`` (deg) with
        standard errors, quality maps and status.
    extra : dict
        ``t2_short``, ``t2_long`` (s), ``spectrum`` (X, Y, Z, n), ``t2`` (the
        grid, s), ``se_calibration`` and, with ``sigma="auto"``, ``noise`` (the value and its source).
    """
    data = np.asarray(data)
    if data.ndim == 2:
        data = data[:, None, None, :]
    settings = SpectrumSettings(**options)
    model = settings.model(te, refocus_deg)
    shape = data.shape[:-1]
    noise = None
    if isinstance(sigma, str):
        if sigma != "auto":
            raise ValueError(f"sigma={sigma!r}: expected 'auto', a positive number or an array of them (a local "
                             f"noise map: the command line's --sigma local)")
        noise = _array_background_sigma(data, mask)
        sigma = noise["sigma"]  # None: pooled from the residuals after the fit
    mask = np.ones(shape, bool) if mask is None else np.asarray(mask, bool)
    out = _Collect(int(np.prod(shape)), model.basis.t2.size)
    n = _fit_flat(model, data, mask, sigma, n_jobs=n_jobs, chunk_size=chunk_size, scheduler=None, quiet=True,
                  label="fitting", out=out)
    if noise is not None and noise["sigma"] is None:
        noise.update(sigma=_pool_sigma(out, model.min_snr),
                     source="median of the per-voxel residual sd of the unregularised spectra (no usable background)")
    cal = _calibrate(model, out, n_sub=settings.se_subsample, replicates=SE_REPLICATES)
    se = fraction_se(cal, out.arr["fraction"], out.arr["snr"])
    maps = _mapset(model, out, shape, se, n)
    kept = np.isin(out.status, _KEPT)
    assert out.spectrum is not None, "the spectra are held"
    extra = {
        "t2_short": np.where(kept, out.arr["t2_short"], np.nan).reshape(shape),
        "t2_long": np.where(kept, out.arr["t2_long"], np.nan).reshape(shape),
        "spectrum": np.where(kept[:, None], out.spectrum, np.nan).reshape(*shape, -1),
        "t2": model.basis.t2.copy(),
        "se_calibration": cal,
    }
    if noise is not None:
        extra["noise"] = noise
    return maps, extra


def _array_background_sigma(data: np.ndarray, mask) -> dict:
    """``sigma="auto"`` of the array API: the background's noise level (as the command), or None (no usable
    background: the caller pools the fit residuals) with the reason."""
    if data.ndim != 4:
        return {"sigma": None, "background": "no image geometry (data of voxel rows)"}
    try:
        est = estimate_noise(ArraySource(data), mask=None if mask is None else np.asarray(mask, bool))
    except InputError as exc:
        return {"sigma": None, "background": str(exc)}
    return {"sigma": float(est.sigma), "source": est.source, "relative_precision": est.relative_precision,
            "notes": list(est.notes)}


@recorded
@shared_parameters(keys=(SpectrumOptions,))
def run_t2_spectrum(
    inputs,
    *,
    common: CommonOptions,
    te=None,
    refocus_deg: float | None = None,
    sigma="auto",
    **options: Unpack[SpectrumOptions],
) -> RunReport:
    """Fit T2 spectra to a multi-echo spin-echo series and write the maps (see the module docstring).

    Parameters
    ----------
    inputs, common, te
        The echo train, as in :func:`~qmap.workflows.decay.run_t2star`.
    refocus_deg : float, optional
        Nominal refocusing angle, degrees; default: the sidecar's
        ``RefocusingFlipAngle`` when present, else 180.
    sigma : "auto", "local", float or path
        Noise sd: from the image background (falling back to the pooled fit
        residuals when there is no usable background); ``"local"``: a smooth
        noise map from the fit residuals and the background (written as
        ``{prefix}_desc-noise_sigmamap``); a value; or a noise map.
    **options
        The keyword options of :class:`SpectrumOptions`; see Other Parameters.
    """
    t0 = time.perf_counter()
    series, notes = load_echoes(inputs, te=te, drop_first=False, common=common)
    te_all = np.asarray(series.acquisition["EchoTime"], float)
    refocus_deg = _refocus_angle(series, refocus_deg)
    settings = SpectrumSettings(**options)
    model = settings.model(te_all, refocus_deg)
    # the noise level is for the standard errors and the SNR only; without a usable background it comes from
    # the pooled fit residuals (below), quietly
    local = str(sigma) == "local"  # the map comes from this fit's residuals (below): nothing to estimate first
    # variant "spectrum": not the prefix of a plain t2 fit of the same series (batch --t2-spectrum names it alike)
    run = prepare_run(series, common, sigma_spec=sigma, sigma_for_se=not local, t0=t0, notes=notes,
                      fallback=("", _NO_BACKGROUND),
                      warn_fallback=False, variant="spectrum")
    check_series_shape(series, model, run.mask, enabled=common.series_check, max_bytes=common.max_memory)
    sig = run.sigma
    info = run.noise_info or {}
    noise_info = {"mode": "gaussian (magnitude above the noise floor)", "sigma": info.get("sigma"),
                  "sigma_source": info.get("source") if sig is not None else
                  "per voxel from the unregularised NNLS residuals (no usable background)"}
    if info.get("noise_map"):
        noise_info["noise_map"] = info["noise_map"]
    run.noise_info = noise_info
    shape = series.shape
    n_t2 = model.basis.t2.size
    # what the noise level and the standard errors need of every voxel is held whole (status, sigma, SNR, chi2,
    # the angle's SE, dof: 21 bytes a voxel); the spectra and the other results go to a temporary file
    out = _Collect(int(np.prod(shape)), n_t2, spectra=False,
                   names=tuple(k for k in _Collect.names if k not in _SPILLED))
    n_mask = int(np.count_nonzero(run.mask))
    workers = resolve_jobs(common.n_jobs)
    # chunks: at most SPECTRUM_CHUNK voxels, and at least one per worker (results do not depend on it)
    chunk = max(256, min(common.chunk_size or SPECTRUM_CHUNK, SPECTRUM_CHUNK, -(-n_mask // workers)))
    spectra = _SpectrumFile(shape, n_t2, _SPILLED)
    try:
        progress = Progress(n_mask, "fitting", quiet=common.quiet)

        def fit_slab(slab: Slab) -> int:
            """Fit a slab as read (``--max-memory``), in parts of about SLAB_VOXELS voxels (one part on Dask)."""
            nz = slab.data.shape[2]
            n = 0
            whole = (slice(None), slice(None), slice(0, nz))
            for box in [whole] if common.scheduler else _fit_parts(shape, nz):
                data = slab.data[box]
                dims = data.shape[:3]
                sub = _Collect(int(np.prod(dims)), n_t2)
                sig = slab.sigma
                if isinstance(sig, np.ndarray) and sig.ndim == 3:
                    sig = sig[box]
                n += _fit_flat(model, data, slab.mask[box], sig, n_jobs=common.n_jobs, chunk_size=chunk,
                               scheduler=common.scheduler, quiet=common.quiet, label=slab.label, out=sub,
                               progress=progress)
                y0, z0 = box[1].start or 0, slab.z0 + box[2].start
                out.place(sub, shape, (box[0], box[1], slice(z0, z0 + dims[2])))
                assert sub.spectrum is not None
                kept = np.isin(sub.status, _KEPT)  # a new noise level below moves voxels only within _KEPT
                spectra.put(sub.spectrum.reshape(*dims, n_t2), kept.reshape(dims), y0, z0,
                            {k: sub.arr[k].reshape(dims) for k in _SPILLED})
                del sub, data
            return n

        n_fitted = sum(run.for_slabs(fit_slab))
        progress.finish()
        return _finish_run(run, model, settings, out, spectra, n_fitted, local=local, sigma=sigma,
                           refocus_deg=refocus_deg)
    finally:
        spectra.close()


def _finish_run(run, model, settings: SpectrumSettings, out: _Collect, spectra: _SpectrumFile, n_fitted: int, *,
                local: bool, sigma, refocus_deg: float) -> RunReport:
    """The noise level (``local`` / from the residuals), the standard errors, and the outputs written slab by slab."""
    common, series, shape = run.common, run.series, run.series.shape
    sig = run.sigma
    noise_info = run.noise_info
    if local:
        sig_map, est = _local_sigma(out, series, run.mask, common.max_memory, model.min_snr)
        name = f"{run.prefix}_desc-noise_sigmamap.nii.gz"
        noise_info.update(est.provenance("local"))
        noise_info["sigma_source"] = (f"noise map {(common.out_dir / name).absolute()} (--sigma local: the "
                                      f"unregularised NNLS residuals and the image background, smoothed)")
        run.notes.append(f"noise sigma: local map, median {est.value:.4g} ({est.n_voxels} voxels)")
        run.notes.extend(est.notes)
        for w in est.warnings:
            warn(w)
        noise_info["noise_map"] = noise_map_entry(common.out_dir / name, written=True)
        run.extra_outputs.append(OutputFile(name, sig_map, "sigma", "quality", "a.u.",
                                            "local noise standard deviation per real channel (--sigma local)"))
    elif sig is None:
        run.notes.remove(_NO_BACKGROUND)  # said below, with the value
        pooled = _pool_sigma(out, model.min_snr)
        if pooled is not None:
            noise_info.update(sigma=pooled, sigma_source="median of the per-voxel residual sd sqrt(RSS/(echoes - "
                                                         "peaks)) of the unregularised spectra (no usable background)")
            run.notes.append(f"noise sigma {pooled:.4g} from the fit residuals (no usable image background)")
    cal = _calibrate(model, out, n_sub=settings.se_subsample, replicates=SE_REPLICATES, spectra=spectra)
    b = model.basis
    provenance = {"refocus_deg": float(refocus_deg), **settings.provenance(),
                  "sigma": None if sigma is None else str(sigma)}
    model_info = {
        "name": "t2spectrum",
        "equation": "y_k = sum_j s_j E_k(T2_j, alpha; ESP, T1), s_j >= 0; min ||A s - y||^2 + mu ||s||^2 with "
                    "chi2 = chi2_factor x chi2_min",
        "basis": "extended phase graphs (qmap.epg.cpmg_echoes), ideal 90 deg excitation, T1 fixed",
        "echo_spacing_s": b.esp,
        "t2_grid_s": [float(v) for v in b.t2],
        "angle_search_deg": [float(v) for v in b.angles],
        "angle_step_deg": float(b.fine_angles[1] - b.fine_angles[0]),
        "stderr": {"MWF": "parametric bootstrap on a subsample calibrating SE = (k0 + k1 MWF) / SNR",
                   "RefocusAngle": "curvature of the NNLS residual over the angle: var = 2 sigma^2 / RSS''"},
        "se_calibration": cal,
        "references": ["Whittall & MacKay, J Magn Reson 1989;84:134",
                       "Prasloski et al., Magn Reson Med 2012;67:1803"],
    }
    run.notes.append(f"T2 grid: {b.t2.size} values {1e3 * b.t2[0]:g} ms - {b.t2[-1]:g} s; echo spacing "
                 f"{1e3 * b.esp:.4g} ms; refocusing angle searched {b.angles[0]:g}-180 deg")
    if np.isfinite(cal.get("k0", np.nan)):
        run.notes.append(f"standard error of MWF calibrated on {cal['n_voxels']} voxels x {cal['replicates']} replicates "
                     f"(median SD {cal['median_sd']:.3g})")
    extra = _extra_outputs(model, run.prefix, common.units)
    run.extra_outputs.extend(extra)  # descriptions: the files are streamed
    stream = run.map_stream(extra=lambda part: part.extra)
    try:
        kept_all = np.isin(out.status, _KEPT)
        for z0, z1 in [(0, shape[2])] if common.scheduler else _slab_steps(shape):
            part = out.slab(shape, z0, z1)
            for k in _SPILLED:
                part.arr[k] = spectra.slab(k, z0, z1)
            dims = (shape[0], shape[1], z1 - z0)
            se = fraction_se(cal, part.arr["fraction"], part.arr["snr"])
            maps = _mapset(model, part, dims, se, n_fitted if z0 == 0 else 0)  # n_fitted: summed over the slabs
            kept = kept_all.reshape(shape)[:, :, z0:z1].reshape(-1)
            t2s = [dataclasses.replace(o, data=np.where(kept, part.arr[key], np.nan).astype(np.float32).reshape(dims))
                   for o, key in zip(extra[:2], ("t2_short", "t2_long"), strict=True)]
            stream.add(_SlabMaps(**{f.name: getattr(maps, f.name) for f in dataclasses.fields(MapSet)}, extra=t2s),
                       z0, z1)
            del maps, t2s, part, se
        del kept_all
        stream.add_file(extra[2], (*shape, model.basis.t2.size), spectra.volumes())
        streamed = stream.maps()
    except BaseException:
        stream.abort()
        raise
    return run.write(streamed, options=provenance, model_info=dict(model_info, parameters=list(model.param_names)))


# documented quality maps of this command (for the README and --help)
QUALITY = {k: QUALITY_DESCRIPTIONS[k] for k in ("rsquared", "rmse", "chi2", "regweight", "snr")}
