"""Rigid matching of a vial layout to detected vial centres (unknown correspondence).

1. Hypotheses: for each candidate rotation (2D: every 2 degrees; 3D: the 24
   axis-aligned orientations times every 5 degrees about the layout's z) and
   each pairing of an anchor layout vial with a detected centre, the
   translation that puts one on the other. Each hypothesis is scored by a
   truncated least-squares cost, sum_i min(d_i^2, a^2), d_i being the
   distance from layout vial i to its nearest detection and a the
   acceptance distance.
2. Refinement of the best hypotheses: optimal one-to-one assignment within
   the acceptance distance (``scipy.optimize.linear_sum_assignment``), then
   the least-squares rotation and translation of the pairs (Kabsch /
   Procrustes with the determinant forced to +1), repeated until the
   assignment no longer changes.
3. The best refined match (most pairs, then smallest RMS residual) wins. If
   a match assigning vials differently is about as good (RMS residual less
   than twice the best's, or less than ``distinct_mm`` above it), the layout
   is too symmetric to tell the vials apart and the match is refused.

References: Kabsch, Acta Cryst A 1976;32:922 (optimal rotation); Kuhn, Naval
Res Logist Q 1955;2:83 (assignment).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field

import numpy as np
from scipy.optimize import linear_sum_assignment
from scipy.spatial.distance import cdist

__all__ = ["MatchFailure", "RigidMatch", "candidate_rotations", "kabsch", "register_points"]


class MatchFailure(Exception):
    """The layout could not be matched; ``str()`` says why (wrapped into an InputError by the caller)."""


@dataclass
class RigidMatch:
    """A rigid transform layout -> image (``x_img = R x_layout + t``) and the vial pairs it rests on."""

    rotation: np.ndarray
    translation: np.ndarray
    pairs: list  # (layout index, detection index)
    residuals_mm: np.ndarray
    alternatives: list = field(default_factory=list)

    @property
    def rms_mm(self) -> float:
        return float(np.sqrt(np.mean(self.residuals_mm**2))) if len(self.residuals_mm) else float("nan")

    @property
    def max_mm(self) -> float:
        return float(np.max(self.residuals_mm)) if len(self.residuals_mm) else float("nan")

    @property
    def angle_deg(self) -> float:
        """Rotation angle (about the rotation axis), degrees."""
        r = self.rotation
        c = (np.trace(r) - (r.shape[0] - 2)) / 2 if r.shape[0] == 3 else r[0, 0]
        return float(np.degrees(np.arccos(np.clip(c, -1, 1))))

    def apply(self, pts: np.ndarray) -> np.ndarray:
        return np.asarray(pts, float) @ self.rotation.T + self.translation


def kabsch(src: np.ndarray, dst: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares proper rotation R and translation t with ``dst ~ src @ R.T + t``.

    Parameters
    ----------
    src, dst : (k, d) ndarray
        Corresponding points (k >= 2 for d = 2, k >= 3 for d = 3).
    """
    cs, cd = src.mean(axis=0), dst.mean(axis=0)
    h = (src - cs).T @ (dst - cd)
    u, _, vt = np.linalg.svd(h)
    d = np.ones(src.shape[1])
    d[-1] = np.sign(np.linalg.det(vt.T @ u.T)) or 1.0
    r = vt.T @ np.diag(d) @ u.T
    return r, cd - r @ cs


def _rot2(theta: float) -> np.ndarray:
    c, s = np.cos(theta), np.sin(theta)
    return np.array([[c, -s], [s, c]])


def candidate_rotations(dim: int) -> np.ndarray:
    """Starting rotations: (K, dim, dim)."""
    if dim == 2:
        return np.stack([_rot2(np.radians(a)) for a in np.arange(0, 360, 2.0)])
    cube = []
    for perm in itertools.permutations(range(3)):
        for signs in itertools.product((1, -1), repeat=3):
            m = np.zeros((3, 3))
            m[np.arange(3), perm] = signs
            if np.linalg.det(m) > 0:
                cube.append(m)
    rz = []
    for a in np.arange(0, 360, 5.0):
        r = np.eye(3)
        r[:2, :2] = _rot2(np.radians(a))
        rz.append(r)
    return np.stack([q @ z for q in cube for z in rz])


