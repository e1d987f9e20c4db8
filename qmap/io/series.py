"""Loading an acquisition series (one 4D NIfTI or several 3D NIfTIs) with its parameters."""

from __future__ import annotations

import logging
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from ..units import check_angles, check_times
from .nifti import check_same_grid, image_data, load_image, read_sidecar

__all__ = ["Series", "load_series", "resolve_parameter"]

log = logging.getLogger("qmap")

#: Relative difference above which a command-line value and a sidecar value
#: count as disagreeing (sidecars round to microseconds).
AGREE_RTOL = 1e-3


@dataclass
class Series:
    """Image data of one acquisition series and the parameters it varies.

    Attributes
    ----------
    data : (X, Y, Z, n) ndarray
        float32 (or complex64) voxel data, scaling slopes applied.
    affine : (4, 4) ndarray
        Voxel-to-world affine of the first input.
    header : nibabel header
        Header of the first input (used to write outputs on the same grid).
    acquisition : dict
        BIDS key -> value(s) actually used, seconds / degrees.
    sources : dict
        BIDS key -> ``"sidecar"`` or ``"command line"``.
    paths : list of Path
        The input files, absolute.
    """

    data: np.ndarray
    affine: np.ndarray
    header: object
    acquisition: dict = field(default_factory=dict)
    sources: dict = field(default_factory=dict)
    paths: list = field(default_factory=list)
    sidecars: list = field(default_factory=list)
    _object_mask: np.ndarray | None = field(default=None, repr=False)

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self.data.shape[:3])

    @property
    def n(self) -> int:
        return int(self.data.shape[3])


def _load_volumes(paths: list[Path], *, allow_complex: bool, what: str):
    """Read the input files into one (X, Y, Z, n) float32 array; check grids."""
    imgs = [load_image(p, what=what) for p in paths]
    first = imgs[0]
    if len(paths) == 1:
        shape = first.shape
        if len(shape) > 4 and not all(s == 1 for s in shape[4:]):
            raise InputError(f"{paths[0]}: {len(shape)}D image {shape}; qmap reads a 4D series (x, y, z, volume)")
        if len(shape) < 4 or shape[3] < 2:
            raise InputError(
                f"{paths[0]}: is a single 3D volume {shape[:3]}; a series needs several volumes -- give one "
                f"4D file or several 3D files in order"
            )
        arrays = [image_data(first, paths[0], dtype=np.float32, allow_complex=allow_complex)]
        data = arrays[0].reshape(shape[:4])
        if data.ndim == 3:
            data = data[..., None]
    else:
        vols = []
        for p, img in zip(paths, imgs):
            shape = img.shape
            if len(shape) > 3 and not all(s == 1 for s in shape[3:]):
                raise InputError(
                    f"{p}: has shape {shape}; when several files are given each must be one 3D volume "
                    f"(or give a single 4D file)"
                )
            check_same_grid(first.shape, first.affine, shape, img.affine, ref_name=str(paths[0]), name=str(p))
            vols.append(image_data(img, p, dtype=np.float32, allow_complex=allow_complex).reshape(shape[:3]))
        data = np.stack(vols, axis=-1)
    if data.ndim != 4:
        raise InputError(f"{paths[0]}: expected 3D volumes, got shape {data.shape}")
    return data, first


def _sidecar_values(paths, sidecars, key, n, *, what: str):
    """Values of ``key`` from the sidecars: (n,) array, a scalar, or None when absent."""
    if len(paths) == 1:
        if key not in sidecars[0]:
            return None
        v = sidecars[0][key]
        return _as_numbers(v, key, paths[0])
    found = [key in sc for sc in sidecars]
    if not any(found):
        return None
    if not all(found):
        missing = [str(p) for p, f in zip(paths, found) if not f]
        raise InputError(
            f"{missing[0]}: sidecar lacks {key} while other files of the series have it; "
            f"add it, or give the values on the command line"
        )
    vals = []
    for p, sc in zip(paths, sidecars):
        arr = _as_numbers(sc[key], key, p)
        if arr.size != 1:
            raise InputError(f"{p}: sidecar {key} holds {arr.size} values for a single 3D volume; expected one")
        vals.append(float(arr[0]))
    return np.asarray(vals)


def _as_numbers(v, key, path) -> np.ndarray:
    if isinstance(v, bool) or v is None:
        raise InputError(f"{path}: sidecar {key} is {v!r}; expected a number (seconds / degrees) or a list of numbers")
    if isinstance(v, (int, float)):
        return np.asarray([float(v)])
    if isinstance(v, list) and v and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
        return np.asarray(v, dtype=float)
    raise InputError(
        f"{path}: sidecar {key} is {v!r} ({type(v).__name__}); expected a number (seconds / degrees) or a list of numbers"
    )


