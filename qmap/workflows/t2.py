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
from ..maps import Execution, MapSet
from ..models import build_model, choose
from ..models.base import SeparableModel
from ..models.epg_t2 import EpgT2
from ..pipeline import CommonOptions, RunReport, run_fit
from ..record import recorded
from .decay import DecayOptions, DecaySettings, T2FitOptions, T2Options, load_echoes

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

    The model registry (:data:`qmap.models.COMMAND_MODELS`, command ``t2``) says which model ``epg``
    selects: with ``epg`` the model describes the whole train (equally spaced, TE_k = k * ESP, every
    echo fitted); otherwise the mono-exponential model gets the echo times that are fitted (without the
    first with ``drop_first``).

    Raises
    ------
    UsageError
        ``epg`` together with ``drop_first``.
    """
    te = np.asarray(te, float).ravel()
    whole_train = choose("t2", bool(epg)).model == "epg_t2"
    if whole_train and drop_first:
        raise UsageError(
            "drop_first=True is for the mono-exponential fit: the EPG model (epg=True) describes the first echo "
            "and needs it to tell T2 from the refocusing angle; leave out one of the two"
        )
    model, _ = build_model("t2", bool(epg), te[1:] if drop_first else te, refocus_deg=refocus_deg, t1=t1)
    return model, model.info()


@shared_parameters("mask", keys=(T2Options, DecayOptions, Execution))
def fit_t2(data, te, *, mask=None, **options: Unpack[T2FitOptions]) -> MapSet:
    """Fit T2 in every voxel of a multi-echo spin-echo magnitude series (array API).

    Parameters
    ----------
    data : (..., m) array_like
        Magnitudes; the last axis runs over the echoes of the whole train.
    te : (m,) array_like
        Echo times in seconds. With ``epg`` they must be TE_k = k * ESP.
    **options
        The keyword options of :class:`~qmap.workflows.decay.T2Options` (the fit) and
        :class:`~qmap.maps.Execution` (how it runs); see Other Parameters.

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
    settings, execution = DecaySettings.split(options, T2Options.__optional_keys__, Execution.__optional_keys__)
    data = np.asarray(data)
    model, info = t2_model(te, epg=settings.epg, refocus_deg=settings.refocus_deg, t1=settings.t1,
                           drop_first=settings.drop_first)
    if settings.drop_first:
        data = data[..., 1:]
    from ..api import _fit_with_noise_floor

    maps = _fit_with_noise_floor(model, data, settings, mask=mask, execution=execution)
    maps.info["model_info"] = info
    return maps


@recorded
@shared_parameters(keys=(T2Options, DecayOptions))
def run_t2(inputs, *, common: CommonOptions, te=None, **options: Unpack[T2Options]) -> RunReport:
    """Fit T2, R2 and M0 (and with ``epg`` RefocusScale) maps to a multi-echo spin-echo series.

    Parameters
    ----------
    inputs, common, te
        The echo train, as in :func:`~qmap.workflows.decay.run_t2star`.
    **options
        The keyword options of :class:`~qmap.workflows.decay.T2Options`; see Other Parameters.
    """
    t0 = time.perf_counter()
    s, _ = DecaySettings.split(options, T2Options.__optional_keys__)
    series, notes = load_echoes(inputs, te=te, drop_first=False, common=common)
    te_all = np.asarray(series.acquisition["EchoTime"], float)
    model, info = t2_model(te_all, epg=s.epg, refocus_deg=s.refocus_deg, t1=s.t1, drop_first=s.drop_first)
    if s.drop_first:  # after t2_model, which checks the echo spacing on the whole train
        series.select_volumes(np.arange(1, series.n))
        series.acquisition["EchoTime"] = te_all[1:]
        notes.append("first echo dropped")
    provenance = s.provenance()
    provenance.update(epg=bool(s.epg))
    if isinstance(model, EpgT2):  # epg=True
        provenance.update(refocus_deg=float(s.refocus_deg), t1_s=float(s.t1))
        notes.append(f"EPG model: echo spacing {1e3 * model.esp:.4g} ms, refocusing {s.refocus_deg:g} deg x fitted "
                     f"scale, T1 fixed at {s.t1:g} s")
    return run_fit(
        series, model, common=common, noise=s.noise(), sigma_spec=s.sigma, options=provenance, model_info=info,
        notes=notes, t0=t0, method="mese", coils_auto=s.coils is None,
    )
