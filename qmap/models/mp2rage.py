r"""MP2RAGE: two rapid gradient-echo blocks after one inversion, and the T1 lookup of their ratio image.

Signal model (Marques et al., NeuroImage 2010;49:1271-1281; B1 correction of
the lookup: Marques & Gruetter, PLoS ONE 2013;8:e69294), derived here for
instantaneous pulses and ideal spoiling. One cycle of length
:math:`T_{prep}` (``RepetitionTimePreparation``) holds an inversion (efficiency
:math:`e`: :math:`M_z \to -e M_z`) and two blocks of :math:`n`
(``NumberShots``) excitations spaced :math:`\tau` (``RepetitionTimeExcitation``)
with the actual angles :math:`\alpha_k = B_1 \times` nominal. The excitation at
the centre of k-space is number :math:`c = \lfloor n/2 \rfloor` (0-based) of its
block, at :math:`TI_k` after the inversion, so block :math:`k` starts at
:math:`TI_k - c\tau` and occupies :math:`n\tau`. The free delays are

.. math::

    T_A = TI_1 - c\tau, \qquad T_B = TI_2 - TI_1 - n\tau, \qquad
    T_C = T_{prep} - TI_2 - (n - c)\tau,

all of which must be >= 0 (:meth:`MP2RAGEProtocol.check`).

Between events the longitudinal magnetisation relaxes exactly,
:math:`M_z(t + \Delta) = M_z(t) E_\Delta + M_0 (1 - E_\Delta)`,
:math:`E_\Delta = e^{-\Delta/T_1}`. An excitation multiplies :math:`M_z` by
:math:`\cos\alpha` and gives the signal :math:`M_z \sin\alpha`; spoiling
removes the transverse part before the next pulse. With :math:`E_1 =
e^{-\tau/T_1}` and :math:`q_k = E_1 \cos\alpha_k`, the value :math:`x_j` just
before pulse :math:`j` of a block obeys :math:`x_{j+1} = q_k x_j + M_0(1 - E_1)`,
hence

.. math::

    x_j = \sigma_k + (x_0 - \sigma_k)\, q_k^{\,j}, \qquad
    \sigma_k = M_0 \frac{1 - E_1}{1 - q_k}.

Writing :math:`m` for :math:`M_z` just before the inversion and following the
cycle (:math:`E_A = e^{-T_A/T_1}` etc.):

.. math::

    y_1 &= -e\, m\, E_A + M_0 (1 - E_A) \\
    z_1 &= \sigma_1 + (y_1 - \sigma_1)\, q_1^{\,n} \\
    y_2 &= z_1 E_B + M_0 (1 - E_B) \\
    z_2 &= \sigma_2 + (y_2 - \sigma_2)\, q_2^{\,n} \\
    m &= z_2 E_C + M_0 (1 - E_C).

The chain is affine in :math:`m`, :math:`m = a\,m + b` with
:math:`a = -e E_A q_1^n E_B q_2^n E_C`, so the periodic steady state is
:math:`m = b / (1 - a)` (:math:`b` the chain evaluated at :math:`m = 0`). The
two images are the centre excitations,

.. math::

    S_k = \sin\alpha_k \left[\sigma_k + (y_k - \sigma_k)\, q_k^{\,c}\right],

real and signed after the receive phase (common to both) is removed, and the
combined image (Marques et al. 2010) is

.. math::

    \mathrm{UNI} = \frac{\mathrm{Re}(S_1^* S_2)}{|S_1|^2 + |S_2|^2}
                 = \frac{S_1 S_2}{S_1^2 + S_2^2} \in [-\tfrac12, \tfrac12],

independent of :math:`M_0`, receive sensitivity and :math:`T_2^*`. For vanishing
angles the cycle is a periodic inversion recovery:
:math:`S_k/\sin\alpha_k \to M_0[1 - (1 + e M_{ss}) e^{-TI_k/T_1}]`,
:math:`M_{ss} = (1 - E)/(1 + e E)`, :math:`E = e^{-T_{prep}/T_1}`.

T1 from UNI (:class:`Mp2rageLookup`): UNI is tabulated over a fine
logarithmic T1 grid for each B1 of a grid, restricted per B1 to the longest
range of T1 over which UNI is strictly monotonic, inverted onto a regular UNI
grid (in :math:`\ln T_1`) and read by bilinear interpolation in (B1, UNI):
no fitting.

Noise: with complex Gaussian noise of sd :math:`\sigma` per channel on both
inversion images (phase-aligned, real signed :math:`S_1, S_2`), to first order

.. math::

    \mathrm{sd}(\mathrm{UNI}) = \sigma\, \frac{|S_1^2 - S_2^2|}{(S_1^2 + S_2^2)^{3/2}},

(the imaginary parts enter at second order only), and
:math:`\mathrm{sd}(T_1) = \mathrm{sd}(\mathrm{UNI}) / |\partial\mathrm{UNI}/\partial T_1|`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from ..errors import InputError

__all__ = [
    "DEFAULT_EFFICIENCY",
    "T1_LOOKUP_RANGE",
    "MP2RAGEProtocol",
    "Mp2rageLookup",
    "monotonic_run",
    "mp2rage_signals",
    "mp2rage_uni",
    "uni_from_signals",
    "uni_stderr",
]

#: Default inversion efficiency (Mz after / before the inversion, sign removed): 0.96, the value assumed for
#: an adiabatic inversion in the MP2RAGE simulations of Marques et al. 2010 (from memory).
DEFAULT_EFFICIENCY = 0.96
#: T1 range (s) of the lookup grid; the invertible range is the monotonic part of UNI(T1) inside it
T1_LOOKUP_RANGE = (0.02, 10.0)


@dataclass(frozen=True)
class MP2RAGEProtocol:
    """Timing and angles of an MP2RAGE acquisition (seconds / degrees).

    Attributes
    ----------
    ti : (float, float)
        ``InversionTime``: inversion to the k-space-centre excitation of each block, s.
    fa : (float, float)
        ``FlipAngle``: nominal excitation angles of the two blocks, degrees.
    tr_prep : float
        ``RepetitionTimePreparation``: time between two inversions, s.
    tr_exc : float
        ``RepetitionTimeExcitation``: spacing of the excitations within a block, s.
    shots : int
        ``NumberShots``: excitations per block; ``shots // 2`` precede the centre one.
    efficiency : float
        Inversion efficiency ``e`` in (0, 1]: ``Mz -> -e Mz``.
    """

    ti: tuple[float, float]
    fa: tuple[float, float]
    tr_prep: float
    tr_exc: float
    shots: int
    efficiency: float = DEFAULT_EFFICIENCY

    @property
    def centre(self) -> int:
        """Excitations of a block before its k-space-centre excitation (``shots // 2``)."""
        return int(self.shots) // 2

    def delays(self) -> dict[str, float]:
        """The free delays ``TA`` (inversion to block 1), ``TB`` (between blocks), ``TC`` (block 2 to next inversion), s."""
        n, c, tau = int(self.shots), self.centre, float(self.tr_exc)
        ti1, ti2 = float(self.ti[0]), float(self.ti[1])
        return {"TA": ti1 - c * tau, "TB": ti2 - ti1 - n * tau, "TC": float(self.tr_prep) - ti2 - (n - c) * tau}

    def check(self) -> MP2RAGEProtocol:
        """Raise :class:`~qmap.errors.InputError` for an impossible protocol (naming the negative delay)."""
        if len(self.ti) != 2 or len(self.fa) != 2:
            raise InputError(f"MP2RAGE needs two inversion times and two flip angles, got InversionTime "
                             f"{list(self.ti)} and FlipAngle {list(self.fa)}")
        if int(self.shots) != self.shots or self.shots < 1:
            raise InputError(f"NumberShots {self.shots}: expected a positive whole number of excitations per block")
        if not (np.isfinite(self.tr_exc) and self.tr_exc > 0 and np.isfinite(self.tr_prep) and self.tr_prep > 0):
            raise InputError(f"RepetitionTimeExcitation {self.tr_exc} s and RepetitionTimePreparation {self.tr_prep} s "
                             f"must be positive times")
        if not (0 < self.efficiency <= 1):
            raise InputError(f"inversion efficiency {self.efficiency}: expected a number in (0, 1] "
                             f"(1 = perfect inversion)")
        if not self.ti[0] < self.ti[1]:
            raise InputError(f"InversionTime {list(self.ti)}: the first inversion time must be the shorter one")
        what = {"TA": "the first block would start before the inversion (TI1 < NumberShots//2 x "
                      "RepetitionTimeExcitation)",
                "TB": "the two blocks overlap (TI2 - TI1 < NumberShots x RepetitionTimeExcitation)",
                "TC": "the second block runs past the next inversion (RepetitionTimePreparation < TI2 + "
                      "(NumberShots - NumberShots//2) x RepetitionTimeExcitation)"}
        for name, value in self.delays().items():
            if value < -1e-9:
                raise InputError(
                    f"MP2RAGE timing: delay {name} = {value * 1e3:.4g} ms is negative -- {what[name]}; with "
                    f"TI {self.ti[0] * 1e3:g},{self.ti[1] * 1e3:g} ms, {self.shots} shots spaced "
                    f"{self.tr_exc * 1e3:g} ms and RepetitionTimePreparation {self.tr_prep * 1e3:g} ms; check "
                    f"ti= / shots= / tr_exc= / tr_prep= or the sidecar"
                )
        return self

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x=None) -> MP2RAGEProtocol:
        """The protocol a ``t1-mp2rage`` fit recorded: the acquisition keys of :meth:`as_acquisition` and the
        model entry's ``inversion_efficiency`` (default :data:`DEFAULT_EFFICIENCY`). ``x`` is not used.

        Examples
        --------
        >>> p = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176, efficiency=0.9)
        >>> MP2RAGEProtocol.from_provenance({"inversion_efficiency": 0.9}, p.as_acquisition()) == p
        True
        """
        a = acquisition
        try:
            return cls(ti=(float(a["InversionTime"][0]), float(a["InversionTime"][1])),
                       fa=(float(a["FlipAngle"][0]), float(a["FlipAngle"][1])),
                       tr_prep=float(a["RepetitionTimePreparation"]), tr_exc=float(a["RepetitionTimeExcitation"]),
                       shots=int(a["NumberShots"]),
                       efficiency=float(model.get("inversion_efficiency", DEFAULT_EFFICIENCY)))
        except (KeyError, IndexError, TypeError, ValueError) as exc:
            raise InputError(f"the provenance does not hold the MP2RAGE protocol ({exc!r} missing or malformed); "
                             f"rerun t1-mp2rage with this qmap version") from None

    def as_acquisition(self) -> dict:
        """The BIDS keys of this protocol (seconds / degrees), as recorded in provenance."""
        return {"InversionTime": [float(t) for t in self.ti], "FlipAngle": [float(a) for a in self.fa],
                "RepetitionTimePreparation": float(self.tr_prep), "RepetitionTimeExcitation": float(self.tr_exc),
                "NumberShots": int(self.shots)}


