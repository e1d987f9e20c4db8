"""Relative transmit field (B1) from two images: actual flip-angle imaging and the double-angle method.

Both methods turn a signal ratio into the actual flip angle in closed form;
the relative B1 is actual / nominal angle (1.0 = as prescribed). Voxels whose
ratio corresponds to no flip angle get status 8
(:data:`qmap.fitting.status.NO_VALID_ANGLE`) and a NaN value -- never a
silent NaN with status 0.

Actual flip-angle imaging (AFI; Yarnykh, Magn Reson Med 2007;57:192): two
identical pulses with the delays TR1 < TR2 after them, echoes S1 (in the TR1
interval) and S2 (in the TR2 interval). For TR1, TR2 << T1 and perfect
spoiling

.. math:: r = \\frac{S_2}{S_1} = \\frac{1 + n \\cos\\alpha}{n + \\cos\\alpha},
          \\qquad n = TR_2/TR_1, \\qquad \\alpha = \\arccos\\frac{r n - 1}{n - r}.

Valid magnitude ratios lie in ``[0, 1]`` (angles up to ``arccos(-1/n)``).

Double-angle method (DAM; Insko & Bolinger, J Magn Reson A 1993;103:82): two
acquisitions at a and 2a with TR >> T1 (full recovery), ``S(a) = M0 sin a``,
so

.. math:: \\alpha = \\arccos \\frac{S(2\\alpha)}{2 S(\\alpha)}.

Magnitude images give ratios in ``[0, 1]``, i.e. actual angles up to 90 deg
(2a up to 180 deg).

Standard errors propagate Gaussian image noise ``sigma`` (high-SNR
approximation; sigma e.g. from the image background) through the closed form
to first order.

:func:`load_b1_map` reads a relative B1 map (fraction or percent) and
resamples it onto a data grid through the two affines, for B1 correction.
"""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from .defaults import B1_METHODS, B1_SCALES
from .errors import InputError, UsageError, warn
from .fitting import status as st
from .io.nifti import image_data, load_image, read_sidecar, resample_blocks_of

if TYPE_CHECKING:
    from nibabel.spatialimages import SpatialImage

__all__ = ["B1_METHODS", "B1_SCALES", "B1_UNITS", "B1ClosedForm", "B1OnGrid", "afi_angle", "afi_b1", "afi_ratio",
           "b1_maps", "b1_stderr_beside", "b1_units_scale", "dam_angle", "dam_b1", "load_b1_map", "load_b1_stderr",
           "open_b1_map", "open_b1_stderr"]

#: plausible median of a relative B1 map (fraction)
B1_MEDIAN_RANGE = (0.2, 5.0)


def afi_ratio(fa_deg, n):
    """AFI signal ratio ``r = S2/S1 = (1 + n cos a)/(n + cos a)`` for the actual angle ``fa_deg`` (degrees).

    Examples
    --------
    >>> round(float(afi_ratio(60.0, 5.0)), 6)
    0.636364
    """
    c = np.cos(np.deg2rad(np.asarray(fa_deg, float)))
    n = np.asarray(n, float)
    return (1.0 + n * c) / (n + c)


