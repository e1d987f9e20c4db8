"""Plausibility checks of a series before and after fitting: no confident maps from data that cannot be right.

Every fitting command's run path calls these (through :func:`qmap.pipeline.run_fit`
and the VFA / B1 workflows):

* :func:`clip_small_negatives` -- magnitude images with a few small negative
  samples (interpolation undershoot of a resampled export) are clipped to 0
  with a warning; larger negatives mean a real or phase image and are refused.
* :func:`check_reordered` -- command-line acquisition values that are the
  sidecars' values in another order are refused: the files are not in the
  order the values were typed in (shell globs sort ``e10`` before ``e2``).
* :func:`check_series_shape` -- before fitting, the median signal of the
  object must behave like the model: a decay falls with echo time, an
  inversion recovery has one null and recovers, a VFA curve has one maximum
  (the Ernst angle). A series that clearly does not is refused with exit 2
  and the likely cause (files in another order than the times; a phase
  image); ``--no-series-check`` fits it anyway.
* :func:`warn_fit_quality` -- after fitting, warns when the median R-squared
  of the fitted voxels is low, when fewer than a tenth of the voxels in the
  mask were fitted (e.g. every voxel too noisy for a T2 spectrum), or when the
  automatic mask covers the whole image.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from .errors import InputError, warn
from .fitting import status as st

__all__ = [
    "NEGATIVE_TOLERANCE",
    "R2_WARN",
    "RISE_TOLERANCE",
    "check_reordered",
    "check_series_shape",
    "clip_small_negatives",
    "series_profile",
    "warn_fit_quality",
]

#: magnitude samples down to -NEGATIVE_TOLERANCE x the series maximum are interpolation undershoot (clipped to 0)
NEGATIVE_TOLERANCE = 0.05
#: a step against the model's direction larger than this fraction of the profile's range refuses the series
RISE_TOLERANCE = 0.25
#: a decay must fall by at least this fraction of its first sample over the series
MIN_DECAY = 0.05
#: fraction of the voxels in the mask (and above the noise floor) that must be fitted (status 0), else a warning
FITTED_WARN = 0.1
#: median R-squared of the fitted voxels below which the run warns
R2_WARN = 0.5
#: object voxels sampled for the profile (strided: the choice does not depend on how the data are read)
PROFILE_VOXELS = 20000
#: slabs of a series read from disk that the profile reads (the extra reading stays small)
PROFILE_SLABS = 3
#: the argument that turns the series checks off (the command line shows it as --no-series-check)
OVERRIDE = "series_check=False"


# ----------------------------------------------------------------------------- negatives
def clip_small_negatives(series, lo: float, hi: float, n_negative: int) -> None:
    """Clip negative magnitude samples to 0 when they are small (>= -NEGATIVE_TOLERANCE x max); else refuse.

    Parameters
    ----------
    series : qmap.io.series.Series
    lo, hi : float
        Smallest and largest finite sample of the series.
    n_negative : int
        Number of negative samples.
    """
    if lo >= 0:
        return
    if hi <= 0 or -lo > NEGATIVE_TOLERANCE * hi:
        raise InputError(
            f"{series.paths[0]}: holds negative values (min {lo:g}, {100 * -lo / max(hi, 1e-300):.3g} % of the "
            f"maximum {hi:g}) but magnitude images are >= 0 (undershoot of up to {100 * NEGATIVE_TOLERANCE:g} % is "
            f"clipped); is this a real/phase image? (t1-ir takes real data with signal='real')"
        )
    warn(f"{series.paths[0].name}: {n_negative} negative samples (min {lo:g}, {100 * -lo / hi:.2g} % of the maximum "
         f"{hi:g}): interpolation undershoot of a resampled magnitude export; set to 0 (negatives down to "
         f"-{100 * NEGATIVE_TOLERANCE:g} % of the maximum are clipped)")
    if series.lazy:
        series.clip_negative = True  # applied to every slab read
    else:
        series.data = np.maximum(series.data, 0, out=series.data if series.data.flags.writeable else None)


# ----------------------------------------------------------------------------- order of values
def check_reordered(cli, sidecar, key: str, option: str, where: str, *, rtol: float = 1e-3) -> None:
    """Refuse command-line values that are the sidecars' values in another order.

    Raises
    ------
    InputError
        When ``sorted(cli) == sorted(sidecar)`` but ``cli != sidecar``.
    """
    a = np.atleast_1d(np.asarray(cli, float))
    b = np.atleast_1d(np.asarray(sidecar, float))
    if a.size != b.size or a.size < 2:
        return
    if np.allclose(a, b, rtol=rtol, atol=1e-9) or not np.allclose(np.sort(a), np.sort(b), rtol=rtol, atol=1e-9):
        return
    raise InputError(
        f"{option} lists the sidecars' {key} values in another order than the files ({where}): the files are not in "
        f"the order the values were typed in (a shell glob sorts e10 before e2); leave {option} out -- qmap sorts "
        f"the files by their sidecars -- or pass {OVERRIDE} to use {option} as given"
    )


# ----------------------------------------------------------------------------- series shape
def series_profile(series, mask: np.ndarray, max_bytes: float | None = None) -> np.ndarray:
    """Median over the brighter half of the object of each voxel's samples divided by its maximum, (m,).

    At most :data:`PROFILE_VOXELS` voxels (every k-th by flat index) are used, from at most
    :data:`PROFILE_SLABS` slabs of a series read from disk in slabs.
    """
    sel = np.asarray(mask, bool)
    k = max(1, -(-int(sel.sum()) // PROFILE_VOXELS))
    stride = np.zeros(sel.size, bool)  # every k-th flat index (no volume of int64 indices)
    stride[::k] = True
    keep = sel & stride.reshape(sel.shape)
    del stride
    rows = []
    slabs = series.slabs(max_bytes)
    if len(slabs) > PROFILE_SLABS:  # a series read from disk: the slabs richest in object voxels only
        counts = [int(keep[:, :, z0:z1].sum()) for z0, z1 in slabs]
        slabs = [slabs[i] for i in sorted(np.argsort(counts, kind="stable")[::-1][:PROFILE_SLABS])]
    for z0, z1 in slabs:
        block = series.read(z0, z1)
        v = block[keep[:, :, z0:z1]]
        v = np.abs(v) if np.iscomplexobj(v) else np.asarray(v, float)
        rows.append(v)
    y = np.concatenate(rows, axis=0) if rows else np.zeros((0, series.n))
    y = y[np.all(np.isfinite(y), axis=1)]
    if y.shape[0] == 0:
        return np.full(series.n, np.nan)
    peak = np.max(np.abs(y), axis=1)
    peak_ref = np.median(peak)
    y = y[(peak >= peak_ref) & (peak > 0)]
    return np.median(y / np.max(np.abs(y), axis=1, keepdims=True), axis=0)


def _shape_kind(model) -> str | None:
    """``decay``, ``valley`` (magnitude IR), ``rise`` (signed IR) or ``peak`` (VFA); None: no check."""
    name = getattr(model, "name", "")
    if name in ("monoexp", "epg_t2", "t2spectrum"):
        return "decay"
    if name == "ir":
        if getattr(model, "look_locker", False):
            return None
        return "valley" if getattr(model, "signal", "magnitude") == "magnitude" else "rise"
    if name in ("vfa", "spgr"):
        return "peak"
    return None


def _worst_step(s: np.ndarray, kind: str) -> tuple[float, int]:
    """Largest step against the direction the model allows (as a fraction of the range) and where (index k: k->k+1)."""
    d = np.diff(s)
    rng = float(np.max(s) - np.min(s))
    if rng <= 0 or d.size == 0:
        return 0.0, 0
    if kind == "decay":
        bad = d  # rises
    elif kind == "rise":
        bad = -d
    elif kind == "valley":  # falls to one minimum, then recovers
        i = int(np.argmin(s))
        bad = np.where(np.arange(d.size) < i, d, -d)
    else:  # peak: rises to one maximum, then falls
        i = int(np.argmax(s))
        bad = np.where(np.arange(d.size) < i, -d, d)
    k = int(np.argmax(bad))
    return float(bad[k]) / rng, k


def _natural_key(name: str):
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", name)]


def _looks_like_phase(series, max_bytes: float | None = None) -> str | None:
    """A short description when the first volume's values spread evenly over their range (a phase image)."""
    z0, z1 = series.slabs(max_bytes)[0]
    v = series.read(z0, z1)[..., 0]
    v = np.asarray(np.real(v), float)
    v = v[np.isfinite(v)]
    if v.size < 100:
        return None
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        return None
    q = (np.percentile(v, [10, 25, 50, 75, 90]) - lo) / (hi - lo)
    if np.all(np.abs(q - np.array([0.1, 0.25, 0.5, 0.75, 0.9])) < 0.08):
        return f"its values spread evenly over {lo:.4g}..{hi:.4g} inside and outside the object"
    return None