def mp2rage_signals(t1: ArrayLike, protocol: MP2RAGEProtocol, b1: ArrayLike = 1.0,
                    m0: ArrayLike = 1.0) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """The two k-space-centre signals of the periodic steady state (closed form, see the module docstring).

    Parameters
    ----------
    t1 : array_like
        T1, seconds (> 0).
    protocol : MP2RAGEProtocol
    b1 : array_like
        Relative transmit field (actual / nominal angle), broadcast with ``t1``.
    m0 : array_like
        Equilibrium magnetisation (signal units), broadcast with ``t1``.

    Returns
    -------
    s1, s2 : ndarray
        Real, signed signals of the first and second block (broadcast shape of the inputs).

    Examples
    --------
    >>> p = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)
    >>> s1, s2 = mp2rage_signals(2.0, p)  # a long T1 is still inverted at the first block
    >>> bool(s1 < 0 < s2)
    True
    """
    protocol.check()
    t1 = np.asarray(t1, float)
    b1 = np.asarray(b1, float)
    n, c, tau, e = int(protocol.shots), protocol.centre, float(protocol.tr_exc), float(protocol.efficiency)
    d = protocol.delays()
    r1 = 1.0 / t1
    # factors that depend on T1 only or on B1 only are computed on their own (smaller) arrays, and
    # q^j = E1^j cos(a)^j, so that a T1 x B1 table costs a few products per entry
    e1 = np.exp(-tau * r1)
    e1n, e1c = np.exp(-n * tau * r1), np.exp(-c * tau * r1)
    ea, eb, ec = np.exp(-d["TA"] * r1), np.exp(-d["TB"] * r1), np.exp(-d["TC"] * r1)
    a1 = np.deg2rad(protocol.fa[0]) * b1
    a2 = np.deg2rad(protocol.fa[1]) * b1
    cos1, cos2 = np.cos(a1), np.cos(a2)
    q1n, q2n = e1n * cos1**n, e1n * cos2**n
    q1c, q2c = e1c * cos1**c, e1c * cos2**c
    one_e1 = 1.0 - e1
    sig1, sig2 = one_e1 / (1.0 - e1 * cos1), one_e1 / (1.0 - e1 * cos2)
    # the chain at m = 0 gives b; a is the product of the multipliers
    y1b = 1.0 - ea
    z1b = sig1 + (y1b - sig1) * q1n
    y2b = z1b * eb + (1.0 - eb)
    z2b = sig2 + (y2b - sig2) * q2n
    b = z2b * ec + (1.0 - ec)
    a = (-e) * (ea * eb * ec * e1n * e1n) * (cos1**n * cos2**n)
    m = b / (1.0 - a)
    y1 = (1.0 - ea) - e * m * ea
    z1 = sig1 + (y1 - sig1) * q1n
    y2 = z1 * eb + (1.0 - eb)
    s1 = np.sin(a1) * (sig1 + (y1 - sig1) * q1c)
    s2 = np.sin(a2) * (sig2 + (y2 - sig2) * q2c)
    m0 = np.asarray(m0, float)
    return m0 * s1, m0 * s2


