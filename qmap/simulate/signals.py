"""Noise-free signals of the simulated protocols, and magnitude noise.

The closed forms here are written out independently of the fitting models
(they describe the full sequences, e.g. a finite TR in inversion recovery or
T1 during actual flip-angle imaging) and are checked against Bloch-equation
integration in the tests. Spin-echo trains use the extended-phase-graph
simulation :func:`qmap.epg.cpmg_echoes`, which is validated against an
isochromat simulation.

All functions broadcast voxel properties (arrays of shape ``(n,)``) against
the protocol's sample positions and return ``(n, m)`` signals for M0 = PD.
Times in seconds, angles in degrees.
"""

from __future__ import annotations

import numpy as np

from ..epg import cpmg_echoes

__all__ = ["afi", "dam", "ir", "magnitude_noise", "megre", "mese", "mp2rage", "spgr"]


def _col(a) -> np.ndarray:
    return np.asarray(a, float).reshape(-1, 1)


def ir(ti, *, tr: float, te: float, t1, t2, pd, efficiency: float = 1.0) -> np.ndarray:
    """Inversion recovery with a 90 degree readout at TI and a spin-echo readout of echo time ``te``.

    .. math:: S = PD\\, e^{-TE/T_2} \\left(1 + k e^{-TR/T_1} - (1 + k) e^{-TI/T_1}\\right)

    The readout leaves Mz = 0; it recovers for TR - TI before the next
    inversion (efficiency ``k``: Mz -> -k Mz). Signed (real) signal.
    """
    ti = np.asarray(ti, float)[None, :]
    t1 = _col(t1)
    return _col(pd) * np.exp(-te / _col(t2)) * (1 + efficiency * np.exp(-tr / t1) - (1 + efficiency) * np.exp(-ti / t1))


def spgr(fa_deg, *, tr: float, te: float, t1, t2star, pd, b1) -> np.ndarray:
    """Spoiled gradient-echo steady state at actual angles ``b1 * fa`` (Ernst & Anderson 1966).

    .. math:: S = PD\\, e^{-TE/T_2^*} \\sin\\alpha \\frac{1 - E_1}{1 - E_1\\cos\\alpha}
    """
    a = np.deg2rad(_col(b1) * np.asarray(fa_deg, float)[None, :])
    e1 = np.exp(-tr / _col(t1))
    return _col(pd) * np.exp(-te / _col(t2star)) * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))


def megre(te, *, tr: float, fa_deg: float, t1, t2star, pd, b1) -> np.ndarray:
    """Multi-echo spoiled gradient echo: the SPGR steady state decaying with T2* over the echoes."""
    s0 = spgr([fa_deg], tr=tr, te=0.0, t1=t1, t2star=np.inf, pd=pd, b1=b1)
    return s0 * np.exp(-np.asarray(te, float)[None, :] / _col(t2star))


def mese(*, esp: float, n_echoes: int, refocus_deg: float, t1, t2, pd, b1) -> np.ndarray:
    """CPMG multi-echo spin echo by extended phase graphs; both pulses scaled by B1."""
    s = cpmg_echoes(np.ravel(np.asarray(t2, float)), np.ravel(np.asarray(b1, float)), esp=esp, n_echoes=n_echoes,
                    t1=np.ravel(np.asarray(t1, float)), refocus_deg=refocus_deg)
    return _col(pd) * s


def afi(fa_deg: float, *, tr1: float, tr2: float, t1, pd, b1) -> np.ndarray:
    """Actual flip-angle imaging steady state, both intervals, with T1 (Yarnykh 2007, perfect spoiling).

    .. math::

        S_1 = PD \\sin\\alpha \\frac{1 - E_2 + (1 - E_1) E_2 \\cos\\alpha}{1 - E_1 E_2 \\cos^2\\alpha},\\qquad
        S_2 = PD \\sin\\alpha \\frac{1 - E_1 + (1 - E_2) E_1 \\cos\\alpha}{1 - E_1 E_2 \\cos^2\\alpha}

    with :math:`E_i = e^{-TR_i/T_1}`. Returns (n, 2): S1 (after TR1... i.e. in
    the TR1 interval) and S2.
    """
    a = np.deg2rad(_col(b1) * fa_deg)
    t1 = _col(t1)
    e1, e2 = np.exp(-tr1 / t1), np.exp(-tr2 / t1)
    c, s = np.cos(a), np.sin(a)
    den = 1 - e1 * e2 * c * c
    s1 = s * (1 - e2 + (1 - e1) * e2 * c) / den
    s2 = s * (1 - e1 + (1 - e2) * e1 * c) / den
    return _col(pd) * np.concatenate([s1, s2], axis=1)