def resolve_parameter(
    key: str,
    cli,
    sidecar,
    n: int | None,
    *,
    option: str,
    where: str,
    required: bool = True,
    check_key: str | None = None,
):
    """Choose between a command-line value and a sidecar value; warn when they disagree.

    Returns ``(value, source)``; ``value`` is an array of length ``n`` (or a
    float when ``n`` is None), ``source`` is ``"command line"``/``"sidecar"``.
    """
    ck = check_key or key
    check = check_angles if key == "FlipAngle" else (lambda a, where: check_times(a, key=ck, where=where))
    if sidecar is not None:
        sidecar = np.atleast_1d(np.asarray(sidecar, float))
        if n is not None and sidecar.size == 1 and n > 1 and cli is None:
            raise InputError(
                f"{where}: sidecar {key} holds one value for a series of {n} volumes; give {option} with {n} values"
            )
        if n is None and sidecar.size != 1:
            if np.allclose(sidecar, sidecar[0]):
                sidecar = sidecar[:1]
            else:
                raise InputError(f"{where}: sidecar {key} differs between volumes {sidecar.tolist()}; expected one value")
        if n is not None and sidecar.size not in (1, n):
            raise InputError(f"{where}: sidecar {key} has {sidecar.size} values for {n} volumes")
    if cli is not None:
        value = np.atleast_1d(np.asarray(cli, float))
        src = "command line"
        if n is not None and value.size != n:
            raise InputError(f"{option}: {value.size} values given for a series of {n} volumes; give one per volume")
        if n is None and value.size != 1:
            raise InputError(f"{option}: expected one value, got {value.size}")
        if sidecar is not None:
            ref = np.broadcast_to(sidecar, value.shape)
            if not np.allclose(value, ref, rtol=AGREE_RTOL, atol=1e-9):
                log.warning(
                    "%s %s differs from the sidecar %s %s; using the command line",
                    option, _fmt(value, key), key, _fmt(ref, key),
                )
    elif sidecar is not None:
        value = sidecar if n is None or sidecar.size == n else np.broadcast_to(sidecar, (n,)).copy()
        src = "sidecar"
        value = check(value, where=f"{where} (sidecar {key})")
    else:
        if not required:
            return None, None
        raise InputError(f"{where}: no {key} found; give {option} or add {key} to the BIDS sidecars")
    value = check(value, where=option if src == "command line" else where)
    return (float(value[0]) if n is None else value), src


def _fmt(v, key) -> str:
    v = np.atleast_1d(v)
    if key == "FlipAngle":
        return ",".join(f"{x:g}" for x in v) + " deg"
    return ",".join(f"{x * 1e3:g}" for x in v) + " ms"


def load_series(
    paths,
    *,
    key: str,
    value=None,
    option: str,
    scalars: dict | None = None,
    allow_complex: bool = False,
    sort: bool = True,
    min_volumes: int = 2,
    what: str = "series",
) -> Series:
    """Load one 4D NIfTI or several 3D NIfTIs, with the varied acquisition parameter.

    Parameters
    ----------
    paths : list of path-like
        One 4D file or several 3D files in acquisition order.
    key : str
        BIDS key that varies across the volumes (``EchoTime``,
        ``InversionTime``, ``FlipAngle``).
    value : (n,) array_like, optional
        Values from the command line (seconds / degrees); they take
        precedence over the sidecars, with a warning when they disagree.
    option : str
        Command-line option name for ``value`` (used in messages).
    scalars : dict, optional
        Further keys holding one value for the whole series, mapped to
        ``(cli_value_or_None, option, required, plausibility_key)``, e.g.
        ``{"RepetitionTime": (0.015, "--tr", True, "RepetitionTimeSpoiled")}``
        (see :data:`qmap.units.PLAUSIBLE_MAX_S`).
    allow_complex : bool
        Accept complex-valued data (otherwise an error).
    sort : bool
        Sort the volumes by ``key`` when they are not in increasing order
        (with a note). Duplicated values are rejected.
    min_volumes : int
        Smallest usable number of volumes.

    Returns
    -------
    Series
    """
    paths = [Path(p).expanduser().absolute() for p in (paths if isinstance(paths, (list, tuple)) else [paths])]
    if not paths:
        raise InputError(f"no {what} given; name one 4D NIfTI or several 3D NIfTIs")
    data, first = _load_volumes(paths, allow_complex=allow_complex, what=what)
    n = data.shape[3]
    sidecars = [read_sidecar(p) for p in paths]
    where = str(paths[0]) if len(paths) == 1 else f"{paths[0].name}..{paths[-1].name}"
    sc = _sidecar_values(paths, sidecars, key, n, what=what)
    vals, src = resolve_parameter(key, value, sc, n, option=option, where=where)
    acquisition = {key: vals}
    sources = {key: src}
    for skey, (cli, sopt, required, ckey) in (scalars or {}).items():
        scv = _sidecar_values(paths, sidecars, skey, n, what=what)
        v, s = resolve_parameter(skey, cli, scv, None, option=sopt, where=where, required=required, check_key=ckey)
        if v is not None:
            acquisition[skey] = v
            sources[skey] = s
    if n < min_volumes:
        raise InputError(f"{where}: {n} volumes; this fit needs at least {min_volumes}")
    if np.unique(vals).size != vals.size:
        raise InputError(
            f"{where}: repeated {key} values {_fmt(vals, key)}; every volume must have its own value "
            f"(check the converter's sidecars, or average repeated volumes first)"
        )
    if sort and np.any(np.diff(vals) < 0):
        order = np.argsort(vals, kind="stable")
        log.warning("volumes were not in increasing %s order; sorted them (%s)", key, _fmt(vals[order], key))
        data = data[..., order]
        vals = vals[order]
        acquisition[key] = vals
    return Series(
        data=data,
        affine=np.asarray(first.affine, float),
        header=first.header,
        acquisition=acquisition,
        sources=sources,
        paths=paths,
        sidecars=sidecars,
    )