def uni_from_signals(s1: ArrayLike, s2: ArrayLike) -> NDArray[np.float64]:
    """``UNI = Re(S1* S2) / (|S1|^2 + |S2|^2)`` for real or complex signals (NaN where both are 0)."""
    s1 = np.asarray(s1)
    s2 = np.asarray(s2)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.real(np.conj(s1) * s2) / (np.abs(s1) ** 2 + np.abs(s2) ** 2)


def mp2rage_uni(t1: ArrayLike, protocol: MP2RAGEProtocol, b1: ArrayLike = 1.0) -> NDArray[np.float64]:
    """UNI of the steady state for T1 (s) and relative B1 (broadcast)."""
    return uni_from_signals(*mp2rage_signals(t1, protocol, b1))


def uni_stderr(s1: ArrayLike, s2: ArrayLike, sigma: ArrayLike) -> NDArray[np.float64]:
    """First-order sd of UNI for noise sd ``sigma`` per real/imaginary channel of both images.

    ``s1``, ``s2`` are the real, signed (phase-aligned) signals; see the module docstring.
    """
    s1 = np.asarray(s1, float)
    s2 = np.asarray(s2, float)
    p = s1 * s1 + s2 * s2
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(sigma, float) * np.abs(s1 * s1 - s2 * s2) / p**1.5


