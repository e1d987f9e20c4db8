"""``qmap t1-mp2rage``: T1 from the combined MP2RAGE image by a lookup of the signal model, with B1 correction.

UNI -> T1 through :class:`qmap.models.mp2rage.Mp2rageLookup` (a table over T1 x
B1, interpolated; no fitting). The UNI image may be a float image in
[-0.5, 0.5] or the 12-bit integer export 0..4095 (UNI = value / 4095 - 0.5;
common practice), told apart by its range. With the two inversion images
(``inv1``, ``inv2``: magnitude, complex, or magnitude with a phase image) the
workflow also writes M0 (least squares of the two magnitudes on the model
signals) and standard errors of T1, R1 and M0: the noise sd of the inversion
images (:func:`qmap.pipeline.resolve_sigma`, as every command) propagated
through UNI to first order at the model signals.

Status codes: 0 inverted, 1 outside the mask, 2 UNI not finite, 6 outside the
B1 map, 9 UNI outside the range the lookup can invert at that voxel's B1
(T1 outside the range where UNI is monotonic in T1, or B1 outside 0.2-3).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, TypedDict, Unpack

import numpy as np
from numpy.typing import ArrayLike

if TYPE_CHECKING:
    from ..b1 import B1OnGrid

from .. import status as st
from ..docstrings import shared_parameters
from ..errors import InputError, UsageError, warn
from ..io.nifti import SlabReader, check_same_grid, image_data, load_image, read_sidecar
from ..io.series import Series, resolve_parameter
from ..maps import MapSet
from ..models.mp2rage import (
    DEFAULT_EFFICIENCY,
    Mp2rageLookup,
    MP2RAGEProtocol,
    mp2rage_signals,
    uni_stderr,
)
from ..pipeline import CommonOptions, RunReport, Slab, prepare_run
from ..record import recorded

__all__ = ["B1_TABLE_RANGE", "UNI_ENCODINGS", "decode_uni", "fit_t1_mp2rage", "lookup_for", "run_t1_mp2rage",
           "uni_encoding"]

#: relative B1 values the lookup table may cover; voxels outside get status 9
B1_TABLE_RANGE = (0.2, 3.0)
UNI_ENCODINGS = {
    "float": "float UNI in [-0.5, 0.5]",
    "12bit": "12-bit integer export 0..4095, UNI = value/4095 - 0.5 (common practice)",
}
#: relative step of the central difference for dUNI/dT1
_H = 1e-4
#: what the standard errors become when the inversion images' noise level cannot be estimated (warning, note)
_NO_NOISE = ("M0 is written, the standard errors are not",
             "no standard errors: the noise level of the inversion images could not be estimated (give sigma=VALUE)")
NO_B1_NOTE = ("no B1 correction: nominal flip angles assumed (UNI depends on the transmit field, most for long "
              "T1; pass b1=B1MAP to correct)")
EQUATION = ("UNI = S1 S2/(S1^2 + S2^2), S1, S2 the k-space-centre signals of the periodic steady state of "
            "inversion (efficiency e) + two gradient-echo blocks with angles B1 x FlipAngle (Marques et al. 2010)")


def uni_encoding(lo: float, hi: float, where: str) -> str:
    """``"float"`` or ``"12bit"``: how a UNI image stores its values, from the range ``lo..hi`` of its finite values."""
    if lo == hi:
        raise InputError(f"{where}: the UNI image holds no signal (every value is {lo:g}); check the export")
    tol = 1e-6
    if lo >= -0.5 - tol and hi <= 0.5 + tol:
        return "float"
    if lo >= 0 and hi <= 4095 + tol and hi > 1.0:
        return "12bit"
    hint = " (rescaled to [0, 1]? subtract 0.5)" if lo >= 0 and hi <= 1 else ""
    raise InputError(f"{where}: UNI values span {lo:g}..{hi:g}, neither a float UNI in [-0.5, 0.5] nor the 12-bit "
                     f"integer export 0..4095{hint}; pass the combined MP2RAGE image (UNI/UNIT1) as exported")


def _decode(v: np.ndarray, encoding: str) -> np.ndarray:
    """UNI in [-0.5, 0.5] (float32) from stored values of a known encoding (element by element)."""
    if encoding == "float":
        return np.clip(v.astype(np.float32), -0.5, 0.5)
    return v.astype(np.float32) / np.float32(4095.0) - np.float32(0.5)


def _finite_range(v: np.ndarray) -> tuple[float, float] | None:
    """(min, max) of the finite values of ``v``; None when there is none."""
    finite = v[np.isfinite(v)] if np.issubdtype(v.dtype, np.floating) else v.reshape(-1)
    return None if finite.size == 0 else (float(finite.min()), float(finite.max()))


def decode_uni(values: np.ndarray, where: str) -> tuple[np.ndarray, str]:
    """UNI in [-0.5, 0.5] from a float or 12-bit integer image, recognised by the range of its finite values."""
    v = np.asarray(values)
    span = _finite_range(v)
    if span is None:
        raise InputError(f"{where}: every UNI value is NaN or infinite; nothing to invert")
    encoding = uni_encoding(*span, where)
    return _decode(v, encoding), encoding


def _merged_sidecar(uni, inv1, inv2) -> tuple[dict, str]:
    """The protocol keys from the UNI sidecar, completed from the inversion images' sidecars (one value each)."""
    sc = dict(read_sidecar(uni))
    if inv1 is None or inv2 is None:
        return sc, str(uni)
    s1, s2 = read_sidecar(inv1), read_sidecar(inv2)
    for key in ("InversionTime", "FlipAngle"):
        if key not in sc and key in s1 and key in s2:
            sc[key] = [s1[key], s2[key]]
    for key in ("RepetitionTimePreparation", "RepetitionTimeExcitation", "NumberShots"):
        if key not in sc:
            vals = [s[key] for s in (s1, s2) if key in s]
            if vals:
                if len(vals) == 2 and vals[0] != vals[1]:
                    raise InputError(f"{inv1}, {inv2}: sidecars disagree on {key} ({vals[0]} vs {vals[1]}); one "
                                     f"MP2RAGE acquisition has one value")
                sc[key] = vals[0]
    return sc, str(uni)


