"""Parameter descriptions shared by several docstrings, written once.

Where several functions take a parameter with the same meaning (the series and the common options
of the fitting commands, the array API's ``mask`` and ``**execution``, the noise estimators'
``source``, ...), its numpydoc entry lives here, in :data:`PARAMETERS`, and each function names the
entries it takes with the :func:`shared_parameters` decorator. The decorator puts them into the
function's ``Parameters`` section, in the order of the signature, when the module is imported:
``help()``, the doctests and any documentation tool see the full docstring. This is the habit of
scipy (``scipy._lib.doccer``) and matplotlib (``matplotlib._docstring``).

A name that :data:`PARAMETERS` does not hold, or a docstring without a ``Parameters`` section, is an
error at import time, so neither can slip through.

Examples
--------
>>> @shared_parameters("mask")
... def f(data, mask=None):
...     '''Do something.
...
...     Parameters
...     ----------
...     data : ndarray
...         The data.
...     '''
>>> print("\\n".join(line.strip() for line in f.__doc__.strip().splitlines()[3:]))
----------
data : ndarray
The data.
mask : (...) array_like of bool, optional
Voxels to fit (default: all).
"""

from __future__ import annotations

import inspect
import re
from collections.abc import Callable
from typing import TypeVar

__all__ = ["PARAMETERS", "keys_section", "shared_parameters"]

F = TypeVar("F", bound=Callable)

#: numpydoc entries (the name line, then the description indented by four spaces), by name
PARAMETERS: dict[str, str] = {
    # the file-based workflows (qmap.workflows.*.run_*)
    "inputs": """inputs : list of path-like
    The series: one 4D NIfTI or several 3D NIfTIs, one volume per value of the varied acquisition
    parameter (echo time, inversion time, flip angle).""",
    "common": """common : CommonOptions
    The options every fitting command shares: output folder, prefix, mask, workers, memory budget,
    ... (see :class:`~qmap.pipeline.CommonOptions`).""",
    # the array API (qmap.api, qmap.workflows.*.fit_*)
    "mask": """mask : (...) array_like of bool, optional
    Voxels to fit (default: all).""",
    "execution": """**execution
    :class:`~qmap.maps.Execution` options: ``n_jobs``, ``engine``, ``chunk_size``, ``scheduler``.""",
    "decay_options": """**options
    The keyword options of :class:`~qmap.workflows.decay.DecayOptions` (the fit) and
    :class:`~qmap.maps.Execution` (how it runs); see Other Parameters.""",
    # the noise-level estimators (qmap.noise_level)
    "source": """source : VolumeSource
    The series (a :class:`~qmap.io.series.Series` or an :class:`ArraySource`).""",
    "max_bytes": """max_bytes : float, optional
    Memory budget (bytes) for reading the series, which is read slab by slab within it.""",
}

_HEADER = re.compile(r"^(?P<indent>[ \t]*)Parameters[ \t]*\n(?P=indent)-{3,}[ \t]*$", re.MULTILINE)


def _names(entry_line: str) -> list[str]:
    """The parameter names an entry's first line documents (``a, b : float`` -> a, b; ``**kw`` -> kw)."""
    return [n.strip().lstrip("*") for n in entry_line.split(" : ")[0].split(",")]


def _split(doc: str) -> tuple[str, str, list[str], list[str]]:
    """``doc`` cut around its Parameters section: (text up to the section, base indent, section lines, rest)."""
    m = _HEADER.search(doc)
    if m is None:
        raise ValueError("shared_parameters: the docstring has no numpydoc 'Parameters' section")
    indent = m.group("indent")
    lines = doc[m.end() + 1:].split("\n")
    # the section runs to the next section header (a line at the base indent underlined by dashes) or the end
    end = len(lines)
    for i in range(len(lines) - 1):
        if lines[i].startswith(indent) and re.fullmatch(re.escape(indent) + r"-{3,}[ \t]*", lines[i + 1]):
            end = i
            break
    while end > 0 and not lines[end - 1].strip():
        end -= 1
    return doc[: m.end() + 1], indent, lines[:end], lines[end:]


def _insert(section: list[str], indent: str, names: tuple[str, ...], order: list[str]) -> None:
    """Put the entries ``PARAMETERS[name]`` into the Parameters ``section`` (lines) by the signature ``order``."""

    def rank(name: str) -> int:
        return order.index(name) if name in order else len(order)

    for key in names:
        text = PARAMETERS[key].split("\n")
        at_rank = min(rank(n) for n in _names(text[0]))
        at = len(section)
        for i, line in enumerate(section):
            starts_entry = line.startswith(indent) and line.strip() and not line[len(indent)].isspace()
            if starts_entry and min(rank(n) for n in _names(line.strip())) > at_rank:
                at = i
                break
        section[at:at] = [indent + t if t else t for t in text]


def keys_section(cls: type) -> list[str]:
    """The lines (dedented) of the ``Keys`` section of a TypedDict's docstring: its keys as numpydoc entries."""
    lines = inspect.cleandoc(cls.__doc__ or "").splitlines()
    for i in range(len(lines) - 1):
        if lines[i] == "Keys" and re.fullmatch(r"-{3,}", lines[i + 1]):
            body = []
            for j in range(i + 2, len(lines)):
                if j + 1 < len(lines) and lines[j] and not lines[j][0].isspace() and re.fullmatch(r"-{3,}",
                                                                                                 lines[j + 1]):
                    break
                body.append(lines[j])
            while body and not body[-1].strip():
                body.pop()
            return body
    raise ValueError(f"shared_parameters: {cls.__name__} has no 'Keys' section in its docstring")


def shared_parameters(*names: str, keys: tuple[type, ...] = ()) -> Callable[[F], F]:
    """Decorator: add shared entries to the function's docstring.

    Parameters
    ----------
    *names : str
        Keys of :data:`PARAMETERS`; each entry goes into the ``Parameters`` section before the first
        documented parameter that follows it in the signature (after the last one if none does).
    keys : tuple of TypedDict classes
        The option sets the function takes as ``**kwargs``: the entries of their docstrings' ``Keys``
        sections, in this order, become an ``Other Parameters`` section after ``Parameters`` (numpydoc's
        place for keyword arguments that are not in the signature).

    Raises
    ------
    KeyError
        A name that :data:`PARAMETERS` does not hold.
    ValueError
        A docstring without a ``Parameters`` section, or a class in ``keys`` without a ``Keys`` section.
    """
    unknown = [n for n in names if n not in PARAMETERS]
    if unknown:
        raise KeyError(f"shared_parameters: no entry {unknown} in qmap.docstrings.PARAMETERS")
    other = [line for cls in keys for line in keys_section(cls)]

    def decorate(func: F) -> F:
        head, indent, section, rest = _split(func.__doc__ or "")
        _insert(section, indent, names, list(inspect.signature(func).parameters))
        if other:
            section += ["", indent + "Other Parameters", indent + "-" * len("Other Parameters")]
            section += [indent + line if line else line for line in other]
        func.__doc__ = head + "\n".join(section + rest)
        return func

    return decorate
