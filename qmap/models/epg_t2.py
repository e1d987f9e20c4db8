"""T2 from a multi-echo spin-echo (CPMG) train with stimulated echoes: the EPG model.

With imperfect refocusing (transmit-field error, slice profile) the later
echoes of a CPMG train carry stimulated-echo pathways, and a mono-exponential
fit overestimates T2. This model computes the echo train by extended phase
graphs (Hennig, J Magn Reson 1988;78:397; Weigel, J Magn Reson Imaging
2015;41:266) and fits

.. math:: S_k = M_0 \\, E_k(T_2, \\alpha; \\mathrm{ESP}, T_1),
          \\qquad \\alpha = \\kappa \\, \\alpha_\\mathrm{nom},

with the refocusing scale ``kappa`` (RefocusScale) per voxel, the nominal
angle ``alpha_nom`` (``--refocus``), an ideal 90 degree excitation and T1
held fixed (Lebel & Wilman, Magn Reson Med 2010;64:1005; Prasloski et al.,
Magn Reson Med 2012;67:1803).

Conventions
-----------
* Echo k is at TE_k = k * ESP; the echo spacing comes from the echo times,
  which must be equally spaced and start at ESP (a CPMG train). Every echo
  is fitted: the first one, free of stimulated echoes, is what separates T2
  from the refocusing angle (without it a very short T2 with a huge M0 and
  a train carried by stored pathways can mimic a slow decay).
* Only the refocusing angle is scaled (the convention of the papers above;
  :func:`qmap.epg.cpmg_echoes` with ``scale_excitation=False``). The
  excitation only multiplies the train, so T2 and the scale do not depend on
  this choice; M0 is the amplitude for an ideal 90 degree excitation.
* T1 only affects the decay of the stored (longitudinal) states between the
  pulses: with 180 degree refocusing it has no effect at all, and for
  refocusing scales 0.8-1 a factor of two error in T1 moves the fitted T2 by
  well under 1 % (see the tests) -- hence a fixed default of 1 s.

The refocusing angle as a fit parameter
---------------------------------------
The echo magnitudes are symmetric about 180 degrees (``a`` and ``360 - a``
give the same train), so in terms of the angle a voxel with perfect
refocusing sits at a stationary point on the edge of the allowed range: the
derivative vanishes there, Levenberg-Marquardt crawls, and the covariance is
singular. The recursion, however, depends on the angle only through
``c = cos(a)`` (``sin^2(a/2) = (1 - c)/2``, ``sin^2(a) = 1 - c^2``, with the
stored states carried as ``sin(a) Z``), polynomially, so the fitted non-linear
parameter is ``c`` (``RefocusCos``), continued analytically slightly past
``c = -1``. Perfectly refocused voxels are then interior points with a
regular Jacobian; the estimator of ``c`` stays unbiased about 180 degrees
(noise puts half of such voxels a little beyond), and the reported
RefocusScale is ``arccos(max(c, -1)) / alpha_nom`` (at most ``180 /
alpha_nom``). Its standard error is half the width of the +-1 SE interval of
``c`` mapped through ``arccos`` (the delta method away from 180 degrees, and
finite at 180 degrees, where the angle is determined to second order only).

The recursion is the one kernel of :mod:`qmap.epg` (:func:`qmap.epg.cpmg_cos`,
which also serves :func:`qmap.epg.cpmg_echoes`); the tests check it against an
independent isochromat simulation and the closed forms to rounding.
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np

from ..epg import cpmg_cos
from ..errors import InputError, warn
from .base import Derived, SeparableModel, delta_se_inverse

__all__ = ["EpgT2", "EpgT2Finish", "EpgT2Table", "cpmg_cos", "echo_spacing"]

#: smallest refocusing scale searched (90 degrees for a nominal 180)
SCALE_MIN = 0.5
#: lower bound of c = cos(refocusing angle): the analytic continuation past 180 degrees
COS_MIN = -1.25
#: relative tolerance on TE_k = k * ESP (sidecars round to microseconds)
ESP_RTOL = 1e-3
#: deviation from TE_k = k x ESP accepted (with a warning) for echo times rounded to 0.1 ms by an export, s
TE_ROUNDING_S = 6e-5


def echo_spacing(te, *, where: str = "te=") -> float:
    """Echo spacing ESP (s) of a CPMG train whose echo times are TE_k = k * ESP, k = 1..n.

    Parameters
    ----------
    te : (n,) array_like
        Echo times in seconds, in order.
    where : str
        Name used in the error message.

    Returns
    -------
    float
        The least-squares ESP through the origin.

    Raises
    ------
    InputError
        When the echoes are not at 1, 2, ..., n times one spacing.
    """
    te = np.asarray(te, float).ravel()
    k = np.arange(1, te.size + 1)
    # robust spacing for the check (one misplaced echo must not shift it), least squares for the value
    esp0 = float(np.median(te / k)) if te.size else float("nan")
    dev = np.abs(te - k * esp0)
    tol = max(ESP_RTOL * esp0, 2e-6)
    rounded = False
    if te.size >= 2 and np.isfinite(esp0) and esp0 > 0 and np.any(dev > tol):
        # exports that round echo times to 0.1 ms: accept when every echo is within TE_ROUNDING_S of k x ESP
        # (least-squares ESP), with a warning
        esp_ls = float(np.sum(k * te) / np.sum(k * k))
        rounded = bool(np.all(np.abs(te - k * esp_ls) <= TE_ROUNDING_S))
        if rounded:
            dev = np.zeros_like(dev)
    if te.size < 2 or not np.isfinite(esp0) or esp0 <= 0 or np.any(dev > tol):
        i = int(np.argmax(dev)) if te.size else 0
        shown = ",".join(f"{1e3 * t:g}ms" for t in te)
        raise InputError(
            f"{where}: epg=True needs equally spaced echoes at TE_k = k x ESP (a CPMG train starting one spacing "
            f"after excitation), got {shown} (echo {i + 1} is at {1e3 * te[i]:g} ms, expected "
            f"{1e3 * (i + 1) * esp0:g} ms); give the whole train in acquisition order, or fit without epg=True"
        )
    esp = float(np.sum(k * te) / np.sum(k * k))
    if rounded:
        warn(f"the echo times deviate from TE_k = k x ESP by up to {1e3 * float(np.max(np.abs(te - k * esp))):.3g} ms, "
             f"as when rounded to 0.1 ms; using ESP = {1e3 * esp:.5g} ms (least squares; deviations up to "
             f"{1e3 * TE_ROUNDING_S:g} ms are accepted)")
    return esp


class EpgT2(SeparableModel):
    """CPMG echo train by extended phase graphs; fits M0, T2 and the refocusing angle.

    Parameters
    ----------
    te : (n,) array_like
        Echo times of the whole train in seconds, TE_k = k * ESP.
    refocus_deg : float
        Nominal refocusing angle in degrees, (0, 180].
    t1 : float
        Fixed longitudinal relaxation time in seconds (default 1 s).
    n_t2, n_scale : int
        Size of the start dictionary: log-spaced T2 values x refocusing
        scales from 0.5 to 180 / refocus_deg.

    Notes
    -----
    The non-linear parameters are ``T2`` (s) and ``RefocusCos``, the cosine
    of the actual refocusing angle (see the module notes); the reported maps
    are T2, R2, M0 and RefocusScale.

    Examples
    --------
    >>> import numpy as np
    >>> m = EpgT2(np.arange(1, 5) * 0.01)
    >>> m.predict(np.array([[1.0, 0.05, -1.0]])).round(4).tolist()  # 180 deg: exp(-TE/T2)
    [[0.8187, 0.6703, 0.5488, 0.4493]]
    """

    name = "epg_t2"
    discrete = True
    linear = ("M0",)
    nonlinear = ("T2", "RefocusCos")

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x) -> EpgT2:
        """The echo train as fitted (``x`` is ignored: the model exists at the echoes only)."""
        n = int(model.get("n_echoes_in_train") or model["n_echoes"])
        te = float(model["echo_spacing_s"]) * np.arange(1, n + 1)
        start = model.get("start_dictionary", {})
        kw = {k: int(start[s]) for k, s in (("n_t2", "T2"), ("n_scale", "RefocusScale")) if s in start}
        return cls(te, refocus_deg=float(model["refocus_deg"]), t1=float(model["t1_s"]), **kw)

    def __init__(self, te, *, refocus_deg: float = 180.0, t1: float = 1.0, n_t2: int = 60, n_scale: int = 25):
        te = np.asarray(te, float).ravel()
        self.esp = echo_spacing(te)
        self.n_echoes = int(te.size)
        refocus_deg = float(refocus_deg)
        if not np.isfinite(refocus_deg) or not 0.0 < refocus_deg <= 180.0:
            raise InputError(f"refocus_deg={refocus_deg:g}: the nominal refocusing angle must be degrees in (0, 180]")
        t1 = float(t1)
        if not np.isfinite(t1) or t1 <= 0:
            raise InputError(f"t1={t1:g}: T1 must be a positive number of seconds (e.g. 1s)")
        self.refocus_deg = refocus_deg
        self.t1 = t1
        self.x = self.esp * np.arange(1, self.n_echoes + 1)
        if self.x.size < 4:
            raise InputError(
                f"epg=True fits M0, T2 and the refocusing angle and needs at least 4 echoes, got {self.x.size}"
            )
        #: refocusing scale at which the angle is 180 degrees (largest reported scale)
        self.scale_180 = 180.0 / refocus_deg
        self.n_t2 = int(n_t2)
        self.n_scale = int(n_scale)

    # ------------------------------------------------------------------ physics
    def _train(self, theta, grad=False):
        return cpmg_cos(theta[:, 0], theta[:, 1], esp=self.esp, n_echoes=self.n_echoes, t1=self.t1, grad=grad)

    def basis(self, theta, ctx=None):
        return self._train(theta)[:, :, None]

    def dbasis(self, theta, ctx=None):
        _, d_t2, d_c = self._train(theta, grad=True)
        return np.stack([d_t2, d_c], axis=-1)[:, :, None, :]

    def signal_jacobian(self, params, ctx=None):
        # one pass of the recursion gives the train and both derivatives (forward mode)
        s, d_t2, d_c = self._train(params[:, 1:], grad=True)
        m0 = params[:, 0:1]
        J = np.empty((params.shape[0], 3, self.x.size))
        J[:, 0] = s
        np.multiply(m0, d_t2, out=J[:, 1])
        np.multiply(m0, d_c, out=J[:, 2])
        return m0 * J[:, 0], J

    def bounds(self):
        lo = np.array([self.esp / 20.0, COS_MIN])
        hi = np.array([self.x.max() * 200.0, np.cos(np.deg2rad(SCALE_MIN * self.refocus_deg))])
        return lo, hi

    def grid(self):
        """Start dictionary (G, 2): log-spaced T2 x refocusing scales 0.5 .. 180/refocus_deg (as cosines)."""
        lo, hi = self.bounds()
        t2 = np.geomspace(lo[0] * 1.05, hi[0] / 1.05, self.n_t2)
        scale = np.linspace(SCALE_MIN, self.scale_180, self.n_scale)
        tt, cc = np.meshgrid(t2, self.from_scale(scale), indexing="ij")
        return np.column_stack([tt.ravel(), cc.ravel()])

    def surrogate(self) -> EpgT2Table:
        """The interpolated stand-in used for the bulk of the iterations (built once per process and protocol)."""
        return _table_model(self.esp, self.n_echoes, self.t1, self.refocus_deg, self.n_t2, self.n_scale)

    def finisher(self) -> EpgT2Finish:
        """The model that finishes a fit started on :meth:`surrogate`: exact trains, the stand-in's derivatives."""
        return EpgT2Finish(self, self.surrogate())

    # ------------------------------------------------------- angle <-> scale
    def from_scale(self, scale) -> np.ndarray:
        """cos of the refocusing angle for a refocusing scale (exactly -1 at 180 degrees)."""
        deg = np.asarray(scale, float) * self.refocus_deg
        return np.where(deg == 180.0, -1.0, np.cos(np.deg2rad(deg)))

    def to_scale(self, c) -> np.ndarray:
        """Refocusing scale for c = cos(angle); c <= -1 maps to 180 degrees."""
        return np.rad2deg(np.arccos(np.clip(c, -1.0, 1.0))) / self.refocus_deg

    def info(self) -> dict:
        """Model description for provenance."""
        return {
            "name": self.name,
            "equation": "S_k = M0 * EPG_k(T2, RefocusScale x refocus_deg; ESP, T1), TE_k = k ESP",
            "method": "extended phase graphs, CPMG (Hennig 1988; Weigel 2015); refocusing-angle fit "
                      "(Lebel & Wilman 2010; Prasloski et al. 2012)",
            "refocus_deg": self.refocus_deg,
            "excitation_deg": 90.0,
            "excitation_scaled": False,
            "t1_s": self.t1,
            "echo_spacing_s": self.esp,
            "n_echoes": self.n_echoes,
            "fitted_angle_parameter": "RefocusCos = cos(refocusing angle), continued past 180 deg down to "
                                      f"{COS_MIN}",
            "start_dictionary": {"T2": self.n_t2, "RefocusScale": self.n_scale},
        }

    def report(self, params, cov):
        t2 = params[:, 1]
        se_t2 = np.sqrt(cov[:, 1, 1])
        c = params[:, 2]
        se_c = np.sqrt(cov[:, 2, 2])
        with np.errstate(invalid="ignore"):
            se_scale = 0.5 * (self.to_scale(c + se_c) - self.to_scale(c - se_c))
            se_scale = np.abs(np.where(np.isfinite(se_c), se_scale, se_c))
        return [
            Derived("T2", t2, se_t2, "s", "T2 from the EPG fit of the spin-echo train", is_time=True),
            Derived("R2", 1.0 / t2, delta_se_inverse(t2, se_t2), "1/s", "R2 relaxation rate (1/T2)"),
            Derived("M0", params[:, 0], np.sqrt(cov[:, 0, 0]), "a.u.",
                    "echo-train amplitude for an ideal 90 deg excitation (signal units)"),
            Derived("RefocusScale", self.to_scale(c), se_scale, "fraction",
                    f"actual / nominal ({self.refocus_deg:g} deg) refocusing angle, at most 180 deg"),
        ]


