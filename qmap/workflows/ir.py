"""``qmap t1-ir``: T1 maps from an inversion-recovery series (files in, maps out), and its array API.

Signal types
------------
``magnitude`` (the usual scanner export)
    Samples before the null have lost their sign; it is restored per voxel
    (the better of the two sign patterns around the smallest sample, Barral
    et al. 2010), see :class:`qmap.models.ir.InversionRecovery`.
``real``
    Phase-corrected real-valued images, fitted as they are (may be negative).
``complex``
    Either a complex-valued 4D NIfTI, or the magnitude series plus the phase
    images (``phase=``, radians, same order and number of volumes as the
    magnitude inputs). Each voxel is phase-corrected by the phase of its
    longest-TI sample and the real part is fitted; the imaginary part only
    holds noise after the correction. The overall sign this leaves is
    arbitrary (negative when the longest TI is still before the null), so M0
    is reported as a magnitude; T1 and the inversion efficiency do not
    depend on it. Complex series are read whole (``--max-memory`` applies to
    magnitude and real series).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Unpack

import numpy as np

from ..docstrings import shared_parameters
from ..errors import InputError, UsageError, warn
from ..io.nifti import check_same_grid, image_data, load_image
from ..io.series import Series, load_series
from ..maps import Execution, MapSet, execution_kwargs, fit_volume
from ..models import build_model
from ..models.ir import SIGNALS
from ..pipeline import CommonOptions, RunReport, run_fit
from ..record import recorded

__all__ = ["fit_t1_ir", "phase_correct", "run_t1_ir"]

EQUATION = ("S = M0 (1 - (1 + InversionEfficiency) exp(-TI/T1)) (InversionEfficiency 1 = perfect inversion), "
            "fitted in its linear-amplitude form a + b exp(-TI/T1) with M0 = a, InversionEfficiency = -b/a - 1")
LOOK_LOCKER = "T1 = T1* (B/A - 1) for S = A - B exp(-TI/T1*) (Deichmann & Haase, J Magn Reson 1992;96:608)"
POLARITY = ("magnitude: sign restored per voxel, the better fit of flipping the samples before the smallest one "
            "or up to and including it (Barral et al., Magn Reson Med 2010;64:1057)")
PHASE_CORRECTION = "real part after removing each voxel's phase at the longest TI"
#: at least this many inversion times (three parameters, plus one degree of freedom to judge the fit)
MIN_TIS = 4


def phase_correct(z: np.ndarray, ti: np.ndarray | None = None) -> np.ndarray:
    """Real part of complex samples after removing each voxel's phase at the longest TI.

    Parameters
    ----------
    z : (..., m) complex ndarray
        Complex samples; the last axis runs over the inversion times.
    ti : (m,) ndarray, optional
        Inversion times (s); default: the last sample is the longest TI.

    Returns
    -------
    (..., m) float ndarray
        ``Re(z * conj(z_ref) / |z_ref|)`` (float32 for complex64 input);
        where ``z_ref`` is 0 the real part of ``z`` as it is.
    """
    z = np.asarray(z)
    ref_index = z.shape[-1] - 1 if ti is None else int(np.argmax(np.asarray(ti, float)))
    ref = z[..., ref_index : ref_index + 1]
    mag = np.abs(ref)
    with np.errstate(divide="ignore", invalid="ignore"):
        rot = np.where(mag > 0, np.conj(ref) / mag, 1.0)
    out = (z * rot).real
    return out.astype(np.float32 if z.dtype == np.complex64 else np.float64, copy=False)


def _load_phase(paths, series: Series) -> np.ndarray:
    """Phase images (radians) on the grid of ``series``, one per volume, (X, Y, Z, n) float32."""
    paths = [Path(p).expanduser().absolute() for p in paths]
    vols = []
    for p in paths:
        img = load_image(p, what="phase=")
        check_same_grid(series.data.shape, series.affine, img.shape, img.affine, ref_name=str(series.paths[0]),
                        name=f"phase={p}")
        data = image_data(img, p, dtype=np.float32)
        vols.append(data.reshape(data.shape[:3] + (-1,)))
    phase = np.concatenate(vols, axis=-1)
    if phase.shape[-1] != series.n:
        raise InputError(
            f"phase=: {phase.shape[-1]} phase volumes for {series.n} magnitude volumes; give one phase image "
            f"per inversion time, in the same order as the series"
        )
    finite = phase[np.isfinite(phase)]
    peak = float(np.max(np.abs(finite))) if finite.size else 0.0
    if peak > 2 * np.pi + 1e-3:
        raise InputError(
            f"phase={paths[0]}: values reach {peak:g}, expected radians in [-pi, pi]; convert the phase "
            f"images first (e.g. integer-coded phase in -4096..4095: multiply by pi/4096)"
        )
    return phase


def _sort_by_ti(series: Series) -> None:
    ti = np.asarray(series.acquisition["InversionTime"], float)
    if np.any(np.diff(ti) < 0):
        order = np.argsort(ti, kind="stable")
        warn("volumes were not in increasing InversionTime order; sorted them ("
             + ",".join(f"{v * 1e3:g}" for v in ti[order]) + " ms)")
        series.select_volumes(order)
        series.acquisition["InversionTime"] = ti[order]


@recorded
@shared_parameters("inputs", "common")
def run_t1_ir(
    inputs,
    *,
    common: CommonOptions,
    ti=None,
    tr: float | None = None,
    signal: str = "magnitude",
    look_locker: bool = False,
    phase=None,
    sigma="auto",
) -> RunReport:
    """Fit T1, R1, M0 and inversion-efficiency maps (with standard errors, quality and status) to an IR series.

    Parameters
    ----------
    ti : (m,) array_like, optional
        Inversion times in seconds; default from the BIDS sidecars (``InversionTime``).
    tr : float, optional
        Repetition time (inversion to inversion) in seconds; default from the
        sidecars when present. Recorded in provenance and checked against the
        TIs; the fit does not need it (the three-parameter model absorbs
        incomplete recovery).
    signal : {"magnitude", "real", "complex"}
        What the images hold (see the module docstring).
    look_locker : bool
        The series is a Look-Locker acquisition: report ``T1 = T1* (B/A - 1)``
        and the apparent ``ApparentT1`` instead of the inversion efficiency.
    phase : list of path-like, optional
        Phase images in radians for ``signal="complex"`` (same order and
        volume count as ``inputs``).
    sigma : "auto", "local", float or path
        Noise sd for the standard errors (``common.stderr == "noise"``); when
        it cannot be estimated the standard errors fall back to the residual
        variance with a warning.

    Returns
    -------
    RunReport
    """
    t0 = time.perf_counter()
    if signal not in SIGNALS:
        raise UsageError(f"signal={signal!r}: expected one of {', '.join(SIGNALS)}")
    if phase and signal != "complex":
        raise UsageError("phase= is for complex data: add signal='complex' (or leave phase= out)")
    series = load_series(
        inputs, key="InversionTime", value=ti, option="ti=",
        scalars={"RepetitionTime": (tr, "tr=", False, "RepetitionTime")},
        allow_complex=signal == "complex", sort=not phase, min_volumes=MIN_TIS,
        max_bytes=None if signal == "complex" else common.max_memory, check_order=common.series_check,
    )
    extra = []
    if signal == "complex":
        if phase:
            if np.iscomplexobj(series.data):
                raise UsageError("phase=: the series already holds complex data; give either a complex series or a "
                                 "magnitude series with phase=, not both")
            ph = _load_phase(phase, series)
            series.data = (series.data * np.exp(1j * ph)).astype(np.complex64)
            extra = [Path(p).expanduser().absolute() for p in phase]
            _sort_by_ti(series)
        elif not np.iscomplexobj(series.data):
            raise InputError(
                f"{series.paths[0]}: signal='complex' but the series holds real values; give a complex NIfTI, "
                f"or the phase images with phase=, or use signal='magnitude' / signal='real'"
            )
        series.data = phase_correct(series.data)
    ti_used = np.asarray(series.acquisition["InversionTime"], float)
    tr_used = series.acquisition.get("RepetitionTime")
    if (tr_used is not None and not look_locker and ti_used.max() >= tr_used
            and series.sources.get("RepetitionTime") == "sidecar"):
        # exports often store the readout's TR (a few ms) as RepetitionTime; the fit does not need TR
        warn(f"sidecar RepetitionTime {tr_used:g} s is shorter than the inversion times (up to {ti_used.max():g} s): "
             f"it is the readout's TR, not the time between inversions; ignored (the fit does not need it; tr= "
             f"records the inversion repetition time)")
        del series.acquisition["RepetitionTime"]
        series.sources.pop("RepetitionTime", None)
        tr_used = None
    if tr_used is not None and not look_locker and ti_used.max() >= tr_used:
        raise InputError(
            f"InversionTime up to {ti_used.max():g} s is not shorter than RepetitionTime {tr_used:g} s; "
            f"check ti= / tr= and their units (seconds, e.g. tr=6.0)"
        )
    model, _ = build_model("t1-ir", None, ti_used, signal=signal, look_locker=look_locker)
    model_info = {"name": model.name, "equation": EQUATION, "signal": signal, "look_locker": bool(look_locker),
                  # qmap's own parametrisation (the solver's amplitudes a, b are an implementation detail)
                  "parameters": ["M0", "ApparentT1" if look_locker else "InversionEfficiency", "T1"]}
    if signal == "magnitude":
        model_info["polarity_restoration"] = POLARITY
    if signal == "complex":
        model_info["phase_correction"] = PHASE_CORRECTION
    if look_locker:
        model_info["look_locker_correction"] = LOOK_LOCKER
    options = {"signal": signal, "look_locker": bool(look_locker),
               "phase": [str(p) for p in extra] if extra else None, "sigma": None if sigma is None else str(sigma)}
    report = run_fit(series, model, common=common, noise=None, sigma_spec=sigma, options=options,
                     model_info=model_info, extra_inputs=extra, magnitude=signal == "magnitude", t0=t0, method="irt1")
    good = report.maps.status == 0
    if tr_used is not None and not look_locker and good.any():
        t1_med = float(np.median(report.maps["T1"][good]))
        if tr_used < 5 * t1_med:
            report.notes.append(
                f"TR {tr_used:g} s is < 5 x the median T1 ({t1_med:.3g} s): M0 and InversionEfficiency are "
                f"apparent values (incomplete recovery between inversions); T1 is not affected"
            )
    return report


@shared_parameters("mask", "execution", keys=(Execution,))
def fit_t1_ir(
    data,
    ti,
    *,
    signal: str = "magnitude",
    phase=None,
    look_locker: bool = False,
    mask=None,
    **execution: Unpack[Execution],
) -> MapSet:
    """Fit inversion-recovery T1 in every voxel of an array.

    Parameters
    ----------
    data : (..., m) array_like
        Samples; the last axis runs over the inversion times. Magnitudes
        (>= 0) for ``signal="magnitude"``, signed values for ``"real"``,
        complex values (or magnitudes with ``phase``) for ``"complex"``.
    ti : (m,) array_like
        Inversion times in seconds (any order; the samples are sorted with them).
    signal : {"magnitude", "real", "complex"}
        See the module docstring.
    phase : (..., m) array_like, optional
        Phase in radians, for magnitude ``data`` with ``signal="complex"``.
    look_locker : bool
        Report the Look-Locker corrected T1 ``T1* (B/A - 1)`` (Deichmann & Haase 1992).

    Returns
    -------
    MapSet
        ``maps["T1"]`` (s), ``"R1"`` (1/s), ``"M0"`` (a.u.) and
        ``"InversionEfficiency"`` (or ``"ApparentT1"`` with ``look_locker``),
        their ``stderr``, ``quality`` and ``status``.

    Notes
    -----
    .. math:: S(TI) = a + b \\exp(-TI/T_1), \\quad M_0 = a, \\quad k = -b/a - 1

    References
    ----------
    Barral JK et al. Magn Reson Med 2010;64:1057. doi:10.1002/mrm.22497

    Examples
    --------
    >>> import numpy as np
    >>> from qmap.models.ir import ir_signal
    >>> ti = np.array([0.05, 0.15, 0.4, 0.8, 1.5, 3.0, 5.0])
    >>> data = np.abs(ir_signal(ti, 0.9, m0=1000.0, efficiency=0.95)) * np.ones((2, 2, 1, 1))
    >>> maps = fit_t1_ir(data, ti)
    >>> float(np.round(maps["T1"][0, 0, 0], 6)), float(np.round(maps["InversionEfficiency"][0, 0, 0], 6))
    (0.9, 0.95)
    """
    if signal not in SIGNALS:
        raise ValueError(f"signal={signal!r}; expected one of {', '.join(SIGNALS)}")
    data = np.asarray(data)
    ti = np.asarray(ti, float).ravel()
    if data.shape[-1] != ti.size:
        raise ValueError(f"data has {data.shape[-1]} samples per voxel but {ti.size} inversion times were given")
    if phase is not None:
        if signal != "complex" or np.iscomplexobj(data):
            raise ValueError("phase= goes with magnitude data and signal='complex'")
        data = data * np.exp(1j * np.asarray(phase, float))
    if signal == "complex":
        if not np.iscomplexobj(data):
            raise ValueError("signal='complex' needs complex data (or magnitude data with phase=)")
        data = phase_correct(data, ti)
    elif np.iscomplexobj(data):
        raise ValueError(f"complex data with signal={signal!r}; use signal='complex'")
    elif signal == "magnitude" and np.any(data < 0):
        raise ValueError("negative values in magnitude data; use signal='real' for phase-corrected real data")
    order = np.argsort(ti, kind="stable")
    data, ti = data[..., order], ti[order]
    model, _ = build_model("t1-ir", None, ti, signal=signal, look_locker=look_locker)
    return fit_volume(model, data, mask=mask, **execution_kwargs(execution))
