"""Property-based tests (hypothesis) for the loaders, the time parser, the models and determinism (issue 10).

* Loaders: one 4D NIfTI with list sidecars and the same volumes as separate 3D
  files with scalar sidecars (the usual BIDS layout) load to the same array and
  the same acquisition values, in any order given; integer data with random
  scaling slopes decode as ``y = scl_slope * x + scl_inter`` (NIfTI-1 standard,
  nifti1.h).
* Time parser: random times written in s / ms / us (bare numbers = seconds,
  README) parse back to the same seconds; implausible bare numbers are
  refused with an ``ms`` suggestion.
* Models (mono-exponential with and without offset, inversion recovery,
  spoiled GRE with per-voxel B1, EPG T2): random valid parameters -> the
  model's own ``predict`` -> fit on noise-free data recovers them (a noise-free separable least-squares problem
  has its exact solution as the global minimum; Golub & Pereyra 1973).
* Determinism: the maps are bit-identical for any chunk size and number of
  workers (DEVELOPERS.md: per-voxel element-wise arithmetic after the grid search).
"""

from __future__ import annotations

import json
import tempfile
import warnings
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from qmap.errors import InputError, QmapWarning
from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.solver import fit_chunk
from qmap.io.series import load_series
from qmap.maps import fit_volume
from qmap.models.monoexp import MonoExponential
from qmap.units import PLAUSIBLE_MAX_S, parse_angle_list, parse_time_list

SETTINGS = settings(deadline=None, max_examples=60, suppress_health_check=[HealthCheck.too_slow],
                    derandomize=True)
AFFINE = np.diag([1.5, 1.5, 2.0, 1.0])


def _write(path: Path, arr, sidecar=None):
    nib.save(nib.Nifti1Image(np.asarray(arr), AFFINE), str(path))
    if sidecar is not None:
        path.with_name(path.name.removesuffix(".nii.gz") + ".json").write_text(json.dumps(sidecar))
    return path


# --------------------------------------------------------------------------- loaders

shapes = st.tuples(st.integers(1, 5), st.integers(1, 5), st.integers(1, 4), st.integers(2, 6))


@SETTINGS
@given(shape=shapes, seed=st.integers(0, 2**32 - 1), shuffle=st.booleans())
def test_4d_and_3d_files_load_the_same(shape, seed, shuffle):
    rng = np.random.default_rng(seed)
    n = shape[3]
    data = rng.uniform(0, 1000, shape).astype(np.float32)
    te = np.sort(rng.choice(np.arange(1, 400), size=n, replace=False)) * 1e-3  # distinct, ms grid, seconds
    tr = float(rng.integers(20, 3000)) * 1e-3
    order = rng.permutation(n) if shuffle else np.arange(n)
    with tempfile.TemporaryDirectory() as tmp:
        d = Path(tmp)
        p4 = _write(d / "s4d.nii.gz", data[..., order], {"EchoTime": te[order].tolist(), "RepetitionTime": tr})
        p3 = [_write(d / f"s_echo-{i}.nii.gz", data[..., i], {"EchoTime": float(te[i]), "RepetitionTime": tr})
              for i in order]
        kw = {"key": "EchoTime", "option": "--te",
              "scalars": {"RepetitionTime": (None, "--tr", True, "RepetitionTime")}}
        with warnings.catch_warnings():  # a shuffled series is sorted, with a warning
            warnings.simplefilter("ignore" if shuffle and n > 1 else "error", QmapWarning)
            a = load_series([p4], **kw)
            b = load_series(p3, **kw)
            c = load_series(p3, value=te[order], **kw)  # the same values on the command line
    for s in (a, b, c):
        assert s.data.dtype == np.float32 and s.data.shape == shape
        np.testing.assert_array_equal(s.data, data)  # sorted back to increasing TE
        np.testing.assert_array_equal(s.acquisition["EchoTime"], te)
        assert s.acquisition["RepetitionTime"] == tr
        np.testing.assert_allclose(s.affine, AFFINE)
    assert (a.sources["EchoTime"], b.sources["EchoTime"], c.sources["EchoTime"]) == ("sidecar", "sidecar",
                                                                                      "command line")


@SETTINGS
@given(shape=shapes, seed=st.integers(0, 2**32 - 1),
       slope=st.floats(1e-3, 50, allow_nan=False), inter=st.floats(-1e3, 1e3, allow_nan=False),
       dtype=st.sampled_from([np.int16, np.uint16, np.int32, np.uint8]))