#: node spacing of the stand-in's table in ln(T2) and in c = cos(refocusing angle)
TABLE_DU = 0.1
TABLE_DZ = 0.05
#: the table's c axis is uniform in z = asinh((c + 1) / TABLE_W): nodes TABLE_W * TABLE_DZ apart at 180 degrees
#: (where the train, a polynomial of high degree in c, bends most), TABLE_DZ * sqrt(TABLE_W^2 + (c + 1)^2) elsewhere
TABLE_W = 0.05
#: voxels whose table rows are gathered at once (16 rows x echoes x 8 bytes each: 4 MB for 32 echoes)
TABLE_BLOCK = 1024


class EpgT2Table(EpgT2):
    """Fast stand-in for :class:`EpgT2`: the train interpolated from a precomputed table.

    The normalised train ``E_k(T2, c)`` and its derivatives are computed once
    with the exact kernel (:func:`qmap.epg.cpmg_cos`) on a grid of ``u = ln T2``
    (step ``TABLE_DU``) by ``z = asinh((c + 1) / TABLE_W)`` (step ``TABLE_DZ``:
    nodes 0.0025 apart in c at 180 degrees, where the train bends most, 0.05
    apart at 90 degrees) spanning the model's bounds, and evaluated by bicubic
    Hermite interpolation (values and first derivatives at the nodes exact,
    the cross derivative by central differences of ``dE/du`` along ``z``).
    The table holds the *signed* CPMG amplitudes, smooth in both parameters;
    the magnitude is taken after interpolation (interpolating the magnitude
    itself smeared its kinks where a late echo changes sign, near 180 degrees
    above all: errors up to 1e-2 of the train there; now, on 32 echoes, below
    1e-6 (trains for M0 = 1) at 99 % of the points with
    refocusing scales 0.55-1 and T2 10-500 ms, and below 2e-5 just beyond 180
    degrees, c in [-1.03, -1]: tested).
    It has the parameters, bounds and start dictionary of the exact model. The
    solver uses it for the start and the bulk of the iterations and finishes
    every fit on the exact train (:func:`qmap.fitting.solver.fit_chunk`, with
    :class:`EpgT2Finish`), so it decides how fast the exact minimum is
    reached, not where it is. The interpolation is element-wise per voxel (row
    gathers and one small product per voxel), so results do not depend on
    chunking.
    """

    def __init__(self, exact: EpgT2):
        self.__dict__.update(exact.__dict__)
        lo, hi = exact.bounds()
        u0, u1 = np.log(lo[0]), np.log(hi[0])
        self._nu = int(np.ceil((u1 - u0) / TABLE_DU)) + 1
        z0, z1 = np.arcsinh((lo[1] + 1.0) / TABLE_W), np.arcsinh((hi[1] + 1.0) / TABLE_W)
        self._nc = int(np.ceil((z1 - z0) / TABLE_DZ)) + 1
        self._u = np.linspace(u0, u1, self._nu)
        self._z = np.linspace(z0, z1, self._nc)
        self._hu = float(self._u[1] - self._u[0])
        self._hz = float(self._z[1] - self._z[0])
        uu, zz = np.meshgrid(self._u, self._z, indexing="ij")
        t2 = np.exp(uu.ravel())
        c = -1.0 + TABLE_W * np.sinh(zz.ravel())
        # the signed amplitudes (smooth: polynomial in c), whose magnitude is taken after interpolation; the
        # magnitude itself has a kink wherever a late echo changes sign (near and beyond 180 degrees above all)
        f, f_t2, f_c = cpmg_cos(t2, c, esp=self.esp, n_echoes=self.n_echoes, t1=self.t1, grad=True, signed=True)
        E = self.n_echoes
        shape = (self._nu, self._nc, E)
        f_u = (f_t2 * t2[:, None]).reshape(shape)
        f_z = (f_c * (TABLE_W * np.cosh(zz.ravel()))[:, None]).reshape(shape)
        f_uz = np.gradient(f_u, self._hz, axis=1)
        # per node: [E, h_u dE/du, h_z dE/dz, h_u h_z d2E/du dz] (derivatives scaled to the unit cell)
        tab = np.stack([f.reshape(shape), self._hu * f_u, self._hz * f_z, self._hu * self._hz * f_uz], axis=2)
        self._tab = np.ascontiguousarray(tab.reshape(self._nu * self._nc, 4 * E))

    @staticmethod
    def _hermite(t):
        t2 = t * t
        t3 = t2 * t
        w = (2 * t3 - 3 * t2 + 1, t3 - 2 * t2 + t, -2 * t3 + 3 * t2, t3 - t2)
        dw = (6 * t2 - 6 * t, 3 * t2 - 4 * t + 1, -6 * t2 + 6 * t, 3 * t2 - 2 * t)
        return w, dw

    def _train(self, theta, grad=False):
        t2 = np.asarray(theta[:, 0], float)
        c = np.asarray(theta[:, 1], float)
        x = (np.log(t2) - self._u[0]) / self._hu
        zc = np.arcsinh((c + 1.0) / TABLE_W)
        z = (zc - self._z[0]) / self._hz
        i = np.clip(np.floor(x), 0, self._nu - 2).astype(np.intp)
        j = np.clip(np.floor(z), 0, self._nc - 2).astype(np.intp)
        wu, dwu = self._hermite(np.clip(x - i, 0.0, 1.0))
        wc, dwc = self._hermite(np.clip(z - j, 0.0, 1.0))
        E = self.n_echoes
        n = t2.size
        base = i * self._nc + j
        corners = np.stack([base, base + 1, base + self._nc, base + self._nc + 1], axis=1)
        k = 3 if grad else 1
        wts = np.empty((n, k, 16))
        col = 0
        for a in (0, 1):
            for b in (0, 1):
                for ku, kc in ((0, 0), (1, 0), (0, 1), (1, 1)):
                    pu, pc = 2 * a + ku, 2 * b + kc  # Hermite basis: [value at 0, slope at 0, value at 1, slope at 1]
                    wts[:, 0, col] = wu[pu] * wc[pc]
                    if grad:
                        wts[:, 1, col] = dwu[pu] * wc[pc]
                        wts[:, 2, col] = wu[pu] * dwc[pc]
                    col += 1
        # (n, k, E): one small product per voxel, no sum across voxels; the gathered table rows (16 x E per
        # voxel, five times the result) are taken a block of voxels at a time to keep the memory peak low
        out = np.empty((n, k, E))
        for s in range(0, n, TABLE_BLOCK):
            rows = np.take(self._tab, corners[s : s + TABLE_BLOCK], axis=0).reshape(-1, 16, E)  # [E, E_u, E_c, E_uc]
            np.matmul(wts[s : s + TABLE_BLOCK], rows, out=out[s : s + TABLE_BLOCK])
        if not grad:
            return np.abs(out[:, 0])
        dz_dc = 1.0 / (self._hz * TABLE_W * np.cosh(zc))
        val, d_t2, d_c = out[:, 0], out[:, 1] / (self._hu * t2[:, None]), out[:, 2] * dz_dc[:, None]
        neg = val < 0.0
        np.negative(d_t2, out=d_t2, where=neg)
        np.negative(d_c, out=d_c, where=neg)
        return np.abs(val), d_t2, d_c


