"""A fit problem, checked once before any work (the habit of ``scipy.optimize``).

:class:`FitProblem` holds what every voxel of a fit shares -- the model, the noise-floor handling,
the noise level, the covariance convention and the method -- and :meth:`FitProblem.create` checks
it up front: the model's sampling values (echo / inversion times in seconds, flip angles in
degrees) are finite, the method and the covariance convention are known, a noise floor that needs
the noise sd has it, a given noise sd is positive, the per-voxel inputs the model needs are there.
The volume layer (:func:`qmap.maps.fit_volume`) and the engine (:func:`qmap.engine.fit_voxels`)
create it once and the chunk fitters consume it; nothing downstream checks these again.

Messages name the arguments of the array API (``sigma=``, ``stderr=``); the command line, which
checks its options itself, never reaches them with a bad value.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from .noise_floor import NoiseFloor
from .uncertainty import CONVENTIONS

__all__ = ["METHODS", "FitProblem"]

#: the chunk fitters: the vectorised solver, the per-voxel lmfit reference, the model's linearised estimator
METHODS = ("fast", "lmfit", "linear")


@dataclass(frozen=True)
class FitProblem:
    """What every voxel of a fit shares, checked (see the module docstring).

    Attributes
    ----------
    model : SeparableModel (or a model with its own ``fit_chunk``)
    noise : NoiseFloor
        The noise-floor handling (``NoiseFloor("none")`` when not given).
    stderr : {"noise", "residual"}
        Covariance convention when a noise sd is known (:mod:`qmap.fitting.uncertainty`).
    method : {"fast", "lmfit", "linear"}
    max_iter : int
        Levenberg-Marquardt iterations at most.
    """

    model: Any
    noise: NoiseFloor
    stderr: str = "noise"
    method: str = "fast"
    max_iter: int = 60

    @property
    def default_chunk(self) -> int:
        """Voxels per work unit when none is asked for (:data:`~qmap.defaults.DEFAULT_CHUNK`;
        :data:`~qmap.defaults.EXPONENTIAL_CHUNK` for the one-exponential solver's lean work arrays)."""
        from ..defaults import DEFAULT_CHUNK, EXPONENTIAL_CHUNK

        return EXPONENTIAL_CHUNK if lean_fit(self.model, self.method, self.noise) else DEFAULT_CHUNK

    @classmethod
    def create(cls, model, *, noise: NoiseFloor | None = None, sigma=None, stderr: str = "noise",
               method: str = "fast", max_iter: int = 60) -> FitProblem:
        """Check the shared inputs of a fit and return the problem.

        Parameters
        ----------
        model : SeparableModel
        noise : NoiseFloor, optional
        sigma : float or ndarray, optional
            The noise sd (signal units): a number must be positive and finite; an array (a noise
            map, per voxel) may hold voxels without a usable value (they get a status code).
        stderr, method, max_iter
            See the attributes.

        Raises
        ------
        ValueError
            For the first input that is wrong, naming the argument.
        """
        noise = noise or NoiseFloor("none")
        if stderr not in CONVENTIONS:
            raise ValueError(f"stderr={stderr!r}; expected one of {', '.join(CONVENTIONS)}")
        if method not in METHODS:
            raise ValueError(f"method={method!r}; expected one of {', '.join(METHODS)}")
        if int(max_iter) < 1:
            raise ValueError(f"max_iter={max_iter!r}; expected a positive number of iterations")
        x = getattr(model, "x", None)
        if x is not None:
            xv = np.asarray(x, float)
            if xv.size == 0 or not np.all(np.isfinite(xv)):
                varied = getattr(model, "varied", "sampling values")
                raise ValueError(f"the model's {varied} values {xv.tolist()} are not all finite numbers "
                                 f"(seconds for times, degrees for angles)")
        if sigma is None:
            if noise.needs_sigma:
                raise ValueError(f"the {str(noise.mode)!r} noise floor needs sigma (the noise sd in signal units); "
                                 "estimate it with qmap.noise_level.estimate_noise or give it")
        elif np.ndim(sigma) == 0:
            s = float(sigma)
            if not (np.isfinite(s) and s > 0):
                raise ValueError(f"sigma={s!r}: the noise sd must be a positive number in signal units")
        return cls(model=model, noise=noise, stderr=stderr, method=method, max_iter=int(max_iter))

    def check_samples(self, m: int) -> None:
        """The data have ``m`` samples per voxel: as many as the model has sampling values."""
        n = getattr(self.model, "n_samples", None)
        if n is not None and m != n:
            raise ValueError(f"data has {m} samples per voxel, the model {n}")


def lean_fit(model, method: str = "fast", noise: NoiseFloor | None = None) -> bool:
    """True for a fit by the one-exponential solver (Newton on the rate, :mod:`qmap.fitting.exponential`):
    a one-exponential model, the fast engine, and no noise floor or the Rician one (whose refinement starts
    from that fit and takes only the voxels near the floor). Its work arrays are a few per chunk: it takes
    larger chunks (:attr:`FitProblem.default_chunk`) and a run fits two slabs at a time
    (:meth:`qmap.pipeline.PreparedRun.fit`). Other fits hold more per voxel (measured: ``t1-ir`` +30 MB with
    chunks twice as large, +9 MB with two slabs, for no speed; ``t2star --noise-floor offset`` +12 MB)."""
    mode = "none" if noise is None else str(noise.mode)
    return method == "fast" and bool(getattr(model, "one_exponential", False)) and mode in ("none", "rician")
