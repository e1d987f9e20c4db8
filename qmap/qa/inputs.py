"""Loading the phantom inputs: parameter maps (parameter and unit) and integer label images."""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..io.nifti import image_data, load_image, read_sidecar, resample_to_grid, same_grid
from .quantities import PARAMETERS, canonical_param, default_unit, sidecar_unit

__all__ = [
    "MapInput",
    "label_names",
    "labels_on_grid",
    "load_any_map",
    "load_labels",
    "load_map",
    "map_provenance",
    "param_from_name",
    "status_beside",
]

#: any qmap / BIDS map suffix: ``..._InversionEfficiencymap.nii.gz``, ``..._desc-rsquared_fitmap.nii.gz``
_ANY_SUFFIX = re.compile(r"^(?P<prefix>.*?)_(?:desc-(?P<desc>[A-Za-z0-9]+)_)?(?P<stem>[A-Za-z0-9]+)map\.nii(?:\.gz)?$")
_SUFFIX = re.compile(r"(?:^|[_-])(" + "|".join(sorted(PARAMETERS, key=len, reverse=True)) + r")map\.nii(?:\.gz)?$")


@dataclass
class MapInput:
    """One parameter map.

    Attributes
    ----------
    path : Path
    param : str
        ``T1``, ``T2``, ``T2star``, ``R1``, ...
    unit : str
        Canonical unit of the voxel values (``s``, ``ms``, ``1/s``, ...).
    unit_source : str
        ``"sidecar"`` or ``"default"`` (no sidecar ``Units``: seconds for times).
    param_source : str
        ``"--param"``, ``"file name"`` or ``"sidecar"``.
    data : (X, Y, Z) ndarray of float64
    affine : (4, 4) ndarray
    sidecar : dict
    """

    path: Path
    param: str
    unit: str
    unit_source: str
    param_source: str
    data: np.ndarray
    affine: np.ndarray
    sidecar: dict = field(default_factory=dict)
    tag: str = ""  #: user label telling two maps of one parameter apart (``--tag ir``)
    provenance: dict | None = None  #: what produced the map (see :func:`map_provenance`)

    @property
    def key(self) -> str:
        """``T1``, or ``T1 (ir)`` with a tag: how rows, figures and the history name this map's parameter."""
        return f"{self.param} ({self.tag})" if self.tag else self.param

    @property
    def zooms(self) -> np.ndarray:
        return np.sqrt((self.affine[:3, :3] ** 2).sum(axis=0))


def param_from_name(path: str | Path) -> str | None:
    """The parameter named by a BIDS-style suffix: ``sub-01_T1map.nii.gz`` -> ``T1``; else None."""
    m = _SUFFIX.search(Path(path).name)
    return m.group(1) if m else None


def _volume(img, path, what) -> np.ndarray:
    shape = img.shape
    if len(shape) == 4 and shape[3] == 1:
        shape = shape[:3]
    if len(shape) == 2:
        shape = shape + (1,)
    if len(shape) != 3:
        raise InputError(f"{what}{path}: has shape {img.shape}; expected one 3D volume")
    return shape


def load_map(path: str | Path, param: str | None = None) -> MapInput:
    """Load one parameter map; the parameter from ``param``, the file name or the sidecar ``Parameter``."""
    p = Path(path)
    img = load_image(p, what="map=")
    shape = _volume(img, p, "map=")
    side = read_sidecar(p)
    if "desc-stderr" in p.name or str(side.get("Kind", "")).lower() == "stderr":
        raise InputError(f"map={p}: is a standard-error map; give the estimate map ({p.name.replace('desc-stderr_', '')})")
    if param is not None:
        canon, source = canonical_param(param), "--param"
        if canon is None:
            raise InputError(f"param={param!r}: unknown parameter; use one of {', '.join(PARAMETERS)}")
    else:
        canon, source = param_from_name(p), "file name"
        if canon is None and isinstance(side.get("Parameter"), str):
            canon, source = canonical_param(side["Parameter"]), "sidecar"
        if canon is None:
            raise InputError(f"map={p}: cannot tell which parameter it holds from its name; name it like "
                             f"sub-01_T1map.nii.gz or give its param='T1'")
    if "Units" in side:
        unit, usource = sidecar_unit(canon, side["Units"], where=f"map={p}"), "sidecar"
    else:
        unit, usource = default_unit(canon), "default"
    data = image_data(img, p).reshape(shape)
    return MapInput(p, canon, unit, usource, source, data, np.asarray(img.affine, float), side)


