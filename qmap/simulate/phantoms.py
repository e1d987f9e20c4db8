"""Digital phantoms: label images with relaxation properties, and a smooth transmit (B1) field.

Three built-in phantoms, all invented for qmap:

``vials``
    A round container of fill liquid holding nine vials (eight on a ring,
    one near the centre) whose relaxation times span T1 0.1-2 s and T2
    0.02-0.5 s, with a linear temperature dependence. Values and
    temperature coefficients are invented (no real phantom is described);
    they are plausible for doped water. The arrangement is deliberately
    asymmetric (vial B sits further out than the rest of the ring, vial A
    off the centre towards vial D), so that a vial layout can be matched to
    an image without ambiguity; the fill has half the vials' proton density
    (a water / heavy-water mix), so the vials stand out on proton-density
    (M0) images. See :data:`VIAL_CENTRES`.
``pools``
    A disc of multi-pool voxels (two pools in one half, three in the other)
    for multi-component T2; see :func:`pools_phantom`.
``head``
    An axial slab through a simplified head: cerebrospinal fluid (CSF)
    around the brain and in two ventricles, a folded grey-matter (GM) ribbon
    and a white-matter (WM) core. Relaxation times at 3 T from published
    ranges (see :data:`TISSUES`).

Geometry is defined in normalised in-plane coordinates ``u, v`` in [-1, 1]
across the field of view, so any matrix size gives the same picture; labels
are those of the voxel centres, while the signals carry partial volume: each
voxel's signal is the sum over its compartments weighted by their volume
fractions (4 x 4 sub-samples in-plane).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import UsageError

__all__ = [
    "FILL",
    "PHANTOMS",
    "REFERENCE_TEMPERATURE_C",
    "TEMP_COEFF",
    "TISSUES",
    "VIALS",
    "VIAL_CENTRES",
    "Phantom",
    "Tissue",
    "b1_field",
    "head_phantom",
    "make_phantom",
    "pools_phantom",
    "vial_layout_rows",
    "vial_phantom",
    "vial_properties",
]


@dataclass(frozen=True)
class Tissue:
    """Relaxation properties of one compartment (seconds; PD relative to water = 1)."""

    label: int
    name: str
    t1: float
    t2: float
    t2star: float
    pd: float


@dataclass
class Phantom:
    """A labelled volume and the properties of each label.

    Attributes
    ----------
    name : str
        ``"vials"`` or ``"head"``.
    labels : (X, Y, Z) ndarray of int
        Compartment per voxel; 0 = air (no signal).
    tissues : dict of int -> Tissue
        Properties per label (label 0 absent).
    roi : (X, Y, Z) ndarray of int
        Labels for region statistics (vials: voxels entirely inside a vial;
        head: the tissue labels).
    temperature_c : float or None
        Temperature the vial values were taken at.
    fractions : dict of int -> (X, Y, Z) ndarray
        Volume fraction of each label per voxel (partial volume at edges);
        the signal of a voxel is the fraction-weighted sum of its compartments.
    """

    name: str
    labels: np.ndarray
    tissues: dict
    roi: np.ndarray
    temperature_c: float | None = None
    fractions: dict | None = None
    roi_names: dict | None = None  # names of the ``roi`` labels when they are regions, not tissues
    extra_truth: dict | None = None  # name -> (map, units, description), e.g. the short-T2 fraction

    def property_map(self, attr: str) -> np.ndarray:
        """(X, Y, Z) map of ``attr`` (``"t1"``, ``"t2"``, ``"t2star"``, ``"pd"``); air is 0 (pd) or NaN."""
        fill = 0.0 if attr == "pd" else np.nan
        out = np.full(self.labels.shape, fill)
        for lab, t in self.tissues.items():
            out[self.labels == lab] = getattr(t, attr)
        return out


# ----------------------------------------------------------------------------- vials
#: Temperature at which :data:`VIALS` holds its values, degrees C.
REFERENCE_TEMPERATURE_C = 20.0
#: Invented linear temperature coefficients (relative change per degree C) of T1, T2 and T2*.
TEMP_COEFF = {"t1": 0.016, "t2": 0.011, "t2star": 0.008}
#: Extra dephasing rate R2' of the vials (1/s), invented: T2* = 1 / (1/T2 + R2').
R2PRIME = 20.0

# label, name, T1 (s), T2 (s), PD at 20 C -- invented values spanning T1 0.1-2 s, T2 0.02-0.5 s
_VIAL_TABLE = [
    (1, "vial-A", 0.100, 0.020, 0.95),
    (2, "vial-B", 0.200, 0.045, 0.96),
    (3, "vial-C", 0.350, 0.070, 0.97),
    (4, "vial-D", 0.500, 0.100, 0.98),
    (5, "vial-E", 0.700, 0.140, 0.99),
    (6, "vial-F", 0.950, 0.200, 1.00),
    (7, "vial-G", 1.250, 0.280, 1.00),
    (8, "vial-H", 1.600, 0.380, 1.00),
    (9, "vial-I", 2.000, 0.500, 1.00),
]
VIALS = [Tissue(lab, name, t1, t2, 1.0 / (1.0 / t2 + R2PRIME), pd) for lab, name, t1, t2, pd in _VIAL_TABLE]
#: The fill liquid around the vials (invented; label 10, not part of the reference table). Its proton
#: density is half the vials' (a water / heavy-water mix), so the vials are bright on M0 images.
FILL = Tissue(10, "fill", 1.400, 0.300, 1.0 / (1.0 / 0.300 + R2PRIME), 0.50)
#: Radius of the round container, of the vials, normalised (1 = half the field of view).
CONTAINER_RADIUS = 0.75
VIAL_RADIUS = 0.15
#: Vial centres (u, v), normalised like :data:`CONTAINER_RADIUS`, in the order of :data:`VIALS`: vial A
#: 0.07 off the centre towards vial D; B-I clockwise from 12 o'clock on a ring of radius 0.46, vial B
#: further out (0.56). No rotation or reflection maps this arrangement onto itself: B is the only vial
#: off the ring, and A's offset is off the B axis. (Invented.)
VIAL_CENTRES = tuple([(0.07, 0.0)] + [((0.56 if k == 0 else 0.46) * float(np.cos(a)),
                                       (0.56 if k == 0 else 0.46) * float(np.sin(a)))
                                      for k, a in enumerate(np.pi / 2 - np.arange(8) * np.pi / 4)])


def vial_properties(tissue: Tissue, temperature_c: float) -> Tissue:
    """``tissue`` at ``temperature_c`` by the invented linear coefficients :data:`TEMP_COEFF`."""
    d = temperature_c - REFERENCE_TEMPERATURE_C
    return Tissue(tissue.label, tissue.name, tissue.t1 * (1 + TEMP_COEFF["t1"] * d),
                  tissue.t2 * (1 + TEMP_COEFF["t2"] * d), tissue.t2star * (1 + TEMP_COEFF["t2star"] * d), tissue.pd)


#: Sub-samples per voxel edge in-plane for partial volume (fractions of 1/16).
SUPERSAMPLE = 4


def _grid(shape, sub: int = 1):
    """Normalised coordinates of the voxel centres (``sub = 1``) or of ``sub`` x ``sub`` in-plane sub-samples."""
    X, Y, Z = shape
    off = (np.arange(sub) + 0.5) / sub
    u = ((np.arange(X)[:, None] + off[None, :]).ravel()) / X * 2 - 1
    v = ((np.arange(Y)[:, None] + off[None, :]).ravel()) / Y * 2 - 1
    w = (np.arange(Z) + 0.5) / Z * 2 - 1 if Z > 1 else np.zeros(1)
    return np.meshgrid(u, v, w, indexing="ij")


def _vial_labels(u, v, w):
    labels = np.zeros(u.shape, np.int16)
    labels[u**2 + v**2 <= CONTAINER_RADIUS**2] = FILL.label
    for t, (cu, cv) in zip(VIALS, VIAL_CENTRES):
        labels[(u - cu) ** 2 + (v - cv) ** 2 <= VIAL_RADIUS**2] = t.label
    return labels


def vial_layout_rows(shape, voxel_size, *, roi_radius_fraction: float = 0.7) -> list[dict]:
    """The vial layout of :func:`vial_phantom` on a grid, as rows of a ``qmap phantom --layout`` file.

    Parameters
    ----------
    shape : (3,) tuple of int
        Matrix size the phantom is drawn on (the normalised coordinates span its field of view).
    voxel_size : (3,) array_like
        Voxel size, mm.
    roi_radius_fraction : float
        ROI radius as a fraction of the vial radius (stays clear of the vial wall).

    Returns
    -------
    list of dict
        ``label, name, x_mm, y_mm, radius_mm`` per vial; x along the first voxel axis, y along the
        second, origin at the container's centre, mm (rounded to 0.01 mm; the radius to 0.1 mm).
    """
    half = np.asarray(shape[:2], float) * np.asarray(voxel_size[:2], float) / 2.0
    radius = roi_radius_fraction * VIAL_RADIUS * float(min(half))
    return [{"label": t.label, "name": t.name, "x_mm": round(cu * half[0], 2) + 0.0,
             "y_mm": round(cv * half[1], 2) + 0.0, "radius_mm": round(radius, 1)} for t, (cu, cv) in zip(VIALS, VIAL_CENTRES)]


def _head_labels(u, v, w):
    theta = np.arctan2(v, u)
    shrink = 1.0 - 0.04 * w**2  # brain outline slightly smaller towards the slab edges
    r = np.sqrt((u / 0.72) ** 2 + (v / 0.86) ** 2) / shrink
    labels = np.zeros(u.shape, np.int16)
    labels[r <= 1.0] = 1  # CSF around the brain
    folds = 0.05 * np.cos(9 * theta) + 0.02 * np.cos(23 * theta + 0.7)
    labels[r <= 0.93 + 0.02 * np.cos(9 * theta)] = 2  # GM ribbon
    labels[r <= 0.76 + folds] = 3  # WM core
    for cu in (-0.12, 0.12):
        labels[((u - cu) / 0.07) ** 2 + ((v - 0.05) / 0.22) ** 2 <= 1.0] = 1  # ventricles
    return labels


def _fractions(label_fn, shape) -> dict:
    """Volume fraction of every label in every voxel, from ``SUPERSAMPLE``^2 in-plane sub-samples."""
    k = SUPERSAMPLE
    fine = label_fn(*_grid(shape, k))
    X, Y, Z = shape
    blocks = fine.reshape(X, k, Y, k, Z)
    return {int(lab): (blocks == lab).mean(axis=(1, 3)) for lab in np.unique(fine) if lab != 0}


def vial_phantom(shape=(48, 48, 4), *, temperature_c: float = REFERENCE_TEMPERATURE_C) -> Phantom:
    """The invented nine-vial relaxation phantom (see the module docstring).

    Parameters
    ----------
    shape : (3,) tuple of int
        Matrix size; at least 24 x 24 in-plane so the vials hold voxels.
    temperature_c : float
        Phantom temperature, degrees C (sets the relaxation times).
    """
    labels = _vial_labels(*_grid(shape))
    fractions = _fractions(_vial_labels, shape)
    # ROIs: voxels entirely inside a vial (no partial volume with the fill)
    roi = np.zeros(shape, np.int16)
    for t in VIALS:
        roi[fractions.get(t.label, np.zeros(shape)) >= 1.0] = t.label
    tissues = {t.label: vial_properties(t, temperature_c) for t in VIALS + [FILL]}
    return Phantom("vials", labels, tissues, roi, temperature_c, fractions)


# ----------------------------------------------------------------------------- head
#: Tissue properties at 3 T. T1 and T2 of WM and GM: Stanisz GJ et al., Magn Reson
#: Med 2005;54:507 (3 T: WM T1 1084 ms, T2 69 ms; GM T1 1820 ms, T2 99 ms) (memory).
#: T2* of WM and GM: Wansapura JP et al., J Magn Reson Imaging 1999;9:531 (3 T: WM
#: 53.2 ms, GM 66.0 ms) (memory). CSF (close to pure water at body temperature) and
#: the proton densities (WM 0.69, GM 0.80, CSF 1.0) are rounded textbook values
#: (memory; common practice).
TISSUES = [
    Tissue(1, "CSF", 4.000, 1.500, 0.500, 1.00),
    Tissue(2, "GM", 1.820, 0.099, 0.0660, 0.80),
    Tissue(3, "WM", 1.084, 0.069, 0.0532, 0.69),
]


def head_phantom(shape=(64, 64, 4)) -> Phantom:
    """A simplified axial head slab (CSF, GM ribbon with folds, WM, ventricles); see the module docstring."""
    labels = _head_labels(*_grid(shape))
    tissues = {t.label: t for t in TISSUES}
    return Phantom("head", labels, tissues, labels.copy(), None, _fractions(_head_labels, shape))


# ----------------------------------------------------------------------------- pools
#: Compartments of the invented multi-pool phantom: a short-T2 pool (like myelin water), an intermediate pool
#: (like intra/extracellular water) and a free-water pool; values invented, in the ranges of brain studies.
POOLS = [
    Tissue(1, "short-pool", 0.50, 0.020, 0.015, 1.0),
    Tissue(2, "intermediate-pool", 1.00, 0.080, 0.050, 1.0),
    Tissue(3, "free-pool", 3.00, 1.000, 0.300, 1.0),
]
#: largest short-pool fraction (reached at the right edge of the object)
POOLS_MAX_SHORT = 0.30
#: free-pool fraction of the three-pool half
POOLS_FREE = 0.20


def pools_phantom(shape=(48, 48, 4)) -> Phantom:
    """An invented disc of multi-pool voxels for multi-component T2.

    The upper half (v < 0) holds two pools (short + intermediate), the lower
    half three (short + intermediate + free water, the free pool at
    :data:`POOLS_FREE`). The short-pool fraction rises linearly from 0 at the
    left edge of the disc to :data:`POOLS_MAX_SHORT` at the right. Every
    compartment has PD 1, so volume fractions are signal fractions at TE = 0.
    ``roi``: 1 = two-pool half, 2 = three-pool half; ``extra_truth`` holds the
    short-pool fraction (``MWF``).
    """
    u, v, _ = _grid(shape)
    obj = (u**2 + v**2) < 0.85**2
    short = np.where(obj, POOLS_MAX_SHORT * np.clip((u + 0.85) / 1.7, 0.0, 1.0), 0.0)
    free = np.where(obj & (v >= 0), POOLS_FREE, 0.0)
    fractions = {1: short, 2: np.where(obj, 1.0 - short - free, 0.0), 3: free}
    labels = np.where(obj, 2, 0).astype(np.int16)  # the dominant pool: the truth T1/T2 maps show it
    roi = np.where(obj, np.where(v < 0, 1, 2), 0).astype(np.int16)
    extra = {"MWF": (np.where(obj, short, np.nan), "fraction",
                     "true short-pool (T2 20 ms) fraction of the signal at TE = 0 (simulated)")}
    return Phantom("pools", labels, {t.label: t for t in POOLS}, roi, None, fractions,
                   roi_names={1: "two-pool", 2: "three-pool"}, extra_truth=extra)


PHANTOMS = ("vials", "head", "pools")


def make_phantom(name: str, shape, *, temperature_c: float = REFERENCE_TEMPERATURE_C) -> Phantom:
    """Build the built-in phantom ``name`` (``vials`` or ``head``) on a matrix of ``shape``."""
    shape = tuple(int(s) for s in shape)
    if len(shape) != 3 or min(shape[:2]) < 24 or shape[2] < 1:
        raise UsageError(f"shape={shape}: expected shape=(X, Y, Z) with X and Y at least 24 (e.g. shape=(48, 48, 4))")
    if name == "vials":
        return vial_phantom(shape, temperature_c=temperature_c)
    if name == "head":
        return head_phantom(shape)
    if name == "pools":
        return pools_phantom(shape)
    raise UsageError(f"phantom={name!r}: expected one of {', '.join(PHANTOMS)}")


def b1_field(shape, voxel_size=(1.0, 1.0, 1.0), *, low: float = 0.85, high: float = 1.15) -> np.ndarray:
    """A smooth relative transmit field (fraction; 1 = nominal) between ``low`` and ``high``.

    Brightest slightly off the centre and falling towards the edges (a
    broad Gaussian bump with a weak tilt), as is typical of a volume coil at
    3 T. The bump is isotropic in millimetres (its width is set by the
    in-plane field of view, so a thin slab sees little change through the
    slices); the field is rescaled so its extremes over the grid are ``low``
    and ``high``.
    """
    if not 0 < low <= high:
        raise UsageError(f"b1_range={(low, high)}: expected 0 < MIN <= MAX (fractions, e.g. b1_range=(0.85, 1.15))")
    shape = tuple(int(s) for s in shape)
    vs = np.asarray(voxel_size, float)
    half = shape[0] * vs[0] / 2.0  # mm: normalise every axis by the half field of view along x
    axes = [((np.arange(n) + 0.5) - n / 2.0) * v / half for n, v in zip(shape, vs)]
    u, v, w = np.meshgrid(*axes, indexing="ij")
    g = np.exp(-((u - 0.12) ** 2 + (v + 0.08) ** 2 + w**2) / 0.9) + 0.05 * u
    g = (g - g.min()) / (g.max() - g.min()) if g.max() > g.min() else np.zeros_like(g)
    return low + (high - low) * g