def check_series_shape(series, model, mask: np.ndarray, *, enabled: bool = True,
                       max_bytes: float | None = None) -> np.ndarray | None:
    """Refuse a series whose object signal clearly does not behave like ``model``; returns the profile checked.

    The profile is :func:`series_profile`. A decay must fall by at least
    :data:`MIN_DECAY` of its first sample and rise nowhere by more than
    :data:`RISE_TOLERANCE` of its range; a magnitude inversion recovery must
    fall to one null and recover; a signed one must rise; a VFA curve must
    have one maximum (the Ernst angle). Series with fewer than 3 samples are
    not checked.

    Raises
    ------
    InputError
        With the likely cause and the override ``--no-series-check``.
    """
    kind = _shape_kind(model)
    if kind is None or series.n < 3 or not np.any(mask):
        return None
    s = series_profile(series, mask, max_bytes)
    if not np.all(np.isfinite(s)):
        return None
    if not enabled:
        return s
    key = next(iter(series.acquisition))
    x = np.asarray(series.acquisition[key], float)
    fmt = (lambda t: f"{t:g} deg") if key == "FlipAngle" else (lambda t: f"{t * 1e3:.4g} ms")
    step, k = _worst_step(s, kind)
    if float(np.max(s) - np.min(s)) < MIN_DECAY:  # a flat profile: its wiggles are noise
        step = 0.0
    no_decay = kind == "decay" and s[0] - s[-1] < MIN_DECAY * s[0]
    if step <= RISE_TOLERANCE and not no_decay:
        return s
    what = {"decay": "decay with echo time", "valley": "fall to one null and recover with inversion time",
            "rise": "recover with inversion time", "peak": "have one maximum over the flip angles (the Ernst angle)"}
    profile = ", ".join(f"{v:.2f}" for v in s)
    if no_decay and step <= RISE_TOLERANCE:
        found = f"the median object signal does not fall (relative to each voxel's maximum: {profile})"
    else:
        direction = "rises" if kind in ("decay",) or (kind == "valley" and k < int(np.argmin(s))) or (
            kind == "peak" and k >= int(np.argmax(s))) else "falls"
        found = (f"the median object signal {direction} from {fmt(x[k])} to {fmt(x[k + 1])} by "
                 f"{100 * step:.0f} % of its range (relative to each voxel's maximum: {profile})")
    phase = _looks_like_phase(series, max_bytes)
    if phase:
        cause = (f"this looks like a phase image ({phase}), not a magnitude image; give the magnitude images "
                 f"(a phase image stored as integers, e.g. 0..4095, is not a signal)")
    else:
        names = [Path(p).name for p in series.paths]
        source = series.sources.get(key, "")
        cause = ("the files may not be in the order of the values"
                 + (f" ({key} from the {source})" if source else ""))
        if len(names) > 2 and sorted(names, key=_natural_key) != names and sorted(names) == names:
            cause += (f": they are in shell-glob order ({', '.join(names[:4])}, ...), which sorts 10 before 2; "
                      f"list them in acquisition order (e.g. ls | sort -V) or give the values in the files' order")
        else:
            cause += "; check the order of the files and of the values"
    raise InputError(f"the series does not {what[kind]}: {found}; {cause}; or pass {OVERRIDE} to fit it anyway")


