"""Phantom quality assurance: reference tables, ROIs, statistics, layout matching, report and history.

The command ``qmap phantom`` (:func:`qmap.workflows.phantom.run_phantom`) ties these together:

- :mod:`.reference` -- the reference CSV and its temperature interpolation
- :mod:`.inputs` -- maps (parameter, unit) and integer label images
- :mod:`.rois`, :mod:`.stats` -- eroded ROIs and their statistics / verdict
- :mod:`.detect`, :mod:`.register`, :mod:`.layout` -- ROI placement from a vial layout
- :mod:`.figures`, :mod:`.report`, :mod:`.results`, :mod:`.compose` -- the outputs
- :mod:`.history`, :mod:`.session` -- the session history and drift detection
"""

from .reference import ReferenceEntry, ReferenceTable, parse_reference, read_reference
from .stats import ERROR_BASIS, RoiResult, roi_statistics

__all__ = [
           "ERROR_BASIS",
           "ReferenceEntry",
           "ReferenceTable",
           "RoiResult",
           "parse_reference",
           "read_reference",
           "roi_statistics",
]
