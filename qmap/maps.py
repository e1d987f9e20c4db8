"""Fitting a whole volume: masking, bad-voxel screening, the engine, and named maps."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, TypedDict

import numpy as np

from .engine import fit_voxels, status_counts
from .fitting import status as st
from .fitting.noise_floor import NoiseFloor
from .fitting.problem import FitProblem
from .models.base import SeparableModel

__all__ = ["Execution", "MapSet", "execution_kwargs", "fit_volume", "join_info", "place_slab"]


class Execution(TypedDict, total=False):
    """How an array fit runs: the keyword arguments shared by the ``fit_*`` array functions.

    Keys
    ----
    n_jobs : int or None
        Local worker threads (default: all cores).
    engine : {"fast", "lmfit"}
        The vectorised solver (default) or per-voxel lmfit reference fits.
    chunk_size : int or None
        Voxels per work unit (default :data:`~qmap.defaults.DEFAULT_CHUNK`, for one-exponential fits
        :data:`~qmap.defaults.EXPONENTIAL_CHUNK`); results do not depend on it.
    scheduler : str or None
        Address of an existing Dask distributed cluster that runs the chunks.
    """

    n_jobs: int | None
    engine: str
    chunk_size: int | None
    scheduler: str | None


def execution_kwargs(execution: Mapping[str, Any]) -> dict[str, Any]:
    """The :func:`fit_volume` keyword arguments of :class:`Execution` options.

    Raises
    ------
    TypeError
        A name that is not an :class:`Execution` option (as for any unknown keyword argument).
    """
    unknown = sorted(set(execution) - Execution.__optional_keys__)
    if unknown:
        raise TypeError(f"unexpected keyword argument(s) {', '.join(map(repr, unknown))}; the execution options are "
                        f"{', '.join(sorted(Execution.__optional_keys__))}")
    return {"n_jobs": execution.get("n_jobs"), "method": execution.get("engine", "fast"),
            "scheduler": execution.get("scheduler"), "chunk_size": execution.get("chunk_size")}


@dataclass
class MapSet:
    """The maps of one fit, as volume-shaped arrays.

    Attributes
    ----------
    estimates, stderr : dict of str -> (X, Y, Z) ndarray
        Parameter estimates and their standard errors (1 sigma), seconds for
        times, 1/s for rates, signal units for amplitudes.
    units, descriptions : dict of str -> str
    time_params : tuple of str
        Parameters that are times (converted by ``--units ms`` on writing).
    quality : dict of str -> (X, Y, Z) ndarray
        ``rsquared`` and ``rmse`` (RMS residual, signal units), and
        ``nsamples`` when samples were dropped.
    status : (X, Y, Z) uint8 ndarray
        Per-voxel status code (see :data:`qmap.fitting.status.STATUS_CODES`).
    info : dict
        Model, noise handling, sigma and counts, for provenance.

    ``maps["T2star"]`` is short for ``maps.estimates["T2star"]``.
    """

    estimates: Mapping[str, np.ndarray]  # a dict, or maps read from their files (qmap.streaming.FileMaps)
    stderr: Mapping[str, np.ndarray]
    units: dict
    descriptions: dict
    time_params: tuple
    quality: Mapping[str, np.ndarray]
    status: np.ndarray
    info: dict = field(default_factory=dict)

    def __getitem__(self, name: str) -> np.ndarray:
        return self.estimates[name]

    @property
    def names(self) -> list[str]:
        return list(self.estimates)

    @property
    def status_counts(self) -> dict[str, int]:
        return status_counts(self.status)


QUALITY_UNITS = {"rsquared": "1", "rmse": "a.u.", "nsamples": "1", "residualsd": "a.u.", "chi2": "1",
                 "regweight": "1", "snr": "1"}
#: why a quality map holds NaN in fitted voxels
EXACTLY_DETERMINED = ("NaN where the fit is exactly determined (as many samples as free parameters, e.g. 2-angle VFA "
                      "or a B1 map from two images): the residuals are zero by construction, so the fit quality is "
                      "not measurable")
QUALITY_DESCRIPTIONS = {
    "rsquared": f"coefficient of determination R^2 of the fit (1 = perfect); {EXACTLY_DETERMINED}",
    "rmse": f"root-mean-square residual of the fit, signal units; {EXACTLY_DETERMINED}",
    "nsamples": "number of samples used by the fit",
    "residualsd": "per-voxel residual sd sqrt(RSS/(m_used - P)), signal units: about the noise sd where the model "
                  "fits; the scale of the standard errors under --stderr residual",
    "chi2": "chi-squared of the fit: sum of squared residuals / sigma^2 (about the number of samples when the model "
            "fits and sigma is right)",
    "regweight": "regularisation weight mu of the T2 spectrum, relative to the mean squared norm of the basis trains "
                 "(0 = not regularised)",
    "snr": "signal-to-noise ratio of the first echo (fitted amplitude / sigma)",
}


#: the order of the voxels of a volume as fit_volume visits them and lays out its maps: Fortran order, the
#: order of a NIfTI file's voxels (its arrays' flat views; a slab's maps are appended to the files as they
#: are, without a transposed copy). The results do not depend on it: every voxel's arithmetic is its own.
VOXEL_ORDER: Literal["F"] = "F"


class _Gather:
    """Rows ``idx`` (flat voxel indices in ``order``, "C" or "F") of a (..., m) array, gathered a chunk at a time.

    Avoids holding a copy of every selected voxel's samples: the engine asks for ``rows[a:b]``.
    """

    def __init__(self, data: np.ndarray, idx: np.ndarray, order: Literal["C", "F"] = "C"):
        self.data = data
        self.idx = idx
        self.order = order
        self.shape = (idx.size, data.shape[-1])

    def __getitem__(self, sl: slice) -> np.ndarray:
        return self.data[np.unravel_index(self.idx[sl], self.data.shape[:-1], order=self.order)]


def fit_volume(
    model: SeparableModel,
    data: np.ndarray,
    *,
    mask: np.ndarray | None = None,
    ctx_maps: dict | None = None,
    noise: NoiseFloor | None = None,
    sigma=None,
    n_jobs: int | None = None,
    chunk_size: int | None = None,
    scheduler: str | None = None,
    quiet: bool = True,
    invalid_ctx_status: int = st.OUTSIDE_B1,
    method: str = "fast",
    label: str = "fitting",
    dtype=np.float64,
    stderr: str = "noise",
    input_se: dict | None = None,
    progress=None,
) -> MapSet:
    """Fit ``model`` in every voxel of ``data`` (X, Y, Z, m) inside ``mask``.

    Voxels with a non-finite sample are not fitted (status
    :data:`~qmap.fitting.status.NONFINITE`) and do not affect their
    neighbours; voxels whose per-voxel model input (``ctx_maps``, e.g. B1) is
    not finite get ``invalid_ctx_status``.

    Standard errors (:mod:`qmap.fitting.uncertainty`): with ``sigma`` given
    and ``stderr="noise"`` (default) the inverse Fisher information with that
    noise sd; otherwise the per-voxel residual variance. ``input_se`` maps a
    ``ctx_maps`` name to the standard error of that input (same shape as the
    volume), propagated to first order into the covariance.
    ``maps.info["stderr"]`` records the convention. ``progress`` (:class:`qmap.engine.Progress`) is a
    display shared with the other slabs of a run.
    """
    from .fitting.uncertainty import CONVENTION_TEXT, add_input_covariance, input_sensitivity

    problem = FitProblem.create(model, noise=noise, sigma=sigma, stderr=stderr, method=method)  # checked once
    noise = problem.noise
    data = np.asarray(data)
    if data.ndim == 1:
        data = data[None, :]
    shape = data.shape[:-1]
    m = data.shape[-1]
    problem.check_samples(m)
    if stderr == "residual" and sigma is not None and m <= len(noise.wrap(model).param_names):
        # exactly determined (e.g. two flip angles for M0 and T1): no voxel has a residual degree of freedom,
        # so the residual convention has nothing to go on; the whole map takes the known noise sd and says so
        # (one convention per map, never sigma in some voxels of a map labelled "residual")
        stderr = "noise"
    nvox = int(np.prod(shape))
    # no reshaped copy of the series: only the selected voxels are gathered below, in VOXEL_ORDER (the
    # files' order: a NIfTI volume's flat view, the maps written without transposing)
    finite: np.ndarray = np.ones(shape, bool, order=VOXEL_ORDER)
    for k in range(m):  # one volume at a time: no (voxels x samples) temporary
        finite &= np.isfinite(data[..., k])
    finite = finite.reshape(-1, order=VOXEL_ORDER)
    sel = (np.ones(nvox, bool) if mask is None
           else np.asarray(mask, bool).reshape(-1, order=VOXEL_ORDER).copy())
    status = np.full(nvox, st.MASKED, np.uint8)
    status[sel & ~finite] = st.NONFINITE
    sel &= finite
    ctx = None
    if ctx_maps:
        ctx_flat = {k: np.asarray(v, float).reshape(-1, order=VOXEL_ORDER) for k, v in ctx_maps.items()}
        ok = np.all([np.isfinite(v) for v in ctx_flat.values()], axis=0)
        status[sel & ~ok] = invalid_ctx_status
        sel &= ok
    sig_flat = None
    if sigma is not None:
        sig_flat = np.broadcast_to(np.asarray(sigma, float), shape).reshape(-1, order=VOXEL_ORDER)
        ok_sigma = np.isfinite(sig_flat) & (sig_flat > 0)
        if noise.needs_sigma:
            status[sel & ~ok_sigma] = st.NONFINITE
            sel &= ok_sigma
    idx = np.flatnonzero(sel)
    if nvox < 2**31:  # half the memory of int64 (the index of every fitted voxel is held through the fit)
        idx = idx.astype(np.int32)
    if ctx_maps:
        ctx = {k: v[idx] for k, v in ctx_flat.items()}
    # the maps are filled chunk by chunk as results arrive: no all-voxel copy of parameters and
    # covariances is ever held; during the fit each map holds only the fitted voxels (idx order) and
    # is spread onto the volume at the end, one map at a time (peak memory: the masked voxels' maps)
    P = len(noise.wrap(model).param_names)
    template = noise.report(model, np.ones((1, P)), np.ones((1, P, P)))
    n_fit = idx.size
    estimates = {d.name: np.full(n_fit, np.nan, dtype) for d in template}
    stderr_maps = {d.name: np.full(n_fit, np.nan, dtype) for d in template}
    units = {d.name: d.units for d in template}
    descriptions = {d.name: d.description for d in template}
    times = [d.name for d in template if d.is_time]
    quality = {"rsquared": np.full(n_fit, np.nan, dtype), "rmse": np.full(n_fit, np.nan, dtype),
               "residualsd": np.full(n_fit, np.nan, dtype)}
    if noise.weighted:
        quality["nsamples"] = np.zeros(n_fit, dtype)
    # values are kept where a fit was made (status 0, at bound, not converged, ill-conditioned)
    kept_codes = (st.FITTED, st.AT_BOUND, st.NOT_CONVERGED, st.ILL_CONDITIONED)
    fit_model = noise.wrap(model)
    se_in = {k: np.broadcast_to(np.asarray(v, float), shape).reshape(-1, order=VOXEL_ORDER)[idx]
             for k, v in (input_se or {}).items()}

    kept = np.zeros(256, bool)
    kept[list(kept_codes)] = True

    def on_chunk(a: int, b: int, fit) -> None:
        status[idx[a:b]] = fit.status
        keep_mask = kept[fit.status]
        # the chunk's voxels that keep their values, and their positions in the fitted-voxel maps: slices when
        # all do (the rule; no fancy indexing), else indices
        keep: slice | np.ndarray
        at: slice | np.ndarray
        if keep_mask.all():
            keep, at = slice(None), slice(a, b)
        else:
            keep = np.flatnonzero(keep_mask)
            at = a + keep
        cov = fit.cov
        for name, se in se_in.items():  # an input's own uncertainty (e.g. the B1 map's), to first order
            assert ctx is not None, "an input with a standard error is one of the model inputs"
            cctx = {k: v[a:b] for k, v in ctx.items()}
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                cov = add_input_covariance(cov, input_sensitivity(fit_model, fit.params, cctx, name), se[a:b])
        for d in noise.report(model, fit.params, cov):
            estimates[d.name][at] = np.asarray(d.value, float)[keep]
            stderr_maps[d.name][at] = np.asarray(d.stderr, float)[keep]
        quality["rsquared"][at] = fit.r2[keep]
        quality["rmse"][at] = fit.rmse[keep]
        dof = fit.n_used[keep] - P
        with np.errstate(invalid="ignore", divide="ignore"):
            quality["residualsd"][at] = np.where(dof > 0, np.sqrt(fit.rss[keep] / np.maximum(dof, 1)), np.nan)
        if "nsamples" in quality:
            quality["nsamples"][a:b] = fit.n_used

    fit_voxels(
        model, _Gather(data, idx, VOXEL_ORDER), ctx=ctx, noise=noise, sigma=_per_voxel(sigma, sig_flat, idx),
        n_jobs=n_jobs, chunk_size=chunk_size, scheduler=scheduler, quiet=quiet, method=method, label=label,
        on_chunk=on_chunk, stderr=stderr, progress=progress,
    )
    for maps_ in (estimates, stderr_maps, quality):
        for key in list(maps_):  # replaced one at a time: the fitted-voxel array is freed as its volume is made
            full = np.full(nvox, 0 if key == "nsamples" else np.nan, dtype)
            full[idx] = maps_[key]
            maps_[key] = full.reshape(shape, order=VOXEL_ORDER)
    stderr_out = stderr_maps
    info: dict[str, Any] = {
        "model": model.name,
        "parameters": list(model.param_names),
        "noise_floor": str(noise.mode),
        "n_fitted": int(idx.size),
    }
    used = stderr if sigma is not None else "residual"
    info["stderr"] = {"convention": used, "meaning": CONVENTION_TEXT[used]}
    if used == "noise" and sig_flat is not None and np.ndim(sigma) > 0:
        # one convention per map: a fitted voxel without a usable noise sd (a noise map's hole) has NaN
        # standard errors, never the residual variance (counted here: the provenance and sidecars say so)
        info["stderr"]["no_noise_level_voxels"] = int(np.count_nonzero(~ok_sigma[idx]))
    if se_in:
        info["stderr"]["propagated_inputs"] = sorted(se_in)
    return MapSet(estimates, stderr_out, units, descriptions, tuple(times), quality,
                  status.reshape(shape, order=VOXEL_ORDER), info)


def _per_voxel(sigma, sig_flat: np.ndarray | None, idx: np.ndarray):
    """The noise sd of the selected voxels: one number stays one number (no array over the voxels)."""
    if sig_flat is None:
        return None
    if np.ndim(sigma) == 0:
        return float(sigma)
    return sig_flat[idx]


def join_info(info: dict | None, part: MapSet) -> dict:
    """The ``info`` of the maps of several slabs: the first slab's, with the counts summed over the slabs.

    ``info`` is the running result (None before the first slab); returns it updated with ``part``.
    """
    if info is None:
        info = dict(part.info, n_fitted=0)
        if "no_noise_level_voxels" in (part.info.get("stderr") or {}):  # summed over the slabs below
            info["stderr"] = dict(part.info["stderr"], no_noise_level_voxels=0)
    info["n_fitted"] += part.info.get("n_fitted", 0)
    holes = (part.info.get("stderr") or {}).get("no_noise_level_voxels")
    if holes is not None:
        info["stderr"]["no_noise_level_voxels"] += holes
    return info


def place_slab(full: MapSet | None, part: MapSet, shape: tuple, z0: int, z1: int) -> MapSet:
    """Copy the maps of the slab ``z0:z1`` into ``full`` (allocated on the first slab) -- one copy of the maps only."""
    if full is None:
        def blank(d, fill=np.nan):
            return {k: np.full(shape, fill, dtype=v.dtype) for k, v in d.items()}

        full = MapSet(blank(part.estimates), blank(part.stderr), dict(part.units), dict(part.descriptions),
                      part.time_params, blank(part.quality), np.zeros(shape, np.uint8), join_info(None, part))
    else:
        join_info(full.info, part)
    for dst, src in ((full.estimates, part.estimates), (full.stderr, part.stderr), (full.quality, part.quality)):
        for k, v in src.items():
            dst[k][:, :, z0:z1] = v
    full.status[:, :, z0:z1] = part.status
    return full
