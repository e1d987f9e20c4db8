"""Textbook extended phase graphs with complex states (test reference).

Independent of ``qmap.epg`` (which uses a reduced real-valued state and
pruned rows): here the full complex configuration states F+(k), F-(k) and
Z(k), k = 0..K, are carried for every voxel, a pulse is the 3x3 complex
transition matrix of Weigel (J Magn Reson Imaging 2015;41:266, eq. 15) with
the pulse phase phi, relaxation scales F by E2 and Z by E1 (plus recovery
of Z(0) by 1 - E1), and a dephasing gradient shifts F+ up and F- down by one
order with F+(0) = conj(F-(0)) (Weigel 2015, section "Dephasing").

Sequence: excitation ``excite_deg`` with pulse phase 90 degrees, then
refocusing pulses with phase 0 at (k - 1/2) ESP (the CPMG condition: the
refocusing axis is parallel to the excited magnetisation), echoes (|F+(0)|)
at k ESP. One dephasing step per half spacing.
"""

from __future__ import annotations

import numpy as np


def _pulse(alpha_deg: np.ndarray, phi_deg: float) -> np.ndarray:
    """Transition matrices (V, 3, 3) acting on (F+, F-, Z) for flip angles ``alpha_deg`` (V,) and phase phi."""
    a = np.deg2rad(np.asarray(alpha_deg, float))
    p = np.deg2rad(phi_deg)
    c2, s2 = np.cos(a / 2) ** 2, np.sin(a / 2) ** 2
    sa, ca = np.sin(a), np.cos(a)
    e = np.exp(1j * p)
    T = np.empty(a.shape + (3, 3), complex)
    T[..., 0, 0] = c2
    T[..., 0, 1] = e**2 * s2
    T[..., 0, 2] = -1j * e * sa
    T[..., 1, 0] = np.conj(e) ** 2 * s2
    T[..., 1, 1] = c2
    T[..., 1, 2] = 1j * np.conj(e) * sa
    T[..., 2, 0] = -0.5j * np.conj(e) * sa
    T[..., 2, 1] = 0.5j * e * sa
    T[..., 2, 2] = ca
    return T


def cpmg_reference(t2, alpha_deg, *, esp: float, n_echoes: int, t1=1.0, excite_deg: float = 90.0) -> np.ndarray:
    """Echo magnitudes (V, n_echoes) of a CPMG train for M0 = 1.

    Parameters
    ----------
    t2 : (V,) array_like
        T2 per voxel, s.
    alpha_deg : (V,) array_like
        Actual refocusing angle per voxel, degrees (the excitation stays ``excite_deg``).
    esp : float
        Echo spacing, s.
    n_echoes : int
    t1 : float or (V,) array_like
        T1, s.
    """
    t2 = np.atleast_1d(np.asarray(t2, float))
    alpha = np.broadcast_to(np.asarray(alpha_deg, float), t2.shape)
    t1 = np.broadcast_to(np.asarray(t1, float), t2.shape)
    V = t2.size
    K = 2 * n_echoes + 2
    S = np.zeros((V, 3, K), complex)  # rows F+, F-, Z; columns k = 0..K-1
    S[:, 2, 0] = 1.0
    E2 = np.exp(-0.5 * esp / t2)[:, None]
    E1 = np.exp(-0.5 * esp / t1)[:, None]
    Tex = _pulse(np.full(V, excite_deg), 90.0)
    Tref = _pulse(alpha, 0.0)
    S = np.einsum("vij,vjk->vik", Tex, S)

    def half_spacing(S):
        S = S.copy()
        S[:, 0:2] *= E2[:, None]
        S[:, 2] *= E1
        S[:, 2, 0] += (1.0 - E1[:, 0])
        fp = np.roll(S[:, 0], 1, axis=1)  # F+(k) <- F+(k-1)
        fm = np.roll(S[:, 1], -1, axis=1)  # F-(k) <- F-(k+1)
        fm[:, -1] = 0.0
        fp[:, 0] = np.conj(fm[:, 0])
        S[:, 0], S[:, 1] = fp, fm
        return S

    out = np.empty((V, n_echoes))
    for n in range(n_echoes):
        S = half_spacing(S)
        S = np.einsum("vij,vjk->vik", Tref, S)
        S = half_spacing(S)
        out[:, n] = np.abs(S[:, 0, 0])
    return out
