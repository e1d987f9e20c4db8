"""``qmap t2star`` (and the mono-exponential part of ``qmap t2``): multi-echo decay maps."""

from __future__ import annotations

import time
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, TypedDict, Unpack

import numpy as np

from ..defaults import DEFAULT_REFOCUS, DEFAULT_T1
from ..docstrings import shared_parameters
from ..fitting.noise_floor import DEFAULT_MODE, NoiseFloor
from ..io.series import load_series
from ..maps import Execution
from ..models import build_model
from ..pipeline import CommonOptions, RunReport, run_fit
from ..record import recorded

__all__ = ["DecayFitOptions", "DecayOptions", "DecaySettings", "T2FitOptions", "T2Options", "load_echoes",
           "run_t2star"]


class DecayOptions(TypedDict, total=False):
    """How a multi-echo decay is fitted: the keyword arguments shared by ``qmap t2star`` and ``qmap t2``
    (:func:`run_t2star`, :func:`~qmap.workflows.t2.run_t2`) and the array API (:func:`qmap.fit_decay`,
    :func:`qmap.fit_t2star`, :func:`qmap.fit_t2`). Their defaults are those of :class:`DecaySettings`.

    Keys
    ----
    noise_floor : {"rician", "offset", "truncate", "none"}
        Noise-floor handling (see :mod:`qmap.fitting.noise_floor`); default ``rician``, which needs ``sigma``.
    sigma : "auto", "local", float, (...) ndarray or path
        Noise sd in signal units. ``"auto"`` (default) estimates it from the data as ``--sigma auto`` does
        (the image background, else the residuals of a first plain fit in voxels well above the noise; see
        :func:`qmap.noise_level.estimate_noise`); ``"local"`` a smooth noise map; a path (the commands): a
        NIfTI noise map (see :func:`qmap.pipeline.resolve_sigma`). An array fit puts the estimate in
        ``maps.info["noise"]``.
    coils : int or None
        ``rician``: coils combined by sum of squares (the noncentral-chi expectation); None (default): one,
        unless the background's moments show more.
    drop_first : bool
        Ignore the first echo (default False; mono-exponential fits only).
    """

    noise_floor: str
    sigma: Any
    coils: int | None
    drop_first: bool


class T2Options(DecayOptions, total=False):
    """:class:`DecayOptions` and the extended-phase-graph model of ``qmap t2`` (:func:`qmap.fit_t2`).

    Keys
    ----
    epg : bool
        Fit the extended-phase-graph model (M0, T2 and the refocusing scale) instead of a
        mono-exponential (default False).
    refocus_deg : float
        ``epg``: nominal refocusing angle in degrees (default 180).
    t1 : float
        ``epg``: fixed T1 in seconds (default 1).
    """

    epg: bool
    refocus_deg: float
    t1: float


class DecayFitOptions(DecayOptions, Execution, total=False):
    """The keyword arguments of :func:`qmap.fit_decay`: :class:`DecayOptions` and :class:`~qmap.maps.Execution`."""


class T2FitOptions(T2Options, Execution, total=False):
    """The keyword arguments of :func:`qmap.fit_t2`: :class:`T2Options` and :class:`~qmap.maps.Execution`."""


@dataclass(frozen=True)
class DecaySettings:
    """:class:`DecayOptions` / :class:`T2Options` with their defaults filled in (the one place they are set)."""

    noise_floor: str = DEFAULT_MODE
    sigma: Any = "auto"
    coils: int | None = None
    drop_first: bool = False
    epg: bool = False
    refocus_deg: float = DEFAULT_REFOCUS
    t1: float = DEFAULT_T1

    @classmethod
    def split(cls, options: Mapping[str, Any], keys: frozenset[str],
              others: frozenset[str] = frozenset()) -> tuple[DecaySettings, dict[str, Any]]:
        """The settings from the ``keys`` (an options TypedDict's) of ``options``, and the ``others`` given.

        Raises
        ------
        TypeError
            A name in neither ``keys`` nor ``others`` (as for any unknown keyword argument).
        """
        unknown = sorted(set(options) - keys - others)
        if unknown:
            raise TypeError(f"unexpected keyword argument(s) {', '.join(map(repr, unknown))}; the options are "
                            f"{', '.join(sorted(keys | others))}")
        return (cls(**{k: v for k, v in options.items() if k in keys}),
                {k: v for k, v in options.items() if k not in keys})

    def noise(self, coils: int | None = None) -> NoiseFloor:
        """The noise-floor handling (``coils``: the background's count where :attr:`coils` is None)."""
        return NoiseFloor(self.noise_floor, coils=self.coils or coils or 1)

    def provenance(self) -> dict:
        """The provenance ``options`` of a decay fit."""
        return {"noise_floor": self.noise_floor, "sigma": None if self.sigma is None else str(self.sigma),
                "coils": self.coils, "drop_first_echo": self.drop_first}


def load_echoes(inputs, *, te, drop_first: bool, common: CommonOptions, min_volumes: int = 2):
    """Load a multi-echo series (``EchoTime``), optionally without its first echo; returns (series, notes)."""
    series = load_series(inputs, key="EchoTime", value=te, option="te=",
                         min_volumes=min_volumes + 1 if drop_first else min_volumes, max_bytes=common.max_memory,
                         check_order=common.series_check)
    notes = []
    if drop_first:
        series.select_volumes(np.arange(1, series.n))
        series.acquisition["EchoTime"] = np.asarray(series.acquisition["EchoTime"])[1:]
        notes.append("first echo dropped")
    return series, notes


@recorded
@shared_parameters("inputs", "common", keys=(DecayOptions,))
def run_t2star(inputs, *, common: CommonOptions, te=None, **options: Unpack[DecayOptions]) -> RunReport:
    """Fit T2*, R2* and M0 maps (with standard errors, quality and status) to a multi-echo GRE series.

    Parameters
    ----------
    te : (m,) array_like, optional
        Echo times in seconds; default from the BIDS sidecars (``EchoTime``).
    **options
        The keyword options of :class:`DecayOptions`; see Other Parameters.
    """
    t0 = time.perf_counter()
    settings, _ = DecaySettings.split(options, DecayOptions.__optional_keys__)
    series, notes = load_echoes(inputs, te=te, drop_first=settings.drop_first, common=common)
    model, _ = build_model("t2star", None, series.acquisition["EchoTime"])  # the registry's model of t2star
    return run_fit(
        series, model, common=common, noise=settings.noise(), sigma_spec=settings.sigma,
        options=settings.provenance(),
        model_info=model.info(), notes=notes, t0=t0,
        method="megre",
        coils_auto=settings.coils is None,
    )
