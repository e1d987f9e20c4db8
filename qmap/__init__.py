"""qmap: quantitative MRI relaxometry maps (T1, T2, T2*, B1) with uncertainties and phantom QA.

Array-level API (numpy in, named maps out)::

    maps = qmap.fit_t2star(data, te, noise_floor="rician", sigma=5.0)
    maps["T2star"], maps.stderr["T2star"], maps.quality["rsquared"], maps.status

File-level workflows (one per command) live in :mod:`qmap.workflows`.
"""

__version__ = "0.1.0"

from .errors import InputError, QmapError, UsageError

_API = {"b1_maps", "fit_decay", "fit_t1_ir", "fit_t1_vfa", "fit_t2", "fit_t2star"}


def __getattr__(name):  # entry points are imported on first use (keeps `qmap --version` fast)
    if name in _API:
        from . import api

        return getattr(api, name)
    if name in ("MapSet", "fit_volume"):
        from . import maps

        return getattr(maps, name)
    if name == "run_batch":
        from .batch import run_batch

        return run_batch
    if name == "plan":  # protocol design (qmap plan); the module is qmap.planning
        from .planning import plan

        return plan
    if name == "run_phantom":
        from .workflows.phantom import run_phantom

        return run_phantom
    raise AttributeError(f"module 'qmap' has no attribute {name!r}")

__all__ = [
    "InputError",
    "MapSet",
    "QmapError",
    "UsageError",
    "__version__",
    "b1_maps",
    "fit_decay",
    "fit_t1_ir",
    "fit_t1_vfa",
    "fit_t2",
    "fit_t2star",
    "fit_volume",
    "plan",
    "run_batch",
    "run_phantom",
]
