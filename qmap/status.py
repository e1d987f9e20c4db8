"""Per-voxel status codes written to ``{prefix}_desc-status_fitmap.nii.gz`` (uint8).

The lowest layer: models (a model with its own chunk fitter), the fitting code, the maps and the
workflows all use these codes, so they live below all of them (``qmap.fitting.status`` re-exports them).
"""

from __future__ import annotations

__all__ = [
           "AT_BOUND",
           "FITTED",
           "ILL_CONDITIONED",
           "LOW_SNR",
           "MASKED",
           "NOISE_ONLY",
           "NONFINITE",
           "NOT_CONVERGED",
           "NO_VALID_ANGLE",
           "OUTSIDE_B1",
           "OUTSIDE_LOOKUP",
           "STATUS_CODES",
           "TOO_FEW_SAMPLES",
]

FITTED = 0
MASKED = 1
NONFINITE = 2
AT_BOUND = 3
NOT_CONVERGED = 4
ILL_CONDITIONED = 5
OUTSIDE_B1 = 6
TOO_FEW_SAMPLES = 7
NO_VALID_ANGLE = 8
OUTSIDE_LOOKUP = 9
LOW_SNR = 10
NOISE_ONLY = 11

#: code -> meaning, as written to provenance (``status_codes``)
STATUS_CODES = {
    FITTED: "fitted",
    MASKED: "outside the mask, not fitted",
    NONFINITE: "bad input: a sample is NaN or infinite, not fitted",
    AT_BOUND: "an estimate hit a bound of its allowed range (value is the bound)",
    NOT_CONVERGED: "the fit did not converge within the iteration limit",
    ILL_CONDITIONED: "the fit is ill-conditioned: standard errors are not estimable",
    OUTSIDE_B1: "outside the B1 map's field of view, not fitted",
    TOO_FEW_SAMPLES: "too few samples above the noise floor to fit",
    NO_VALID_ANGLE: "the signal ratio corresponds to no valid flip angle",
    OUTSIDE_LOOKUP: "the value (MP2RAGE UNI) lies outside the range the lookup table can invert at this voxel's B1",
    LOW_SNR: "signal-to-noise ratio too low for a reliable T2 spectrum (values kept; see --min-snr)",
    NOISE_ONLY: "no signal above the noise floor (the samples are consistent with pure noise), not fitted",
}