def test_integer_data_are_decoded_with_the_scaling_slope(shape, seed, slope, inter, dtype):
    rng = np.random.default_rng(seed)
    info = np.iinfo(dtype)
    raw = rng.integers(max(info.min, -30000), min(info.max, 30000), shape, endpoint=True).astype(dtype)
    with tempfile.TemporaryDirectory() as tmp:
        img = nib.Nifti1Image(raw, AFFINE)
        img.header.set_slope_inter(slope, inter)
        p = Path(tmp) / "s.nii.gz"
        nib.save(img, str(p))
        s = load_series([p], key="EchoTime", value=np.arange(1, shape[3] + 1) * 0.01, option="--te")
    # header fields are float32 (NIfTI-1), so the reference uses the stored values
    sl, it = np.float32(slope), np.float32(inter)
    expected = raw.astype(np.float64) * float(sl) + float(it)
    np.testing.assert_allclose(s.data, expected, rtol=2e-7, atol=2e-7 * (abs(float(it)) + 1))


# --------------------------------------------------------------------------- time parser

UNITS = {"s": 1.0, "ms": 1e-3, "us": 1e-6}
keys = st.sampled_from(sorted(PLAUSIBLE_MAX_S))


@SETTINGS
@given(key=keys, data=st.data(), unit=st.sampled_from(["s", "ms", "us", ""]), spaces=st.booleans())
def test_time_lists_round_trip(key, data, unit, spaces):
    limit = PLAUSIBLE_MAX_S[key]
    lo = 0.0 if key == "InversionTime" else 1e-6
    values = data.draw(st.lists(st.floats(lo, limit, allow_nan=False, exclude_min=(lo == 1e-6)), min_size=1,
                                max_size=8))
    scale = UNITS[unit] if unit else 1.0
    sep = " , " if spaces else ","
    text = sep.join(f"{v / scale!r}{unit}" for v in values)
    got = parse_time_list(text, key=key, what="--x")
    np.testing.assert_allclose(got, values, rtol=1e-12, atol=0)


@SETTINGS
@given(key=keys, factor=st.floats(1.001, 1e4), n=st.integers(1, 5))
def test_implausible_bare_numbers_are_refused_with_an_ms_hint(key, factor, n):
    limit = PLAUSIBLE_MAX_S[key]
    values = [limit * factor] + [limit / 2] * (n - 1)
    text = ",".join(f"{v!r}" for v in values)
    with pytest.raises(InputError, match=r"ms"):
        parse_time_list(text, key=key, what="--x")
    # the same numbers as milliseconds are accepted when they are plausible then
    ms = [v * 1e-3 for v in values]
    if max(ms) <= limit:
        np.testing.assert_allclose(parse_time_list(",".join(f"{v!r}ms" for v in values), key=key), ms, rtol=1e-12)


@SETTINGS
@given(angles=st.lists(st.floats(0.5, 180, allow_nan=False), min_size=1, max_size=6), deg=st.booleans())
def test_angle_lists_round_trip(angles, deg):
    text = ",".join(f"{a!r}{'deg' if deg else ''}" for a in angles)
    np.testing.assert_array_equal(parse_angle_list(text), angles)


# --------------------------------------------------------------------------- models: noise-free recovery


@st.composite
def echo_trains(draw):
    m = draw(st.integers(3, 12))
    first = draw(st.floats(1e-3, 10e-3))
    spacing = draw(st.floats(1e-3, 10e-3))
    return first + spacing * np.arange(m)


@SETTINGS
@given(te=echo_trains(), data=st.data())
def test_monoexp_recovers_random_parameters(te, data):
    model = MonoExponential(te, param="T2star")
    n = 6
    # identifiable range: the first two echoes keep >= e^-3 of the signal before them (T >= max(TE1, dTE) / 3),
    # up to a decay of 5 % over the train (T = 20 x the last echo); both well inside the model's bounds
    t_min = max(te[0], te[1] - te[0]) / 3
    log_t = data.draw(st.lists(st.floats(np.log(t_min), np.log(te[-1] * 20)), min_size=n, max_size=n))
    m0 = data.draw(st.lists(st.floats(10, 1e4), min_size=n, max_size=n))
    params = np.column_stack([m0, np.exp(log_t)])
    fit = fit_chunk(model, model.predict(params))
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)


