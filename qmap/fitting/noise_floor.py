"""Noise-floor handling for magnitude data, as a property of the objective.

Usable by every decay model (mono-exponential T2/T2*, the EPG spin-echo model):

``none``
    Plain least squares on the magnitude.
``offset``
    A constant ``C >= 0`` is added to the model (one more linear amplitude,
    written as its own map).
``truncate``
    Samples from the first one whose magnitude falls below ``factor`` times
    the mean of the noise floor (``sigma * sqrt(pi/2)``, the Rayleigh mean)
    are dropped; at least ``min_samples`` samples are always kept. The number
    of samples used per voxel is written as a quality map.
``rician``
    The model's prediction ``S`` is replaced by the expectation of its
    magnitude under Rician noise, ``E|S + noise|`` (Gudbjartsson & Patz 1995),
    for the voxels whose Gaussian fit comes within ``RICIAN_SWITCH`` sigma of
    the floor; elsewhere the expectation equals ``S`` to better than 0.25 %
    at the lowest sample and the Gaussian fit is kept. Voxels whose samples
    are consistent with pure noise (:meth:`NoiseFloor.noise_only`) are not
    fitted at all (status ``NOISE_ONLY``): the engine's fast path for the
    background under ``--mask none``.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from enum import StrEnum

import numpy as np

from ..defaults import DEFAULT_NOISE_MODE as DEFAULT_MODE
from ..defaults import NOISE_MODES as MODES
from ..models.base import Derived, SeparableModel
from .optimizer import levenberg_marquardt, row_min

__all__ = ["DEFAULT_MODE", "MODES", "NOISE_ONLY_Z", "RICIAN_SWITCH", "Mode", "NoiseFloor", "WithOffset"]

#: voxels whose lowest fitted sample is below this many sigma get the Rician objective
#: (relative bias of the Gaussian model there is sigma^2 / (2 S^2) < 0.25 %)
RICIAN_SWITCH = 15.0
#: ``rician``: a voxel whose mean sample lies less than this many standard errors above the mean of pure
#: noise is noise only (status NOISE_ONLY, not fitted); pure noise exceeds it in about 0.1 % of voxels
NOISE_ONLY_Z = 3.0


class Mode(StrEnum):
    """The noise-floor modes (``--noise-floor``). A ``str``: ``Mode.RICIAN == "rician"``.

    The one place where a mode name is switched on is :class:`NoiseFloor`: the rest of qmap asks it
    what the mode implies (:attr:`NoiseFloor.needs_sigma`, :attr:`~NoiseFloor.weighted`,
    :attr:`~NoiseFloor.rician`, :meth:`~NoiseFloor.wrap`, ...).
    """

    NONE = "none"
    OFFSET = "offset"
    TRUNCATE = "truncate"
    RICIAN = "rician"


assert tuple(m.value for m in Mode) == tuple(MODES), "qmap.defaults.NOISE_MODES and Mode list the same modes"


class WithOffset(SeparableModel):
    """``model`` plus a constant offset ``C`` (a further linear amplitude)."""

    def __init__(self, base: SeparableModel):
        self.base = base
        self.name = base.name
        self.linear = tuple(base.linear) + ("Offset",)
        self.nonlinear = base.nonlinear
        self.voxel_inputs = base.voxel_inputs
        self.x = base.x

    def basis(self, theta, ctx=None):
        phi = self.base.basis(theta, ctx)
        return np.concatenate([phi, np.ones(phi.shape[:2] + (1,))], axis=2)

    def dbasis(self, theta, ctx=None):
        d = self.base.dbasis(theta, ctx)
        return np.concatenate([d, np.zeros(d.shape[:2] + (1, d.shape[3]))], axis=2)

    def signal_jacobian(self, params, ctx=None):
        # the base model's (possibly specialised) signal and Jacobian, plus the constant
        k = len(self.base.linear)
        base = np.concatenate([params[:, :k], params[:, k + 1 :]], axis=1)
        s, J = self.base.signal_jacobian(base, ctx)
        s = s + params[:, k : k + 1]
        J = np.concatenate([J[:, :k], np.ones((J.shape[0], 1, J.shape[2])), J[:, k:]], axis=1)
        return s, J

    def bounds(self):
        return self.base.bounds()

    def grid(self):
        return self.base.grid()

    def report(self, params, cov):
        return NoiseFloor(Mode.OFFSET).report(self.base, params, cov)


@dataclass(frozen=True)
class NoiseFloor:
    """How the fit treats the noise floor of magnitude data.

    Parameters
    ----------
    mode : {"none", "offset", "truncate", "rician"}
    factor : float
        ``truncate``: samples below ``factor * sigma * sqrt(pi/2)`` are dropped.
    min_samples : int
        ``truncate``: samples always kept.
    coils : int
        ``rician``: number of coils combined by sum of squares (1 = Rician,
        more = noncentral chi).
    """

    mode: Mode | str = Mode.NONE
    factor: float = 3.0
    min_samples: int = 3
    coils: int = 1

    def __post_init__(self):
        if self.mode not in MODES:
            raise ValueError(f"noise-floor mode {str(self.mode)!r}; expected one of {', '.join(MODES)}")
        object.__setattr__(self, "mode", Mode(self.mode))

    @property
    def needs_sigma(self) -> bool:
        """The mode needs the noise sd (``truncate``, ``rician``)."""
        return self.mode in (Mode.TRUNCATE, Mode.RICIAN)

    @property
    def weighted(self) -> bool:
        """Samples are weighted (``truncate`` drops the samples near the floor): the fit uses :meth:`weights`."""
        return self.mode == Mode.TRUNCATE

    @property
    def rician(self) -> bool:
        """The fitted signal is the expectation of the noisy magnitude (``rician``)."""
        return self.mode == Mode.RICIAN

    def with_coils(self, coils: int | None) -> NoiseFloor:
        """This noise floor with the number of coils found from the data (only ``rician`` uses it)."""
        if not self.rician or not coils or int(coils) == self.coils:
            return self
        return dataclasses.replace(self, coils=int(coils))

    def provenance(self) -> dict:
        """The settings of this mode for the provenance's ``noise`` entry (beside ``mode`` and sigma)."""
        if self.mode == Mode.TRUNCATE:
            return {"truncate_factor": self.factor, "min_samples": self.min_samples}
        if self.mode == Mode.RICIAN:
            return {"coils": self.coils}
        return {}

    def expectation(self, s: np.ndarray, sigma) -> np.ndarray:
        """What the fit compares with the data for the model signal ``s``: ``E|s + noise|`` (``rician``), else ``s``."""
        if not self.rician:
            return s
        from ..noise import rician_mean

        return rician_mean(s, sigma, coils=self.coils)

    def wrap(self, model: SeparableModel) -> SeparableModel:
        return WithOffset(model) if self.mode == Mode.OFFSET else model

    def linear_lower(self, fit_model: SeparableModel) -> np.ndarray:
        return np.array([0.0 if name == "Offset" else -np.inf for name in fit_model.linear])

    def report(self, model: SeparableModel, params: np.ndarray, cov: np.ndarray) -> list[Derived]:
        """Reported maps of ``model`` fitted under this noise handling (adds the offset map)."""
        if self.mode != Mode.OFFSET:
            return model.report(params, cov)
        k = len(model.linear)  # the offset is the last linear amplitude
        keep = [i for i in range(params.shape[1]) if i != k]
        base = model.report(params[:, keep], cov[:, keep][:, :, keep])
        return base + [offset_report(params, cov, k)]

    def weights(self, y: np.ndarray, sigma) -> np.ndarray:
        """Sample weights (0/1), (n, m)."""
        w = np.ones_like(y)
        if not self.weighted:
            return w
        floor = self.factor * np.sqrt(np.pi / 2) * np.broadcast_to(np.asarray(sigma, float), y.shape[:1])
        below = y < floor[:, None]
        below[:, : self.min_samples] = False
        dropped = np.cumsum(below, axis=1) > 0  # from the first low sample onwards
        w[dropped] = 0.0
        return w

    def noise_only(self, y: np.ndarray, sigma) -> np.ndarray:
        """Voxels whose samples are consistent with pure noise (``rician`` only), (n,) bool.

        Without signal the magnitude follows the central chi distribution with
        ``2 N`` degrees of freedom (Rayleigh for one coil; Constantinides et
        al., Magn Reson Med 1997;38:852): mean
        :math:`\\mu_0 = \\sigma\\sqrt2\\,\\Gamma(N+\\frac12)/\\Gamma(N)`
        (:math:`\\sigma\\sqrt{\\pi/2}` for one coil) and variance
        :math:`2N\\sigma^2 - \\mu_0^2`. A voxel whose mean over its ``m``
        samples is below :math:`\\mu_0 + z\\,\\mathrm{sd}_0/\\sqrt m`
        (``z`` = ``NOISE_ONLY_Z``) shows no signal: a fit would only describe
        the noise, so it is not made.
        """
        n, m = y.shape
        if not self.rician or sigma is None or m == 0:
            return np.zeros(n, bool)
        k = math.sqrt(2.0) * math.exp(math.lgamma(self.coils + 0.5) - math.lgamma(self.coils))
        sd = math.sqrt(max(2.0 * self.coils - k * k, 0.0))
        sig = np.broadcast_to(np.asarray(sigma, float), (n,))
        limit = sig * (k + NOISE_ONLY_Z * sd / math.sqrt(m))
        return (np.mean(y, axis=1) < limit) & (sig > 0)

    def rician_select(self, model, p, sigma, ctx) -> np.ndarray:
        """Indices of the voxels whose Gaussian fit ``p`` comes within ``RICIAN_SWITCH`` sigma of the floor."""
        sig = np.broadcast_to(np.asarray(sigma, float), p.shape[:1])
        s = model.predict(p, ctx)
        return np.flatnonzero(row_min(s) < RICIAN_SWITCH * sig)

    def rician_refine(self, model, y, w, p, rss, J, conv, nit, sigma, ctx, lo, hi, *, max_iter=60, select=None,
                      se_tol=1e-3):
        """Refit near-floor voxels (``select``, default :meth:`rician_select`) with the Rician expectation.

        ``max_iter`` and ``se_tol`` are those of :func:`~qmap.fitting.optimizer.levenberg_marquardt`.
        """
        from ..noise import rician_mean_grad

        sig = np.broadcast_to(np.asarray(sigma, float), y.shape[:1])
        sel = self.rician_select(model, p, sigma, ctx) if select is None else np.asarray(select, np.intp)
        if sel.size == 0:
            return p, rss, J, conv, nit
        sub_ctx = None if not ctx else {k: v[sel] for k, v in ctx.items()}
        sig_sel = sig[sel]
        coils = self.coils

        def evaluate(pp, idx):
            c = None if not sub_ctx else {k: v[idx] for k, v in sub_ctx.items()}
            s0, j0 = model.signal_jacobian(pp, c)
            e, de = rician_mean_grad(s0, sig_sel[idx, None], coils=coils)
            return e, j0 * de[:, None, :]

        p2, rss2, J2, conv2, nit2 = levenberg_marquardt(evaluate, y[sel], None if w is None else w[sel], p[sel], lo,
                                                        hi, max_iter=max_iter, se_tol=se_tol)
        p, rss, J, conv, nit = p.copy(), rss.copy(), J.copy(), conv.copy(), nit.copy()
        p[sel], rss[sel], J[sel], conv[sel] = p2, rss2, J2, conv2
        nit[sel] += nit2
        return p, rss, J, conv, nit


def offset_report(params: np.ndarray, cov: np.ndarray, index: int) -> Derived:
    """The fitted offset as a reported map (signal units)."""
    return Derived(
        name="Offset",
        value=params[:, index],
        stderr=np.sqrt(cov[:, index, index]),
        units="a.u.",
        description="constant signal offset fitted to absorb the noise floor",
    )
