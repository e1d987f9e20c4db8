"""Pulse-by-pulse simulation of an MP2RAGE cycle, independent of qmap's closed form.

The magnetisation is a 3-vector per voxel (M0 = 1). Hard pulses are rotations
of that vector; between events it relaxes exactly (T1 towards +z, T2 in the
transverse plane). The events of one cycle (length RepetitionTimePreparation)
are placed at absolute times: the inversion at 0 (a rotation by
arccos(-e) about x, which leaves Mz = -e Mz, followed by a crusher that
removes the transverse part) and the excitations of block k at
TI_k + (j - shots // 2) * TR_exc, j = 0..shots-1, each a rotation about y by
B1 x nominal angle, preceded by ideal spoiling (transverse part set to 0).
The signal of a block is the x component just after its k-space-centre
excitation (j = shots // 2). Cycles are repeated until the magnetisation at
the start of a cycle stops changing (the periodic steady state).
"""

from __future__ import annotations

import numpy as np

from .magnetisation import free, rotation


def simulate(t1, b1, *, ti, fa, tr_prep, tr_exc, shots, efficiency=0.96, t2=0.05, max_cycles=400, tol=1e-14):
    """Signals (s1, s2) of the k-space-centre excitations in the steady state, one per voxel.

    Parameters
    ----------
    t1, b1 : (n,) array_like
        T1 (s) and relative B1 per voxel.
    ti, fa : two values each
        Inversion times (s) and nominal angles (deg).
    tr_prep, tr_exc : float
        Time between inversions and between excitations, s.
    shots : int
        Excitations per block.
    """
    t1 = np.atleast_1d(np.asarray(t1, float))
    b1 = np.broadcast_to(np.asarray(b1, float), t1.shape)
    centre = shots // 2
    events = [(0.0, "inv", None, None)]
    for k in range(2):
        for j in range(shots):
            events.append((ti[k] + (j - centre) * tr_exc, "exc", k, j == centre))
    events.sort(key=lambda ev: (ev[0], ev[1] != "inv"))
    assert events[0][1] == "inv" and events[-1][0] < tr_prep, "the protocol overlaps"
    inv = rotation(np.full(t1.shape, np.degrees(np.arccos(-efficiency))), 0.0)  # about x
    exc = [rotation(fa[k] * b1, 90.0) for k in range(2)]  # about y
    m = np.zeros((t1.size, 3))
    m[:, 2] = 1.0
    sig = np.zeros((2, t1.size))
    for _ in range(max_cycles):
        start = m.copy()
        t = 0.0
        for time, kind, k, is_centre in events:
            m = free(m, time - t, t1, t2)
            t = time
            m[:, :2] = 0.0  # ideal spoiling / crusher before every pulse
            if kind == "inv":
                m = np.einsum("nij,nj->ni", inv, m)
                m[:, :2] = 0.0  # crusher after the inversion
            else:
                m = np.einsum("nij,nj->ni", exc[k], m)
                if is_centre:
                    sig[k] = m[:, 0]
        m = free(m, tr_prep - t, t1, t2)
        m[:, :2] = 0.0
        if np.max(np.abs(m - start)) < tol:
            break
    else:
        raise RuntimeError("no steady state reached")
    return sig[0], sig[1]
