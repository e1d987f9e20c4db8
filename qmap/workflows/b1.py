"""``qmap b1``: a relative B1 map (``TB1map``, fraction) from AFI or double-angle images.

The closed forms live in :mod:`qmap.b1`; this module loads the two images with
their acquisition parameters, masks, estimates the image noise for the
standard errors, and writes the maps through :func:`qmap.pipeline.write_run`
(the same outputs and provenance as every other command).
"""

from __future__ import annotations

import time
from dataclasses import dataclass

import numpy as np

from ..b1 import B1_METHODS, b1_maps
from ..errors import InputError, UsageError
from ..fitting import status as st
from ..io.series import load_series
from ..models import choose
from ..pipeline import CommonOptions, RunReport, prepare_run
from ..record import recorded

__all__ = ["EQUATIONS", "run_b1"]


EQUATIONS = {
    "afi": "r = S2/S1, n = TR2/TR1, a = arccos((r n - 1)/(n - r)) (TR1, TR2 << T1; Yarnykh 2007); TB1 = a / nominal",
    "dam": "a = arccos(S(2a) / (2 S(a))) (TR >> T1; Insko & Bolinger 1993); TB1 = a / nominal",
}
#: (warning, summary note) when the noise level cannot be estimated: no residual to fall back on
NAN_FALLBACK = ("the TB1 standard errors are NaN (give sigma=VALUE)",
                "standard errors are NaN: the noise could not be estimated (give sigma=VALUE)")
#: DAM needs full recovery; below this TR (s) the summary reminds the user (TR >= ~5 T1, common practice)
DAM_TR_NOTE_S = 5.0


@dataclass(frozen=True)
class _Pair:
    """How one method's two images are told apart (``key``) and which scalar they share."""

    name: str  # in messages about the options
    title: str  # in messages about the images
    images: str  # what the two images are
    what: str  # the images, in messages of the series loader
    key: str  # the acquisition parameter that differs between the images
    option: str
    scalar: str  # the acquisition parameter the images share
    scalar_option: str
    scalar_required: bool
    scalar_noun: str


_AFI = _Pair(name="AFI", title="AFI", images="TR1 and TR2", what="AFI images", key="RepetitionTime", option="tr=",
             scalar="FlipAngle", scalar_option="fa=", scalar_required=True, scalar_noun="nominal flip angle")
_DAM = _Pair(name="DAM", title="the double-angle method", images="a and 2a", what="double-angle images",
             key="FlipAngle", option="fa=", scalar="RepetitionTime", scalar_option="tr=", scalar_required=False,
             scalar_noun="repetition time")


def _load_pair(pair: _Pair, inputs, value, scalar, max_bytes, check_order):
    """The two images of ``pair``'s method, labelled by ``pair.key`` (``value`` or the sidecars)."""
    if scalar is not None and np.size(scalar) != 1:
        raise UsageError(f"{pair.scalar_option}: {pair.name} takes one {pair.scalar_noun}, got {np.size(scalar)} "
                         f"values")
    one = None if scalar is None else float(np.ravel(scalar)[0])
    series = load_series(inputs, key=pair.key, value=value, option=pair.option,
                         scalars={pair.scalar: (one, pair.scalar_option, pair.scalar_required, pair.scalar)},
                         min_volumes=2, what=pair.what, max_bytes=max_bytes, check_order=check_order)
    if series.n != 2:
        raise InputError(f"{series.paths[0]}: {pair.title} takes two images ({pair.images}), got {series.n}")
    return series


def _load_afi(inputs, fa, tr, max_bytes, check_order=True):
    series = _load_pair(_AFI, inputs, tr, fa, max_bytes, check_order)
    trs = np.asarray(series.acquisition["RepetitionTime"], float)
    return series, float(series.acquisition["FlipAngle"]), float(trs[1] / trs[0])


def _load_dam(inputs, fa, tr, max_bytes, check_order=True):
    if fa is not None:
        fa = np.atleast_1d(np.asarray(fa, float))
        if fa.size == 1:
            fa = np.array([fa[0], 2.0 * fa[0]])
        elif fa.size != 2:
            raise UsageError(f"fa=({', '.join(f'{v:g}' for v in fa)}): the double-angle method takes one angle a "
                             f"or two, a and 2a; got {fa.size}")
    series = _load_pair(_DAM, inputs, fa, tr, max_bytes, check_order)
    a = np.asarray(series.acquisition["FlipAngle"], float)
    if not np.isclose(a[1], 2.0 * a[0], rtol=1e-2):
        raise InputError(f"flip angles {a[0]:g},{a[1]:g} deg (fa= or the sidecar FlipAngle): the double-angle method needs the "
                         f"angles a and 2a (e.g. 60,120)")
    return series, float(a[0]), None


