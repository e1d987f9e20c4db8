"""Loading an acquisition series (one 4D NIfTI or several 3D NIfTIs) with its parameters."""

from __future__ import annotations

import mmap
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..checks import check_reordered
from ..errors import InputError, warn
from ..units import check_angles, check_times
from . import readahead
from .nifti import check_same_grid, image_data, load_image, read_sidecar

__all__ = ["Series", "load_series", "resolve_parameter"]

#: Relative difference above which a command-line value and a sidecar value
#: count as disagreeing (sidecars round to microseconds).
AGREE_RTOL = 1e-3


@dataclass
class Series:
    """Image data of one acquisition series and the parameters it varies.

    Attributes
    ----------
    data : (X, Y, Z, n) ndarray
        float32 (or complex64) voxel data, scaling slopes applied. For a
        series opened lazily (``load_series(..., max_bytes=...)``) the data
        stay on disk and :meth:`read` returns slabs; touching ``data`` then
        loads everything.
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

    _data: np.ndarray | None
    affine: np.ndarray
    header: object
    acquisition: dict = field(default_factory=dict)
    sources: dict = field(default_factory=dict)
    paths: list = field(default_factory=list)
    sidecars: list = field(default_factory=list)
    _object_mask: np.ndarray | None = field(default=None, repr=False)
    _object_median: float | None = field(default=None, repr=False)  # the object voxels' median peak (noise estimate)
    _proxies: list | None = field(default=None, repr=False)  # lazy: [4D proxy] or [3D proxies]
    _order: np.ndarray | None = field(default=None, repr=False)  # volume order applied on reading
    _shape4: tuple | None = field(default=None, repr=False)
    _allow_complex: bool = field(default=False, repr=False)
    #: negative samples are set to 0 on reading (small interpolation undershoot, see qmap.checks)
    clip_negative: bool = field(default=False, repr=False)

    @property
    def data(self) -> np.ndarray:
        if self._data is None:
            self._data = self.read(0, self.shape[2])
            self._proxies = None
        return self._data

    @data.setter
    def data(self, value: np.ndarray) -> None:
        self._data = value
        self._proxies = None
        self._order = None
        self._shape4 = None

    @property
    def lazy(self) -> bool:
        return self._data is None

    def release(self) -> None:
        """Drop the voxel data once every slab has been fitted (the write stage needs only the grid, header and
        acquisition): the end of a run then does not hold the series beside the maps it reads back. Reading
        the data afterwards is an error."""
        if self._data is not None:
            self._shape4 = tuple(self._data.shape)
            self._data = None
        self._proxies = []
        self._order = None

    def _lazy_state(self) -> tuple[list, tuple]:
        """The image proxies and 4D shape of a lazy series (``load_series`` sets both with ``_data`` None)."""
        assert self._proxies is not None and self._shape4 is not None, "a lazy series keeps its proxies and shape"
        return self._proxies, self._shape4

    @property
    def shape(self) -> tuple[int, int, int]:
        return tuple(self._lazy_state()[1][:3]) if self._data is None else tuple(self._data.shape[:3])

    @property
    def n(self) -> int:
        return int(self._lazy_state()[1][3]) if self._data is None else int(self._data.shape[3])

    def select_volumes(self, index) -> None:
        """Keep (and order) the volumes ``index`` -- without loading a lazy series."""
        index = np.asarray(index)
        if self._data is not None:
            self._data = self._data[..., index]
            return
        shape4 = self._lazy_state()[1]
        base = np.arange(shape4[3]) if self._order is None else self._order
        self._order = base[index]
        self._shape4 = shape4[:3] + (len(self._order),)

    def read(self, z0: int, z1: int) -> np.ndarray:
        """Voxel data of the slices ``z0:z1`` as (X, Y, z1-z0, n) float32 / complex64."""
        if self._data is not None:
            return self._data[:, :, z0:z1]
        dtype = np.complex64 if self._allow_complex else np.float32
        proxies = self._lazy_state()[0]
        if not proxies:
            raise RuntimeError(f"{self.paths[0]}: the series' data were released after the fit")
        if len(proxies) == 1:
            raw = np.asanyarray(proxies[0][:, :, z0:z1, :])
            if raw.ndim == 3:
                raw = raw[:, :, :, None]
        else:
            raw = np.stack([np.asanyarray(p[:, :, z0:z1] if len(p.shape) > 2 else p[:, :][:, :, None])
                            .reshape(p.shape[:2] + (z1 - z0,)) for p in proxies], axis=-1)
        if np.iscomplexobj(raw) and not self._allow_complex:
            raise InputError(f"{self.paths[0]}: holds complex data but this fit expects magnitude images")
        # the slab as read, when it is of the right type and its memory is private to it (no second copy of the
        # slab); anything else (another type, a read-only view) is copied / converted
        out = raw if raw.dtype == dtype and _private(raw) else raw.astype(dtype, copy=True)
        if self.clip_negative:
            np.maximum(out, 0, out=out)
        return out if self._order is None else out[..., self._order]

    def slabs(self, max_bytes: float | None) -> list[tuple[int, int]]:
        """Slice ranges along z whose data fit in about ``max_bytes`` / 2.5 each (one slab when in memory)."""
        nz = self.shape[2]
        if max_bytes is None or not self.lazy:
            return [(0, nz)]
        per_z = self.shape[0] * self.shape[1] * self.n * (8 if self._allow_complex else 4)
        k = max(1, int(max_bytes / (2.5 * per_z)))
        return [(z, min(z + k, nz)) for z in range(0, nz, k)]


def _private(a: np.ndarray) -> bool:
    """True when ``a`` may be used (and changed) as a slab: a writeable array whose memory is an array read for
    it, or nibabel's copy-on-write memory map of an uncompressed file (``nib.load``'s default ``mmap=True`` maps
    with mode ``"c"``: writes stay private; a read-only map gives a read-only array, which is copied)."""
    if type(a) is not np.ndarray or not a.flags.writeable:
        return False
    base = a
    while isinstance(base, np.ndarray) and base.base is not None:
        base = base.base
    return isinstance(base, (np.ndarray, mmap.mmap))


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
        for p, img in zip(paths, imgs):
            shape = img.shape
            if len(shape) > 3 and not all(s == 1 for s in shape[3:]):
                raise InputError(
                    f"{p}: has shape {shape}; when several files are given each must be one 3D volume "
                    f"(or give a single 4D file)"
                )
            check_same_grid(first.shape, first.affine, shape, img.affine, ref_name=str(paths[0]), name=str(p))
        # one volume at a time into the series (no list of volumes and stacked copy: twice the series)
        data = None
        for v, (p, img) in enumerate(zip(paths, imgs)):
            # a single-slice 2D file (x, y) is one slice: (x, y, 1)
            vol = image_data(img, p, dtype=np.float32, allow_complex=allow_complex).reshape(_as_3d(img.shape))
            if data is None:  # volume after volume in memory, as a 4D NIfTI file holds them (each volume contiguous)
                data = np.empty(vol.shape + (len(paths),), vol.dtype, order="F")
            elif vol.dtype != data.dtype:  # a complex file after real ones: the series becomes complex
                data = data.astype(np.result_type(data, vol))
            data[..., v] = vol
            del vol
    assert data is not None, "at least one file was read"
    if data.ndim != 4:
        raise InputError(f"{paths[0]}: expected 3D volumes, got shape {data.shape}")
    return data, first


def _as_3d(shape) -> tuple:
    """Spatial shape (x, y, z) of one volume; a 2D image (x, y) is a single slice (x, y, 1)."""
    shape = tuple(shape)
    return shape[:3] if len(shape) >= 3 else shape[:2] + (1,) * (3 - len(shape))


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
            raise InputError(f"{p}: sidecar {key} holds {arr.size} values for a single 3D volume; expected one "
                                 f"(give the values on the command line: they replace unusable sidecar values)")
        vals.append(float(arr[0]))
    return np.asarray(vals)


def _usable_sidecar_values(paths, sidecars, key, n, cli, option, *, what: str):
    """:func:`_sidecar_values`, except that unusable sidecar values are ignored (with a warning) when ``cli`` is given."""
    try:
        return _sidecar_values(paths, sidecars, key, n, what=what)
    except InputError as exc:
        if cli is None:
            raise
        warn(f"{str(exc).split('; expected')[0]} -- ignored: using the {option} given")
        return None


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
    check_order: bool = True,
):
    """Choose between a command-line value and a sidecar value; warn when they disagree.

    Returns ``(value, source)``; ``value`` is an array of length ``n`` (or a
    float when ``n`` is None), ``source`` is ``"command line"``/``"sidecar"``.
    With ``check_order``, command-line values that are the sidecars' values in
    another order are refused (:func:`qmap.checks.check_reordered`).
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
            raise InputError(
                f"{where}: sidecar {key} has {sidecar.size} values for {n} volumes; fix the sidecar, "
                f"or give {option} with {n} values"
            )
    if cli is not None:
        value = np.atleast_1d(np.asarray(cli, float))
        src = "command line"
        if n is not None and value.size != n:
            raise InputError(f"{option}: {value.size} values given for a series of {n} volumes; give one per volume")
        if n is None and value.size != 1:
            raise InputError(f"{option}: expected one value, got {value.size}")
        if sidecar is not None:
            if check_order and n is not None:
                check_reordered(value, sidecar, key, option, where)
            ref = np.broadcast_to(sidecar, value.shape)
            if not np.allclose(value, ref, rtol=AGREE_RTOL, atol=1e-9):
                warn(f"{option} {_fmt(value, key)} differs from the sidecar {key} {_fmt(ref, key)}; "
                     f"using the {option} given")
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
    max_bytes: float | None = None,
    check_order: bool = True,
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
    max_bytes : float, optional
        Memory budget: when the series would take more than this in memory,
        it is left on disk and read in slabs (:meth:`Series.read`).
    check_order : bool
        Refuse command-line values that reorder the sidecars' values
        (``--no-series-check`` turns this off).

    Sidecar values that cannot be used (strings, a list in each 3D file's
    sidecar, ...) are an error unless the command line gives the values: then
    they are ignored with a warning.

    Returns
    -------
    Series
    """
    paths = [Path(p).expanduser().absolute() for p in (paths if isinstance(paths, (list, tuple)) else [paths])]
    if not paths:
        raise InputError(f"no {what} given; name one 4D NIfTI or several 3D NIfTIs")
    lazy = max_bytes is not None and _in_memory_bytes(paths, allow_complex) > max_bytes
    if lazy:
        readahead.discard()  # a series read in slabs was not read ahead (same budget); nothing is held
        proxies, first, shape4 = _open_volumes(paths, what=what)
        data = None
        n = shape4[3]
    else:
        data, first = _load_volumes(paths, allow_complex=allow_complex, what=what)
        n = data.shape[3]
    sidecars = [read_sidecar(p) for p in paths]
    where = str(paths[0]) if len(paths) == 1 else f"{paths[0].name}..{paths[-1].name}"
    sc = _usable_sidecar_values(paths, sidecars, key, n, value, option, what=what)
    vals, src = resolve_parameter(key, value, sc, n, option=option, where=where, check_order=check_order)
    acquisition = {key: vals}
    sources = {key: src}
    for skey, (cli, sopt, required, ckey) in (scalars or {}).items():
        scv = _usable_sidecar_values(paths, sidecars, skey, n, cli, sopt, what=what)
        v, s = resolve_parameter(skey, cli, scv, None, option=sopt, where=where, required=required, check_key=ckey)
        if v is not None:
            acquisition[skey] = v
            sources[skey] = s
    if n < min_volumes:
        raise InputError(f"{where}: {n} volumes; this fit needs at least {min_volumes}")
    if len(set(np.asarray(vals).tolist())) != vals.size:  # (not np.unique: it imports numpy.ma, ~10 ms of start-up)
        raise InputError(
            f"{where}: repeated {key} values {_fmt(vals, key)}; every volume must have its own value "
            f"(check the converter's sidecars, or average repeated volumes first)"
        )
    if sort and np.any(np.diff(vals) < 0):
        order = np.argsort(vals, kind="stable")
        warn(f"volumes were not in increasing {key} order; sorted them ({_fmt(vals[order], key)})")
        vals = vals[order]
        acquisition[key] = vals
    else:
        order = None
    series = Series(
        _data=data,
        affine=np.asarray(first.affine, float),
        header=first.header,
        acquisition=acquisition,
        sources=sources,
        paths=paths,
        sidecars=sidecars,
        _proxies=proxies if lazy else None,
        _shape4=shape4 if lazy else None,
        _allow_complex=allow_complex,
    )
    if order is not None:
        series.select_volumes(order)
    return series


def _in_memory_bytes(paths, allow_complex: bool) -> float:
    total = 0.0
    for p in paths:
        img = load_image(p)
        total += float(np.prod(img.shape)) * (8 if allow_complex else 4)
    return total


def _open_volumes(paths: list[Path], *, what: str):
    """Open the inputs lazily (array proxies), with the same checks as :func:`_load_volumes`."""
    imgs = [load_image(p, what=what) for p in paths]
    first = imgs[0]
    if len(paths) == 1:
        shape = first.shape
        if len(shape) != 4 or shape[3] < 2:
            raise InputError(
                f"{paths[0]}: shape {shape}; a series is one 4D file (x, y, z, volume) or several 3D files"
            )
        return [first.dataobj], first, tuple(shape)
    for p, img in zip(paths, imgs):
        if len(img.shape) > 3 and not all(s == 1 for s in img.shape[3:]):
            raise InputError(f"{p}: has shape {img.shape}; when several files are given each must be one 3D volume")
        check_same_grid(first.shape, first.affine, img.shape, img.affine, ref_name=str(paths[0]), name=str(p))
    return [img.dataobj for img in imgs], first, _as_3d(first.shape) + (len(paths),)
