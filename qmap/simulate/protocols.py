"""Acquisition protocols of the simulator and their synthesis on a phantom.

Each protocol is a set of volumes (one per inversion time, flip angle or
echo) plus the BIDS sidecar entries of each volume. :func:`synthesise`
turns a phantom, a B1 field and a protocol into noise-free volumes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import UsageError
from . import signals
from .phantoms import Phantom

__all__ = ["PROTOCOLS", "Protocols", "Series", "synthesise"]

#: protocol names accepted by ``--protocol``
PROTOCOLS = ("ir", "vfa", "mese", "megre", "b1", "mp2rage")


@dataclass
class Protocols:
    """Settings of every protocol (seconds, degrees). Defaults suit the vial phantom at 3 T.

    Attributes
    ----------
    ir_ti : tuple of float
        Inversion times of the inversion-recovery series.
    ir_tr, ir_te, ir_efficiency : float
        Time between inversions, spin-echo readout echo time, inversion efficiency.
    vfa_fa : tuple of float
        Nominal flip angles of the variable-flip-angle series.
    vfa_tr, vfa_te : float
    mese_esp, mese_echoes, mese_refocus, mese_tr
        Echo spacing, number of echoes, nominal refocusing angle, TR (full recovery assumed).
    megre_te : tuple of float
        Echo times of the multi-echo gradient echo; ``megre_tr``, ``megre_fa`` its TR and flip angle.
    b1_method : {"dam", "afi"}
        B1 mapping inputs written at low resolution: double-angle (``dam_fa``, 2 ``dam_fa``, TR
        ``dam_tr``) or actual flip-angle imaging (``afi_fa``, ``afi_tr`` = (TR1, TR2)).
    b1_factor : int
        The B1 inputs' voxels are this many main voxels wide in-plane (and
        through-plane when the slice count allows).
    mp2rage_ti, mp2rage_fa : (float, float)
        MP2RAGE inversion times (to the k-space-centre excitation) and the two blocks' angles;
        ``mp2rage_tr_prep`` (between inversions), ``mp2rage_tr_exc`` (excitation spacing),
        ``mp2rage_shots`` (excitations per block), ``mp2rage_efficiency`` (inversion), ``mp2rage_te``.
        The defaults (invented) keep UNI monotonic in T1 from about 0.05 s to beyond 3 s, so that
        every vial can be inverted.
    """

    ir_ti: tuple = (0.05, 0.1, 0.2, 0.35, 0.6, 1.0, 1.6, 2.6, 4.0, 6.0)
    ir_tr: float = 10.0
    ir_te: float = 0.012
    ir_efficiency: float = 0.97
    vfa_fa: tuple = (3.0, 6.0, 10.0, 15.0, 20.0, 30.0)
    vfa_tr: float = 0.015
    vfa_te: float = 0.003
    mese_esp: float = 0.010
    mese_echoes: int = 32
    mese_refocus: float = 180.0
    mese_tr: float = 10.0
    megre_te: tuple = tuple(round(0.0025 + 0.004 * k, 6) for k in range(12))
    megre_tr: float = 0.05
    megre_fa: float = 20.0
    b1_method: str = "dam"
    dam_fa: float = 60.0
    dam_tr: float = 12.0
    afi_fa: float = 60.0
    afi_tr: tuple = (0.020, 0.100)
    b1_factor: int = 2
    mp2rage_ti: tuple = (0.3, 2.2)
    mp2rage_fa: tuple = (3.0, 5.0)
    mp2rage_tr_prep: float = 4.0
    mp2rage_tr_exc: float = 0.006
    mp2rage_shots: int = 96
    mp2rage_efficiency: float = 0.96
    mp2rage_te: float = 0.003

    def __post_init__(self):
        if self.b1_method not in ("dam", "afi"):
            raise UsageError(f"b1_method={self.b1_method!r}: expected dam or afi")
        if self.ir_tr <= max(self.ir_ti):
            raise UsageError(f"ir_tr={self.ir_tr:g}: the time between inversions (s) must exceed the longest "
                             f"inversion time, {max(self.ir_ti):g} s")
        if int(self.mese_echoes) < 2:
            raise UsageError(f"mese_echoes={self.mese_echoes}: a spin-echo train needs at least 2 echoes")


@dataclass
class Series:
    """Noise-free volumes of one protocol and what to write with them.

    Attributes
    ----------
    name : str
        Protocol (``ir``, ``vfa``, ``mese``, ``megre``, ``b1``).
    suffix, entity : str
        BIDS suffix (``IRT1``) and the entity that numbers the volumes (``inv``).
    data : (X, Y, Z, n) ndarray
        Signed noise-free signal (PD units).
    key : str
        BIDS key varied over the volumes.
    values : (n,) ndarray
    sidecar : dict
        Entries shared by every volume.
    lowres : bool
        On the low-resolution B1 grid.
    labels : list of str, optional
        Entity values (default 1..n).
    """

    name: str
    suffix: str
    entity: str
    data: np.ndarray
    key: str
    values: np.ndarray
    sidecar: dict
    lowres: bool = False
    labels: list | None = None
    per_volume: dict | None = None  # further sidecar keys with one value per volume


def _voxels(ph: Phantom, b1: np.ndarray):
    """(voxel, compartment) pairs with signal: flat voxel index, volume fraction, properties, B1 -- (n,) each."""
    idx, frac, b = [], [], []
    props: dict[str, list[np.ndarray]] = {a: [] for a in ("t1", "t2", "t2star", "pd")}
    fractions = ph.fractions or {lab: (ph.labels == lab).astype(float) for lab in ph.tissues}
    for lab, f in sorted(fractions.items()):
        sel = np.flatnonzero(f.ravel() > 0)
        idx.append(sel)
        frac.append(f.ravel()[sel])
        b.append(b1.ravel()[sel])
        for a, values in props.items():
            values.append(np.full(sel.size, getattr(ph.tissues[lab], a)))
    cat = np.concatenate
    return (cat(idx), cat(frac)), {a: cat(v) for a, v in props.items()}, cat(b)


def _volume(sel, values: np.ndarray, shape) -> np.ndarray:
    """Sum the compartment signals ``values`` (n, m) of the pairs ``sel`` into an (X, Y, Z, m) volume."""
    idx, frac = sel
    out = np.zeros((int(np.prod(shape)), values.shape[1]))
    for k in range(values.shape[1]):
        out[:, k] = np.bincount(idx, weights=values[:, k] * frac, minlength=out.shape[0])
    return out.reshape(tuple(shape) + (values.shape[1],))


def synthesise(name: str, ph: Phantom, b1: np.ndarray, p: Protocols) -> Series:
    """Noise-free series of protocol ``name`` for phantom ``ph`` in the transmit field ``b1`` (X, Y, Z)."""
    sel, t, b = _voxels(ph, b1)

    def series(suffix: str, entity: str, s: np.ndarray, key: str, values, sidecar: dict, **more) -> Series:
        """The series of the compartment signals ``s`` (n, m), whose volumes vary ``key`` over ``values``."""
        return Series(name, suffix, entity, _volume(sel, s, ph.labels.shape), key, np.asarray(values, float),
                      sidecar, **more)

    if name == "ir":
        s = signals.ir(p.ir_ti, tr=p.ir_tr, te=p.ir_te, t1=t["t1"], t2=t["t2"], pd=t["pd"], efficiency=p.ir_efficiency)
        return series("IRT1", "inv", s, "InversionTime", p.ir_ti,
                      {"RepetitionTime": p.ir_tr, "EchoTime": p.ir_te, "FlipAngle": 90.0,
                       "PulseSequenceType": "inversion recovery spin echo (simulated)"})
    if name == "vfa":
        s = signals.spgr(p.vfa_fa, tr=p.vfa_tr, te=p.vfa_te, t1=t["t1"], t2star=t["t2star"], pd=t["pd"], b1=b)
        return series("VFA", "flip", s, "FlipAngle", p.vfa_fa,
                      {"RepetitionTime": p.vfa_tr, "EchoTime": p.vfa_te,
                       "PulseSequenceType": "spoiled gradient echo (simulated)"})
    if name == "mese":
        s = signals.mese(esp=p.mese_esp, n_echoes=int(p.mese_echoes), refocus_deg=p.mese_refocus, t1=t["t1"],
                         t2=t["t2"], pd=t["pd"], b1=b)
        return series("MESE", "echo", s, "EchoTime", p.mese_esp * np.arange(1, int(p.mese_echoes) + 1),
                      {"RepetitionTime": p.mese_tr, "FlipAngle": 90.0, "RefocusingFlipAngle": p.mese_refocus,
                       "PulseSequenceType": "CPMG multi-echo spin echo (simulated by extended phase graphs)"})
    if name == "megre":
        s = signals.megre(p.megre_te, tr=p.megre_tr, fa_deg=p.megre_fa, t1=t["t1"], t2star=t["t2star"], pd=t["pd"],
                          b1=b)
        return series("MEGRE", "echo", s, "EchoTime", p.megre_te,
                      {"RepetitionTime": p.megre_tr, "FlipAngle": p.megre_fa,
                       "PulseSequenceType": "multi-echo spoiled gradient echo (simulated)"})
    if name == "b1":
        if p.b1_method == "dam":
            s = signals.dam(p.dam_fa, tr=p.dam_tr, t1=t["t1"], pd=t["pd"], b1=b)
            return series("TB1DAM", "flip", s, "FlipAngle", [p.dam_fa, 2 * p.dam_fa], {"RepetitionTime": p.dam_tr},
                          lowres=True)
        s = signals.afi(p.afi_fa, tr1=p.afi_tr[0], tr2=p.afi_tr[1], t1=t["t1"], pd=t["pd"], b1=b)
        return series("TB1AFI", "acq", s, "RepetitionTime", p.afi_tr, {"FlipAngle": p.afi_fa}, lowres=True,
                      labels=["tr1", "tr2"])
    if name == "mp2rage":
        s = signals.mp2rage(ti=p.mp2rage_ti, fa_deg=p.mp2rage_fa, tr_prep=p.mp2rage_tr_prep, tr_exc=p.mp2rage_tr_exc,
                            shots=p.mp2rage_shots, efficiency=p.mp2rage_efficiency, te=p.mp2rage_te, t1=t["t1"],
                            t2star=t["t2star"], pd=t["pd"], b1=b)
        return series("MP2RAGE", "inv", s, "InversionTime", p.mp2rage_ti,
                      {"RepetitionTimePreparation": p.mp2rage_tr_prep, "RepetitionTimeExcitation": p.mp2rage_tr_exc,
                       "NumberShots": int(p.mp2rage_shots), "EchoTime": p.mp2rage_te,
                       "PulseSequenceType": "MP2RAGE (simulated)"},
                      per_volume={"FlipAngle": [float(a) for a in p.mp2rage_fa]})
    raise UsageError(f"name={name!r}: expected one of {', '.join(PROTOCOLS)} (a protocol of qmap.simulate)")
