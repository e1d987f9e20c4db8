"""Brute-force isochromat simulation of a CPMG echo train (test reference).

Independent of ``qmap.epg`` (no shared code or formalism): the sample is
``n_iso`` isochromats, each a classical magnetisation vector (Mx, My, Mz),
whose phase advance per half echo spacing is spread uniformly over one full
cycle (the crusher/readout gradient). Hard pulses are 3x3 rotation matrices
(built by ``scipy.spatial.transform.Rotation``), free precession is a
rotation about z by the isochromat's own phase, and between pulses the Bloch
relaxation solution applies (transverse decay by T2, recovery of Mz towards
M0 = 1 by T1). The echo amplitude is the magnitude of the mean transverse
magnetisation at TE_k = k * esp.

Sequence: excitation about x at t = 0, refocusing about y at
t = (k - 1/2) esp, k = 1..n_echoes (CPMG phase).
"""

from __future__ import annotations

import numpy as np

from .magnetisation import free, rotation


def cpmg_isochromats(
    t2: float,
    t1: float,
    esp: float,
    n_echoes: int,
    refocus_deg: float,
    excite_deg: float = 90.0,
    n_iso: int = 4096,
) -> np.ndarray:
    """Echo magnitudes of a CPMG train from ``n_iso`` isochromats.

    Parameters
    ----------
    t2, t1 : float
        Relaxation times, s.
    esp : float
        Echo spacing, s.
    n_echoes : int
        Number of echoes.
    refocus_deg, excite_deg : float
        Actual refocusing and excitation angles, degrees.
    n_iso : int
        Number of isochromats (phases 2 pi i / n_iso per half echo spacing).

    Returns
    -------
    ndarray, shape (n_echoes,)
        |mean(Mx + i My)| at each echo, for M0 = 1.
    """
    dphi = 2.0 * np.pi * np.arange(n_iso) / n_iso
    excite = rotation(excite_deg, 0.0)  # about x
    refocus = rotation(refocus_deg, 90.0)  # about y
    m = np.tile([0.0, 0.0, 1.0], (n_iso, 1))
    m = m @ excite.T
    out = np.empty(n_echoes)
    half = 0.5 * esp
    for k in range(n_echoes):
        m = free(m, half, t1, t2, dphi)
        m = m @ refocus.T
        m = free(m, half, t1, t2, dphi)
        out[k] = abs(complex(m[:, 0].mean(), m[:, 1].mean()))
    return out
