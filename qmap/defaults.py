"""Option choices and defaults that the command line shows in ``--help``.

This module imports no numpy (only the model registry, which is plain data): the command-line parser
reads its choices and defaults from here, so that ``qmap COMMAND --help`` starts in a fraction of a
second; the library modules that use these values import them from here too (one definition each).
The model choices (``B1_METHODS``, ``VFA_METHODS``) are the registry's (:data:`qmap.models.COMMAND_MODELS`).
"""

from __future__ import annotations

from .models import COMMAND_MODELS

__all__ = [
    "B1_METHODS",
    "B1_SCALES",
    "DEFAULT_CHUNK",
    "DEFAULT_NOISE_MODE",
    "DEFAULT_REFOCUS",
    "DEFAULT_T1",
    "EXPONENTIAL_CHUNK",
    "IR_SIGNALS",
    "NOISE_MODES",
    "T1_TYPICAL",
    "VFA_METHODS",
]

#: voxels per work unit of the fitting engine (results do not depend on it)
DEFAULT_CHUNK = 8192
#: ... for a one-exponential fit (t2star, t2 without EPG; no noise floor or the Rician one: qmap.fitting.problem.
#: lean_fit), whose solver (Newton on the rate) holds a few arrays
#: of the chunk: twice the voxels halve the per-chunk Python work (about 0.8 ms a chunk; 7 % of a 1M-voxel
#: t2star run on two cores, measured) for 3 MB more memory, where other fits' work arrays would take 30 MB more
EXPONENTIAL_CHUNK = 16384
#: noise-floor handling of magnitude data (t2, t2star)
NOISE_MODES = ("none", "offset", "truncate", "rician")
#: default for t2 and t2star: the mode that stays unbiased on low-SNR magnitude data
DEFAULT_NOISE_MODE = "rician"
#: inversion-recovery signal types
IR_SIGNALS = ("magnitude", "real", "complex")
#: B1 mapping methods (actual flip angle imaging, double angle method): the models of qmap b1
B1_METHODS: tuple[str, ...] = COMMAND_MODELS["b1"].values
#: how a B1 map stores actual / nominal angle
B1_SCALES = ("fraction", "percent")
#: t1-vfa fitting methods: the estimators of the VFA model in the registry
VFA_METHODS: tuple[str, ...] = COMMAND_MODELS["t1-vfa"].values
#: T1 assumed for the VFA protocol note unless --t1-typical is given, seconds (brain white matter at 3 T is
#: about 0.8-1.1 s: Stanisz et al., Magn Reson Med 2005;54:507, (memory))
T1_TYPICAL = 1.0
#: fixed T1 of the EPG T2 model, seconds
DEFAULT_T1 = 1.0
#: nominal refocusing angle, degrees
DEFAULT_REFOCUS = 180.0
