"""What a fitting run records about itself: when, with which versions, and the warnings it gave.

The provenance's top-level keys are fixed, so this goes into
``options["run"]`` of ``{prefix}_provenance.json``::

    "run": {"date": "2026-12-04T20:15:03+00:00",
            "versions": {"qmap": ..., "python": ..., "numpy": ..., "scipy": ..., "nibabel": ...},
            "warnings": ["--te disagrees with the sidecar EchoTime ...", ...]}

``warnings`` holds every warning the run issued (:func:`qmap.errors.warn`;
the same lines as on stderr: sidecar / command-line disagreements, volumes
re-sorted, fallbacks) up to the moment the provenance was written. A workflow
function decorated with :func:`recorded` collects them for its own thread
(nested runs and concurrent batch threads each get their own list).
"""

from __future__ import annotations

import datetime as dt
import functools
import platform
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TypeVar, cast

from .errors import collecting_warnings

__all__ = ["recorded", "recording", "run_record"]

_local = threading.local()
F = TypeVar("F", bound=Callable[..., Any])


@contextmanager
def recording() -> Iterator[list[str]]:
    """Collect the warnings this thread issues inside the block (a list, filled as they come; still shown)."""
    with collecting_warnings() as mine:
        _local.__dict__.setdefault("open", []).append(mine)
        try:
            yield mine
        finally:
            _local.open.remove(mine)


def recorded(fn: F) -> F:
    """Decorator: run ``fn`` inside :func:`recording`, so that its provenance lists its warnings."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        with recording():
            return fn(*args, **kwargs)

    return cast(F, wrapper)  # functools.wraps keeps fn's signature


def versions() -> dict[str, str]:
    """Versions of qmap, Python and the numerical libraries a result depends on."""
    import nibabel
    import numpy
    import scipy

    from . import __version__

    return {"qmap": __version__, "python": platform.python_version(), "numpy": numpy.__version__,
            "scipy": scipy.__version__, "nibabel": nibabel.__version__}


def run_record() -> dict:
    """``{"date", "versions", "warnings"}`` of the current run (the innermost open recording's warnings).

    ``date`` is the time of writing, ISO 8601 in UTC.
    """
    opened = getattr(_local, "open", None) or [[]]
    return {"date": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"), "versions": versions(),
            "warnings": list(dict.fromkeys(" ".join(w.split()) for w in opened[-1]))}
