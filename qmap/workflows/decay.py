"""``qmap t2star`` (and the mono-exponential part of ``qmap t2``): multi-echo decay maps."""

from __future__ import annotations

import time

import numpy as np

from ..docstrings import shared_parameters
from ..fitting.noise_floor import DEFAULT_MODE, NoiseFloor
from ..io.series import load_series
from ..models.monoexp import MonoExponential
from ..pipeline import CommonOptions, RunReport, run_fit
from ..record import recorded

__all__ = ["load_echoes", "noise_options", "run_t2star"]


def noise_options(noise_floor: str, sigma, coils: int | None, drop_first: bool = False) -> dict:
    return {"noise_floor": noise_floor, "sigma": None if sigma is None else str(sigma), "coils": coils,
            "drop_first_echo": drop_first}


def load_echoes(inputs, *, te, drop_first: bool, common: CommonOptions, min_volumes: int = 2):
    """Load a multi-echo series (``EchoTime``), optionally without its first echo; returns (series, notes)."""
    series = load_series(inputs, key="EchoTime", value=te, option="--te",
                         min_volumes=min_volumes + 1 if drop_first else min_volumes, max_bytes=common.max_memory,
                         check_order=common.series_check)
    notes = []
    if drop_first:
        series.select_volumes(np.arange(1, series.n))
        series.acquisition["EchoTime"] = np.asarray(series.acquisition["EchoTime"])[1:]
        notes.append("first echo dropped")
    return series, notes


@recorded
@shared_parameters("inputs", "common")
def run_t2star(
    inputs,
    *,
    common: CommonOptions,
    te=None,
    noise_floor: str = DEFAULT_MODE,
    sigma="auto",
    coils: int | None = None,
    drop_first: bool = False,
) -> RunReport:
    """Fit T2*, R2* and M0 maps (with standard errors, quality and status) to a multi-echo GRE series.

    Parameters
    ----------
    te : (m,) array_like, optional
        Echo times in seconds; default from the BIDS sidecars (``EchoTime``).
    noise_floor : {"rician", "offset", "truncate", "none"}
    sigma : "auto", "local", float, or path
        Noise sd: from the data (image background, else the residuals of a first fit), a smooth
        local map, a value in signal units, or a NIfTI noise map (see :func:`qmap.pipeline.resolve_sigma`).
    coils : int, optional
        Sum-of-squares coils for the noncentral-chi expectation (``rician``); None: one, unless the
        background's moments show more.
    drop_first : bool
        Ignore the first echo.
    """
    t0 = time.perf_counter()
    series, notes = load_echoes(inputs, te=te, drop_first=drop_first, common=common)
    model = MonoExponential(series.acquisition["EchoTime"], param="T2star")
    return run_fit(
        series, model, common=common, noise=NoiseFloor(noise_floor, coils=coils or 1), sigma_spec=sigma,
        options=noise_options(noise_floor, sigma, coils, drop_first),
        model_info={"name": "monoexp", "equation": "S = M0 exp(-TE/T2star)"}, notes=notes, t0=t0,
        method="megre",
        coils_auto=coils is None,
    )
