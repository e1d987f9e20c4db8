"""The per-voxel status codes as seen from the fitting layer: they live in :mod:`qmap.status`.

Kept so that ``from qmap.fitting import status`` goes on working; new code imports :mod:`qmap.status`.
"""

from __future__ import annotations

from ..status import *
from ..status import __all__  # noqa: F401