def _hypotheses(layout, det, accept, rotations, anchors, keep_per_rot=3):
    out = []
    acc2 = accept**2
    for ri, r in enumerate(rotations):
        p = layout @ r.T  # (n, d)
        t = (det[None, :, :] - p[anchors][:, None, :]).reshape(-1, layout.shape[1])  # (H, d)
        moved = p[None, :, :] + t[:, None, :]  # (H, n, d)
        d2 = ((moved[:, :, None, :] - det[None, None, :, :]) ** 2).sum(-1).min(-1)  # (H, n)
        cost = np.minimum(d2, acc2).sum(-1)
        for h in np.argsort(cost)[:keep_per_rot]:
            out.append((float(cost[h]), ri, t[h]))
    out.sort(key=lambda x: x[0])
    return out


def _refine(layout, det, r, t, accept, min_pairs):
    pairs = None
    for _ in range(25):
        dist = cdist(layout @ r.T + t, det)
        gated = np.where(dist <= accept, dist**2, 1e12)
        rows, cols = linear_sum_assignment(gated)
        keep = dist[rows, cols] <= accept
        new = tuple(zip(rows[keep].tolist(), cols[keep].tolist()))
        if new == pairs or len(new) < min_pairs:
            pairs = new
            break
        pairs = new
        ri, ci = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
        r, t = kabsch(layout[ri], det[ci])
    if not pairs:
        return None
    ri, ci = np.array([p[0] for p in pairs]), np.array([p[1] for p in pairs])
    res = np.linalg.norm(layout[ri] @ r.T + t - det[ci], axis=1)
    return RigidMatch(r, t, sorted(pairs), res)


def _conflicts(a: RigidMatch, b: RigidMatch) -> bool:
    da, db = dict(a.pairs), dict(b.pairs)
    return any(da[i] != db[i] for i in da.keys() & db.keys()) or not (da.keys() & db.keys())


def register_points(layout: np.ndarray, detected: np.ndarray, *, accept_mm: float, min_pairs: int,
                    distinct_mm: float = 0.5, max_refine: int = 25) -> RigidMatch:
    """Match layout points to detected points by a rigid transform (see the module docstring).

    Parameters
    ----------
    layout : (n, d) ndarray
        Vial centres in the phantom's frame, mm (d = 2 or 3).
    detected : (m, d) ndarray
        Detected centres in the image frame, mm.
    accept_mm : float
        A pair counts only when its distance after the transform is at most this.
    min_pairs : int
        Fewest pairs that make an acceptable match.
    distinct_mm : float
        A different assignment with as many pairs counts as a rival (ambiguity) unless its RMS residual
        exceeds the best one's by more than this and by a factor of 2.

    Raises
    ------
    MatchFailure
        No transform pairs ``min_pairs`` vials, or two different assignments fit about equally well.
    """
    layout = np.asarray(layout, float)
    det = np.asarray(detected, float)
    n, dim = layout.shape
    if len(det) < min_pairs:
        raise MatchFailure(f"only {len(det)} vial-like components were found, at least {min_pairs} are needed")
    centred = layout - layout.mean(axis=0)
    far = np.argsort(-np.linalg.norm(centred, axis=1))
    anchors = far if (dim == 2 or n <= 6) else far[:6]
    hyps = _hypotheses(centred, det, accept_mm, candidate_rotations(dim), anchors)
    rots = candidate_rotations(dim)
    results, seen = [], set()
    for cost, ri, t in hyps:
        m = _refine(centred, det, rots[ri], t, accept_mm, min_pairs)
        if m is None:
            continue
        key = tuple(m.pairs)
        if key in seen:
            continue
        seen.add(key)
        results.append(m)
        if len(results) >= max_refine:
            break
    if not results:
        raise MatchFailure("no rigid transform brings any detected vial close to the layout")
    results.sort(key=lambda m: (-len(m.pairs), m.rms_mm))
    best = results[0]
    if len(best.pairs) < min_pairs:
        raise MatchFailure(f"the best rigid transform pairs only {len(best.pairs)} of the {n} layout vials "
                           f"(at least {min_pairs} needed) within {accept_mm:.3g} mm")
    rivals = [m for m in results[1:] if len(m.pairs) >= len(best.pairs) and _conflicts(best, m)
              and m.rms_mm <= max(2.0 * best.rms_mm, best.rms_mm + distinct_mm)]
    if rivals:
        raise MatchFailure(f"two different vial assignments fit about equally well (residual {best.rms_mm:.2g} mm vs "
                           f"{rivals[0].rms_mm:.2g} mm); the layout is too symmetric to tell the vials apart")
    best.alternatives = [m for m in results[1:] if _conflicts(best, m)][:3]
    # express the translation for the uncentred layout
    best.translation = best.translation - best.rotation @ layout.mean(axis=0)
    return best