@SETTINGS
@given(te=echo_trains(), data=st.data())
def test_monoexp_with_offset_recovers_random_parameters(te, data):
    model = MonoExponential(te, param="T2")
    noise = NoiseFloor("offset")
    n = 5
    # three unknowns need a decay the echoes can see: T between the echo spacing and 3x the train length
    log_t = data.draw(st.lists(st.floats(np.log(te[-1] / 4), np.log(te[-1] * 3)), min_size=n, max_size=n))
    m0 = np.asarray(data.draw(st.lists(st.floats(100, 1e4), min_size=n, max_size=n)))
    off = data.draw(st.lists(st.floats(0.0, 0.2), min_size=n, max_size=n)) * m0
    params = np.column_stack([m0, np.exp(log_t)])
    y = model.predict(params) + off[:, None]
    fit = fit_chunk(model, y, noise=noise)
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params, np.column_stack([m0, off, np.exp(log_t)]), rtol=1e-5,
                               atol=1e-6 * m0.max())


@SETTINGS
@given(data=st.data(), signal=st.sampled_from(["real", "magnitude"]))
def test_inversion_recovery_recovers_random_parameters(data, signal):
    """S = a + b exp(-TI/T1) with b = -a (1 + k), k the inversion efficiency (common practice)."""
    from qmap.models.ir import InversionRecovery

    m = data.draw(st.integers(5, 10))
    ti0 = data.draw(st.floats(0.02, 0.1))
    ratio = data.draw(st.floats(1.5, 2.5))
    ti = ti0 * ratio ** np.arange(m)
    model = InversionRecovery(ti, signal=signal)
    n = 5
    # T1 seen by the train: between twice the first TI and two thirds of the last
    t1 = np.exp(data.draw(st.lists(st.floats(np.log(2 * ti[0]), np.log(ti[-1] / 1.5)), min_size=n, max_size=n)))
    a = np.asarray(data.draw(st.lists(st.floats(100, 5000), min_size=n, max_size=n)))
    k = np.asarray(data.draw(st.lists(st.floats(0.8, 1.0), min_size=n, max_size=n)))
    params = np.column_stack([a, -a * (1 + k), t1])
    y = model.predict(params)
    if signal == "magnitude":
        y = np.abs(y)
    fit = fit_chunk(model, y)
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)


@SETTINGS
@given(data=st.data())
def test_spoiled_gre_recovers_random_parameters(data):
    """S = M0 sin(B1 a) (1 - E1) / (1 - cos(B1 a) E1), E1 = exp(-TR/T1) (Ernst & Anderson 1966), per-voxel B1."""
    from qmap.models.vfa import SpoiledGRE

    tr = data.draw(st.floats(0.005, 0.03))
    low = data.draw(st.floats(2.0, 5.0))
    fa = np.array([low, low * 2.5, low * 5.0, low * 8.0])[: data.draw(st.integers(3, 4))]
    model = SpoiledGRE(fa, tr)
    n = 5
    t1 = np.exp(data.draw(st.lists(st.floats(np.log(0.2), np.log(3.0)), min_size=n, max_size=n)))
    m0 = data.draw(st.lists(st.floats(100, 1e4), min_size=n, max_size=n))
    b1 = np.asarray(data.draw(st.lists(st.floats(0.7, 1.3), min_size=n, max_size=n)))
    params = np.column_stack([m0, t1])
    ctx = {"b1": b1}
    fit = fit_chunk(model, model.predict(params, ctx), ctx=ctx)
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params, params, rtol=1e-6)