def load_labels(path: str | Path) -> tuple[np.ndarray, np.ndarray]:
    """Load an integer label image (0 = background).

    Returns
    -------
    labels : (X, Y, Z) ndarray of int64
    affine : (4, 4) ndarray

    Raises
    ------
    InputError
        Non-integer, negative or non-finite values, or no label at all.
    """
    p = Path(path)
    img = load_image(p, what="labels=")
    shape = _volume(img, p, "labels=")
    raw = image_data(img, p).reshape(shape)
    if not np.all(np.isfinite(raw)):
        raise InputError(f"labels={p}: contains NaN or infinite values; a label image holds integers (0 = background)")
    rounded = np.rint(raw)
    bad = np.abs(raw - rounded) > 1e-3
    if bad.any():
        example = float(raw[bad][0])
        raise InputError(f"labels={p}: holds non-integer values (e.g. {example:.4g} in {int(bad.sum())} voxels); "
                         f"expected an integer label image (0 = background, 1..N = vials), not a probability or "
                         f"parameter map")
    if rounded.min() < 0:
        raise InputError(f"labels={p}: holds negative values (min {int(rounded.min())}); labels are 0 (background) "
                         f"or positive integers")
    labels = rounded.astype(np.int64)
    if not labels.any():
        raise InputError(f"labels={p}: holds no label (every voxel is 0)")
    return labels, np.asarray(img.affine, float)


def labels_on_grid(labels: np.ndarray, affine: np.ndarray, shape, target_affine) -> tuple[np.ndarray, bool]:
    """The label image on a map's grid (nearest neighbour through the affines); also whether it was resampled."""
    if same_grid(labels.shape, affine, shape, target_affine):
        return labels, False
    out = resample_to_grid(labels, affine, tuple(shape[:3]), target_affine, order=0, cval=0)
    return np.asarray(out).astype(np.int64), True


def _generic_param(name: str) -> str | None:
    """Parameter named by any map suffix: ``x_InversionEfficiencymap`` -> ``InversionEfficiency``,
    ``x_desc-stderr_T1map`` -> ``T1_stderr``, ``x_desc-rsquared_fitmap`` -> ``rsquared``."""
    m = _ANY_SUFFIX.match(name)
    if not m:
        return None
    stem, desc = m.group("stem"), m.group("desc")
    if stem == "fit" and desc:
        return desc
    known = canonical_param(stem) or stem
    return f"{known}_{desc}" if desc else known


def load_any_map(path: str | Path, param: str | None = None) -> MapInput:
    """Load any 3D map for ROI statistics (``qmap roi``): known parameters as in :func:`load_map`, others too.

    The parameter comes from ``param``, else the file name (``..._T1map.nii.gz`` -> ``T1``, any other
    ``..._<Name>map`` -> ``<Name>``, ``..._desc-stderr_T1map`` -> ``T1_stderr``, ``..._desc-<q>_fitmap``
    -> ``<q>``), else the sidecar ``Parameter``, else the file name without extension. The unit comes from
    the sidecar ``Units`` (checked for known parameters; default seconds for times, 1/s for rates, empty
    when unknown).
    """
    p = Path(path)
    img = load_image(p, what="map=")
    shape = _volume(img, p, "map=")
    side = read_sidecar(p)
    canon: str | None = None
    name: str | None
    if param is not None:
        name, source = str(param).strip(), "--param"
        if not name:
            raise InputError(f"param={param!r}: give a parameter name such as T1")
        canon = canonical_param(name)
        name = canon or name
    else:
        name, source = param_from_name(p), "file name"
        canon = name
        if name is None:
            name = _generic_param(p.name)
        if name is None and isinstance(side.get("Parameter"), str):
            name, source = side["Parameter"], "sidecar"
            canon = canonical_param(name)
        if name is None:
            name, source = p.name.split(".nii")[0], "file name"
    units = side.get("Units")
    if canon is not None and "desc-stderr" not in p.name and str(side.get("Kind", "")) != "stderr":
        if units is not None:
            unit, usource = sidecar_unit(canon, units, where=f"map={p}"), "sidecar"
        else:
            unit, usource = default_unit(canon), "default"
    elif isinstance(units, str):
        unit, usource = units, "sidecar"
    else:
        unit, usource = "", "unknown"
    data = image_data(img, p).reshape(shape)
    return MapInput(p, str(name), unit, usource, source, data, np.asarray(img.affine, float), side)


