"""One exception family for everything the user can fix, and one warning category.

Every message names what was found, what was expected and how to fix it. The
command line maps :class:`QmapError` (and its subclasses) to exit code 2 and
prints the message as one line; anything else is a bug (exit code 1).

Warnings -- the run goes on, but the user should know (a sidecar disagrees with
the command line, volumes were re-sorted, a B1 unit was overridden) -- are
issued with :func:`warn`, i.e. :func:`warnings.warn` with the category
:class:`QmapWarning`. A library caller filters them like any Python warning
(``warnings.simplefilter("ignore", QmapWarning)``, or ``"error"`` to make them
exceptions); the command line prints each as one line ``qmap: warning: ...``
on stderr. :func:`collecting_warnings` gathers the warnings issued in the
current thread (e.g. one series of a batch run), with or without also showing
them.
"""

from __future__ import annotations

import threading
import warnings
from collections.abc import Iterator
from contextlib import contextmanager

__all__ = [
    "InputError",
    "OutputError",
    "OutputExistsError",
    "QmapError",
    "QmapWarning",
    "UsageError",
    "collecting_warnings",
    "warn",
]


class QmapError(Exception):
    """Base class: bad usage or bad input the user can correct (exit code 2)."""


class InputError(QmapError, ValueError):
    """An input file, sidecar or value is unreadable, inconsistent or implausible."""


class UsageError(QmapError):
    """Options that contradict each other or are missing."""


class OutputExistsError(QmapError):
    """Outputs exist already and ``--overwrite`` was not given."""


class OutputError(QmapError):
    """The outputs cannot be written (permissions, disk full, ...)."""


class QmapWarning(UserWarning):
    """The run went on, but something deserves the user's attention (see the module docstring)."""


_local = threading.local()


def warn(message: str, *, stacklevel: int = 2) -> None:
    """Issue a :class:`QmapWarning` (and hand it to the current thread's collectors).

    Parameters
    ----------
    message : str
        One line: what was found and what qmap did about it.
    stacklevel : int
        As for :func:`warnings.warn` (2: the caller of ``warn``).

    Examples
    --------
    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as seen:
    ...     warnings.simplefilter("always")
    ...     warn("volumes were re-sorted")
    >>> seen[0].category.__name__, str(seen[0].message)
    ('QmapWarning', 'volumes were re-sorted')
    """
    show = True
    for sink, emit in getattr(_local, "sinks", ()):
        sink.append(message)
        show = show and emit
    if show:
        warnings.warn(message, QmapWarning, stacklevel=stacklevel + 1)


@contextmanager
def collecting_warnings(*, emit: bool = True) -> Iterator[list[str]]:
    """Collect the messages of the :func:`warn` calls made by this thread inside the block.

    Thread-safe (each thread has its own collectors), unlike
    :class:`warnings.catch_warnings`.

    Parameters
    ----------
    emit : bool
        Also issue each warning as usual (False: only collect it).

    Yields
    ------
    list of str
        The messages, in order; filled while the block runs.
    """
    sinks = _local.__dict__.setdefault("sinks", [])
    entry: tuple[list[str], bool] = ([], emit)
    sinks.append(entry)
    try:
        yield entry[0]
    finally:
        for i, e in enumerate(sinks):
            if e is entry:
                del sinks[i]
                break
