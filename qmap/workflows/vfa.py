"""``qmap t1-vfa``: T1 from variable-flip-angle spoiled gradient echo, with optional B1 correction.

Two methods share one output path (a :class:`~qmap.maps.MapSet` written by
:func:`qmap.pipeline.write_run`):

``nonlinear`` (default)
    Least squares on the signals: M0 solved in closed form, T1 by the
    vectorised Levenberg-Marquardt solver, started from the DESPOT1
    regression (:class:`qmap.models.vfa.SpoiledGRE`).
``linear``
    The iteratively reweighted DESPOT1 regression as the final answer
    (:func:`qmap.models.vfa.despot1`; Deoni, Rutt & Peters 2003).

A B1 map (relative, fraction or percent) is resampled onto the data grid
through the two affines (trilinear); voxels it does not cover get status 6.
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np

from ..b1 import b1_stderr_beside, load_b1_map, load_b1_stderr
from ..defaults import T1_TYPICAL
from ..defaults import VFA_METHODS as METHODS
from ..engine import DEFAULT_CHUNK
from ..errors import InputError, UsageError
from ..fitting import status as st
from ..fitting.noise_floor import NoiseFloor
from ..fitting.uncertainty import CONVENTION_TEXT, add_input_covariance, input_sensitivity
from ..io.series import load_series
from ..maps import MapSet, fit_volume
from ..models.vfa import LINEAR_PASSES, SpoiledGRE, despot1, ernst_angle, optimal_angle_pair, t1_crlb
from ..pipeline import (
    CommonOptions,
    RunReport,
    check_outputs_free,
    check_signal,
    default_prefix,
    resolve_mask,
    sigma_for_stderr,
    write_run,
)
from ..record import recorded

__all__ = [
    "METHODS",
    "NO_B1_NOTE",
    "T1_TYPICAL",
    "fit_t1_vfa",
    "protocol_check",
    "run_t1_vfa",
]

#: the CRLB of T1 may be this many times that of the optimal two-angle protocol before the note is printed
PROTOCOL_RATIO = 1.5
NO_B1_NOTE = ("no B1 correction applied: nominal flip angles assumed (T1 errs roughly in proportion to B1^2 "
              "where the transmit field is off; pass --b1 B1MAP to correct)")
EQUATION = "S = M0 sin(a) (1-E1)/(1 - E1 cos(a)), E1 = exp(-TR/T1), a = B1 x nominal flip angle"
LINEAR_DESC = (f"DESPOT1 regression S/sin a = E1 S/tan a + M0 (1-E1), unweighted first pass then {LINEAR_PASSES} "
               "passes weighted by (sin a / (1 - E1 cos a))^2 (inverse variance of the line's residual); standard "
               "errors s^2 (X^T W X)^-1 with s^2 = RSS/(m-2) (two angles: the background noise sigma^2), delta "
               "method to T1 and M0")
NONLINEAR_DESC = ("least squares on the signals: M0 in closed form, T1 by batched Levenberg-Marquardt from the "
                  "DESPOT1 start; standard errors s^2 (J^T J)^-1 with s^2 = RSS/(m-2) (two angles: the background "
                  "noise sigma^2)")


# ------------------------------------------------------------------ protocol note
def protocol_check(fa, tr: float, t1_typical: float = T1_TYPICAL) -> tuple[dict, str | None]:
    """Compare the flip angles with the optimal two-angle protocol for a typical T1.

    Returns the protocol facts (Ernst angle, the two angles at ~0.71 of the
    Ernst signal, and the ratio of the T1 Cramer-Rao bound of the given angles
    to that of the optimal pair with the same number of images) and a note
    when that ratio exceeds 1.5 (else None). Deoni, Rutt & Peters 2003;
    Schabel & Morrell 2009.
    """
    fa = np.asarray(fa, float)
    ae = float(ernst_angle(tr, t1_typical))
    pair = optimal_angle_pair(tr, t1_typical)
    sd_user = t1_crlb(fa, tr, t1_typical)
    sd_opt = t1_crlb(np.asarray(pair), tr, t1_typical) * np.sqrt(2.0 / fa.size)
    ratio = sd_user / sd_opt
    info = {"t1_typical_s": float(t1_typical), "ernst_angle_deg": round(ae, 4),
            "optimal_pair_deg": [round(pair[0], 3), round(pair[1], 3)],
            "t1_sd_relative_to_optimal_pair": round(float(ratio), 4) if np.isfinite(ratio) else None}
    note = None
    if not ratio <= PROTOCOL_RATIO:
        shown = ",".join(f"{a:g}" for a in fa)
        note = (f"protocol: for T1 ~ {t1_typical:g} s at TR {tr * 1e3:g} ms the Ernst angle is {ae:.1f} deg and the "
                f"two angles giving 0.71 of its signal are {pair[0]:.1f} and {pair[1]:.1f} deg (Deoni 2003); your "
                f"angles {shown} deg give a {ratio:.1f}x larger T1 standard deviation than those for the same number "
                f"of images (--t1-typical sets the T1 assumed)")
    return info, note


# ------------------------------------------------------------------ fitting
def _linear_volume(model: SpoiledGRE, data: np.ndarray, *, mask=None, b1=None, sigma=None,
                   chunk_size: int = DEFAULT_CHUNK, stderr: str = "noise", b1_se=None) -> MapSet:
    """The ``linear`` method over a volume, with the same screening and outputs as :func:`qmap.maps.fit_volume`."""
    data = np.asarray(data)
    shape, m = data.shape[:-1], data.shape[-1]
    flat = data.reshape(-1, m)
    nvox = flat.shape[0]
    finite = np.all(np.isfinite(flat), axis=1)
    sel = np.ones(nvox, bool) if mask is None else np.asarray(mask, bool).reshape(-1).copy()
    status = np.full(nvox, st.MASKED, np.uint8)
    status[sel & ~finite] = st.NONFINITE
    sel &= finite
    b1f = None
    if b1 is not None:
        b1f = np.broadcast_to(np.asarray(b1, float), shape).reshape(-1)
        ok = np.isfinite(b1f)
        status[sel & ~ok] = st.OUTSIDE_B1
        sel &= ok
    idx = np.flatnonzero(sel)
    sig = None if sigma is None else np.broadcast_to(np.asarray(sigma, float), shape).reshape(-1)
    b1sef = None if b1_se is None else np.broadcast_to(np.asarray(b1_se, float), shape).reshape(-1)
    parts = []
    for i in range(0, idx.size, max(1, int(chunk_size))):
        j = idx[i : i + chunk_size]
        part = despot1(flat[j].astype(float), model.x, model.tr, b1=None if b1f is None else b1f[j],
                       t1_bounds=model.t1_bounds, sigma=None if sig is None else sig[j], stderr=stderr)
        if b1sef is not None:  # the B1 map's own error, to first order (as for the nonlinear method)
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
                g = input_sensitivity(model, part.params, {"b1": b1f[j]}, "b1")
                part.cov = add_input_covariance(part.cov, g, b1sef[j])
        parts.append(part)
    cat = (lambda f: np.concatenate([getattr(p, f) for p in parts])) if parts else None
    if parts:
        params, cov, r2, rmse, fst = cat("params"), cat("cov"), cat("r2"), cat("rmse"), cat("status")
    else:
        params, cov, r2, rmse = np.zeros((0, 2)), np.zeros((0, 2, 2)), np.zeros(0), np.zeros(0)
        fst = np.zeros(0, np.uint8)
    status[idx] = fst
    keep = np.isin(fst, (st.FITTED, st.AT_BOUND, st.NOT_CONVERGED, st.ILL_CONDITIONED))

    def scatter(values):
        out = np.full(nvox, np.nan)
        out[idx[keep]] = np.asarray(values, float)[keep]
        return out.reshape(shape)

    est, se, units, desc, times = {}, {}, {}, {}, []
    for d in model.report(params, cov):
        est[d.name], se[d.name] = scatter(d.value), scatter(d.stderr)
        units[d.name], desc[d.name] = d.units, d.description
        if d.is_time:
            times.append(d.name)
    used = stderr if sigma is not None else "residual"
    info = {"model": model.name, "parameters": list(model.param_names), "noise_floor": "none",
            "n_fitted": int(idx.size), "method": "linear",
            "stderr": {"convention": used, "meaning": CONVENTION_TEXT[used]}}
    if b1sef is not None:
        info["stderr"]["propagated_inputs"] = ["b1"]
    if parts:
        dof = cat("n_used") - 2
        with np.errstate(invalid="ignore", divide="ignore"):
            rsd = np.where(dof > 0, np.sqrt(cat("rss") / np.maximum(dof, 1)), np.nan)
    else:
        rsd = np.zeros(0)
    return MapSet(est, se, units, desc, tuple(times),
                  {"rsquared": scatter(r2), "rmse": scatter(rmse), "residualsd": scatter(rsd)},
                  status.reshape(shape), info)


def fit_t1_vfa(
    data,
    fa,
    tr: float,
    *,
    b1=None,
    method: str = "nonlinear",
    mask=None,
    sigma=None,
    n_jobs: int | None = None,
    engine: str = "fast",
    chunk_size: int | None = None,
    scheduler: str | None = None,
    quiet: bool = True,
    stderr: str = "noise",
    b1_se=None,
) -> MapSet:
    """Fit T1, R1 and M0 to variable-flip-angle spoiled gradient-echo magnitudes.

    Parameters
    ----------
    data : (..., m) array_like
        Signals; the last axis runs over the flip angles.
    fa : (m,) array_like
        Nominal flip angles, degrees (at least two different ones).
    tr : float
        Repetition time, seconds.
    b1 : (...) array_like, optional
        Relative B1 (fraction) per voxel; NaN voxels get status 6 and are not
        fitted. Without it the nominal angles are used.
    method : {"nonlinear", "linear"}
        Least squares on the signals, or the reweighted DESPOT1 regression.
    mask : (...) array_like of bool, optional
        Voxels to fit (default: all).
    sigma : float or (...) ndarray, optional
        Noise sd (signal units). With ``stderr="noise"`` the standard errors
        come from it (inverse Fisher information); otherwise, and without
        ``sigma``, from s^2 = RSS/(m-2) (sigma only where no residual degrees
        of freedom remain: two flip angles).
    engine : {"fast", "lmfit"}
        ``nonlinear`` only: the vectorised solver or the per-voxel lmfit reference.
    stderr : {"noise", "residual"}
        Standard-error convention (see :mod:`qmap.fitting.uncertainty`).
    b1_se : (...) array_like, optional
        Standard error of ``b1`` (fraction), propagated to first order into
        the covariance (``dp/dB1`` from the model at the solution).

    Returns
    -------
    MapSet
        ``maps["T1"]`` (s), ``maps["R1"]`` (1/s), ``maps["M0"]`` (a.u.),
        ``stderr``, ``quality`` and ``status``.

    Examples
    --------
    >>> import numpy as np
    >>> from qmap.models.vfa import spgr_signal
    >>> fa = np.array([3.0, 8.0, 15.0, 25.0])
    >>> data = spgr_signal(fa, 0.015, 0.9, m0=1000.0, b1=1.1) * np.ones((2, 2, 1, 1))
    >>> maps = fit_t1_vfa(data, fa, 0.015, b1=np.full((2, 2, 1), 1.1))
    >>> float(np.round(maps["T1"][0, 0, 0], 6))
    0.9
    """
    data = np.asarray(data)
    fa = np.asarray(fa, float).ravel()
    if method not in METHODS:
        raise ValueError(f"method {method!r}; expected one of {METHODS}")
    if np.unique(fa).size < 2:
        raise ValueError(f"VFA needs at least two different flip angles, got {fa.tolist()}")
    if data.shape[-1] != fa.size:
        raise ValueError(f"data has {data.shape[-1]} samples per voxel for {fa.size} flip angles")
    model = SpoiledGRE(fa, tr)
    kw = {} if chunk_size is None else {"chunk_size": chunk_size}
    if b1_se is not None and b1 is None:
        raise ValueError("b1_se= needs b1=")
    if method == "linear":
        return _linear_volume(model, data, mask=mask, b1=b1, sigma=sigma, stderr=stderr, b1_se=b1_se, **kw)
    ctx = None
    if b1 is not None:
        ctx = {"b1": np.broadcast_to(np.asarray(b1, float), data.shape[:-1])}
    maps = fit_volume(model, data, mask=mask, ctx_maps=ctx, noise=NoiseFloor("none"), sigma=sigma, n_jobs=n_jobs,
                      method=engine, scheduler=scheduler, quiet=quiet, stderr=stderr,
                      input_se=None if b1_se is None else {"b1": b1_se}, **kw)
    maps.info["method"] = "nonlinear"
    return maps


@recorded
def run_t1_vfa(
    inputs,
    *,
    common: CommonOptions,
    fa=None,
    tr: float | None = None,
    b1=None,
    b1_scale: str | None = None,
    b1_smooth: float | None = None,
    method: str = "nonlinear",
    t1_typical: float = T1_TYPICAL,
    sigma="auto",
    b1_se="auto",
) -> RunReport:
    """Fit T1, R1 and M0 maps (with standard errors, quality and status) to a VFA series.

    Parameters
    ----------
    inputs : list of path-like
        One 4D NIfTI or several 3D NIfTIs (one per flip angle).
    common : CommonOptions
        Output folder, prefix, mask, workers, ...
    fa : (m,) array_like, optional
        Nominal flip angles, degrees; default from the sidecars (``FlipAngle``).
    tr : float, optional
        Repetition time, seconds; default from the sidecars (``RepetitionTime``).
    b1 : path-like, optional
        Relative B1 map (any grid; resampled through the affines).
    b1_scale : {"fraction", "percent"}, optional
        Units of the B1 map (default: its sidecar ``Units``, else fraction).
    b1_smooth : float, optional
        Gaussian smoothing of the B1 map, FWHM in mm.
    method : {"nonlinear", "linear"}
    t1_typical : float
        T1 (s) assumed for the protocol note.
    sigma : "auto", "local", float or path
        Noise sd for the standard errors (``common.stderr == "noise"``, and
        always with two flip angles); when it cannot be estimated the
        standard errors fall back to the residual variance with a warning.
    b1_se : "auto", "none" or path
        Standard error of the B1 map, propagated into the T1 standard error
        (:func:`qmap.fitting.uncertainty.input_sensitivity`): ``"auto"`` uses
        the ``desc-stderr`` map that ``qmap b1`` writes beside its TB1map
        when there is one; ``"none"`` switches the propagation off.
    """
    t0 = time.perf_counter()
    if method not in METHODS:
        raise UsageError(f"--method {method!r}: expected nonlinear or linear")
    if method == "linear" and common.engine == "lmfit":
        raise UsageError("--engine lmfit applies to --method nonlinear; the linear method is a closed-form regression")
    if fa is not None and np.unique(np.asarray(fa, float)).size < 2:
        raise UsageError(f"--fa {','.join(f'{a:g}' for a in np.atleast_1d(fa))}: VFA T1 needs at least two "
                         f"different flip angles")
    if not (np.isfinite(t1_typical) and t1_typical > 0):
        raise UsageError(f"--t1-typical {t1_typical}: give a positive time, e.g. 1s or 900ms")
    series = load_series(inputs, key="FlipAngle", value=fa, option="--fa",
                         scalars={"RepetitionTime": (tr, "--tr", True, "RepetitionTimeSpoiled")}, min_volumes=2)
    fa_used = np.asarray(series.acquisition["FlipAngle"], float)
    tr_used = float(series.acquisition["RepetitionTime"])
    prefix = common.prefix or default_prefix(series.paths[0], "vfa")
    check_outputs_free(common, prefix)
    check_signal(series)
    notes = []
    b1_map, b1_info = None, {"b1": None}
    if b1 is not None:
        b1_map, b1_info = load_b1_map(b1, shape=series.shape, affine=series.affine, scale=b1_scale,
                                      smooth_fwhm_mm=b1_smooth)
        b1_desc = (f"B1 correction applied from {Path(b1).name} ({b1_info['b1_scale']}, "
                   f"{'x'.join(map(str, b1_info['b1_grid']))} grid resampled onto the data"
                   + (f", smoothed FWHM {b1_smooth:g} mm" if b1_smooth else "") + ")")
    elif b1_scale is not None or b1_smooth:
        raise UsageError("--b1-scale / --b1-smooth need --b1 B1MAP")
    else:
        b1_desc = NO_B1_NOTE
    proto, proto_note = protocol_check(fa_used, tr_used, t1_typical)
    options = {"method": method, "t1_typical_s": float(t1_typical), "b1_correction": b1 is not None,
               "sigma": None if sigma is None else str(sigma)}
    options.update(b1_info)
    model = SpoiledGRE(fa_used, tr_used)
    model_info = {"name": model.name, "equation": EQUATION, "method": method,
                  "estimator": NONLINEAR_DESC if method == "nonlinear" else LINEAR_DESC,
                  "b1_correction": b1_desc, "protocol": proto}
    if proto_note:
        notes.append(proto_note)
    # one path for both methods (run_fit's steps, plus the noise sd for the standard errors)
    mask, mask_desc = resolve_mask(common.mask, series)
    sig, noise_info = None, {"mode": "none", "sigma": None}
    extra_inputs = [b1] if b1 is not None else []
    if common.stderr == "noise" or fa_used.size == 2:  # two angles: no residual degrees of freedom either way
        sig, sinfo = sigma_for_stderr(sigma, series, notes=notes)
        noise_info.update(sinfo)
        if "path" in sinfo:
            extra_inputs.append(sinfo["path"])
        if sig is None and fa_used.size == 2:
            notes.append("two flip angles leave no residual degrees of freedom: standard errors are NaN")
    b1_se_map = None
    if b1 is not None:
        b1_se_map, se_info = _b1_stderr(b1, b1_se, series, b1_info["b1_scale"])
        options["b1_stderr"] = se_info
        if b1_se_map is not None:
            extra_inputs.append(se_info["path"])
            notes.append(f"the B1 map's standard error ({Path(se_info['path']).name}) is propagated into the T1 "
                         f"standard error")
    elif b1_se not in (None, "auto", "none"):
        raise UsageError("--b1-stderr FILE needs --b1 B1MAP")
    data = np.abs(series.data)
    maps = fit_t1_vfa(data, fa_used, tr_used, b1=b1_map, method=method, mask=mask, sigma=sig,
                      n_jobs=common.n_jobs, engine=common.engine, chunk_size=common.chunk_size,
                      scheduler=common.scheduler, quiet=common.quiet, stderr=common.stderr, b1_se=b1_se_map)
    report = write_run(series, maps, common=common, prefix=prefix, noise_info=noise_info, options=options,
                       model_info=dict(model_info, parameters=list(model.param_names)),
                       extra_inputs=extra_inputs or None, notes=notes, t0=t0, mask_desc=mask_desc)
    _b1_summary(report, b1_map, b1_desc)
    return report


def _b1_stderr(b1, spec, series, scale: str) -> tuple[np.ndarray | None, dict]:
    """The B1 map's standard error on the data grid, for ``--b1-stderr auto|none|FILE``; (map or None, provenance)."""
    spec = "auto" if spec is None else str(spec)
    if spec == "none":
        return None, {"propagated": False, "reason": "--b1-stderr none"}
    if spec == "auto":
        path = b1_stderr_beside(b1)
        if path is None:
            return None, {"propagated": False, "reason": "no standard-error map beside the B1 map"}
        try:
            se, info = load_b1_stderr(path, shape=series.shape, affine=series.affine, scale=scale)
        except InputError as exc:  # e.g. all NaN: qmap b1 had no noise level; nothing known to propagate
            return None, {"propagated": False, "reason": f"the standard-error map beside the B1 map is not usable "
                                                         f"({exc})", "path": str(path.absolute())}
    else:
        path = Path(spec)
        se, info = load_b1_stderr(path, shape=series.shape, affine=series.affine, scale=scale)
    return se, dict(info, propagated=True, path=str(Path(path).absolute()))


def _b1_summary(report: RunReport, b1_map, b1_desc: str) -> None:
    """Put the B1 statement first among the notes (with the B1 range over the fitted voxels)."""
    text = b1_desc
    if b1_map is not None:
        good = report.maps.status == st.FITTED
        v = b1_map[good]
        if v.size:
            q = np.percentile(v, [5, 50, 95])
            text += f"; B1 over fitted voxels: median {q[1]:.3g} (5-95%: {q[0]:.3g}-{q[2]:.3g})"
    report.notes.insert(0, text)
