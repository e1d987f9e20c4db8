"""The fit problem is checked once, up front, with messages that name the argument (scipy.optimize's habit)."""

from __future__ import annotations

import numpy as np
import pytest

from qmap.engine import fit_voxels
from qmap.fitting.noise_floor import Mode, NoiseFloor
from qmap.fitting.problem import FitProblem
from qmap.maps import fit_volume
from qmap.models.monoexp import MonoExponential

TE = np.array([0.005, 0.010, 0.020, 0.040])


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"stderr": "fisher"}, r"stderr='fisher'"),
    ({"method": "simplex"}, r"method='simplex'"),
    ({"max_iter": 0}, r"max_iter=0"),
    ({"sigma": 0.0}, r"sigma=0\.0"),
    ({"sigma": float("nan")}, r"sigma=nan"),
    ({"noise": NoiseFloor("rician")}, r"'rician' noise floor needs sigma"),
])
def test_bad_shared_inputs_are_refused_before_any_work(kwargs, match):
    with pytest.raises(ValueError, match=match):
        FitProblem.create(MonoExponential(TE), **kwargs)
    # the engine refuses them the same way, before fitting a chunk
    y = np.ones((3, TE.size))
    with pytest.raises(ValueError, match=match):
        fit_voxels(MonoExponential(TE), y, n_jobs=1, **kwargs)


def test_non_finite_sampling_values_are_refused():
    with pytest.raises(ValueError, match="EchoTime values .* not all finite"):
        FitProblem.create(MonoExponential(np.array([0.01, np.nan, 0.03])))


def test_sample_count_is_checked_against_the_model():
    with pytest.raises(ValueError, match="data has 3 samples per voxel, the model 4"):
        fit_volume(MonoExponential(TE), np.ones((2, 2, 1, 3)))


def test_a_noise_map_may_hold_unusable_voxels():
    # an array sigma is per voxel: its holes get a status code, they are not an error
    sigma = np.array([1.0, 0.0, np.nan])
    problem = FitProblem.create(MonoExponential(TE), noise=NoiseFloor("rician"), sigma=sigma)
    assert problem.noise.rician and problem.noise.needs_sigma
    y = 100.0 * np.exp(-TE / 0.03)
    maps = fit_volume(MonoExponential(TE), np.tile(y, (3, 1, 1, 1)), noise=NoiseFloor("rician"),
                      sigma=sigma.reshape(3, 1, 1))
    assert maps.status.reshape(-1).tolist()[1:] == [2, 2]  # NONFINITE: no usable noise level there
    assert maps.status.reshape(-1)[0] == 0


def test_the_mode_is_checked_once_and_is_a_string():
    assert NoiseFloor("truncate").mode is Mode.TRUNCATE
    assert NoiseFloor("truncate").mode == "truncate" and NoiseFloor("truncate").weighted
    assert NoiseFloor("rician", coils=1).with_coils(4).coils == 4
    assert NoiseFloor("offset").with_coils(4).coils == 1  # only the Rician objective uses coils
    assert NoiseFloor("truncate").provenance() == {"truncate_factor": 3.0, "min_samples": 3}
    with pytest.raises(ValueError, match="noise-floor mode 'gaussian'"):
        NoiseFloor("gaussian")


@pytest.mark.parametrize(("mode", "method", "lean"), [
    ("none", "fast", True), ("rician", "fast", True), ("offset", "fast", False), ("truncate", "fast", False),
    ("none", "lmfit", False),
])
def test_the_one_exponential_fit_takes_larger_chunks(mode, method, lean):
    from qmap.defaults import DEFAULT_CHUNK, EXPONENTIAL_CHUNK
    from qmap.fitting.problem import lean_fit
    from qmap.models.ir import InversionRecovery

    sigma = 1.0 if mode in ("rician", "truncate") else None
    problem = FitProblem.create(MonoExponential(TE), noise=NoiseFloor(mode), sigma=sigma, method=method)
    assert lean_fit(problem.model, method, problem.noise) is lean
    assert problem.default_chunk == (EXPONENTIAL_CHUNK if lean else DEFAULT_CHUNK)
    # a model with more work per voxel keeps the default chunk
    assert FitProblem.create(InversionRecovery(np.array([0.1, 0.5, 1.0, 2.0]))).default_chunk == DEFAULT_CHUNK
    # the chunk does not change the fit (the engine splits by it; a row's result depends on the row alone)
    rng = np.random.default_rng(3)
    y = 100 * np.exp(-TE / rng.uniform(0.01, 0.05, (300, 1))) + rng.normal(0, 1, (300, TE.size))
    a = fit_voxels(problem.model, y, noise=problem.noise, sigma=sigma, method=method, n_jobs=1)
    b = fit_voxels(problem.model, y, noise=problem.noise, sigma=sigma, method=method, n_jobs=1, chunk_size=7)
    assert np.array_equal(a.params, b.params, equal_nan=True) and np.array_equal(a.status, b.status)
