"""Signal models, one module each; the registry below lists them for the CLI, inspect and the contract test.

A fit records its model's ``name`` and settings in the provenance; :func:`model_class` maps the name back
to the class, whose ``from_provenance`` rebuilds the model (``qmap inspect`` redraws any fit that way), and
:func:`model_kind` says how it was estimated, which decides how ``inspect`` draws a voxel:

* :data:`REGISTRY` -- ``"fitted"``: separable least-squares models (the fitted curve through the samples);
* :data:`CLOSED_FORMS` -- ``"closed_form"``: estimates computed in closed form from two images (B1 by AFI
  or the double-angle method; the relation that was inverted);
* :data:`LOOKUPS` -- ``"lookup"``: a signal model inverted through a table (MP2RAGE: UNI against T1 at the
  voxel's B1);
* :data:`SPECTRA` -- ``"spectrum"``: a non-negative spectrum over a basis (multi-component T2: the
  echo train and the spectrum read from the maps).
"""

from __future__ import annotations

import importlib

__all__ = ["ALIASES", "CLOSED_FORMS", "KINDS", "LOOKUPS", "REGISTRY", "SPECTRA", "model_class", "model_kind"]

#: model name (as recorded in provenance) -> "module:Class"
REGISTRY = {
    "monoexp": "qmap.models.monoexp:MonoExponential",
    "ir": "qmap.models.ir:InversionRecovery",
    "vfa": "qmap.models.vfa:SpoiledGRE",
    "epg_t2": "qmap.models.epg_t2:EpgT2",
}

#: closed-form estimates (provenance name -> "module:Class")
CLOSED_FORMS = {
    "afi": "qmap.b1:B1ClosedForm",
    "dam": "qmap.b1:B1ClosedForm",
}

#: models inverted through a lookup table (provenance name -> "module:Class")
LOOKUPS = {
    "mp2rage": "qmap.models.mp2rage:MP2RAGEProtocol",
}

#: non-negative spectra over a basis (provenance name -> "module:Class")
SPECTRA = {
    "t2spectrum": "qmap.models.t2_spectrum:SpectrumModel",
}

#: the tables above by kind
KINDS = {"fitted": REGISTRY, "closed_form": CLOSED_FORMS, "lookup": LOOKUPS, "spectrum": SPECTRA}

#: names written by earlier versions -> current name
ALIASES = {"spgr": "vfa"}


def model_class(name: str):
    """The class registered under ``name`` (a fitted model or a closed form); KeyError if none is.

    Examples
    --------
    >>> model_class("vfa").__name__, model_class("spgr").__name__, model_class("dam").__name__
    ('SpoiledGRE', 'SpoiledGRE', 'B1ClosedForm')
    >>> model_class("mp2rage").__name__
    'MP2RAGEProtocol'
    """
    name = ALIASES.get(name, name)
    module, cls = _entry(name).split(":")
    return getattr(importlib.import_module(module), cls)


def model_kind(name: str) -> str:
    """How the model registered under ``name`` is estimated (a key of :data:`KINDS`); KeyError if none is.

    Examples
    --------
    >>> model_kind("monoexp"), model_kind("dam"), model_kind("mp2rage"), model_kind("t2spectrum")
    ('fitted', 'closed_form', 'lookup', 'spectrum')
    """
    name = ALIASES.get(name, name)
    _entry(name)
    return next(kind for kind, table in KINDS.items() if name in table)


def _entry(name: str) -> str:
    for table in KINDS.values():
        if name in table:
            return table[name]
    raise KeyError(name)