def _numbers(sc: dict, key: str, where: str):
    if key not in sc:
        return None
    v = sc[key]
    vals = v if isinstance(v, list) else [v]
    if not vals or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in vals):
        raise InputError(f"{where}: sidecar {key} is {v!r}; expected a number or a list of numbers")
    return np.asarray(vals, float)


class ProtocolOverrides(TypedDict, total=False):
    """MP2RAGE protocol values given on the command line (:func:`run_t1_mp2rage`, :func:`resolve_protocol`):
    each wins over the sidecars, with a warning where they disagree; None or left out: from the sidecars.

    Keys
    ----
    ti, fa : two values each
        Inversion times (s) and nominal flip angles (deg).
    tr_prep, tr_exc : float
        ``RepetitionTimePreparation`` and ``RepetitionTimeExcitation``, s.
    shots : int
        ``NumberShots`` (excitations per block).
    efficiency : float
        Inversion efficiency (never from a sidecar: default :data:`~qmap.models.mp2rage.DEFAULT_EFFICIENCY`).
    """

    ti: ArrayLike | None
    fa: ArrayLike | None
    tr_prep: float | None
    tr_exc: float | None
    shots: int | None
    efficiency: float | None


def resolve_protocol(sidecar: dict, where: str, **given: Unpack[ProtocolOverrides]) -> tuple[MP2RAGEProtocol, dict]:
    """The protocol from the command line (``given``: wins, with a warning on disagreement) and the sidecar keys.

    Raises
    ------
    TypeError
        A name in ``given`` that is not a :class:`ProtocolOverrides` key (as for any unknown keyword argument).
    """
    unknown = sorted(set(given) - ProtocolOverrides.__optional_keys__)
    if unknown:
        raise TypeError(f"unexpected keyword argument(s) {', '.join(map(repr, unknown))}; the protocol values are "
                        f"{', '.join(sorted(ProtocolOverrides.__optional_keys__))}")
    ti, fa, tr_prep, tr_exc = given.get("ti"), given.get("fa"), given.get("tr_prep"), given.get("tr_exc")
    shots, efficiency = given.get("shots"), given.get("efficiency")
    if fa is not None and np.size(fa) != 2:
        raise UsageError(f"fa=({', '.join(f'{a:g}' for a in np.atleast_1d(fa))}): MP2RAGE has two flip angles "
                         f"(one per block), got {np.size(fa)}")
    if ti is not None and np.size(ti) != 2:
        raise UsageError(f"ti=({', '.join(f'{t:g}' for t in np.atleast_1d(ti))}): MP2RAGE has two inversion times, "
                         f"got {np.size(ti)}")
    sources = {}
    tiv, sources["InversionTime"] = resolve_parameter("InversionTime", ti, _numbers(sidecar, "InversionTime", where),
                                                      2, option="ti=", where=where)
    fav, sources["FlipAngle"] = resolve_parameter("FlipAngle", fa, _numbers(sidecar, "FlipAngle", where), 2,
                                                  option="fa=", where=where)
    tp, sources["RepetitionTimePreparation"] = resolve_parameter(
        "RepetitionTimePreparation", tr_prep, _numbers(sidecar, "RepetitionTimePreparation", where), None,
        option="tr_prep=", where=where, check_key="RepetitionTime")
    te, sources["RepetitionTimeExcitation"] = resolve_parameter(
        "RepetitionTimeExcitation", tr_exc, _numbers(sidecar, "RepetitionTimeExcitation", where), None,
        option="tr_exc=", where=where, check_key="RepetitionTimeSpoiled")
    side_shots = _numbers(sidecar, "NumberShots", where)
    if side_shots is not None and (side_shots.size != 1 or side_shots[0] != int(side_shots[0])):
        raise InputError(f"{where}: sidecar NumberShots {sidecar['NumberShots']!r}; expected one whole number "
                         f"(excitations per block)")
    if shots is not None:
        n, sources["NumberShots"] = int(shots), "command line"
        if side_shots is not None and int(side_shots[0]) != n:
            warn(f"shots={n} differs from the sidecar NumberShots {int(side_shots[0])}; using shots={n}")
    elif side_shots is not None:
        n, sources["NumberShots"] = int(side_shots[0]), "sidecar"
    else:
        raise InputError(f"{where}: no NumberShots found; give shots=N or add NumberShots to the BIDS sidecar")
    eff = DEFAULT_EFFICIENCY if efficiency is None else float(efficiency)
    sources["InversionEfficiency"] = "default" if efficiency is None else "command line"
    proto = MP2RAGEProtocol(ti=(float(tiv[0]), float(tiv[1])), fa=(float(fav[0]), float(fav[1])), tr_prep=float(tp),
                            tr_exc=float(te), shots=n, efficiency=eff).check()
    return proto, sources


