"""The contract every signal model fulfils.

All of qmap's signal models are *separable*: the signal is a linear
combination of basis functions that depend non-linearly on one or two
parameters,

.. math:: S(t) = \\sum_{l} c_l \\, \\phi_l(\\theta; t),

so the amplitudes ``c`` (M0, an offset, ...) can be solved in closed form for
any ``theta`` (variable projection). A model only describes the physics: it
knows nothing about files, chunks, noise handling or processes. The solvers in
:mod:`qmap.fitting` work on any model that implements :class:`SeparableModel`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass

import numpy as np

__all__ = ["OUTPUT_KINDS", "Derived", "SeparableModel"]

OUTPUT_KINDS = ("estimate", "stderr", "quality", "status")


@dataclass
class Derived:
    """One reported parameter: its value, standard error, units and description."""

    name: str
    value: np.ndarray
    stderr: np.ndarray
    units: str
    description: str
    is_time: bool = False


class SeparableModel(ABC):
    """Base class of signal models (see the module docstring).

    Subclasses set the class attributes and implement :meth:`basis`,
    :meth:`dbasis` and :meth:`report`. A model instance holds the acquisition
    (echo times, inversion times, flip angles ...) and does no work in its
    constructor beyond validation.

    Attributes
    ----------
    name : str
        Short name used in provenance (``"monoexp"``, ``"ir"`` ...).
    linear : tuple of str
        Names of the linear amplitudes, in order.
    nonlinear : tuple of str
        Names of the non-linear parameters, in order.
    voxel_inputs : tuple of str
        Names of per-voxel inputs the basis needs (e.g. ``("b1",)``); passed
        to :meth:`basis` as ``ctx``.
    varied : str
        BIDS key of the acquisition parameter the samples vary in
        (``"EchoTime"``, ``"InversionTime"``, ``"FlipAngle"``).
    axis_label : str
        Plot label of that parameter (without units).
    discrete : bool
        The model exists only at the acquired positions (an echo train).

    A model describes itself to the rest of qmap: ``name`` keys it in
    :data:`qmap.models.REGISTRY` and in the provenance, and
    :meth:`from_provenance` rebuilds it from what a fit recorded (``qmap
    inspect`` redraws any fit that way).
    """

    name: str = "model"
    varied: str = "EchoTime"
    axis_label: str = "echo time"
    discrete: bool = False
    linear: tuple[str, ...] = ("M0",)
    nonlinear: tuple[str, ...] = ()
    voxel_inputs: tuple[str, ...] = ()
    #: magnitude data whose sign the fit restores (inversion recovery): samples near the null get no weight in the
    #: standard errors when the noise level is known (:func:`qmap.fitting.solver.fit_chunk`)
    sign_ambiguous: bool = False
    #: :meth:`initial_guess` (when it gives a start) is already the least-squares optimum: with several
    #: :meth:`candidates` the solver keeps each voxel's candidate of lowest start RSS and refines that one only
    exact_start: bool = False
    #: the signal is one decaying exponential ``M0 exp(-x / theta)`` (one amplitude, one non-linear parameter, no
    #: voxel inputs, one candidate) and the model has ``decay(rate)`` = ``exp(-x rate)`` (n, m): an unweighted fit
    #: then runs by Newton's method on the rate (:mod:`qmap.fitting.exponential`), to the same minimum
    one_exponential: bool = False
    #: the sample-axis values the model is evaluated at (seconds / degrees)
    x: np.ndarray

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x: np.ndarray) -> SeparableModel:
        """The model a fit used, from its provenance ``model`` and ``acquisition`` entries, at positions ``x``.

        ``x`` (seconds / degrees) replaces the acquired values of :attr:`varied` (a fine grid draws the curve).
        """
        # the base class itself takes no positions: this default serves the subclasses whose constructor needs
        # only the positions (the others override it), which the type checker cannot see from here
        return cls(x)  # type: ignore[call-arg]

    @property
    def angles(self) -> bool:
        """The sample positions are angles (degrees), not times (seconds)."""
        return self.varied == "FlipAngle"

    # ------------------------------------------------------------------ physics
    @property
    def n_samples(self) -> int:
        return int(np.asarray(self.x).shape[-1])

    @abstractmethod
    def basis(self, theta: np.ndarray, ctx: dict | None = None) -> np.ndarray:
        """Basis functions.

        Parameters
        ----------
        theta : (n, Q) ndarray
            Non-linear parameters per voxel.
        ctx : dict, optional
            Per-voxel inputs, each an (n,) array.

        Returns
        -------
        (n, m, L) ndarray
        """

    @abstractmethod
    def dbasis(self, theta: np.ndarray, ctx: dict | None = None) -> np.ndarray:
        """Derivatives of the basis functions, (n, m, L, Q)."""

    @abstractmethod
    def bounds(self) -> tuple[np.ndarray, np.ndarray]:
        """Lower and upper bounds of the non-linear parameters, each (Q,)."""

    @abstractmethod
    def grid(self) -> np.ndarray:
        """Candidate values of the non-linear parameters for the initial search, (G, Q)."""

    # --------------------------------------------------------------- optional
    def initial_guess(self, y: np.ndarray, w: np.ndarray | None, ctx: dict | None) -> np.ndarray | None:
        """Model-specific closed-form start (n, Q), or None to use the grid search."""
        return None

    def candidates(self, y: np.ndarray) -> list[np.ndarray]:
        """Variants of the data to fit; the best fit per voxel wins (e.g. IR polarity)."""
        return [y]

    @abstractmethod
    def report(self, params: np.ndarray, cov: np.ndarray) -> list[Derived]:
        """Turn fitted parameters ``[c..., theta...]`` (n, P) and covariance (n, P, P) into reported maps."""

    # ------------------------------------------------------------- generic
    @property
    def param_names(self) -> tuple[str, ...]:
        return tuple(self.linear) + tuple(self.nonlinear)

    def predict(self, params: np.ndarray, ctx: dict | None = None) -> np.ndarray:
        """Noise-free signal for parameters ``[c..., theta...]``, (n, m)."""
        L = len(self.linear)
        phi = self.basis(params[:, L:], ctx)
        return np.einsum("nml,nl->nm", phi, params[:, :L])

    def signal_jacobian(self, params: np.ndarray, ctx: dict | None = None):
        """Signal (n, m) and its Jacobian with respect to ``[c..., theta...]``, (n, P, m)."""
        L = len(self.linear)
        c = params[:, :L]
        theta = params[:, L:]
        phi = self.basis(theta, ctx)
        dphi = self.dbasis(theta, ctx)
        s = np.einsum("nml,nl->nm", phi, c)
        dtheta = np.einsum("nmlq,nl->nqm", dphi, c)
        return s, np.concatenate([phi.transpose(0, 2, 1), dtheta], axis=1)


def delta_se_inverse(value: np.ndarray, se: np.ndarray) -> np.ndarray:
    """Standard error of 1/x by the delta method: se(1/x) = se(x) / x^2."""
    with np.errstate(divide="ignore", invalid="ignore"):
        return se / value**2
