"""Mono-exponential decay: T2* from multi-echo gradient echo, T2 from spin-echo trains.

.. math:: S(TE) = M_0 \\exp(-TE / T)
"""

from __future__ import annotations

import numpy as np

from .base import Derived, SeparableModel, delta_se_inverse

__all__ = ["MonoExponential"]


class MonoExponential(SeparableModel):
    """Mono-exponential decay with one amplitude.

    Parameters
    ----------
    te : (m,) array_like
        Echo times in seconds.
    param : {"T2star", "T2"}
        Name of the decay time; its rate is reported as ``R2star`` / ``R2``.

    Notes
    -----
    The decay time is bounded to ``[min(TE)/20, 200 max(TE)]``: outside that
    range the echoes cannot tell it apart from 0 or from no decay, and the
    voxel gets the "hit a bound" status.

    Examples
    --------
    >>> import numpy as np
    >>> m = MonoExponential([0.005, 0.010, 0.020], param="T2star")
    >>> m.predict(np.array([[100.0, 0.010]])).round(3).tolist()
    [[60.653, 36.788, 13.534]]
    """

    name = "monoexp"
    linear = ("M0",)

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x) -> MonoExponential:
        param = next((p for p in model.get("parameters", ()) if p in ("T2", "T2star")), "T2star")
        return cls(x, param=param)

    def __init__(self, te, *, param: str = "T2star"):
        self.x = np.asarray(te, dtype=float).ravel()
        self.param = param
        self.rate = "R2star" if param == "T2star" else "R" + param[1:]
        self.nonlinear = (param,)

    def basis(self, theta, ctx=None):
        t = theta[:, 0:1]
        return np.exp(-self.x[None, :] / t)[:, :, None]

    def dbasis(self, theta, ctx=None):
        t = theta[:, 0:1]
        e = np.exp(-self.x[None, :] / t)
        return (e * self.x[None, :] / t**2)[:, :, None, None]

    def signal_jacobian(self, params, ctx=None):
        # specialised for speed: one exponential per sample
        m0 = params[:, 0:1]
        t = params[:, 1:2]
        e = np.exp(-self.x[None, :] / t)
        s = m0 * e
        J = np.empty((s.shape[0], 2, s.shape[1]))
        J[:, 0] = e
        J[:, 1] = s * (self.x[None, :] / t**2)
        return s, J

    def bounds(self):
        return np.array([self.x.min() / 20.0]), np.array([self.x.max() * 200.0])

    def grid(self):
        lo, hi = self.bounds()
        return np.geomspace(lo[0] * 1.05, hi[0] / 1.05, 40)[:, None]

    def report(self, params, cov):
        t = params[:, 1]
        se_t = np.sqrt(cov[:, 1, 1])
        name, rate = self.param.replace("star", "*"), self.rate.replace("star", "*")  # T2* as written in the trade
        return [
            Derived(self.param, t, se_t, "s", f"{name} decay time", is_time=True),
            Derived(self.rate, 1.0 / t, delta_se_inverse(t, se_t), "1/s", f"{rate} decay rate (1/{name})"),
            Derived("M0", params[:, 0], np.sqrt(cov[:, 0, 0]), "a.u.", "signal extrapolated to TE = 0"),
        ]
