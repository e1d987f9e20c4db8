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
    one_exponential = True

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x) -> MonoExponential:
        param = next((p for p in model.get("parameters", ()) if p in ("T2", "T2star")), "T2star")
        return cls(x, param=param)

    def info(self) -> dict:
        """Model description for provenance (with ``parameters``, what :meth:`from_provenance` reads back)."""
        return {"name": self.name, "equation": f"S = M0 exp(-TE/{self.param})"}

    def __init__(self, te, *, param: str = "T2star"):
        self.x = te
        self.param = param
        self.rate = "R2star" if param == "T2star" else "R" + param[1:]
        self.nonlinear = (param,)

    @property
    def x(self) -> np.ndarray:
        return self._x

    @x.setter
    def x(self, value) -> None:
        self._x = np.asarray(value, dtype=float).ravel()
        x = self._x
        # evenly spaced times (the usual multi-echo train): exp(-TE_k / T) = exp(-TE_1 / T) q^(k-1) with
        # q = exp(-dTE / T), two exponentials per voxel instead of one per sample (rounding: k ulp)
        self._step = None
        if x.size >= 3 and np.all(np.isfinite(x)):
            step = (x[-1] - x[0]) / (x.size - 1)
            if step != 0 and np.max(np.abs(x - (x[0] + step * np.arange(x.size)))) <= 1e-12 * np.max(np.abs(x)):
                self._step = float(step)

    def decay(self, rate: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
        """``exp(-TE * rate)`` for decay rates ``rate`` (n,) (1/s) at the model's times, (n, m).

        ``out`` (n, m), optional, may be a strided view (a column block of a larger array).
        """
        rate = np.asarray(rate, dtype=float)
        x = self._x
        if out is None:
            out = np.empty((rate.shape[0], x.size))
        if self._step is None:
            np.multiply(rate[:, None], -x, out=out)
            return np.exp(out, out=out)
        np.exp(rate * -x[0], out=out[:, 0])
        q = np.exp(rate * -self._step)
        for k in range(1, x.size):
            np.multiply(out[:, k - 1], q, out=out[:, k])
        return out

    def basis(self, theta, ctx=None):
        return self.decay(1.0 / theta[:, 0])[:, :, None]

    def dbasis(self, theta, ctx=None):
        t = theta[:, 0:1]
        e = self.decay(1.0 / theta[:, 0])
        return (e * self.x[None, :] / t**2)[:, :, None, None]

    def predict(self, params, ctx=None):
        return params[:, 0:1] * self.decay(1.0 / params[:, 1])

    def signal_jacobian(self, params, ctx=None):
        # specialised for speed: the decay once, both derivatives from it
        n, m = params.shape[0], self.x.size
        rate = 1.0 / params[:, 1]
        J = np.empty((n, 2, m))
        e = self.decay(rate, out=J[:, 0])
        s = params[:, 0:1] * e
        np.multiply(s, self.x, out=J[:, 1])
        J[:, 1] *= (rate * rate)[:, None]
        return s, J

    def initial_guess(self, y, w, ctx=None):
        """Closed-form start: the weighted log-linear regression of ``ln y`` on TE, (n, 1) decay times.

        ``ln S = ln M0 - TE / T`` is a straight line; with weights ``y^2`` (the
        inverse variance of ``ln y`` for Gaussian noise of constant sd, to
        first order) its least-squares solution is exact for noise-free data
        and within a few per cent of the least-squares optimum otherwise, so
        that the solver's refinement starts next to the minimum. Samples
        ``<= 0`` get no weight; a voxel whose regression is undetermined or
        does not decay starts at the upper bound, one that decays faster than
        the lower bound at the lower bound.
        """
        x = self.x
        pos = y > 0
        if pos.all():  # the rule (no temporaries of np.where's)
            wt, ly = y * y, np.log(y)
        else:
            wt, ly = np.where(pos, y * y, 0.0), np.log(np.where(pos, y, 1.0))
        if w is not None:
            wt = wt * w
        wl = wt * ly
        s0 = np.einsum("nm->n", wt)
        s1 = np.einsum("nm,m->n", wt, x)
        s2 = np.einsum("nm,m->n", wt, x * x)
        t0 = np.einsum("nm->n", wl)
        t1 = np.einsum("nm,m->n", wl, x)
        lo, hi = self.bounds()
        with np.errstate(divide="ignore", invalid="ignore"):
            rate = (s1 * t0 - s0 * t1) / (s0 * s2 - s1 * s1)  # minus the slope: 1 / T
            t = 1.0 / rate
        t = np.where(np.isfinite(t) & (rate > 0), t, hi[0])
        return np.clip(t, lo[0], hi[0])[:, None]

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
