"""``qmap t2``: T2 maps from multi-echo spin-echo (CPMG) trains.

Two models share the rest of the machinery (noise-floor handling, solver,
engine, outputs) with ``qmap t2star``:

* the mono-exponential decay ``S = M0 exp(-TE/T2)``
  (:class:`qmap.models.monoexp.MonoExponential`), optionally without the first
  echo, and
* with ``epg=True`` the extended-phase-graph model of the echo train with a
  fitted refocusing angle (:class:`qmap.models.epg_t2.EpgT2`), which removes
  the T2 overestimation that stimulated echoes cause under imperfect
  refocusing.
"""

from __future__ import annotations

import time
from typing import Unpack

import numpy as np

from ..defaults import DEFAULT_REFOCUS, DEFAULT_T1
from ..docstrings import shared_parameters
from ..errors import UsageError
from ..fitting.noise_floor import DEFAULT_MODE, NoiseFloor
from ..maps import Execution, MapSet
from ..models.base import SeparableModel
from ..models.epg_t2 import EpgT2
from ..models.monoexp import MonoExponential
from ..pipeline import CommonOptions, RunReport, run_fit
from ..record import recorded
from .decay import load_echoes, noise_options

__all__ = ["DEFAULT_REFOCUS", "DEFAULT_T1", "fit_t2", "run_t2", "t2_model"]


def t2_model(
    te,
    *,
    epg: bool = False,
    refocus_deg: float = DEFAULT_REFOCUS,
    t1: float = DEFAULT_T1,
    drop_first: bool = False,
) -> tuple[SeparableModel, dict]:
    """The T2 model for a train with echo times ``te`` (s), and its provenance description.

    With ``epg`` the model describes the whole train (equally spaced, TE_k =
    k * ESP, every echo fitted); otherwise the mono-exponential model gets the
    echo times that are fitted (without the first with ``drop_first``).

    Raises
    ------
    UsageError
        ``epg`` together with ``drop_first``.
    """
    te = np.asarray(te, float).ravel()
    if epg:
        if drop_first:
            raise UsageError(
                "--drop-first is for the mono-exponential fit: the EPG model (--epg) describes the first echo and "
                "needs it to tell T2 from the refocusing angle; leave out one of the two options"
            )
        epg_model = EpgT2(te, refocus_deg=refocus_deg, t1=t1)
        return epg_model, epg_model.info()
    return MonoExponential(te[1:] if drop_first else te, param="T2"), {"name": "monoexp",
                                                                        "equation": "S = M0 exp(-TE/T2)"}


@shared_parameters("decay_coils", "mask", "execution")
def fit_t2(
    data,
    te,
    *,
    epg: bool = False,
    refocus_deg: float = DEFAULT_REFOCUS,
    t1: float = DEFAULT_T1,
    noise_floor: str = DEFAULT_MODE,
    sigma="auto",
    coils: int | None = None,
    drop_first: bool = False,
    mask=None,
    **execution: Unpack[Execution],
) -> MapSet:
    """Fit T2 in every voxel of a multi-echo spin-echo magnitude series (array API).

    Parameters
    ----------
    data : (..., m) array_like
        Magnitudes; the last axis runs over the echoes of the whole train.
    te : (m,) array_like
        Echo times in seconds. With ``epg`` they must be TE_k = k * ESP.
    epg : bool
        Fit the extended-phase-graph model (M0, T2 and the refocusing scale)
        instead of a mono-exponential.
    refocus_deg : float
        ``epg``: nominal refocusing angle in degrees (default 180).
    t1 : float
        ``epg``: fixed T1 in seconds (default 1).
    noise_floor : {"rician", "offset", "truncate", "none"}
        Noise-floor handling (see :mod:`qmap.fitting.noise_floor`); default
        ``rician``, which needs ``sigma``.
    sigma : "auto", "local", float or (...) ndarray
        Noise sd in signal units; ``"auto"`` (default) / ``"local"`` estimate it
        from ``data`` (see :func:`qmap.fit_decay`).
    drop_first : bool
        Do not fit the first echo (mono-exponential only).

    Returns
    -------
    MapSet
        ``maps["T2"]``, ``maps["R2"]``, ``maps["M0"]`` (and with ``epg``
        ``maps["RefocusScale"]``, the actual / nominal refocusing angle), with
        ``stderr``, ``quality`` and ``status``; ``maps.info["model_info"]``
        describes the model.

    Examples
    --------
    >>> import numpy as np
    >>> te = np.arange(1, 17) * 0.01
    >>> data = 1000 * np.exp(-te / 0.08) * np.ones((2, 2, 1, 1))
    >>> maps = fit_t2(data, te, epg=True, noise_floor="none")
    >>> float(np.round(maps["T2"][0, 0, 0], 6)), float(np.round(maps["RefocusScale"][0, 0, 0], 4))
    (0.08, 1.0)
    """
    data = np.asarray(data)
    model, info = t2_model(te, epg=epg, refocus_deg=refocus_deg, t1=t1, drop_first=drop_first)
    if drop_first:
        data = data[..., 1:]
    from ..api import _fit_with_noise_floor

    maps = _fit_with_noise_floor(model, data, mask=mask, noise_floor=noise_floor, sigma=sigma, coils=coils,
                                 **execution)
    maps.info["model_info"] = info
    return maps


@recorded
def run_t2(
    inputs,
    *,
    common: CommonOptions,
    te=None,
    epg: bool = False,
    refocus_deg: float = DEFAULT_REFOCUS,
    t1: float = DEFAULT_T1,
    noise_floor: str = DEFAULT_MODE,
    sigma="auto",
    coils: int | None = None,
    drop_first: bool = False,
) -> RunReport:
    """Fit T2, R2 and M0 (and with ``epg`` RefocusScale) maps to a multi-echo spin-echo series.

    Parameters
    ----------
    inputs, common, te
        The echo train, as in :func:`~qmap.workflows.decay.run_t2star`.
    epg, refocus_deg, t1, noise_floor, sigma, coils, drop_first
        As in :func:`fit_t2` (``sigma`` may also be ``"auto"`` or a noise-map path).
    """
    t0 = time.perf_counter()
    series, notes = load_echoes(inputs, te=te, drop_first=False, common=common)
    te_all = np.asarray(series.acquisition["EchoTime"], float)
    model, info = t2_model(te_all, epg=epg, refocus_deg=refocus_deg, t1=t1, drop_first=drop_first)
    if drop_first:  # after t2_model, which checks the echo spacing on the whole train
        series.select_volumes(np.arange(1, series.n))
        series.acquisition["EchoTime"] = te_all[1:]
        notes.append("first echo dropped")
    options = noise_options(noise_floor, sigma, coils, drop_first)
    options.update(epg=bool(epg))
    if isinstance(model, EpgT2):  # epg=True
        options.update(refocus_deg=float(refocus_deg), t1_s=float(t1))
        notes.append(f"EPG model: echo spacing {1e3 * model.esp:.4g} ms, refocusing {refocus_deg:g} deg x fitted "
                     f"scale, T1 fixed at {t1:g} s")
    return run_fit(
        series, model, common=common, noise=NoiseFloor(noise_floor, coils=coils or 1), sigma_spec=sigma,
        options=options, model_info=info, notes=notes, t0=t0, method="mese", coils_auto=coils is None,
    )