def fit_t1_mp2rage(
    uni: ArrayLike,
    protocol: MP2RAGEProtocol,
    *,
    b1: ArrayLike | None = None,
    mask: ArrayLike | None = None,
    inv1: ArrayLike | None = None,
    inv2: ArrayLike | None = None,
    sigma: ArrayLike | None = None,
    b1_se: ArrayLike | None = None,
    lut: Mp2rageLookup | None = None,
) -> MapSet:
    """T1 and R1 (and with the inversion images M0 and standard errors) from UNI by the lookup.

    Parameters
    ----------
    uni : (...) array_like
        UNI in [-0.5, 0.5].
    protocol : MP2RAGEProtocol
    b1 : (...) array_like, optional
        Relative B1 per voxel (NaN: status 6). Without it B1 = 1.
    mask : (...) bool array_like, optional
        Voxels to invert (default: all).
    inv1, inv2 : (...) array_like, optional
        The inversion images (magnitudes, or complex: their magnitudes are
        used). Needed for M0 and the standard errors.
    sigma : float or (...) ndarray, optional
        Noise sd per real/imaginary channel of the inversion images (signal
        units); without it no standard errors are returned.
    b1_se : (...) array_like, optional
        Standard error of ``b1`` (fraction); added to the standard errors to
        first order (NaN counts as 0).
    lut : Mp2rageLookup, optional
        The lookup table to invert with (default: one for ``protocol`` over the B1 range of the voxels to
        invert). A volume inverted in parts passes the table of the whole volume (see
        :func:`lookup_for`), so that every part uses the same one.

    Returns
    -------
    MapSet
        ``T1`` (s), ``R1`` (1/s), and with ``inv1``/``inv2`` ``M0`` (a.u.)
        with standard errors and the ``rmse`` quality map (RMS residual of
        the two magnitudes against M0 x model).

    Examples
    --------
    >>> import numpy as np
    >>> from qmap.models.mp2rage import MP2RAGEProtocol, mp2rage_uni
    >>> p = MP2RAGEProtocol((0.7, 2.5), (4.0, 5.0), 5.0, 0.007, 176)
    >>> maps = fit_t1_mp2rage(mp2rage_uni(np.array([0.9, 1.6]), p), p)
    >>> [round(float(t), 4) for t in maps["T1"]]
    [0.9, 1.6]
    """
    u = np.asarray(uni, np.float32)
    shape = u.shape
    nvox = u.size
    sel = np.ones(nvox, bool) if mask is None else np.asarray(mask, bool).reshape(-1).copy()
    uf = u.reshape(-1)
    status = np.full(nvox, st.MASKED, np.uint8)
    finite = np.isfinite(uf)
    status[sel & ~finite] = st.NONFINITE
    sel &= finite
    b1f = None
    if b1 is not None:
        b1f = np.broadcast_to(np.asarray(b1, np.float32), shape).reshape(-1)
        okb = np.isfinite(b1f)
        status[sel & ~okb] = st.OUTSIDE_B1
        sel &= okb
    idx = np.flatnonzero(sel)
    bsel = None if b1f is None else b1f[idx].astype(float)
    if lut is None:
        lut = lookup_for(protocol, bsel)
    t1 = lut.t1(uf[idx].astype(float), bsel)
    ok = np.isfinite(t1)
    status[idx] = np.where(ok, st.FITTED, st.OUTSIDE_LOOKUP)
    good = idx[ok]
    t1g = t1[ok]
    bg = None if bsel is None else bsel[ok]

    def volume(values=None, at=good):
        out = np.full(nvox, np.nan, np.float32)
        if values is not None:
            out[at] = values
        return out.reshape(shape)

    est = {"T1": volume(t1g), "R1": volume(1.0 / t1g)}
    units = {"T1": "s", "R1": "1/s"}
    desc = {"T1": "longitudinal relaxation time T1 from the MP2RAGE UNI image (lookup of the signal model)",
            "R1": "longitudinal relaxation rate R1 = 1/T1"}
    stderr: dict = {}
    quality: dict = {}
    holes = None
    if inv1 is not None and inv2 is not None:
        sig_good = None
        if sigma is not None:
            sig_good = np.broadcast_to(np.asarray(sigma, float), shape).reshape(-1)[good]
            if np.ndim(sigma) > 0:
                # one convention per map: a voxel without a usable noise sd (a noise map's hole) has NaN
                # standard errors (counted: the provenance and the sidecars say so)
                usable = np.isfinite(sig_good) & (sig_good > 0)
                holes = int(np.count_nonzero(~usable))
                if holes:
                    sig_good = np.where(usable, sig_good, np.nan)
        m0, se = _m0_and_errors(t1g, bg, protocol, np.asarray(inv1).reshape(-1)[good],
                                np.asarray(inv2).reshape(-1)[good], sig_good,
                                None if b1_se is None else np.broadcast_to(np.asarray(b1_se, float),
                                                                           shape).reshape(-1)[good])
        est["M0"] = volume(m0["M0"])
        units["M0"] = "a.u."
        desc["M0"] = ("apparent M0 (least squares of the two inversion magnitudes on the model signals; includes "
                      "receive sensitivity and T2* decay)")
        if sigma is not None:  # without a noise level there is nothing to write
            stderr = {k: volume(v) for k, v in se.items()}
        quality["rmse"] = volume(m0["rmse"])
    info = {"model": "mp2rage", "parameters": list(est), "noise_floor": "none", "n_fitted": int(idx.size),
            "stderr": ({"convention": "noise"} if holes is None else
                       {"convention": "noise", "no_noise_level_voxels": holes}) if stderr else {},
            "t1_lookup_range_s": [float(np.nanmin(lut.limits[:, 0])), float(np.nanmax(lut.limits[:, 1]))],
            "b1_table": [float(lut.b1[0]), float(lut.b1[-1])]}
    return MapSet(est, stderr, units, desc, ("T1",), quality, status.reshape(shape), info)