@recorded
def run_b1(
    inputs,
    *,
    common: CommonOptions,
    method: str,
    fa=None,
    tr=None,
    sigma=None,
) -> RunReport:
    """Compute a relative B1 map (``TB1``, fraction) with its standard error and status, and write it.

    Parameters
    ----------
    inputs : list of path-like
        Two 3D NIfTIs or one 4D NIfTI with two volumes: AFI in the order TR1,
        TR2 (each image labelled by its ``RepetitionTime``); DAM at a and 2a.
    common : CommonOptions
    method : {"afi", "dam"}
    fa : array_like, optional
        Degrees. AFI: the nominal angle; DAM: ``a`` or ``a, 2a``. Default from
        the sidecars (``FlipAngle``).
    tr : array_like, optional
        Seconds. AFI: ``TR1, TR2``; DAM: optional, the repetition time
        (recorded, and checked against full recovery in the summary).
        Default from the sidecars (``RepetitionTime``).
    sigma : None, "auto", "local", float or path
        Image noise sd for the standard errors. None / ``"auto"`` /
        ``"local"``: estimated from the images when possible, otherwise the
        standard errors are NaN with a warning (the summary and provenance
        say why; two images leave no residual to fall back on).

    Notes
    -----
    Status codes: 0 valid, 1 masked, 2 non-finite input, 8 the signal ratio
    corresponds to no flip angle (value NaN).
    """
    t0 = time.perf_counter()
    if method not in B1_METHODS:
        raise UsageError(f"method={method!r}: expected afi or dam")
    if common.engine != "fast":
        raise UsageError(f"engine={common.engine!r} does not apply to B1 maps: B1 is computed in closed form")
    if common.units != "s":
        raise UsageError(f"units={common.units!r} does not apply to B1 maps: no time map is written (TB1 is a "
                         f"fraction)")
    budget = common.max_memory
    if method == "afi":
        series, fa_nom, n = _load_afi(inputs, fa, tr, budget, common.series_check)
    else:
        series, fa_nom, n = _load_dam(inputs, fa, tr, budget, common.series_check)
    # two images, no residual: without a noise level the standard errors are NaN
    # (the library default sigma=None stays quiet about an unknown noise level; the command line's "auto" warns)
    run = prepare_run(series, common, sigma_spec=sigma, sigma_for_se=True, fallback=NAN_FALLBACK,
                      warn_fallback=sigma is not None, t0=t0,
                      method=f"tb1{method}")
    noise_info: dict = run.noise_info if run.noise_info is not None else {"mode": "none", "sigma": None}
    run.noise_info = noise_info
    if run.sigma is None:
        noise_info["stderr"] = (f"not estimable: noise sigma unknown ({noise_info.get('stderr_fallback')}); "
                                f"standard errors are NaN")
    else:
        noise_info["stderr"] = "first-order propagation of Gaussian image noise sigma through the closed form"
    info = {}
    if n is not None:
        info["tr_ratio"] = n
    maps = run.map_slabs(lambda slab: b1_maps(slab.data, method=method, fa=fa_nom, n=n, mask=slab.mask,
                                              sigma=slab.sigma, info=info, dtype=np.float32),
                         slabs=run.fit_slabs_for(series.n))
    if run.sigma is not None:  # two images, no residual: the standard error is the noise propagated
        maps.info["stderr"] = {"convention": "noise", "meaning": noise_info["stderr"]}
        if isinstance(run.sigma, np.ndarray):
            # one convention per map: a noise map's holes (no positive value) give NaN standard errors in the
            # voxels computed there, counted as by the fitting commands (provenance and sidecars say so)
            usable = np.isfinite(run.sigma) & (run.sigma > 0)
            computed = ~np.isin(maps.status, (st.MASKED, st.NONFINITE))
            maps.info["stderr"]["no_noise_level_voxels"] = int(np.count_nonzero(computed & ~usable))
    notes = run.notes
    ok = maps.status == 0
    fitted = maps.status != st.MASKED
    if fitted.any() and np.mean(maps.status[fitted] == st.NO_VALID_ANGLE) > 0.5:
        swap = ("the two images (or tr=(TR1, TR2)) are probably in the wrong order" if method == "afi"
                else "the two images are probably in the wrong order (give S(a) first, then S(2a))")
        run.discard(maps)  # the maps streamed into the output folder go again
        raise InputError(
            f"{series.paths[0]}: {np.mean(maps.status[fitted] == st.NO_VALID_ANGLE):.0%} of the object has a signal "
            f"ratio that corresponds to no flip angle; {swap}"
        )
    if ok.any():
        values = maps["TB1"][ok]  # the map read back from its file is dropped at once
        q = np.percentile(values, [5, 50, 95], overwrite_input=True)  # partitioned in place: the same values
        del values
        notes.insert(0, f"TB1 (fraction): median {q[1]:.4g} (5-95%: {q[0]:.4g}-{q[2]:.4g})")
    del ok, fitted
    if method == "dam":
        trv = series.acquisition.get("RepetitionTime")
        if trv is None:
            notes.append("the double-angle method assumes full recovery (TR >= ~5 T1); RepetitionTime unknown")
        elif float(trv) < DAM_TR_NOTE_S:
            notes.append(f"the double-angle method assumes full recovery (TR >= ~5 T1): with TR {float(trv):g} s, "
                         f"tissue with T1 above {float(trv) / 5:.2g} s biases B1")
    model_info = {"name": choose("b1", method).model, "equation": EQUATIONS[method], "parameters": ["TB1"],
                  "nominal_flip_angle_deg": fa_nom}
    if n is not None:
        model_info["tr_ratio"] = n
    options = {"method": method, "sigma": None if sigma is None else str(sigma)}
    return run.write(maps, options=options, model_info=model_info)
