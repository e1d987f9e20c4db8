"""ROI statistics and the tolerance verdict of one vial and parameter.

The percent error compares the ROI **median** with the reference::

    error_pct = 100 (median - reference) / reference

The median is used rather than the mean because a few voxels that a fit
pushed to a bound, an air bubble or a residual edge voxel move the mean of a
small ROI by several percent but leave the median almost unchanged. The mean
is reported beside it; a large mean-median gap points at such voxels.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import stats as sps

__all__ = ["ERROR_BASIS", "RoiResult", "ValueSummary", "roi_statistics", "summarise"]

#: Which ROI statistic the percent error and the verdict use.
ERROR_BASIS = "median"


@dataclass
class ValueSummary:
    """Summary statistics of the finite values of one ROI (the one implementation ``roi`` and ``phantom`` share).

    ``sd`` uses ddof=1; ``robust_sd`` is 1.4826 x the median absolute deviation
    (consistent with the sd for Gaussian values -- common practice); ``p5`` and
    ``p95`` are the 5th and 95th percentiles (numpy's default linear
    interpolation). ``n_voxels`` counts the finite values used, ``n_nonfinite``
    the values skipped because they are NaN / inf. Statistics of an empty set
    are NaN; the spreads of a single value are NaN.
    """

    n_voxels: int
    n_nonfinite: int
    mean: float
    median: float
    sd: float
    robust_sd: float
    p5: float
    p95: float


def summarise(values: np.ndarray) -> ValueSummary:
    """Summary statistics of ``values`` (any shape; non-finite values are skipped and counted)."""
    v = np.asarray(values, float).ravel()
    finite = v[np.isfinite(v)]
    n = int(finite.size)
    nan = math.nan
    if n:
        p5, med, p95 = (float(x) for x in np.percentile(finite, [5, 50, 95]))
    else:
        p5 = med = p95 = nan
    return ValueSummary(
        n_voxels=n, n_nonfinite=int(v.size - n),
        mean=float(finite.mean()) if n else nan, median=med,
        sd=float(finite.std(ddof=1)) if n > 1 else nan,
        robust_sd=float(sps.median_abs_deviation(finite, scale="normal")) if n > 1 else nan,
        p5=p5, p95=p95,
    )


@dataclass
class RoiResult:
    """Statistics of one vial x parameter, in the reference column's unit.

    ``robust_sd`` is 1.4826 x the median absolute deviation (consistent with
    the sd for Gaussian values -- common practice). ``n_voxels`` counts the
    finite voxels used; ``n_nonfinite`` the ROI voxels skipped because the map
    is NaN / inf there (e.g. failed fits). ``pass_`` requires ``n_voxels >=
    min_voxels`` and ``|error_pct| <= tolerance_pct``.
    """

    label: int
    name: str
    parameter: str
    unit: str
    reference: float
    mean: float
    median: float
    sd: float
    robust_sd: float
    n_voxels: int
    n_nonfinite: int
    error_pct: float
    tolerance_pct: float
    too_small: bool
    pass_: bool
    map: str = ""
    #: mean of the standard-error map over the same voxels (NaN when no standard-error map was found):
    #: about the SD when the spread in the ROI is noise only
    mean_se: float = math.nan
    n_excluded: int = 0  # ROI voxels left out because qmap's status map beside the map says "not fitted"
    source: str = ""  # the map's --tag (tells two maps of one parameter apart), "" without one

    @property
    def key(self) -> str:
        """``T1``, or ``T1 (ir)`` for a tagged map."""
        return f"{self.parameter} ({self.source})" if self.source else self.parameter

    def as_dict(self) -> dict:
        d = asdict(self)
        d["pass"] = d.pop("pass_")
        return {k: (None if isinstance(v, float) and not math.isfinite(v) else v) for k, v in d.items()}


def roi_statistics(values: np.ndarray, *, label: int, name: str, parameter: str, unit: str, reference: float,
                   tolerance_pct: float, min_voxels: int, map_name: str = "",
                   stderr_values: np.ndarray | None = None) -> RoiResult:
    """Statistics of the voxel ``values`` of one ROI (already in ``unit``) against ``reference``.

    Parameters
    ----------
    values : (n,) ndarray
        Map values inside the (eroded) ROI, in the reference's unit; non-finite ones are skipped.
    reference : float
        Reference value (same unit), > 0.
    tolerance_pct : float
        Allowed absolute percent error of the median.
    min_voxels : int
        Fewer finite voxels than this fail the vial (too small to judge).
    stderr_values : (n,) ndarray, optional
        The map's standard errors at the same voxels (same unit); their mean
        over the voxels with a finite value and standard error is ``mean_se``.
    """
    s = summarise(values)
    n = s.n_voxels
    err = 100.0 * (s.median - reference) / reference if n else math.nan
    too_small = n < min_voxels
    ok = (not too_small) and math.isfinite(err) and abs(err) <= tolerance_pct
    mean_se = math.nan
    if stderr_values is not None:
        se = np.asarray(stderr_values, float).ravel()
        v = np.asarray(values, float).ravel()
        se = se[np.isfinite(v) & np.isfinite(se)]
        mean_se = float(se.mean()) if se.size else math.nan
    return RoiResult(int(label), name, parameter, unit, float(reference), s.mean, s.median, s.sd, s.robust_sd, n,
                     s.n_nonfinite, err, float(tolerance_pct), too_small, bool(ok), map_name, mean_se)