def dam(fa_deg: float, *, tr: float, t1, pd, b1) -> np.ndarray:
    """Double-angle method: saturation-recovery GRE at the nominal angles a and 2a (TR finite), (n, 2)."""
    return spgr([fa_deg, 2 * fa_deg], tr=tr, te=0.0, t1=t1, t2star=np.inf, pd=pd, b1=b1)


def mp2rage(*, ti, fa_deg, tr_prep: float, tr_exc: float, shots: int, efficiency: float, te: float, t1, t2star,
            pd, b1, tol: float = 1e-12, max_cycles: int = 500) -> np.ndarray:
    """MP2RAGE k-space-centre signals of both blocks, event by event to the periodic steady state, (n, 2).

    Independent of the closed form in :mod:`qmap.models.mp2rage`: Mz is stepped
    through every event of a cycle (inversion ``Mz -> -e Mz`` at 0; excitations
    of block k at ``TI_k + (j - shots // 2) tr_exc`` with angle ``b1 x fa_k``,
    ``Mz -> Mz cos a`` and signal ``Mz sin a``, ideal spoiling; exact T1
    relaxation in between) and cycles are repeated until Mz at the start of a
    cycle changes by less than ``tol``. The signals are real and signed (the
    receive phase removed) and decay with ``exp(-te / T2*)``.
    """
    t1 = np.ravel(np.asarray(t1, float))
    b1 = np.broadcast_to(np.ravel(np.asarray(b1, float)), t1.shape)
    centre = int(shots) // 2
    times = [(ti[k] + (j - centre) * tr_exc, k, j) for k in range(2) for j in range(int(shots))]
    times.sort()
    if times[0][0] < 0 or times[-1][0] >= tr_prep:
        raise ValueError("MP2RAGE protocol: the excitations do not fit between two inversions")
    cos = [np.cos(np.deg2rad(b1 * fa_deg[k])) for k in range(2)]
    sin = [np.sin(np.deg2rad(b1 * fa_deg[k])) for k in range(2)]
    mz = np.ones_like(t1)
    sig = np.zeros((t1.size, 2))
    for _ in range(max_cycles):
        start = mz.copy()
        mz = -efficiency * mz
        t = 0.0
        for time, k, j in times:
            e = np.exp(-(time - t) / t1)
            mz = mz * e + (1.0 - e)
            t = time
            if j == centre:
                sig[:, k] = mz * sin[k]
            mz = mz * cos[k]
        e = np.exp(-(tr_prep - t) / t1)
        mz = mz * e + (1.0 - e)
        if np.max(np.abs(mz - start)) < tol:
            break
    return _col(pd) * np.exp(-te / _col(t2star)) * sig


def magnitude_noise(signal: np.ndarray, sigma: float, rng: np.random.Generator, *, coils: int = 1) -> np.ndarray:
    """Magnitude of ``signal`` with complex Gaussian noise (Rician; noncentral chi for several coils).

    With ``coils`` = N the signal is spread evenly over N receive channels
    (``signal / sqrt(N)`` each, so the noise-free root sum of squares is
    ``|signal|``), each gets independent complex noise of standard deviation
    ``sigma`` per real channel, and the root sum of squares is returned
    (Constantinides et al. 1997).
    """
    s = np.asarray(signal, float)
    if coils == 1:
        return np.hypot(s + rng.normal(0.0, sigma, s.shape), rng.normal(0.0, sigma, s.shape))
    per = s / np.sqrt(coils)
    acc = np.zeros_like(s)
    for _ in range(coils):
        acc += (per + rng.normal(0.0, sigma, s.shape)) ** 2 + rng.normal(0.0, sigma, s.shape) ** 2
    return np.sqrt(acc)