def afi_angle(r, n):
    """Actual flip angle (degrees) from the AFI ratio ``r = S2/S1`` and ``n = TR2/TR1``.

    NaN where ``(r n - 1)/(n - r)`` lies outside ``[-1, 1]`` (no valid angle).

    Examples
    --------
    >>> round(float(afi_angle(7.0 / 11.0, 5.0)), 9)
    60.0
    """
    r = np.asarray(r, float)
    n = np.asarray(n, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = (r * n - 1.0) / (n - r)
        return np.degrees(np.arccos(np.where(np.abs(u) <= 1.0, u, np.nan)))


def dam_angle(s1, s2):
    """Actual flip angle (degrees) from the double-angle signals ``s1 = S(a)``, ``s2 = S(2a)``.

    NaN where ``s2 / (2 s1)`` lies outside ``[-1, 1]`` or ``s1 = 0``.

    Examples
    --------
    >>> import numpy as np
    >>> round(float(dam_angle(np.sin(np.radians(50)), np.sin(np.radians(100)))), 9)
    50.0
    """
    s1 = np.asarray(s1, float)
    s2 = np.asarray(s2, float)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = s2 / (2.0 * s1)
        return np.degrees(np.arccos(np.where(np.abs(u) <= 1.0, u, np.nan)))


def _finish(angle_rad, d_angle, fa_nominal, finite_in, sel):
    """Relative B1, its standard error and status from the angle (rad) and d(angle) per unit noise."""
    valid = sel & finite_in & np.isfinite(angle_rad)
    status = np.full(angle_rad.shape, st.MASKED, np.uint8)
    status[sel & ~finite_in] = st.NONFINITE
    status[sel & finite_in & ~np.isfinite(angle_rad)] = st.NO_VALID_ANGLE
    status[valid] = st.FITTED
    scale = 1.0 / np.deg2rad(fa_nominal)
    tb1 = np.where(valid, angle_rad * scale, np.nan)
    se = np.where(valid, d_angle * scale, np.nan)
    return tb1, se, status


def afi_b1(s1, s2, fa_nominal: float, n: float, *, mask=None, sigma=None):
    """Relative B1 from AFI images.

    Parameters
    ----------
    s1, s2 : (...) ndarray
        Magnitudes of the echoes in the TR1 and TR2 intervals (TR1 < TR2).
    fa_nominal : float
        Nominal flip angle, degrees.
    n : float
        ``TR2 / TR1`` (> 1).
    mask : (...) bool ndarray, optional
        Voxels to compute (default: all).
    sigma : float or (...) ndarray, optional
        Image noise sd (signal units) for the standard error; NaN stderr without it.

    Returns
    -------
    tb1, stderr : (...) ndarray
        Relative B1 (fraction) and its standard error; NaN where status != 0.
    status : (...) uint8 ndarray
        0 valid, 1 masked, 2 non-finite input, 8 ratio with no valid angle
        (outside ``[0, 1]`` for magnitudes, or ``S1 <= 0``).

    Notes
    -----
    ``var(r) = sigma^2 (1 + r^2) / S1^2``; ``d a / d r = -(n^2 - 1) /
    ((n - r)^2 sqrt(1 - u^2))`` with ``u = (r n - 1)/(n - r)``.
    """
    s1 = np.asarray(s1, float)
    s2 = np.asarray(s2, float)
    sel = np.ones(s1.shape, bool) if mask is None else np.asarray(mask, bool)
    finite = np.isfinite(s1) & np.isfinite(s2)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(s1 > 0, s2 / s1, np.nan)
        r = np.where(r >= 0, r, np.nan)
        u = (r * n - 1.0) / (n - r)
        ang = np.arccos(np.where(np.abs(u) <= 1.0, u, np.nan))
        sig = _known_sigma(sigma)
        se_r = sig * np.sqrt(1.0 + r * r) / s1
        d = (n * n - 1.0) / ((n - r) ** 2 * np.sqrt(1.0 - u * u)) * se_r
    return _finish(ang, d, fa_nominal, finite, sel)


def _known_sigma(sigma) -> np.ndarray | float:
    """The noise sd where it is known (finite, > 0), NaN elsewhere (a noise map's hole: no standard error)."""
    if sigma is None:
        return np.nan
    sig = np.asarray(sigma, float)
    return np.where(np.isfinite(sig) & (sig > 0), sig, np.nan)


def dam_b1(s_a, s_2a, fa_nominal: float, *, mask=None, sigma=None):
    """Relative B1 from double-angle images ``S(a)``, ``S(2a)`` at the nominal angle ``fa_nominal`` (degrees).

    Returns ``(tb1, stderr, status)`` as :func:`afi_b1`; status 8 where
    ``S(2a)/(2 S(a))`` is outside ``[0, 1]`` or ``S(a) <= 0``.

    Notes
    -----
    ``u = S(2a)/(2 S(a))``, ``var(u) = sigma^2 (1 + 4 u^2) / (4 S(a)^2)``,
    ``se(a) = se(u) / sqrt(1 - u^2)``.
    """
    s_a = np.asarray(s_a, float)
    s_2a = np.asarray(s_2a, float)
    sel = np.ones(s_a.shape, bool) if mask is None else np.asarray(mask, bool)
    finite = np.isfinite(s_a) & np.isfinite(s_2a)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = np.where(s_a > 0, s_2a / (2.0 * s_a), np.nan)
        u = np.where((u >= 0) & (u <= 1), u, np.nan)
        ang = np.arccos(u)
        sig = _known_sigma(sigma)
        se_u = sig * np.sqrt(1.0 + 4.0 * u * u) / (2.0 * s_a)
        d = se_u / np.sqrt(1.0 - u * u)
    return _finish(ang, d, fa_nominal, finite, sel)


#: voxels per block of :func:`b1_maps`
_B1_BLOCK = 1 << 14


def b1_maps(data, *, method: str, fa: float, n: float | None = None, mask=None, sigma=None, info: dict | None = None,
            dtype=np.float64):
    """Relative B1 as a :class:`~qmap.maps.MapSet` (``maps["TB1"]``, stderr, quality, status).

    Parameters
    ----------
    data : (..., 2) ndarray
        The two magnitude images: AFI ``[S1 (TR1), S2 (TR2)]``; DAM ``[S(a), S(2a)]``.
    method : {"afi", "dam"}
    fa : float
        Nominal flip angle ``a``, degrees.
    n : float
        AFI only: ``TR2 / TR1``.
    mask : (...) bool ndarray, optional
    sigma : float or (...) ndarray, optional
        Image noise sd for the standard errors (NaN without it).
    info : dict, optional
        Added to the MapSet's ``info`` (provenance).
    dtype : numpy dtype
        Of the maps (the command line holds them as float32, the written precision).

    Notes
    -----
    The closed form passes through both samples exactly, so the quality maps
    are R^2 = 1 and RMS residual 0 wherever the angle is valid (written for
    uniformity with the other commands).

    Examples
    --------
    >>> import numpy as np
    >>> s = np.stack([np.sin(np.radians([27.0, 33.0])), np.sin(np.radians([54.0, 66.0]))], -1)
    >>> b1_maps(s, method="dam", fa=30.0)["TB1"].round(6).tolist()
    [0.9, 1.1]
    """
    from .maps import MapSet

    data = np.asarray(data)
    if data.shape[-1] != 2:
        raise ValueError(f"B1 mapping takes two images (last axis 2), got {data.shape[-1]}")
    if method == "afi":
        if n is None or not n > 1:
            raise ValueError(f"AFI needs n = TR2/TR1 > 1, got {n}")
        ratio = float(n)
    elif method != "dam":
        raise ValueError(f"method {method!r}; expected one of {B1_METHODS}")
    shape = data.shape[:-1]
    tb1 = np.empty(shape, dtype)
    se = np.empty(shape, dtype)
    status = np.empty(shape, np.uint8)
    sig = None if sigma is None else np.broadcast_to(np.asarray(sigma, float), shape)
    sel = None if mask is None else np.broadcast_to(np.asarray(mask, bool), shape)
    # in blocks along the first axis: the float64 arithmetic never holds more than _B1_BLOCK voxels at a time
    # (one float64 copy of the images and a dozen float64 volumes would be ~20x the input; same values)
    rows = max(1, _B1_BLOCK // max(1, int(np.prod(shape[1:])))) if shape else 1
    for i0 in range(0, shape[0] if shape else 1, rows):
        part = slice(i0, i0 + rows) if shape else ...
        d = np.asarray(data[part], float)
        m = None if sel is None else sel[part]
        sg = None if sig is None else sig[part]
        if method == "afi":
            tb1[part], se[part], status[part] = afi_b1(d[..., 0], d[..., 1], fa, ratio, mask=m, sigma=sg)
        else:
            tb1[part], se[part], status[part] = dam_b1(d[..., 0], d[..., 1], fa, mask=m, sigma=sg)
    # two images determine B1 exactly (closed form): no residual, so R-squared and the RMS residual are not
    # defined -- written as NaN (see QUALITY_DESCRIPTIONS), not as a perfect fit
    r2 = np.full(status.shape, np.nan, dtype)
    rmse = np.full(status.shape, np.nan, dtype)
    how = ("actual flip-angle imaging (Yarnykh 2007)" if method == "afi"
           else "the double-angle method (Insko & Bolinger 1993)")
    desc = f"relative transmit field B1 (actual / nominal flip angle, 1.0 = nominal) by {how}"
    minfo = {"model": method, "parameters": ["TB1"], "noise_floor": "none",
             "n_fitted": int(np.count_nonzero((status != st.MASKED) & (status != st.NONFINITE)))}
    minfo.update(info or {})
    return MapSet(estimates={"TB1": tb1.astype(dtype, copy=False)}, stderr={"TB1": se.astype(dtype, copy=False)},
                  units={"TB1": "fraction"}, descriptions={"TB1": desc}, time_params=(),
                  quality={"rsquared": r2.astype(dtype, copy=False), "rmse": rmse.astype(dtype, copy=False)},
                  status=status, info=minfo)


class B1ClosedForm:
    """A B1 estimate in closed form from two images, described for ``qmap inspect``.

    Parameters
    ----------
    method : {"afi", "dam"}
    fa : float
        Nominal flip angle ``a``, degrees.
    n : float, optional
        AFI: ``TR2 / TR1``.

    Attributes
    ----------
    varied : str
        BIDS key that labels the two images (``RepetitionTime`` for AFI, ``FlipAngle`` for DAM).
    """

    linear: tuple[str, ...] = ()
    nonlinear = ("TB1",)

    def __init__(self, method: str, fa: float, n: float | None = None):
        if method not in B1_METHODS:
            raise ValueError(f"method {method!r}; expected one of {B1_METHODS}")
        self.name = method
        self.fa = float(fa)
        self.n = None if n is None else float(n)
        self.varied = "RepetitionTime" if method == "afi" else "FlipAngle"

    @classmethod
    def from_provenance(cls, model: dict, acquisition: dict, x=None) -> B1ClosedForm:
        """The estimate a ``qmap b1`` run made, from its provenance ``model`` entry."""
        return cls(model["name"], float(model["nominal_flip_angle_deg"]), model.get("tr_ratio"))

    def voxel_plot(self, y: np.ndarray, tb1: float) -> dict:
        """What :func:`qmap.plots.plot_voxel_fit` draws for one voxel with samples ``y`` (2,) and its TB1.

        DAM: the two signals against the nominal angle with ``S = M0 sin(TB1 x)`` through ``S(a)``
        (full recovery assumed, as the method does; Insko & Bolinger 1993). AFI: the measured ratio
        ``S2/S1`` at the actual angle on the curve ``r = (1 + n cos a)/(n + cos a)`` (Yarnykh 2007).

        Examples
        --------
        >>> d = B1ClosedForm("dam", 30.0).voxel_plot(np.sin(np.radians([33.0, 66.0])), 1.1)
        >>> d["fitted_at_x"].round(6).tolist() == np.sin(np.radians([33.0, 66.0])).round(6).tolist()
        True
        """
        y = np.asarray(y, float)
        if self.name == "dam":
            x = np.array([self.fa, 2.0 * self.fa])
            xf = np.linspace(0.5, 2.5 * self.fa, 400)
            m0 = y[0] / np.sin(np.radians(tb1 * self.fa)) if np.isfinite(tb1) else np.nan
            return {"x": x, "y": y, "x_fine": xf, "curve": m0 * np.sin(np.radians(tb1 * xf)),
                    "fitted_at_x": m0 * np.sin(np.radians(tb1 * x)), "xlabel": "nominal flip angle",
                    "x_unit": "deg", "curve_label": "M0 sin(TB1 x angle), through S(a)"}
        n = float(self.n) if self.n is not None else np.nan
        angle = tb1 * self.fa
        xf = np.linspace(1.0, max(90.0, 1.3 * angle if np.isfinite(angle) else 90.0), 400)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = y[1] / y[0]
        return {"x": np.array([angle]), "y": np.array([r]), "x_fine": xf, "curve": afi_ratio(xf, n),
                "fitted_at_x": np.atleast_1d(afi_ratio(angle, n)), "xlabel": "actual flip angle (ratio S2/S1)",
                "x_unit": "deg", "curve_label": f"r = (1 + n cos a)/(n + cos a), n = {n:.3g}"}


def load_b1_map(
    b1,
    *,
    shape: tuple,
    affine: np.ndarray,
    b1_scale: str | None = None,
    b1_smooth: float | None = None,
    dtype: np.dtype | type = float,
) -> tuple[np.ndarray, dict]:
    """Load a relative B1 map and resample it onto a data grid.

    Parameters
    ----------
    b1 : path-like
        3D NIfTI of relative B1 (actual / nominal angle).
    shape : tuple
        Data grid shape (X, Y, Z).
    affine : (4, 4) ndarray
        Data grid voxel-to-world affine.
    b1_scale : {"fraction", "percent"}, optional
        Units of the map; default from its JSON sidecar ``Units`` when that
        says ``percent`` / ``%``, else fraction.
    b1_smooth : float, optional
        Gaussian smoothing (FWHM, mm) on the map's own grid before resampling.
    dtype : dtype, optional
        Of the returned map (default float64; float32 halves its memory, the values rounded once).

    Returns
    -------
    b1 : (X, Y, Z) ndarray
        Relative B1 (fraction) on the data grid; NaN outside the map's field
        of view and where the map holds no positive finite value.
    info : dict
        What was done, for provenance.

    Notes
    -----
    Zero, negative and non-finite values are "no B1 here" (a relative B1 of
    0 would mean no excitation at all). Smoothing and trilinear resampling
    are normalised by the resampled coverage (value x valid and valid
    interpolated alike, a voxel kept where at least half of its
    interpolation weight is valid), so the edge of a masked B1 map is not
    pulled towards 0. :func:`open_b1_map` gives the same values slab by slab.

    Messages name these arguments (``b1=PATH``, ``b1_scale='percent'``); the command line shows
    its options (``--b1``, ``--b1-scale``, ``--b1-smooth``) instead.
    """
    grid, info = open_b1_map(b1, shape=shape, affine=affine, b1_scale=b1_scale, b1_smooth=b1_smooth)
    b1 = grid.slab(0, grid.shape[2], dtype)
    info["b1_grid_coverage"] = grid.coverage(int(np.count_nonzero(np.isfinite(b1))))
    return b1, info


def open_b1_map(
    b1,
    *,
    shape: tuple,
    affine: np.ndarray,
    b1_scale: str | None = None,
    b1_smooth: float | None = None,
) -> tuple[B1OnGrid, dict]:
    """:func:`load_b1_map` that resamples on demand: the map checked (and smoothed) on its own grid.

    Parameters are those of :func:`load_b1_map`.

    Returns
    -------
    grid : B1OnGrid
        ``grid.slab(z0, z1)`` resamples the slices ``z0:z1`` of the data grid (the values
        :func:`load_b1_map` gives there, bit for bit); ``grid.coverage(n)`` checks the overlap.
    info : dict
        For provenance (without ``b1_grid_coverage``: the caller counts the covered voxels).
    """
    path = Path(b1)
    smooth_fwhm_mm = b1_smooth
    img, data = _load_3d(path, "b1=", "one 3D relative B1 map (for AFI/DAM raw images run qmap b1 first and "
                                      "pass its TB1map)")
    scale, source = _b1_scale(path, b1_scale)
    grid_shape = data.shape
    values = data / 100.0 if scale == "percent" else data  # (float64, read for this call; never written to)
    del data
    nz = values[np.isfinite(values) & (values != 0)]
    med = float(np.median(nz, overwrite_input=True)) if nz.size else float("nan")  # (nz is a copy)
    del nz
    if not med > 0:
        raise InputError(f"b1={path}: median value {med:g} is not positive; a relative B1 map holds values near 1 "
                         f"(fraction) or 100 (percent) -- check the file")
    lo, hi = B1_MEDIAN_RANGE
    if not lo <= med <= hi:
        if scale == "fraction" and med > 10:
            raise InputError(f"b1={path}: median value {med:.4g} is far from 1 -- the map looks like percent; "
                             f"pass b1_scale='percent' (a flip-angle map in degrees must be divided by the nominal "
                             f"angle first)")
        if scale == "percent" and med < 0.05:
            raise InputError(f"b1={path}: with b1_scale='percent' the median is {med:.4g}; the map is already a "
                             f"fraction -- drop b1_scale='percent'")
        raise InputError(f"b1={path}: median relative B1 {med:.4g} ({scale}) is implausible (expected "
                         f"{lo:g}-{hi:g}); check b1_scale={scale!r} and that this is a relative B1 map")
    valid = np.isfinite(values) & (values > 0)
    src_affine = np.asarray(img.affine, float)
    voxel_mm = np.sqrt(np.sum(src_affine[:3, :3] ** 2, axis=0))
    if smooth_fwhm_mm:
        if not np.isfinite(smooth_fwhm_mm) or smooth_fwhm_mm < 0:
            raise UsageError(f"b1_smooth={smooth_fwhm_mm}: give a non-negative FWHM in mm")
        sig = smooth_fwhm_mm / (2.0 * np.sqrt(2.0 * np.log(2.0))) / voxel_mm
        from scipy import ndimage  # imported on use (start-up time)
        sv = ndimage.gaussian_filter(np.where(valid, values, 0.0), sig, mode="constant", cval=0.0)
        sw = ndimage.gaussian_filter(valid.astype(float), sig, mode="constant", cval=0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            values = np.where(valid, sv / sw, np.nan)
    grid = B1OnGrid(values, valid, src_affine, shape, affine,
                    no_overlap=(f"b1={path}: does not overlap the data (its field of view spans "
                                f"{_extent(src_affine, grid_shape)} mm, the series {_extent(affine, shape)} mm in "
                                f"world coordinates); is it from another session or coordinate frame?"))
    info = {
        "b1": str(path.absolute()),
        "b1_scale": scale,
        "b1_scale_source": source,
        "b1_smooth_fwhm_mm": float(smooth_fwhm_mm) if smooth_fwhm_mm else None,
        "b1_grid": [int(s) for s in grid_shape],
        "b1_voxel_mm": [round(float(v), 4) for v in voxel_mm],
        "b1_median": med,
        "b1_resampling": "trilinear through the affines, normalised by coverage",
    }
    return grid, info


class B1OnGrid:
    """A map on its own grid (a B1 map or its standard error), resampled onto a data grid slab by slab.

    Trilinear through the two affines, normalised by the resampled coverage of ``valid`` (a voxel is kept,
    NaN elsewhere, where at least half of its interpolation weight is valid, so the edge of a masked map is
    not pulled towards 0). The resampling is pointwise (each data voxel's source coordinates, then the
    interpolation at them): :meth:`slab` gives each voxel the value the whole grid gives it, so a run that
    resamples one slab at a time holds only that slab.

    Parameters
    ----------
    values : (I, J, K) ndarray
        The map on its grid (float; invalid voxels may hold anything).
    valid : (I, J, K) bool ndarray
    src_affine : (4, 4) ndarray
        Its voxel-to-world affine.
    shape, affine
        The data grid (X, Y, Z) and its affine.
    no_overlap : str
        The message of :meth:`coverage` when no data voxel is covered.
    """

    def __init__(self, values: np.ndarray, valid: np.ndarray, src_affine: np.ndarray, shape: tuple,
                 affine: np.ndarray, no_overlap: str = "the map does not overlap the data"):
        valid = np.asarray(valid, bool)
        self.values = np.where(valid, values, 0.0)  # (float64: as resample_blocks interpolates)
        self.weights = valid.astype(float)
        self.src_affine = np.asarray(src_affine, float)
        self.shape = tuple(int(s) for s in shape[:3])
        self.affine = np.asarray(affine, float)
        self.no_overlap = no_overlap

    def slab(self, z0: int, z1: int, dtype: np.dtype | type = float) -> np.ndarray:
        """The map on the data grid's slices ``z0:z1``: (X, Y, z1 - z0), NaN where not covered."""
        shape = (self.shape[0], self.shape[1], z1 - z0)
        out = np.empty(int(np.prod(shape)), dtype)
        # block by block, the map and its coverage at the same coordinates (qmap.io.nifti.resample_blocks_of):
        # never the coordinates or the two resampled images whole
        for start, (rv, rw) in resample_blocks_of([self.values, self.weights], self.src_affine, self.shape,
                                                  self.affine, order=1, cval=np.nan, z=(z0, z1)):
            with np.errstate(divide="ignore", invalid="ignore"):
                out[start:start + rv.size] = np.where(rw >= 0.5, rv / rw, np.nan)
        return out.reshape(shape)

    def coverage(self, covered: int) -> float:
        """The fraction of the data grid covered, from the number of voxels :meth:`slab` gave a value.

        Raises
        ------
        InputError
            No voxel is covered (the map is elsewhere in world coordinates).
        """
        if covered <= 0:
            raise InputError(self.no_overlap)
        return covered / float(np.prod(self.shape))


def _load_3d(path: Path, argument: str, expected: str) -> tuple[SpatialImage, np.ndarray]:
    """The image and data of a 3D map given as ``argument`` (``"b1="``; a 4D file of one volume is taken as 3D)."""
    img = load_image(path, what=argument)
    data = image_data(img, path)
    if data.ndim == 4 and data.shape[3] == 1:
        data = data[..., 0]
    if data.ndim != 3:
        raise InputError(f"{argument}{path}: has shape {data.shape}, expected {expected}")
    return img, data


def b1_stderr_beside(b1_path) -> Path | None:
    """The standard-error map that ``qmap b1`` writes beside its TB1map (``{prefix}_desc-stderr_TB1map``), if any."""
    from .io.writer import stderr_map_beside

    return stderr_map_beside(b1_path)


def load_b1_stderr(b1_se, *, shape: tuple, affine: np.ndarray, b1_scale: str = "fraction") -> tuple[np.ndarray, dict]:
    """Load the standard error of a relative B1 map and resample it onto a data grid.

    Parameters
    ----------
    b1_se : path-like
        3D NIfTI of the B1 map's standard error, in the units of the map.
    shape, affine
        Data grid (as :func:`load_b1_map`).
    b1_scale : {"fraction", "percent"}
        Units of the B1 map it belongs to (percent is divided by 100).

    Returns
    -------
    se : (X, Y, Z) ndarray
        Standard error (fraction) on the data grid, trilinear; NaN where the
        map holds no finite non-negative value (nothing is added there).
    info : dict
        For provenance.

    Messages name the argument (``b1_se=PATH``; on the command line ``--b1-stderr``).
    :func:`open_b1_stderr` gives the same values slab by slab.
    """
    grid, info = open_b1_stderr(b1_se, shape=shape, affine=affine, b1_scale=b1_scale)
    return grid.slab(0, grid.shape[2]), info


def open_b1_stderr(b1_se, *, shape: tuple, affine: np.ndarray, b1_scale: str = "fraction") -> tuple[B1OnGrid, dict]:
    """:func:`load_b1_stderr` that resamples on demand (:class:`B1OnGrid`; same parameters and checks)."""
    path = Path(b1_se)
    scale = b1_scale
    img, data = _load_3d(path, "b1_se=", "one 3D standard-error map")
    values = data / 100.0 if scale == "percent" else data.astype(float, copy=True)
    valid = np.isfinite(values) & (values >= 0)
    if not valid.any():
        raise InputError(f"b1_se={path}: holds no finite non-negative value; give the B1 map's standard "
                         f"error (e.g. the desc-stderr TB1map of qmap b1) or b1_se='none'")
    med = float(np.median(values[valid]))
    if med > 0.5:
        raise InputError(f"b1_se={path}: median {med:.3g} ({scale}) is not a plausible standard error of a "
                         f"relative B1 map (expected about 0.005-0.1); is it the B1 map itself, or percent?")
    src_affine = np.asarray(img.affine, float)
    grid = B1OnGrid(values, valid, src_affine, shape, affine)
    return grid, {"b1_stderr_median": med, "b1_stderr_resampling": "trilinear through the affines"}


#: sidecar ``Units`` of a B1 map (lower case, stripped) -> its scale
B1_UNITS = {"fraction": "fraction", "ratio": "fraction", "1": "fraction", "": "fraction",
            "percent": "percent", "%": "percent", "pct": "percent"}


def b1_units_scale(units: object) -> str | None:
    """The scale (``"fraction"``, 1 = nominal, or ``"percent"``, 100 = nominal) a B1 sidecar's ``Units`` names.

    The one reader of B1 ``Units`` (the fits and batch's planning). None when ``units`` is not a
    string or names neither scale.

    Examples
    --------
    >>> b1_units_scale(" Percent"), b1_units_scale("1"), b1_units_scale("Hz")
    ('percent', 'fraction', None)
    """
    return B1_UNITS.get(units.strip().lower()) if isinstance(units, str) else None


def _b1_scale(path: Path, scale: str | None) -> tuple[str, str]:
    units = read_sidecar(path).get("Units")
    side = b1_units_scale(units)
    if scale is not None:
        if scale not in B1_SCALES:
            raise UsageError(f"b1_scale={scale!r}: expected fraction or percent")
        if side is not None and side != scale:
            warn(f"b1_scale={scale!r} differs from the B1 sidecar Units {units!r}; using b1_scale={scale!r}")
        return scale, "command line"
    if side is not None:
        return side, f"sidecar Units {units!r}"
    return "fraction", "default"


def _extent(affine, shape) -> str:
    corners = np.array([[i, j, k, 1.0] for i in (-0.5, shape[0] - 0.5) for j in (-0.5, shape[1] - 0.5)
                        for k in (-0.5, shape[2] - 0.5)])
    w = (np.asarray(affine, float) @ corners.T)[:3]
    return " ".join(f"{a:.0f}..{b:.0f}" for a, b in zip(w.min(axis=1), w.max(axis=1)))
