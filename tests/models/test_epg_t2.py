"""The EPG T2 model (qmap.models.epg_t2) and the array API qmap.workflows.t2.fit_t2.

External references: the brute-force isochromat simulation
(tests/reference/isochromat.py; no code shared with qmap), the closed forms
of the perfectly refocused and the first two echoes (Hennig, J Magn Reson
1988;78:397), lmfit (MINPACK) as an independent optimiser, central finite
differences, and Monte-Carlo spreads for the standard errors.
"""

from __future__ import annotations

import numpy as np
import pytest

from qmap.errors import InputError, UsageError
from qmap.maps import fit_volume
from qmap.models.epg_t2 import EpgT2, cpmg_cos, echo_spacing
from qmap.workflows.t2 import fit_t2
from tests.conftest import rician
from tests.reference.isochromat import cpmg_isochromats

ESP = 0.010  # s
N_ECHOES = 32
TE = ESP * np.arange(1, N_ECHOES + 1)
#: isochromats per simulation: with equally spaced dephasing the isochromat mean is an exact discrete Fourier
#: coefficient once n_iso exceeds the highest configuration order (2 x echoes + 1), so 1024 is exact to rounding
N_ISO = 1024


def _iso_train(t2, scale, *, t1=1.0, n_echoes=N_ECHOES, excite_scaled=True):
    """Echo magnitudes (M0 = 1) from the independent isochromat simulation; refocusing 180 x scale."""
    return cpmg_isochromats(t2, t1, ESP, n_echoes, 180.0 * scale,
                            excite_deg=90.0 * (scale if excite_scaled else 1.0), n_iso=N_ISO)


# ------------------------------------------------------------------------------------------ the recursion
def test_perfect_refocusing_is_exponential():
    # Hennig 1988 / Weigel 2015: with 180 degree refocusing every echo is the plain spin echo exp(-TE/T2)
    # (issue 6: to 1e-10); c = cos(180 deg) = -1
    t2 = np.array([0.004, 0.02, 0.08, 0.5, 3.0])
    s = cpmg_cos(t2, -1.0, esp=ESP, n_echoes=N_ECHOES, t1=0.7)
    np.testing.assert_allclose(s, np.exp(-TE[None, :] / t2[:, None]), rtol=1e-10, atol=0)


def test_first_two_echoes_closed_form():
    # Pathways of Hennig 1988, derived by hand for an ideal 90 deg excitation and refocusing a:
    # echo 1 = sin^2(a/2) E2; echo 2 = sin^4(a/2) E2^2 + sin^2(a)/2 E1 E2, E2 = exp(-esp/T2), E1 = exp(-esp/T1)
    t2, t1 = 0.05, 0.9
    for a_deg in (100.0, 140.0, 170.0):
        a = np.deg2rad(a_deg)
        e2, e1 = np.exp(-ESP / t2), np.exp(-ESP / t1)
        expected = [np.sin(a / 2) ** 2 * e2, np.sin(a / 2) ** 4 * e2**2 + 0.5 * np.sin(a) ** 2 * e1 * e2]
        np.testing.assert_allclose(cpmg_cos([t2], np.cos(a), esp=ESP, n_echoes=2, t1=t1)[0], expected, rtol=1e-13)


@pytest.mark.parametrize("n_echoes", [1, 2, 3, 5, 24, 32])
def test_recursion_matches_isochromat_simulation(n_echoes):
    # Issue 6: EPG vs a brute-force isochromat simulation within 0.5 % per echo -- and, because the isochromat
    # sum is exact on this grid (see N_ISO), to rounding; also covers the state truncation at short trains.
    for t2, a_deg, t1 in ((0.02, 150.0, 1.0), (0.12, 120.0, 0.6), (0.06, 175.0, 1.5)):
        s = cpmg_cos([t2], np.cos(np.deg2rad(a_deg)), esp=ESP, n_echoes=n_echoes, t1=t1)[0]
        ref = cpmg_isochromats(t2, t1, ESP, n_echoes, a_deg, n_iso=N_ISO)
        np.testing.assert_allclose(s, ref, rtol=1e-9, atol=1e-14)


