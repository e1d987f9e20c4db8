"""``qmap batch``: fit every relaxometry series of a BIDS dataset into a derivatives folder.

Modules: :mod:`~qmap.batch.plan` (discovery of the series and the fit chosen
for each), :mod:`~qmap.batch.series` (one series: up to date? if not, fit it --
the unit of work shipped to workers) and :mod:`~qmap.batch.run` (the run over
all series, locally or on a Dask cluster, and its report).
"""

from __future__ import annotations

from .plan import FIT_KINDS, BatchPlan, FitKind, SeriesPlan, discover, parse_bids_name
from .run import BATCH_OPTIONS, BIDS_VERSION, BatchReport, dataset_description, fit_options, run_batch
from .series import SeriesResult, equivalent_argv, run_series, series_state

__all__ = ["BATCH_OPTIONS", "BIDS_VERSION", "FIT_KINDS", "BatchPlan", "BatchReport", "FitKind", "SeriesPlan", "SeriesResult",
           "dataset_description", "discover", "equivalent_argv", "fit_options", "parse_bids_name", "run_batch", "run_series",
           "series_state"]