def status_beside(path: str | Path, shape, affine) -> tuple[np.ndarray | None, Path | None, str | None]:
    """The qmap status map written beside a map, if there is one on the map's grid.

    For ``{prefix}_T1map.nii.gz`` (or any ``{prefix}_[desc-x_]<P>map``) the status map is
    ``{prefix}_desc-status_fitmap.nii.gz`` in the same folder, recognised as qmap's by its sidecar
    (``"Kind": "status"``).

    Returns
    -------
    status : (X, Y, Z) ndarray of int or None
    status_path : Path or None
    note : str or None
        Why a status map found beside the map was not used.
    """
    p = Path(path)
    m = _ANY_SUFFIX.match(p.name)
    if not m:
        return None, None, None
    sp = p.with_name(f"{m.group('prefix')}_desc-status_fitmap.nii.gz")
    if sp == p or not sp.is_file():
        return None, None, None
    if str(read_sidecar(sp).get("Kind", "")) != "status":
        return None, None, f"{sp.name} beside {p.name} has no qmap status sidecar (Kind: status); not used"
    img = load_image(sp, what="status map")
    sshape = _volume(img, sp, "status map")
    if not same_grid(sshape, np.asarray(img.affine, float), tuple(shape[:3]), affine):
        return None, None, f"{sp.name} is not on the grid of {p.name}; not used (every finite voxel counted)"
    return np.rint(image_data(img, sp).reshape(sshape)).astype(np.int64), sp, None


def label_names(labels_path: str | Path, names_path: str | Path | None = None) -> tuple[dict[int, str], Path | None]:
    """Names of the labels from a BIDS segmentation table (``dseg.tsv`` style: columns ``index`` and ``name``).

    Without ``names_path`` the table beside the label image with the same stem is used when it exists
    (``sub-01_dseg.nii.gz`` -> ``sub-01_dseg.tsv``).

    Returns
    -------
    names : dict
        label -> name (empty when no table).
    path : Path or None
        The table read.
    """
    if names_path is None:
        lp = Path(labels_path)
        stem = lp.name.split(".nii")[0]
        cand = lp.with_name(stem + ".tsv")
        if not cand.is_file():
            return {}, None
        tp = cand
    else:
        tp = Path(names_path)
        if not tp.is_file():
            raise InputError(f"names={tp}: no such file; give a tab-separated table with columns index and name")
    try:
        text = tp.read_text(encoding="utf-8-sig")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{tp}: cannot read the label table ({exc}); expected UTF-8 tab-separated text") from None
    lines = [ln for ln in text.splitlines() if ln.strip()]
    if not lines:
        raise InputError(f"{tp}: empty label table; expected columns index and name (tab separated)")
    head = [h.strip().lower() for h in lines[0].split("\t")]
    if "index" not in head or "name" not in head:
        raise InputError(f"{tp}: the header must name the columns index and name (tab separated, as in a BIDS "
                         f"dseg.tsv); found {lines[0]!r}")
    ii, ni = head.index("index"), head.index("name")
    names: dict[int, str] = {}
    for k, ln in enumerate(lines[1:], start=2):
        cells = ln.split("\t")
        try:
            idx = int(cells[ii].strip())
            nm = cells[ni].strip()
        except (ValueError, IndexError):
            raise InputError(f"{tp} line {k}: expected an integer index and a name, found {ln!r}") from None
        names[idx] = nm
    return names, tp


def map_provenance(path: str | Path) -> dict | None:
    """What produced a map, from qmap's provenance file beside it (``{prefix}_provenance.json``).

    Returns
    -------
    dict or None
        ``{"file", "command", "model", "equation", "qmap_version"}`` when a provenance file beside the map
        lists it among its outputs; None otherwise.
    """
    import json

    p = Path(path)
    m = _ANY_SUFFIX.match(p.name)
    if not m:
        return None
    prov = p.with_name(f"{m.group('prefix')}_provenance.json")
    try:
        doc = json.loads(prov.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(doc, dict) or p.name not in (doc.get("outputs") or {}):
        return None
    raw_model = doc.get("model")
    model = raw_model if isinstance(raw_model, dict) else {}
    cmd = doc.get("command_line") or []
    return {"file": str(prov), "command": " ".join(str(c) for c in cmd), "model": model.get("name"),
            "equation": model.get("equation"), "qmap_version": doc.get("qmap_version")}