@lru_cache(maxsize=4)
def _table_model(esp: float, n_echoes: int, t1: float, refocus_deg: float, n_t2: int, n_scale: int) -> EpgT2Table:
    exact = EpgT2(esp * np.arange(1, n_echoes + 1), refocus_deg=refocus_deg, t1=t1, n_t2=n_t2, n_scale=n_scale)
    exact.esp = esp  # the caller's spacing exactly (not re-estimated from the echo times)
    exact.x = esp * np.arange(1, n_echoes + 1)
    return EpgT2Table(exact)


class EpgT2Finish(EpgT2):
    """The exact EPG train with the derivatives of the stand-in: the model a fit guided by the table ends on.

    The values (hence residuals, RSS and the minimum) are the exact kernel's
    (:func:`qmap.epg.cpmg_cos`); the derivatives with respect to T2 and c come
    from the interpolated table (:class:`EpgT2Table`) at the same point, about
    a third of the cost of the kernel's forward-mode derivatives. The finish
    converges where the exact residual is orthogonal to these derivatives:
    with their error (1e-5 of the train for scales 0.5-1, more only beyond
    180 degrees) that point is the exact minimum to far below 1e-2 standard
    errors, and the covariance built from them is the exact one to a like
    relative amount (both tested against the exact-only fit and scipy).
    """

    def __init__(self, exact: EpgT2, table: EpgT2Table):
        self.__dict__.update(exact.__dict__)
        self._table = table

    def _train(self, theta, grad=False):
        s = cpmg_cos(theta[:, 0], theta[:, 1], esp=self.esp, n_echoes=self.n_echoes, t1=self.t1)
        if not grad:
            return s
        _, d_t2, d_c = self._table._train(theta, grad=True)
        return s, d_t2, d_c