def monotonic_run(values: NDArray[np.float64]) -> tuple[int, int]:
    """Start and end index (inclusive) of the longest strictly monotonic run of ``values`` (1-D).

    Examples
    --------
    >>> monotonic_run(np.array([0.0, 1.0, 0.5, 0.2, 0.1, 0.3]))
    (1, 4)
    """
    d = np.sign(np.diff(np.asarray(values, float)))
    if d.size == 0:
        return (0, 0)
    cut = np.flatnonzero(d[1:] != d[:-1]) + 1  # first step index of each new run
    starts = np.concatenate([[0], cut])
    ends = np.concatenate([cut, [d.size]])  # exclusive, in steps
    length = np.where(d[starts] != 0, ends - starts, 0)
    k = int(np.argmax(length))
    if length[k] == 0:
        return (0, 0)
    return int(starts[k]), int(ends[k])


#: lookup resolution: T1 points (log-spaced), UNI points (regular over [-0.5, 0.5]), B1 step
T1_POINTS = 1500
UNI_POINTS = 2001
B1_STEP = 0.01
#: B1 rows of the lookup table computed at a time (Mp2rageLookup)
_B1_ROWS = 8


class Mp2rageLookup:
    """UNI -> T1 for one protocol, tabulated over T1 x B1 (see the module docstring).

    Parameters
    ----------
    protocol : MP2RAGEProtocol
    b1_range : (float, float), optional
        Relative B1 values the table must cover (default: only B1 = 1). The grid
        steps by :data:`B1_STEP` from below the lower to above the upper value.
    t1_range : (float, float)
        T1 grid limits, seconds.

    Attributes
    ----------
    b1 : (nb,) ndarray
        B1 grid.
    uni : (nu,) ndarray
        Regular UNI grid over [-0.5, 0.5].
    log_t1 : (nb, nu) ndarray
        ln T1 at each (B1, UNI) node; NaN where that UNI is outside the invertible range at that B1.
    limits : (nb, 2) ndarray
        T1 range (s) over which UNI is monotonic, per B1.

    Examples
    --------
    >>> p = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)
    >>> lut = Mp2rageLookup(p, b1_range=(0.8, 1.2))
    >>> u = mp2rage_uni(np.array([0.8, 1.5]), p, b1=np.array([0.9, 1.1]))
    >>> np.round(lut.t1(u, np.array([0.9, 1.1])), 4).tolist()
    [0.8, 1.5]
    """

    def __init__(self, protocol: MP2RAGEProtocol, *, b1_range: tuple[float, float] | None = None,
                 t1_range: tuple[float, float] = T1_LOOKUP_RANGE):
        self.protocol = protocol.check()
        if b1_range is None:
            self.b1 = np.array([1.0])
        else:
            lo, hi = float(b1_range[0]), float(b1_range[1])
            if not (0 < lo <= hi and np.isfinite(hi)):
                raise ValueError(f"b1_range {b1_range}: expected 0 < lo <= hi")
            k0, k1 = int(np.floor(lo / B1_STEP)), int(np.ceil(hi / B1_STEP))
            self.b1 = np.arange(max(k0, 1), max(k1, k0 + 1) + 1) * B1_STEP
        t1 = np.geomspace(t1_range[0], t1_range[1], T1_POINTS)
        self.uni = np.linspace(-0.5, 0.5, UNI_POINTS)
        self.log_t1 = np.full((self.b1.size, UNI_POINTS), np.nan)
        self.limits = np.full((self.b1.size, 2), np.nan)
        u = np.empty((0, T1_POINTS))
        for i in range(self.b1.size):
            if i % _B1_ROWS == 0:
                # UNI over the T1 grid, a few B1 rows at a time (the model's work arrays are rows x T1_POINTS;
                # each entry is computed element by element, the same as for the whole table)
                u = mp2rage_uni(t1[None, :], protocol, self.b1[i:i + _B1_ROWS, None])
            i0, i1 = monotonic_run(u[i % _B1_ROWS])
            if i1 <= i0:
                continue
            uu, lt = u[i % _B1_ROWS, i0 : i1 + 1], np.log(t1[i0 : i1 + 1])
            if uu[-1] < uu[0]:
                uu, lt = uu[::-1], lt[::-1]
            inside = (self.uni >= uu[0]) & (self.uni <= uu[-1])
            self.log_t1[i, inside] = np.interp(self.uni[inside], uu, lt)
            self.limits[i] = t1[i0], t1[i1]

    def t1(self, uni: ArrayLike, b1: ArrayLike | None = None) -> NDArray[np.float64]:
        """T1 (s) for UNI values (and relative B1, broadcast); NaN where the table cannot invert.

        NaN results: UNI outside the monotonic range at that B1 (or within one grid
        step of its end), B1 outside the table, or non-finite input.
        """
        uni = np.asarray(uni, float)
        nb, nu = self.b1.size, self.uni.size
        # direct indexing into the regular grids (np.interp's search is ~10x slower here)
        fu = (uni - self.uni[0]) * (1.0 / (self.uni[1] - self.uni[0]))
        with np.errstate(invalid="ignore"):
            ok = (fu >= 0) & (fu <= nu - 1)  # False for NaN
        if nb > 1 or b1 is not None:
            b1 = np.broadcast_to(np.asarray(b1 if b1 is not None else 1.0, float), uni.shape)
            fb = (b1 - self.b1[0]) * (1.0 / B1_STEP)
            with np.errstate(invalid="ignore"):
                ok &= (fb >= 0) & (fb <= nb - 1) if nb > 1 else np.abs(fb) < 1e-7
        fu[~ok] = 0.0
        iu = np.minimum(fu.astype(np.intp), nu - 2)
        fu -= iu  # the weight of the upper UNI node
        flat = self.log_t1.reshape(-1)
        lo = flat[iu]
        lo += (flat[iu + 1] - lo) * fu
        if nb > 1:
            fb[~ok] = 0.0
            ib = np.minimum(fb.astype(np.intp), nb - 2)
            fb -= ib
            iu += ib * nu
            lo = flat[iu]
            lo += (flat[iu + 1] - lo) * fu
            iu += nu
            hi = flat[iu]
            hi += (flat[iu + 1] - hi) * fu
            lo += (hi - lo) * fb
        lo[~ok] = np.nan
        return np.exp(lo, out=lo)
