"""Signal models, one module each; the registry below lists them for the CLI, inspect and the contract test."""

from __future__ import annotations

import importlib

__all__ = ["REGISTRY", "model_class"]

#: model name (as recorded in provenance) -> "module:Class"
REGISTRY = {
    "monoexp": "qmap.models.monoexp:MonoExponential",
    "ir": "qmap.models.ir:InversionRecovery",
    "vfa": "qmap.models.vfa:SpoiledGRE",
    "epg_t2": "qmap.models.epg_t2:EpgT2",
}


def model_class(name: str):
    """The model class registered under ``name``."""
    module, cls = REGISTRY[name].split(":")
    return getattr(importlib.import_module(module), cls)
