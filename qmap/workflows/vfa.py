"""``qmap t1-vfa``: T1 from variable-flip-angle spoiled gradient echo, with optional B1 correction.

Two methods share one output path (a :class:`~qmap.maps.MapSet` written by
:func:`qmap.pipeline.write_run`):

``nonlinear`` (default)
    Least squares on the signals: M0 solved in closed form, T1 by the
    vectorised Levenberg-Marquardt solver, started from the linearised
    regression (:class:`qmap.models.vfa.SpoiledGRE`).
``linear``
    The iteratively reweighted linearised regression as the final answer
    (:func:`qmap.fitting.linearised.fit_chunk_linear`; Deoni, Rutt & Peters 2003), run by the
    same engine as the least-squares fit (``method="linear"``).

A B1 map (relative, fraction or percent) is resampled onto the data grid
through the two affines (trilinear); voxels it does not cover get status 6.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any, Unpack

import numpy as np

from ..b1 import b1_stderr_beside, load_b1_map, load_b1_stderr
from ..defaults import T1_TYPICAL
from ..docstrings import shared_parameters
from ..errors import InputError, UsageError
from ..fitting import status as st
from ..fitting.noise_floor import NoiseFloor
from ..io.series import load_series
from ..maps import Execution, MapSet, execution_kwargs, fit_volume
from ..models import COMMAND_MODELS, build_model
from ..models.vfa import LINEAR_PASSES, ernst_angle, optimal_angle_pair, t1_crlb
from ..pipeline import CommonOptions, RunReport, prepare_run
from ..record import recorded

__all__ = [
    "METHODS",
    "NO_B1_NOTE",
    "T1_TYPICAL",
    "fit_t1_vfa",
    "protocol_check",
    "run_t1_vfa",
]

#: the estimators of t1-vfa (``method=``), from the model registry
METHODS = COMMAND_MODELS["t1-vfa"].values
#: the CRLB of T1 may be this many times that of the optimal two-angle protocol before the note is printed
PROTOCOL_RATIO = 1.5
NO_B1_NOTE = ("no B1 correction applied: nominal flip angles assumed (T1 errs roughly in proportion to B1^2 "
              "where the transmit field is off; pass b1=B1MAP to correct)")
EQUATION = "S = M0 sin(a) (1-E1)/(1 - E1 cos(a)), E1 = exp(-TR/T1), a = B1 x nominal flip angle"
LINEAR_DESC = (f"linearised regression (Deoni et al. 2003) S/sin a = E1 S/tan a + M0 (1-E1), unweighted first pass then {LINEAR_PASSES} "
               "passes weighted by (sin a / (1 - E1 cos a))^2 (inverse variance of the line's residual); standard "
               "errors s^2 (X^T W X)^-1 with s^2 = RSS/(m-2) (two angles: the background noise sigma^2), delta "
               "method to T1 and M0")
NONLINEAR_DESC = ("least squares on the signals: M0 in closed form, T1 by batched Levenberg-Marquardt from the "
                  "linearised-regression start; standard errors s^2 (J^T J)^-1 with s^2 = RSS/(m-2) (two angles: the background "
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
                f"of images (t1_typical= sets the T1 assumed)")
    return info, note


# ------------------------------------------------------------------ fitting
@shared_parameters("mask", keys=(Execution,))
def fit_t1_vfa(
    data,
    fa,
    tr: float,
    *,
    b1=None,
    method: str = "nonlinear",
    mask=None,
    sigma=None,
    quiet: bool = True,
    stderr: str = "noise",
    b1_se=None,
    **execution: Unpack[Execution],
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
        Least squares on the signals, or the reweighted linearised regression.
    sigma : float or (...) ndarray, optional
        Noise sd (signal units). With ``stderr="noise"`` the standard errors
        come from it (inverse Fisher information); otherwise, and without
        ``sigma``, from s^2 = RSS/(m-2) (sigma only where no residual degrees
        of freedom remain: two flip angles).
    stderr : {"noise", "residual"}
        Standard-error convention (see :mod:`qmap.fitting.uncertainty`).
    b1_se : (...) array_like, optional
        Standard error of ``b1`` (fraction), propagated to first order into
        the covariance (``dp/dB1`` from the model at the solution).
    **execution
        :class:`~qmap.maps.Execution` options: ``n_jobs``, ``engine`` (``nonlinear`` only: the vectorised
        solver or the per-voxel lmfit reference), ``chunk_size``, ``scheduler``.

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
    model, choice = build_model("t1-vfa", method, fa, tr=tr)  # the registry: the model and its estimator
    kw = execution_kwargs(execution)
    if choice.method is not None:
        kw["method"] = choice.method
    if b1_se is not None and b1 is None:
        raise ValueError("b1_se= needs b1=")
    ctx = None
    if b1 is not None:
        ctx = {"b1": np.broadcast_to(np.asarray(b1, float), data.shape[:-1])}
    maps = fit_volume(model, data, mask=mask, ctx_maps=ctx, noise=NoiseFloor("none"), sigma=sigma, quiet=quiet,
                      stderr=stderr, input_se=None if b1_se is None else {"b1": b1_se}, **kw)
    maps.info["method"] = method
    return maps


@recorded
@shared_parameters("inputs", "common")
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
        raise UsageError(f"method={method!r}: expected nonlinear or linear")
    if method == "linear" and common.engine == "lmfit":
        raise UsageError("engine='lmfit' applies to method='nonlinear'; the linear method is a closed-form regression")
    if fa is not None and np.unique(np.asarray(fa, float)).size < 2:
        raise UsageError(f"fa=({', '.join(f'{a:g}' for a in np.atleast_1d(fa))}): VFA T1 needs at least two "
                         f"different flip angles")
    if not (np.isfinite(t1_typical) and t1_typical > 0):
        raise UsageError(f"t1_typical={t1_typical}: give a positive time, e.g. 1s or 900ms")
    series = load_series(inputs, key="FlipAngle", value=fa, option="fa=",
                         scalars={"RepetitionTime": (tr, "tr=", True, "RepetitionTimeSpoiled")}, min_volumes=2,
                         max_bytes=common.max_memory, check_order=common.series_check)
    fa_used = np.asarray(series.acquisition["FlipAngle"], float)
    tr_used = float(series.acquisition["RepetitionTime"])
    if b1 is None and (b1_scale is not None or b1_smooth):
        raise UsageError("b1_scale= / b1_smooth= need b1=B1MAP")
    if b1 is None and b1_se not in (None, "auto", "none"):
        raise UsageError("b1_se=FILE needs b1=B1MAP")
    proto, proto_note = protocol_check(fa_used, tr_used, t1_typical)
    # two angles leave no residual degrees of freedom: the noise level is needed under either convention
    run = prepare_run(series, common, sigma_spec=sigma, sigma_for_se=common.stderr == "noise" or fa_used.size == 2,
                      extra_inputs=[b1] if b1 is not None else None, notes=[proto_note] if proto_note else None,
                      t0=t0, method="vfa")
    if run.noise_info is None:
        run.noise_info = {"mode": "none", "sigma": None}
    if run.sigma is None and fa_used.size == 2:
        run.notes.append("two flip angles leave no residual degrees of freedom: standard errors are NaN")
    b1_map = None
    b1_info: dict[str, Any] = {"b1": None}
    if b1 is not None:
        b1_map, b1_info = load_b1_map(b1, shape=series.shape, affine=series.affine, b1_scale=b1_scale,
                                      b1_smooth=b1_smooth)
        b1_desc = (f"B1 correction applied from {Path(b1).name} ({b1_info['b1_scale']}, "
                   f"{'x'.join(map(str, b1_info['b1_grid']))} grid resampled onto the data"
                   + (f", smoothed FWHM {b1_smooth:g} mm" if b1_smooth else "") + ")")
    else:
        b1_desc = NO_B1_NOTE
    options = {"method": method, "t1_typical_s": float(t1_typical), "b1_correction": b1 is not None,
               "sigma": None if sigma is None else str(sigma)}
    options.update(b1_info)
    model, choice = build_model("t1-vfa", method, fa_used, tr=tr_used)
    model_info = {"name": model.name, "equation": EQUATION, "method": method,
                  "estimator": NONLINEAR_DESC if method == "nonlinear" else LINEAR_DESC,
                  "b1_correction": b1_desc, "protocol": proto}
    b1_se_map = None
    if b1 is not None:
        b1_se_map, se_info = _b1_stderr(b1, b1_se, series, b1_info["b1_scale"])
        options["b1_stderr"] = se_info
        if b1_se_map is not None:
            run.inputs.append(se_info["path"])
            run.notes.append(f"the B1 map's standard error ({Path(se_info['path']).name}) is propagated into the "
                             f"T1 standard error")
    maps = run.fit(model, noise=NoiseFloor("none"), ctx_maps=None if b1_map is None else {"b1": b1_map},
                   method=choice.method,
                   input_se=None if b1_se_map is None else {"b1": b1_se_map})
    maps.info["method"] = method
    report = run.write(maps, options=options, model_info=dict(model_info, parameters=list(model.param_names)))
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
            se, info = load_b1_stderr(path, shape=series.shape, affine=series.affine, b1_scale=scale)
        except InputError as exc:  # e.g. all NaN: qmap b1 had no noise level; nothing known to propagate
            return None, {"propagated": False, "reason": f"the standard-error map beside the B1 map is not usable "
                                                         f"({exc})", "path": str(path.absolute())}
    else:
        path = Path(spec)
        se, info = load_b1_stderr(path, shape=series.shape, affine=series.affine, b1_scale=scale)
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