@settings(deadline=None, max_examples=20, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(data=st.data())
def test_epg_t2_recovers_random_parameters(data):
    """CPMG echo train by extended phase graphs (Hennig 1988; Weigel 2015): M0, T2 and the refocusing angle."""
    from qmap.models.epg_t2 import EpgT2

    esp = data.draw(st.floats(0.005, 0.012))
    n_echoes = data.draw(st.integers(8, 32))
    refocus = data.draw(st.floats(150.0, 180.0))
    model = EpgT2(esp * np.arange(1, n_echoes + 1), refocus_deg=refocus)
    n = 4
    # T2 from 3 echo spacings to a third of the train x 10 (the decay is seen), refocusing 0.75-1 of nominal
    t2 = np.exp(data.draw(st.lists(st.floats(np.log(3 * esp), np.log(3 * esp * n_echoes)), min_size=n, max_size=n)))
    scale = np.asarray(data.draw(st.lists(st.floats(0.75, 1.0), min_size=n, max_size=n)))
    m0 = data.draw(st.lists(st.floats(100, 1e4), min_size=n, max_size=n))
    params = np.column_stack([m0, t2, model.from_scale(scale)])
    fit = fit_chunk(model, model.predict(params))
    assert np.all(fit.status == 0), fit.status
    np.testing.assert_allclose(fit.params[:, :2], params[:, :2], rtol=1e-5)
    np.testing.assert_allclose(model.to_scale(fit.params[:, 2]), scale, rtol=1e-5)


# --------------------------------------------------------------------------- determinism


def _volume(seed, shape, te):
    rng = np.random.default_rng(seed)
    t2 = rng.uniform(0.005, 0.1, shape)
    m0 = rng.uniform(200, 2000, shape)
    sig = m0[..., None] * np.exp(-te / t2[..., None])
    y = np.abs(sig + rng.normal(0, 10, sig.shape) + 1j * rng.normal(0, 10, sig.shape))
    y[rng.random(shape) < 0.05, rng.integers(len(te))] = np.nan  # some bad voxels
    return y


@settings(deadline=None, max_examples=30, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(shape=st.tuples(st.integers(1, 9), st.integers(1, 9), st.integers(1, 3)), seed=st.integers(0, 2**16),
       chunk=st.integers(1, 97), jobs=st.integers(1, 3),
       mode=st.sampled_from(["none", "offset", "truncate", "rician"]))
def test_maps_are_bit_identical_for_any_chunking(shape, seed, chunk, jobs, mode):
    te = np.arange(1, 9) * 0.006
    y = _volume(seed, shape, te)
    mask = np.random.default_rng(seed + 1).random(shape) < 0.8
    model = MonoExponential(te, param="T2")
    kw = {"mask": mask, "noise": NoiseFloor(mode), "sigma": 10.0 if mode in ("truncate", "rician") else None}
    ref = fit_volume(model, y, n_jobs=1, chunk_size=10**6, **kw)
    got = fit_volume(model, y, n_jobs=jobs, chunk_size=chunk, **kw)
    np.testing.assert_array_equal(got.status, ref.status)
    for group in ("estimates", "stderr", "quality"):
        a, b = getattr(ref, group), getattr(got, group)
        assert a.keys() == b.keys()
        for k in a:
            assert np.array_equal(a[k], b[k], equal_nan=True), (group, k)


@pytest.mark.parametrize(("chunk", "jobs"), [(700, 2), (8192, 2), (1000, 3)])
def test_maps_are_bit_identical_when_the_voxels_are_split_between_workers(chunk, jobs):
    # several workers share each call's voxels in equal chunks (engine.split_chunks); same maps as one chunk
    te = np.arange(1, 9) * 0.006
    y = _volume(7, (40, 40, 2), te)
    model = MonoExponential(te, param="T2")
    kw = {"noise": NoiseFloor("rician"), "sigma": 10.0}
    ref = fit_volume(model, y, n_jobs=1, chunk_size=10**6, **kw)
    got = fit_volume(model, y, n_jobs=jobs, chunk_size=chunk, **kw)
    np.testing.assert_array_equal(got.status, ref.status)
    for group in ("estimates", "stderr", "quality"):
        for k, a in getattr(ref, group).items():
            assert np.array_equal(a, getattr(got, group)[k], equal_nan=True), (group, k)


@given(n=st.integers(0, 50_000), chunk=st.integers(1, 9000), jobs=st.integers(1, 4))
@settings(max_examples=200, derandomize=True)
def test_chunks_cover_every_row_once_and_keep_the_workers_even(n, chunk, jobs):
    from qmap.engine import MIN_SPLIT, split_chunks

    parts = split_chunks(n, chunk, jobs)
    assert [c.start for c in parts[1:]] == [c.stop for c in parts[:-1]]  # contiguous, in order
    assert (parts[0].start if parts else 0) == 0 and (parts[-1].stop if parts else 0) == n
    sizes = [c.stop - c.start for c in parts]
    assert all(0 < s <= chunk for s in sizes)
    if jobs > 1 and n >= jobs * MIN_SPLIT and chunk >= jobs:  # (a chunk of 1 row cannot be shared)
        assert len(parts) % jobs == 0 and max(sizes) - min(sizes) <= 1  # every worker gets the same share
