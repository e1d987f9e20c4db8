"""One exception family for everything the user can fix.

Every message names what was found, what was expected and how to fix it. The
command line maps :class:`QmapError` (and its subclasses) to exit code 2 and
prints the message as one line; anything else is a bug (exit code 1).
"""

from __future__ import annotations

__all__ = [
    "InputError",
    "OutputError",
    "OutputExistsError",
    "QmapError",
    "UsageError",
]


class QmapError(Exception):
    """Base class: bad usage or bad input the user can correct (exit code 2)."""


class InputError(QmapError):
    """An input file, sidecar or value is unreadable, inconsistent or implausible."""


class UsageError(QmapError):
    """Options that contradict each other or are missing."""


class OutputExistsError(QmapError):
    """Outputs exist already and ``--overwrite`` was not given."""


class OutputError(QmapError):
    """The outputs cannot be written (permissions, disk full, ...)."""