def test_consistent_with_the_angle_based_simulator():
    # consistency with qmap.epg (itself validated against the isochromat reference): same echoes and, through
    # dc/dscale = -pi sin(pi scale), the same scale derivative (refocusing-only scaling)
    from qmap.epg import cpmg_echoes_grad

    rng = np.random.default_rng(4)
    t2, scale = rng.uniform(0.01, 0.4, 300), rng.uniform(0.5, 1.0, 300)
    s_ref, dt_ref, db_ref = cpmg_echoes_grad(t2, scale, esp=ESP, n_echoes=N_ECHOES, t1=0.8, scale_excitation=False)
    s, d_t2, d_c = cpmg_cos(t2, np.cos(np.pi * scale), esp=ESP, n_echoes=N_ECHOES, t1=0.8, grad=True)
    np.testing.assert_allclose(s, s_ref, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(d_t2, dt_ref, rtol=1e-10, atol=1e-12 * np.abs(dt_ref).max())
    np.testing.assert_allclose(-np.pi * np.sin(np.pi * scale)[:, None] * d_c, db_ref, rtol=1e-9,
                               atol=1e-12 * np.abs(db_ref).max())


def test_derivatives_match_finite_differences_including_the_continuation_past_180():
    # Central differences (common practice). The cosine parameter must be smooth through c = -1 (180 deg):
    # that is the reason for the parameterisation (module notes), so c < -1 is checked as well.
    rng = np.random.default_rng(11)
    t2 = rng.uniform(0.02, 0.3, 6)
    for c in (-0.5, -0.95, -1.0, -1.03):
        cc = np.full(t2.size, c)
        _s, d_t2, d_c = cpmg_cos(t2, cc, esp=ESP, n_echoes=N_ECHOES, grad=True)
        h = 1e-6
        fd_c = (cpmg_cos(t2, cc + h, esp=ESP, n_echoes=N_ECHOES) - cpmg_cos(t2, cc - h, esp=ESP, n_echoes=N_ECHOES))
        fd_t = (cpmg_cos(t2 * (1 + h), cc, esp=ESP, n_echoes=N_ECHOES)
                - cpmg_cos(t2 * (1 - h), cc, esp=ESP, n_echoes=N_ECHOES))
        np.testing.assert_allclose(d_c, fd_c / (2 * h), rtol=1e-5, atol=1e-7 * np.abs(d_c).max())
        np.testing.assert_allclose(d_t2, fd_t / (2 * h * t2[:, None]), rtol=1e-5, atol=1e-7 * np.abs(d_t2).max())
    # at 180 deg the derivative in c is regular (non-zero), unlike the derivative in the angle, which vanishes
    _, _, d_c = cpmg_cos(t2, -1.0, esp=ESP, n_echoes=N_ECHOES, grad=True)
    assert np.all(np.abs(d_c[:, 1:]).max(axis=1) > 0.05)


def test_chunking_does_not_change_results():
    # element-wise arithmetic per voxel (DEVELOPERS.md, determinism): identical bits for any block / chunk size
    rng = np.random.default_rng(5)
    t2, c = rng.uniform(0.02, 0.2, 5000), rng.uniform(-1.1, -0.3, 5000)
    whole = cpmg_cos(t2, c, esp=ESP, n_echoes=N_ECHOES, grad=True)
    part = cpmg_cos(t2[4321:4330], c[4321:4330], esp=ESP, n_echoes=N_ECHOES, grad=True)
    for a, b in zip(whole, part):
        assert np.array_equal(a[4321:4330], b)


# ------------------------------------------------------------------------------------------ acquisition
def test_echo_spacing_validation():
    assert echo_spacing(TE) == pytest.approx(ESP, rel=1e-12)
    assert echo_spacing(np.round(TE + 4e-7, 6)) == pytest.approx(ESP, rel=1e-4)  # sidecar rounding (1 us)
    for bad in ([0.01, 0.02, 0.035, 0.04], [0.015, 0.025, 0.035, 0.045], [0.01, 0.02, 0.04, 0.05]):
        with pytest.raises(InputError, match="equally spaced"):
            EpgT2(bad)
    with pytest.raises(InputError, match="at least 4 echoes"):
        EpgT2(TE[:3])
    with pytest.raises(UsageError, match="drop_first=True"):
        fit_t2(np.ones((2, N_ECHOES)), TE, epg=True, drop_first=True, noise_floor="none")
    with pytest.raises(InputError, match="refocus"):
        EpgT2(TE, refocus_deg=200.0)


# ------------------------------------------------------------------------------------------ fitting
def test_noise_free_recovery_is_exact():
    # noise-free trains from the isochromat reference (ideal 90 deg excitation, the model's convention) must give
    # M0, T2 and the refocusing scale back to 1e-6 -- also at exactly 180 deg
    t2 = np.array([0.02, 0.045, 0.08, 0.15, 0.2, 0.06])
    scale = np.array([0.8, 0.87, 0.93, 1.0, 0.84, 0.98])
    data = 800.0 * np.array([_iso_train(a, b, excite_scaled=False) for a, b in zip(t2, scale)])
    maps = fit_t2(data, TE, epg=True, noise_floor="none")
    assert np.all(maps.status == 0)
    np.testing.assert_allclose(maps["T2"], t2, rtol=1e-6)
    np.testing.assert_allclose(maps["M0"], 800.0, rtol=1e-6)
    np.testing.assert_allclose(maps["RefocusScale"], scale, atol=1e-6)
    np.testing.assert_allclose(maps["R2"], 1 / t2, rtol=1e-6)
    assert maps.units["RefocusScale"] == "fraction" and maps.info["model_info"]["refocus_deg"] == 180.0


def test_isochromat_cpmg_epg_is_unbiased_and_monoexponential_is_not():
    # Issue 6 acceptance: CPMG data from the independent isochromat simulation, refocusing scale 0.8-1.0 acting on
    # both pulses (a B1 error), 24 and 32 echoes, 10 ms spacing, T2 20-200 ms, tissue T1 0.7-1.5 s (the model
    # keeps 1 s), SNR 80 (M0 / sigma), Rician noise. --epg: median signed T2 error < 1 %, median absolute < 3 %,
    # refocusing scale within 0.03 (median absolute).
    rng = np.random.default_rng(2024)
    k, draws, m0, sigma = 36, 25, 1000.0, 1000.0 / 80
    t2 = np.exp(rng.uniform(np.log(0.02), np.log(0.2), k))
    scale = rng.uniform(0.8, 1.0, k)
    t1 = rng.uniform(0.7, 1.5, k)
    clean = np.array([_iso_train(t2[i], scale[i], t1=t1[i]) for i in range(k)])
    data = rician(m0 * np.repeat(clean, draws, axis=0), sigma, rng)
    true_t2, true_scale = np.repeat(t2, draws), np.repeat(scale, draws)
    low = true_scale < 0.9  # the poorly refocused half
    for n in (32, 24):
        epg = fit_t2(data[:, :n], TE[:n], epg=True, sigma=sigma)  # default noise floor (rician)
        err = epg["T2"] / true_t2 - 1
        assert np.mean(epg.status == 0) > 0.95
        assert abs(np.median(err)) < 0.01
        assert np.median(np.abs(err)) < 0.03
        assert abs(np.median(err[low])) < 0.01
        assert np.median(np.abs(epg["RefocusScale"] - true_scale)) < 0.03
        # the mono-exponential fit of the same data overestimates T2 (stimulated echoes; Lebel & Wilman 2010),
        # clearly so where refocusing is poor, with or without the first echo (Milford et al. 2015 (memory))
        mono = fit_t2(data[:, :n], TE[:n], sigma=sigma)
        mono_err = mono["T2"] / true_t2 - 1
        assert np.median(mono_err) > 0.01
        assert np.median(mono_err[low]) > 0.03 > 3 * abs(np.median(err[low]))
        dropped = fit_t2(data[:, :n], TE[:n], sigma=sigma, drop_first=True)
        assert np.median(dropped["T2"][low] / true_t2[low] - 1) > 0.01


def test_fixed_t1_has_small_influence():
    # Help-text claim: a T1 off by a factor of two changes the EPG T2 by < 1 % for refocusing scales 0.8-1
    # (32 echoes, 10 ms); data from the isochromat reference with the true T1, fitted with the default 1 s.
    t2 = np.array([0.02, 0.05, 0.12, 0.2, 0.03, 0.09])
    scale = np.array([0.8, 0.85, 0.9, 0.8, 0.95, 1.0])
    for t1 in (0.5, 2.0):
        data = np.array([_iso_train(a, b, t1=t1) for a, b in zip(t2, scale)])
        maps = fit_t2(data, TE, epg=True, noise_floor="none")
        assert np.max(np.abs(maps["T2"] / t2 - 1)) < 0.01
        assert np.max(np.abs(maps["RefocusScale"] - scale)) < 0.01


def test_agrees_with_lmfit():
    # the same least-squares problem solved by lmfit's MINPACK per voxel: same minimum to 1e-4
    rng = np.random.default_rng(8)
    k = 10
    t2 = np.exp(rng.uniform(np.log(0.02), np.log(0.2), k))
    scale = rng.uniform(0.8, 1.0, k)
    data = 1000 * np.array([_iso_train(a, b) for a, b in zip(t2, scale)]) + rng.normal(0, 12.5, (k, N_ECHOES))
    model = EpgT2(TE)
    fast = fit_volume(model, data)
    ref = fit_volume(model, data, method="lmfit")
    assert np.all(ref.status == 0)
    # the batched solver may stop a slowly zig-zagging voxel at its iteration limit (status 4, value kept, within
    # a small fraction of its standard error); the converged ones must be the same minimum
    ok = fast.status == 0
    assert ok.sum() >= 8 and np.all(np.isin(fast.status, (0, 4)))
    np.testing.assert_allclose(fast["T2"][ok], ref["T2"][ok], rtol=1e-4)
    np.testing.assert_allclose(fast["M0"][ok], ref["M0"][ok], rtol=1e-4)
    np.testing.assert_allclose(fast["RefocusScale"][ok], ref["RefocusScale"][ok], atol=1e-4)
    np.testing.assert_allclose(fast.stderr["T2"][ok], ref.stderr["T2"][ok], rtol=1e-2)
    np.testing.assert_allclose(fast["T2"], ref["T2"], rtol=0.1 * np.max(fast.stderr["T2"] / fast["T2"]))


@pytest.mark.parametrize("scale", [0.88, 1.0])
def test_standard_error_matches_monte_carlo_spread(scale):
    # the standard error is the sd of the estimator over noise draws (Kay, Fundamentals of Statistical Signal
    # Processing, 1993) -- including a perfectly refocused voxel, where a fit in the angle itself would be singular
    rng = np.random.default_rng(21)
    clean = 1000 * _iso_train(0.07, scale)
    data = clean + rng.normal(0, 12.5, (300, N_ECHOES))
    maps = fit_t2(data, TE, epg=True, noise_floor="none")
    ok = maps.status == 0
    assert ok.mean() > 0.9
    sd = np.std(maps["T2"][ok])
    assert np.median(maps.stderr["T2"][ok]) == pytest.approx(sd, rel=0.15)
    assert abs(np.mean(maps["T2"][ok]) / 0.07 - 1) < 0.005


def test_offset_noise_floor_mode_applies_to_the_epg_model():
    # the noise-floor modes are generic: a constant offset added to an EPG train is recovered with T2
    t2 = np.array([0.03, 0.1])
    data = 900 * np.array([_iso_train(a, 0.9, excite_scaled=False) for a in t2]) + 25.0
    maps = fit_t2(data, TE, epg=True, noise_floor="offset")
    np.testing.assert_allclose(maps["T2"], t2, rtol=1e-6)
    np.testing.assert_allclose(maps["Offset"], 25.0, rtol=1e-6)
    np.testing.assert_allclose(maps["RefocusScale"], 0.9, atol=1e-6)