def lookup_for(protocol: MP2RAGEProtocol, b1=None) -> Mp2rageLookup:
    """The lookup table for ``protocol`` over the range of the relative B1 values ``b1`` (1-D; None: B1 = 1).

    Values outside :data:`B1_TABLE_RANGE` do not widen the table (those voxels get status 9).
    """
    if b1 is None:
        return Mp2rageLookup(protocol)
    b = np.asarray(b1, float)
    inside = (b >= B1_TABLE_RANGE[0]) & (b <= B1_TABLE_RANGE[1])
    lo, hi = (float(b[inside].min()), float(b[inside].max())) if inside.any() else (1.0, 1.0)
    return Mp2rageLookup(protocol, b1_range=(lo, hi))


#: voxels of the data grid :func:`_b1_range` resamples at a time
RANGE_VOXELS = 1 << 16


def _b1_range(b1: B1OnGrid, select: np.ndarray, slabs: list[tuple[int, int]]) -> tuple[tuple[float, float], int]:
    """The B1 range :func:`lookup_for` takes from the finite values of ``b1`` at ``select``, and the number of
    data voxels the map covers, resampling ``b1`` one slab at a time.

    (The same range as ``lookup_for(protocol, b1_whole[select & finite])``, without the whole map.)
    """
    lo, hi = np.inf, -np.inf
    covered = 0
    # thin slabs whatever the fit's (a voxel's value does not depend on the slab): the pass holds little
    step = max(1, RANGE_VOXELS // max(1, select.shape[0] * select.shape[1]))
    first, end = (slabs[0][0], slabs[-1][1]) if slabs else (0, 0)
    for z0 in range(first, end, step):
        z1 = min(z0 + step, end)
        part = b1.slab(z0, z1, np.float32)
        ok = np.isfinite(part)
        covered += int(np.count_nonzero(ok))
        b = part[select[:, :, z0:z1] & ok].astype(float)
        b = b[(b >= B1_TABLE_RANGE[0]) & (b <= B1_TABLE_RANGE[1])]
        if b.size:
            lo, hi = min(lo, float(b.min())), max(hi, float(b.max()))
        del part, ok, b
    return ((lo, hi) if np.isfinite(lo) else (1.0, 1.0)), covered


def _m0_and_errors(t1, b1, protocol, inv1, inv2, sigma, b1_se=None):
    """M0 by least squares of the magnitudes, and first-order standard errors of T1, R1, M0.

    With ``b1_se`` (standard error of the B1 map) its contribution is added to first order
    (:func:`qmap.fitting.uncertainty.combine_se`): ``dT1/dB1 = -(dUNI/dB1)/(dUNI/dT1)`` at fixed UNI.
    """
    b = 1.0 if b1 is None else b1
    f1, f2 = mp2rage_signals(t1, protocol, b)
    a1, a2 = np.abs(inv1).astype(float), np.abs(inv2).astype(float)
    ff = f1 * f1 + f2 * f2
    m0 = (a1 * np.abs(f1) + a2 * np.abs(f2)) / ff
    rmse = np.sqrt(((a1 - m0 * np.abs(f1)) ** 2 + (a2 - m0 * np.abs(f2)) ** 2) / 2.0)
    se = {}
    if sigma is not None:
        # dUNI/dT1 and dM0/dT1 (at fixed magnitudes) by central differences of the model
        p1, p2 = mp2rage_signals(t1 * (1 + _H), protocol, b)
        q1, q2 = mp2rage_signals(t1 * (1 - _H), protocol, b)
        dt = 2 * _H * t1
        du_dt = ((p1 * p2) / (p1 * p1 + p2 * p2) - (q1 * q2) / (q1 * q1 + q2 * q2)) / dt
        m0p = (a1 * np.abs(p1) + a2 * np.abs(p2)) / (p1 * p1 + p2 * p2)
        m0q = (a1 * np.abs(q1) + a2 * np.abs(q2)) / (q1 * q1 + q2 * q2)
        dm0_dt = (m0p - m0q) / dt
        s1, s2 = m0 * f1, m0 * f2  # the model signals (signed): the Fisher-information convention
        pp = s1 * s1 + s2 * s2
        du_ds1 = s2 * (s2 * s2 - s1 * s1) / pp**2
        du_ds2 = s1 * (s1 * s1 - s2 * s2) / pp**2
        with np.errstate(divide="ignore", invalid="ignore"):
            dt_ds1, dt_ds2 = du_ds1 / du_dt, du_ds2 / du_dt
            se_t1 = uni_stderr(s1, s2, sigma) / np.abs(du_dt)
        # M0 = (|S1| |f1| + |S2| |f2|)/(f1^2 + f2^2) with f depending on T1(S1, S2); at the model signals
        # d|S_k|/dS_k = sign(f_k), so the direct term is f_k/(f1^2 + f2^2)
        g1 = f1 / ff + dm0_dt * dt_ds1
        g2 = f2 / ff + dm0_dt * dt_ds2
        se_m0 = sigma * np.sqrt(g1 * g1 + g2 * g2)
        if b1_se is not None and b1 is not None:
            from ..fitting.uncertainty import combine_se

            bp, bq = b * (1 + _H), b * (1 - _H)
            p1, p2 = mp2rage_signals(t1, protocol, bp)
            q1, q2 = mp2rage_signals(t1, protocol, bq)
            db = 2 * _H * b
            du_db = ((p1 * p2) / (p1 * p1 + p2 * p2) - (q1 * q2) / (q1 * q1 + q2 * q2)) / db
            dm0_db = ((a1 * np.abs(p1) + a2 * np.abs(p2)) / (p1 * p1 + p2 * p2)
                      - (a1 * np.abs(q1) + a2 * np.abs(q2)) / (q1 * q1 + q2 * q2)) / db
            with np.errstate(divide="ignore", invalid="ignore"):
                dt1_db = -du_db / du_dt
            se_t1 = combine_se(se_t1, dt1_db, b1_se)
            se_m0 = combine_se(se_m0, dm0_db + dm0_dt * dt1_db, b1_se)
        se = {"T1": se_t1, "R1": se_t1 / t1**2, "M0": se_m0}
    else:
        nan = np.full(t1.shape, np.nan)
        se = {"T1": nan, "R1": nan, "M0": nan}
    return {"M0": m0, "rmse": rmse}, se


def _b1_stderr(b1, spec, shape, affine, scale: str) -> tuple[B1OnGrid | None, dict, Path | None]:
    """The B1 map's standard error for ``--b1-stderr auto|none|FILE`` (as ``t1-vfa``), resampled onto the data
    grid slab by slab."""
    from ..b1 import b1_stderr_beside, open_b1_stderr

    spec = "auto" if spec is None else str(spec)
    if spec == "none":
        return None, {"propagated": False, "reason": "--b1-stderr none"}, None
    path = b1_stderr_beside(b1) if spec == "auto" else Path(spec)
    if path is None:
        return None, {"propagated": False, "reason": "no standard-error map beside the B1 map"}, None
    try:
        se, info = open_b1_stderr(path, shape=shape, affine=affine, b1_scale=scale)
    except InputError as exc:
        if spec != "auto":
            raise
        return None, {"propagated": False, "reason": f"the standard-error map beside the B1 map is not usable ({exc})",
                      "path": str(Path(path).absolute())}, None
    return se, dict(info, propagated=True, path=str(Path(path).absolute())), Path(path)


class _Slices:
    """The slices ``z0:z1`` of a 3D image, read when ``dataobj`` is touched (for :func:`image_data`)."""

    def __init__(self, reader: SlabReader, z0: int, z1: int):
        self.reader, self.z0, self.z1 = reader, z0, z1

    @property
    def dataobj(self):
        return self.reader.read(self.z0, self.z1)


def _open_3d(path, what: str):
    """The image of one 3D volume (header only: the data are read slab by slab, :func:`_read_3d`)."""
    img = load_image(path, what=what)
    shape = img.shape
    if len(shape) > 3 and not all(s == 1 for s in shape[3:]):
        named = what if what.endswith("=") else f"{what} "  # an argument (inv1=PATH) or a noun (UNI PATH)
        raise InputError(f"{named}{path}: has shape {shape}; expected one 3D volume")
    return img


def _read_3d(reader: SlabReader, path, z0: int, z1: int, *, allow_complex: bool = False) -> np.ndarray:
    """The slices ``z0:z1`` of a 3D image as float32 (complex64), scaling applied.

    ``reader`` (one per file) decompresses a ``.nii.gz`` once for the slabs of a pass in z order.
    """
    data = image_data(_Slices(reader, z0, z1), path, dtype=np.float32, allow_complex=allow_complex)
    return data.reshape(reader.img.shape[:2] + (z1 - z0,))


class _Inversion:
    """One inversion image (magnitude or complex, or a magnitude with its phase), read slab by slab."""

    def __init__(self, path, phase, arg: str, ref_img):
        """``arg``: the argument that gave the image (``inv1`` / ``inv2``; its phase is ``{arg}_phase``)."""
        self.path, self.phase, self.arg = path, phase, arg
        self.img = _open_3d(path, f"{arg}=")
        self.reader = SlabReader(self.img)
        check_same_grid(ref_img.shape, ref_img.affine, self.img.shape, self.img.affine, ref_name="the UNI image",
                        name=f"{arg}={path}")
        self.pimg = None
        self.preader: SlabReader | None = None
        if phase is not None:
            if self.img.get_data_dtype().kind == "c":
                raise UsageError(f"{arg}_phase=: {path} already holds complex data; give a complex image or a "
                                 f"magnitude with its phase, not both")
            self.pimg = _open_3d(phase, f"{arg}_phase=")
            self.preader = SlabReader(self.pimg)
            check_same_grid(ref_img.shape, ref_img.affine, self.pimg.shape, self.pimg.affine,
                            ref_name="the UNI image", name=f"{arg}_phase={phase}")

    def magnitude(self, z0: int, z1: int) -> np.ndarray:
        """(X, Y, z1 - z0) float32 magnitudes of the slices ``z0:z1``."""
        data = _read_3d(self.reader, self.path, z0, z1, allow_complex=True)
        arg = self.arg
        if self.preader is not None:
            ph = _read_3d(self.preader, self.phase, z0, z1)
            peak = float(np.nanmax(np.abs(ph))) if np.isfinite(ph).any() else 0.0
            if peak > 3.1416:
                raise InputError(f"{arg}_phase={self.phase}: values reach {peak:g}, expected radians in [-pi, pi]; "
                                 f"convert the phase first (e.g. integer-coded -4096..4095: multiply by pi/4096)")
            data = np.abs(data) * np.exp(1j * ph.astype(np.float32))
        elif not np.iscomplexobj(data) and (data < 0).any():
            raise InputError(f"{arg}={self.path}: holds negative values but a magnitude image is >= 0; give the "
                             f"magnitude, a complex image, or the magnitude with {arg}_phase=")
        return np.abs(data)


@dataclass
class _Images(Series):
    """A series whose slabs come from ``reader(z0, z1) -> (X, Y, z1 - z0, n)`` (lazy: never read whole)."""

    reader: Callable[[int, int], np.ndarray] | None = field(default=None, repr=False)

    def read(self, z0: int, z1: int) -> np.ndarray:
        if self._data is not None or self.reader is None:
            return super().read(z0, z1)
        return self.reader(z0, z1)


@recorded
@shared_parameters(keys=(ProtocolOverrides,))
def run_t1_mp2rage(
    uni: str | Path,
    *,
    common: CommonOptions,
    inv1: str | Path | None = None,
    inv2: str | Path | None = None,
    inv1_phase: str | Path | None = None,
    inv2_phase: str | Path | None = None,
    b1: str | Path | None = None,
    b1_scale: str | None = None,
    b1_smooth: float | None = None,
    b1_stderr: str | None = "auto",
    sigma_spec: str | None = None,
    **overrides: Unpack[ProtocolOverrides],
) -> RunReport:
    """T1, R1 (and with the inversion images M0 and standard errors) maps from an MP2RAGE UNI image.

    Parameters
    ----------
    uni : path-like
        The combined image (3D NIfTI): float in [-0.5, 0.5] or 12-bit integer 0..4095.
    common : CommonOptions
    inv1, inv2 : path-like, optional
        The two inversion images (magnitude or complex), same grid as UNI.
    inv1_phase, inv2_phase : path-like, optional
        Phase images (radians) of magnitude inversion images.
    b1 : path-like, optional
        Relative B1 map (any grid, resampled through the affines).
    b1_scale, b1_smooth, b1_stderr
        As for ``t1-vfa``: units and smoothing of the B1 map, and its standard error
        (``"auto"``: the ``desc-stderr`` map beside it, when there; ``"none"``; or a file),
        propagated into the standard errors when the inversion images are given.
    sigma_spec : str, optional
        ``--sigma`` (auto, a value or a noise map) for the inversion images' noise.
    **overrides
        The protocol values of :class:`ProtocolOverrides` (default: from the sidecars); see Other
        Parameters.
    """
    t0 = time.perf_counter()
    if common.engine != "fast":
        raise UsageError("engine='lmfit': t1-mp2rage fits nothing (UNI -> T1 is a table lookup); leave engine= out")
    if (inv1 is None) != (inv2 is None):
        raise UsageError("inv1= and inv2= go together: give both inversion images, or neither")
    if (inv1_phase is not None and inv1 is None) or (inv2_phase is not None and inv2 is None) or (
            (inv1_phase is None) != (inv2_phase is None)):
        raise UsageError("inv1_phase= / inv2_phase=: give the phase of both inversion images, with inv1= / inv2=")
    if sigma_spec not in (None, "auto") and inv1 is None:
        raise UsageError("sigma= is the noise of the inversion images: it needs inv1= / inv2=")
    if (b1_scale is not None or b1_smooth or b1_stderr not in (None, "auto", "none")) and b1 is None:
        raise UsageError("b1_scale= / b1_smooth= / b1_se=FILE need b1=B1MAP")
    efficiency = overrides.get("efficiency")
    if efficiency is not None and not (0 < efficiency <= 1):
        raise UsageError(f"efficiency={efficiency:g}: expected a number in (0, 1] (1 = perfect)")
    upath = Path(uni).expanduser().absolute()
    img = _open_3d(upath, "UNI")
    sidecar, where = _merged_sidecar(upath, inv1, inv2)
    protocol, sources = resolve_protocol(sidecar, where, **overrides)
    shape, affine = (tuple(img.shape[:3]) + (1,))[:3], np.asarray(img.affine, float)  # a 2D image: one slice
    budget = common.max_memory
    inversions = None
    if inv1 is not None:
        inversions = (_Inversion(inv1, inv1_phase, "inv1", img), _Inversion(inv2, inv2_phase, "inv2", img))
    acq = {"acquisition": protocol.as_acquisition(), "sources": sources, "affine": affine, "header": img.header}
    files = [upath] + [Path(p).expanduser().absolute() for p in (inv1, inv2, inv1_phase, inv2_phase) if p is not None]

    uni_reader = SlabReader(img)

    def read_uni(z0: int, z1: int) -> np.ndarray:
        return _read_3d(uni_reader, upath, z0, z1)[..., None]

    uni_series = _Images(_data=None, _proxies=[], paths=files, _shape4=shape + (1,), reader=read_uni, **acq)
    # UNI's encoding (float or 12-bit) from the range of the whole image, read slab by slab; a stored 0 is a
    # zero-filled background, not a measured UNI
    span: tuple[float, float] | None = None
    finite = np.zeros(shape, bool)
    zero_filled = np.zeros(shape, bool)
    # (in about 16 parts without --max-memory: the float32 UNI is never whole in memory)
    k16 = -(-shape[2] // 16)
    scan = uni_series.slabs(budget) if budget else [(z, min(z + k16, shape[2])) for z in range(0, shape[2], k16)]
    for z0, z1 in scan:
        raw = read_uni(z0, z1)[..., 0]
        part = _finite_range(raw)
        if part is not None:
            span = part if span is None else (min(span[0], part[0]), max(span[1], part[1]))
        finite[:, :, z0:z1] = np.isfinite(raw)
        zero_filled[:, :, z0:z1] = raw == 0
    if span is None:
        raise InputError(f"{upath}: every UNI value is NaN or infinite; nothing to invert")
    encoding = uni_encoding(*span, str(upath))
    if inversions is None:
        # the voxels to invert: the common mask options, except that "auto" needs the inversion images (UNI has
        # no usable object contrast: its background is noise spread over the whole range)
        run_series: Series = uni_series
        auto = (finite & ~zero_filled, ("auto without inversion images: every voxel with a finite UNI whose stored "
                                        "value is not 0 (zero-filled background) (pass mask= or inv1= and inv2= to "
                                        "exclude the background)"))
    else:
        first, second = inversions

        def read_inversions(z0: int, z1: int) -> np.ndarray:
            return np.stack([first.magnitude(z0, z1), second.magnitude(z0, z1)], axis=-1).astype(np.float32)

        # the run reads the inversion magnitudes: their object is the mask, their background the noise level
        run_series = _Images(_data=None, _proxies=[], paths=files, _shape4=shape + (2,), reader=read_inversions,
                             **acq)
        auto = None
    del zero_filled
    run = prepare_run(run_series, common, sigma_spec=sigma_spec, sigma_for_se=inversions is not None, t0=t0,
                      magnitude=inversions is not None, fallback=_NO_NOISE, auto_mask=auto,
                      auto_mask_desc=None if auto is not None else
                      "auto (object of the inversion images: 0.5 x Otsu threshold of their maximum, opened, holes "
                      "filled)")
    run.slab_lazy = True  # UNI (and the inversion images) are read, inverted and written slab by slab
    del auto  # (the mask is run.mask)
    notes = run.notes
    noise_info = None
    if inversions is not None:
        sinfo = run.noise_info or {}
        noise_info = {"mode": "none", "sigma": sinfo.get("sigma"), "sigma_source": sinfo.get("source"),
                      "stderr": "first-order propagation of complex Gaussian noise (sd sigma per channel) on both "
                                "inversion images through UNI, at the model signals"}
        if "stderr_fallback" in sinfo:
            noise_info["stderr"] = f"none written: {sinfo['stderr_fallback']}"
        if sinfo.get("noise_map"):
            noise_info["noise_map"] = sinfo["noise_map"]
    extra = run.inputs
    # one lookup table for the whole volume (its B1 range from every voxel to invert), then slab by slab
    slabs = run.fit_slabs
    b1_grid: B1OnGrid | None = None
    b1_se: B1OnGrid | None = None
    b1_info: dict = {"b1": None}
    b1_range = (1.0, 1.0)
    if b1 is not None:
        from ..b1 import open_b1_map

        # the B1 map stays on its own grid: resampled onto the data slab by slab (each voxel's value the same
        # as when the whole grid is resampled), once here for its coverage and the lookup's B1 range, once
        # in the slab's inversion (never whole on the data grid)
        b1_grid, b1_info = open_b1_map(b1, shape=shape, affine=affine, b1_scale=b1_scale, b1_smooth=b1_smooth)
        b1_range, covered = _b1_range(b1_grid, run.mask & finite, slabs)
        b1_info["b1_grid_coverage"] = b1_grid.coverage(covered)
        extra.append(Path(b1).expanduser().absolute())
        b1_desc = (f"B1 correction applied from {Path(b1).name} ({b1_info['b1_scale']}, "
                   f"{'x'.join(map(str, b1_info['b1_grid']))} grid resampled onto the data)")
        if inversions is not None:
            b1_se, se_info, b1_se_path = _b1_stderr(b1, b1_stderr, shape, affine, b1_info["b1_scale"])
            b1_info["b1_stderr"] = se_info
            if b1_se_path is not None:
                extra.append(b1_se_path.absolute())
                b1_desc += f"; its standard error ({b1_se_path.name}) is propagated into the standard errors"
        elif b1_stderr not in (None, "auto", "none"):
            raise UsageError("b1_se=FILE: standard errors need the inversion images (inv1= / inv2=)")
    else:
        b1_desc = NO_B1_NOTE
    del finite
    lut = lookup_for(protocol) if b1_grid is None else Mp2rageLookup(protocol, b1_range=b1_range)

    def one(slab: Slab) -> MapSet:
        # the slab's UNI: the run's series itself without inversion images (read once, in file order)
        u = _decode((slab.data if inversions is None else read_uni(slab.z0, slab.z1))[..., 0], encoding)
        mags = (None, None) if inversions is None else (slab.data[..., 0], slab.data[..., 1])
        # B1 as float32 (the precision fit_t1_mp2rage computes in), its standard error as float64
        return fit_t1_mp2rage(u, protocol, b1=None if b1_grid is None else b1_grid.slab(slab.z0, slab.z1, np.float32),
                              mask=slab.mask, inv1=mags[0], inv2=mags[1], sigma=slab.sigma,
                              b1_se=None if b1_se is None else b1_se.slab(slab.z0, slab.z1), lut=lut)

    maps = run.map_slabs(one)
    delays = {k: round(v, 6) for k, v in protocol.delays().items()}
    options = {"inversion_efficiency": protocol.efficiency, "uni_encoding": UNI_ENCODINGS[encoding],
               "b1_correction": b1 is not None, "parameter_sources": sources,
               "inversion_images": inv1 is not None}
    options.update(b1_info)
    model_info = {"name": "mp2rage", "parameters": maps.names, "equation": EQUATION,
                  "estimator": "lookup: UNI tabulated over a log-spaced T1 grid per B1, restricted to the monotonic "
                               "range, interpolated bilinearly in (B1, UNI) on ln T1",
                  "inversion_efficiency": protocol.efficiency,
                  "delays_s": delays, "t1_lookup_range_s": maps.info["t1_lookup_range_s"],
                  "b1_correction": b1_desc,
                  "status_9": "UNI outside the range the lookup can invert at the voxel's B1"}
    if np.count_nonzero(maps.status == st.OUTSIDE_LOOKUP):
        notes.append(f"{np.count_nonzero(maps.status == st.OUTSIDE_LOOKUP)} voxels have a UNI the lookup cannot "
                     f"invert (status 9; invertible T1 range {maps.info['t1_lookup_range_s'][0]:.3g}-"
                     f"{maps.info['t1_lookup_range_s'][1]:.3g} s)")
    run.noise_info = noise_info
    report = run.write(maps, options=options, model_info=model_info)
    report.notes.insert(0, f"UNI read as {UNI_ENCODINGS[encoding]}; {b1_desc}")
    return report
