"""Signal models, one module each; the registry below lists them for the CLI, inspect and the contract test.

A fit records its model's ``name`` and settings in the provenance; :func:`model_class` maps the name back
to the class, whose ``from_provenance`` rebuilds the model (``qmap inspect`` redraws any fit that way).
:data:`REGISTRY` holds the fitted (separable least-squares) models; :data:`CLOSED_FORMS` the estimates
computed in closed form from two images (B1 by AFI or the double-angle method), which have no fitted
curve but are rebuilt the same way.
"""

from __future__ import annotations

import importlib

__all__ = ["ALIASES", "CLOSED_FORMS", "REGISTRY", "model_class"]

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

#: names written by earlier versions -> current name
ALIASES = {"spgr": "vfa"}


def model_class(name: str):
    """The class registered under ``name`` (a fitted model or a closed form); KeyError if none is.

    Examples
    --------
    >>> model_class("vfa").__name__, model_class("spgr").__name__, model_class("dam").__name__
    ('SpoiledGRE', 'SpoiledGRE', 'B1ClosedForm')
    """
    name = ALIASES.get(name, name)
    module, cls = (REGISTRY.get(name) or CLOSED_FORMS[name]).split(":")
    return getattr(importlib.import_module(module), cls)
