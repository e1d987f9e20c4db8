"""Classical magnetisation vectors for the pulse-by-pulse references (isochromat.py, mp2rage_pulses.py).

Independent of ``qmap``. A magnetisation is a 3-vector (Mx, My, Mz) per isochromat or voxel, in units
of M0 (M0 = 1). A hard pulse is a rotation about a transverse axis (built by
``scipy.spatial.transform.Rotation``; right-handed, so a pulse about +x turns +z towards -y); between
pulses the Bloch equations' exact solution applies: optional free precession about z, transverse decay
by T2 and recovery of Mz towards 1 by T1 (common practice).
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike
from scipy.spatial.transform import Rotation

__all__ = ["free", "rotation"]


def rotation(angle_deg: ArrayLike, axis_phase_deg: float) -> np.ndarray:
    """Rotation matrices by ``angle_deg`` (scalar or (n,)) about the transverse axis at ``axis_phase_deg`` from x.

    Returns (3, 3) for a scalar angle, (n, 3, 3) for n angles; apply as ``R @ m``.
    """
    phi = np.deg2rad(axis_phase_deg)
    axis = np.array([np.cos(phi), np.sin(phi), 0.0])
    theta = np.deg2rad(np.asarray(angle_deg, float))
    return Rotation.from_rotvec(theta[..., None] * axis).as_matrix()


def free(m: np.ndarray, dt: float, t1: ArrayLike, t2: ArrayLike, dphi: ArrayLike = 0.0) -> np.ndarray:
    """State (n, 3) after ``dt`` s of free precession by ``dphi`` rad about z (per row) and relaxation.

    ``t1``, ``t2`` (s) and ``dphi`` are scalars or one value per row of ``m``.
    """
    e2 = np.exp(-dt / np.asarray(t2, float))
    e1 = np.exp(-dt / np.asarray(t1, float))
    cos, sin = np.cos(dphi), np.sin(dphi)
    mx = e2 * (cos * m[:, 0] - sin * m[:, 1])
    my = e2 * (sin * m[:, 0] + cos * m[:, 1])
    mz = e1 * m[:, 2] + (1.0 - e1)
    return np.stack([mx, my, mz], axis=1)
