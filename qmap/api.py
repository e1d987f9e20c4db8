"""Array-level Python API: fit numpy arrays directly, no files involved.

Each function takes the data as an array whose last axis is the varied
acquisition parameter and returns a :class:`~qmap.maps.MapSet` (named maps,
standard errors, quality and status). The command-line tools are thin layers
over the same machinery.
"""

from __future__ import annotations

from typing import Unpack

import numpy as np

from .docstrings import shared_parameters
from .maps import Execution, MapSet, execution_kwargs, fit_volume
from .models import build_model
from .models.base import SeparableModel
from .workflows.decay import DecayFitOptions, DecayOptions, DecaySettings

__all__ = ["b1_maps", "fit_decay", "fit_t1_ir", "fit_t1_vfa", "fit_t2", "fit_t2star"]


#: the decay time named in the outputs -> the command whose (default) model fits it
_DECAY_COMMANDS = {"T2star": "t2star", "T2": "t2"}


@shared_parameters("mask", "decay_options", keys=(DecayOptions, Execution))
def fit_decay(data, te, *, param: str = "T2star", mask=None, **options: Unpack[DecayFitOptions]) -> MapSet:
    """Fit a mono-exponential decay ``S = M0 exp(-TE/T)`` in every voxel.

    Parameters
    ----------
    data : (..., m) array_like
        Magnitude samples; the last axis runs over the echoes.
    te : (m,) array_like
        Echo times in seconds.
    param : {"T2star", "T2"}
        Name of the decay time in the outputs.

    Returns
    -------
    MapSet
        ``maps[param]``, ``maps["R..."]``, ``maps["M0"]``, their ``stderr``,
        ``quality`` and ``status``.
    """
    settings, execution = DecaySettings.split(options, DecayOptions.__optional_keys__, Execution.__optional_keys__)
    data = np.asarray(data)
    te = np.asarray(te, float)
    if settings.drop_first:
        data, te = data[..., 1:], te[1:]
    if param not in _DECAY_COMMANDS:
        raise ValueError(f"param={param!r}; expected 'T2star' or 'T2'")
    model, _ = build_model(_DECAY_COMMANDS[param], None, te)  # the registry's mono-exponential of that command
    return _fit_with_noise_floor(model, data, settings, mask=mask, execution=execution)


def _fit_with_noise_floor(model: SeparableModel, data, settings: DecaySettings, *, mask, execution: dict) -> MapSet:
    """Fit ``model`` to magnitudes ``data`` with a noise-floor model and its noise level (from the data with "auto").

    The body of the decay fits (:func:`fit_decay`, :func:`qmap.workflows.t2.fit_t2`); ``execution`` holds the
    :class:`~qmap.maps.Execution` options (TypeError for any other name); the estimated noise level is in
    ``maps.info["noise"]``.
    """
    kw = execution_kwargs(execution)
    noise, sigma, info = _noise_for(data, model, settings, mask, kw["n_jobs"])
    maps = fit_volume(model, data, mask=mask, noise=noise, sigma=sigma, **kw)
    if info is not None:
        maps.info["noise"] = info
    return maps


def _noise_for(data, model: SeparableModel, settings: DecaySettings, mask, n_jobs):
    """The noise-floor handling and sigma of an array fit: ``sigma="auto"``/``"local"`` estimated from ``data``."""
    from .noise_level import array_sigma

    noise = settings.noise()
    sigma, coils = settings.sigma, settings.coils
    info = None
    if noise.needs_sigma:
        if sigma is None:
            raise ValueError(f"noise_floor={settings.noise_floor!r} needs sigma (the noise sd in signal units, or "
                             f"'auto')")
        sigma, info = array_sigma(data, model, sigma, mask=mask, coils=coils, n_jobs=n_jobs)
        if info is not None and coils is None and info.get("coils") and info["coils"] != noise.coils:
            noise = settings.noise(int(info["coils"]))
    elif isinstance(sigma, str):
        sigma = None  # not used by this noise-floor mode
    return noise, sigma, info


@shared_parameters(keys=(DecayOptions, Execution))
def fit_t2star(data, te, *, mask=None, **options: Unpack[DecayFitOptions]) -> MapSet:
    """Fit T2* from multi-echo gradient-echo magnitudes: :func:`fit_decay` with ``param="T2star"``.

    Parameters
    ----------
    data, te, mask, **options
        As in :func:`fit_decay`.

    Examples
    --------
    >>> import numpy as np
    >>> te = np.arange(1, 9) * 0.005
    >>> data = 1000 * np.exp(-te / 0.03) * np.ones((4, 4, 1, 1))
    >>> maps = fit_t2star(data, te, noise_floor="none")
    >>> float(np.round(maps["T2star"][0, 0, 0], 6))
    0.03
    """
    return fit_decay(data, te, param="T2star", mask=mask, **options)


# the other models' array-level functions live beside their workflows; re-exported here
from .b1 import b1_maps
from .workflows.ir import fit_t1_ir
from .workflows.t2 import fit_t2
from .workflows.vfa import fit_t1_vfa