# ----------------------------------------------------------------------------- after the fit
def warn_fit_quality(maps, mask: np.ndarray, mask_spec, r2: np.ndarray | None = None) -> list[str]:
    """Warnings after a fit: low median R-squared of the fitted voxels; an automatic mask covering everything.

    ``r2``: the R-squared map when the caller has read it already (a streamed map is read from its file on
    each access). Returns the warnings issued (also logged).
    """
    out = []
    spec = "auto" if mask_spec is None else str(mask_spec)
    good = maps.status == 0
    if r2 is None:
        r2 = maps.quality.get("rsquared")
    v = np.asarray(r2)[good] if r2 is not None else np.zeros(0)
    v = v[np.isfinite(v)]  # closed-form maps (b1) have no R-squared
    if v.size and spec != "none":
        med = float(np.median(v))
        if med < R2_WARN:
            out.append(f"the median R-squared of the fitted voxels is {med:.2f} (below {R2_WARN:g}): the model "
                       f"does not describe these data; check the order of the files and values, and that the "
                       f"images are magnitude images of this kind of series")
    status = np.asarray(maps.status)
    # voxels the fit was asked for: inside the mask, with signal above the noise floor
    tried = np.asarray(mask, bool) & (status != st.NOISE_ONLY)
    n_tried = int(tried.sum())
    n_good = int((good & tried).sum())
    if spec != "none" and n_tried and n_good < FITTED_WARN * n_tried:
        codes, counts = np.unique(status[tried & ~good], return_counts=True)
        top = int(codes[np.argmax(counts)])
        out.append(f"only {n_good} of the {n_tried} voxels in the mask were fitted (status 0); most of the others "
                   f"have status {top}: {st.STATUS_CODES.get(top, 'unknown')}; see the status map before using "
                   f"the maps")
    if spec == "auto" and np.asarray(mask, bool).all() and np.asarray(mask).size >= 1000:
        out.append("the automatic mask covers the whole image (no background found): the maps include every "
                   "voxel; give a mask with mask=FILE if the image has background")
    for w in out:
        warn(w)
    return out
