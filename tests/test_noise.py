"""Tests of qmap.noise: Rician / noncentral-chi means, background sigma, Otsu, auto mask.

Every check compares against something outside qmap: scipy.stats distributions
(rice, ncx2, chi) and their numerical integration, published closed forms and
worked values (Rice 1944; Gudbjartsson & Patz 1995), or seeded Monte-Carlo
simulations of complex Gaussian noise.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage, special, stats

from qmap import noise
from qmap.errors import InputError
from qmap.noise import rician_mean, rician_mean_grad
from qmap.noise_level import auto_mask, estimate_sigma_background, otsu_threshold


def _rice_mean_reference(b: float, scale: float) -> float:
    """Mean of scipy.stats.rice, by its moment formula or by integrating its pdf.

    scipy's ``rice.mean()`` evaluates exp(-b^2/2) * 1F1(3/2; 1; b^2/2), which
    overflows for b above about 37 (scipy 1.17), so there the pdf (written
    with i0e, stable) is integrated numerically around its peak instead.
    """
    dist = stats.rice(b=b, scale=scale)
    if b < 30:
        return float(dist.mean())
    lo, hi = max(0.0, (b - 40.0) * scale), (b + 40.0) * scale
    return float(dist.expect(lambda v: v, lb=lo, ub=hi, epsrel=1e-13, epsabs=0.0))


def _sos_magnitude(rng, nu: float, sigma: float, coils: int, n: int) -> np.ndarray:
    """Root-sum-of-squares magnitude of `coils` complex channels with Gaussian noise.

    The true amplitude is spread unevenly over the channels (only the total
    sqrt(sum |s_k|^2) = nu matters).
    """
    weights = np.linspace(1.0, 2.0, coils)
    signal = nu * weights / np.linalg.norm(weights)
    re = signal[None, :] + sigma * rng.standard_normal((n, coils))
    im = sigma * rng.standard_normal((n, coils))
    return np.sqrt(np.sum(re * re + im * im, axis=1))


# ---------------------------------------------------------------------------
# Rician mean (one coil)
# ---------------------------------------------------------------------------


def test_rician_mean_matches_scipy_rice_over_snr_range():
    # Rice 1944; Gudbjartsson & Patz, Magn Reson Med 1995;34:910: the
    # magnitude is Rician; scipy.stats.rice is an independent implementation.
    sigma = 2.5
    snr = np.concatenate([[0.0], np.logspace(-3, 3, 61)])
    expected = np.array([_rice_mean_reference(b, sigma) for b in snr])
    got = rician_mean(snr * sigma, sigma)
    np.testing.assert_allclose(got, expected, rtol=1e-8, atol=0)


def test_rician_mean_published_check_values():
    # Rician mean (Rice 1944): nu = sigma -> 1.548572 sigma, nu = 3 sigma ->
    # 3.172577 sigma (scipy.stats.rice cross-check values); nu = 0 -> Rayleigh
    # mean sigma sqrt(pi/2) = 1.253314 sigma (Gudbjartsson & Patz 1995).
    sigma = 0.7
    got = rician_mean(np.array([1.0, 3.0, 0.0]) * sigma, sigma) / sigma
    np.testing.assert_allclose(got, [1.548572, 3.172577, 1.253314], rtol=0, atol=6e-7)
    # The Rayleigh mean is exact (closed form), not only to 7 digits.
    assert rician_mean(0.0, sigma) == pytest.approx(sigma * math.sqrt(math.pi / 2), rel=1e-15)


def test_rician_mean_huge_snr_is_finite_and_tends_to_nu():
    # Large-SNR limit: E -> nu (1 + sigma^2 / (2 nu^2)) (Gudbjartsson & Patz
    # 1995: the Rician becomes Gaussian about sqrt(nu^2 + sigma^2)).
    nu = np.array([1e6, 1e150, 1e300])
    sigma = np.array([1.0, 1.0, 1e-10])
    e, de = rician_mean_grad(nu, sigma)
    assert np.all(np.isfinite(e)) and np.all(np.isfinite(de))
    np.testing.assert_allclose(e, nu * (1 + 0.5 * (sigma / nu) ** 2), rtol=1e-15)
    np.testing.assert_allclose(de, 1.0, rtol=1e-12)
    # Tiny sigma and tiny nu: x = nu^2 / (2 sigma^2) would overflow; must not.
    assert rician_mean(1e-150, 1e-300) == pytest.approx(1e-150, rel=1e-15)


def test_rician_mean_is_even_and_gradient_odd():
    # E[|nu + n|] depends on |nu| only (the noise is circularly symmetric).
    nu = np.array([0.3, 2.0, 7.0, 25.0])
    e_pos, d_pos = rician_mean_grad(nu, 1.3)
    e_neg, d_neg = rician_mean_grad(-nu, 1.3)
    np.testing.assert_array_equal(e_pos, e_neg)
    np.testing.assert_array_equal(d_pos, -d_neg)
    assert rician_mean_grad(0.0, 1.3)[1] == 0.0


@pytest.mark.parametrize("coils", [1, 2, 3, 4, 8, 16, 32])
def test_asymptotic_series_agrees_with_exact_form_at_switch_over(coils):
    # The exact forms (Bessel i0e/i1e for one coil, Kummer 1F1 otherwise) are
    # checked against scipy.stats elsewhere; here the series that replaces
    # them at high SNR must agree to 1e-10
    # from the switch-over point up.
    c, d, t_switch = noise._series(coils)
    sigma = 1.0
    t = t_switch * np.array([1.0, 0.999, 0.9, 0.5, 0.1])
    nu = sigma / np.sqrt(t)
    e_series = nu * np.polynomial.polynomial.polyval(t, c)
    d_series = np.polynomial.polynomial.polyval(t, d)
    e_exact, d_exact = noise._exact(nu, sigma, coils, True)
    np.testing.assert_allclose(e_series, e_exact, rtol=1e-10, atol=0)
    np.testing.assert_allclose(d_series, d_exact, rtol=1e-10, atol=0)
    # Through the public function, just either side of the switch-over.
    nu_pm = nu[0] * np.array([1 - 1e-9, 1 + 1e-9])
    e_pub, d_pub = rician_mean_grad(nu_pm, sigma, coils=coils)
    e_ref, d_ref = noise._exact(nu_pm, sigma, coils, True)
    np.testing.assert_allclose(e_pub, e_ref, rtol=1e-10, atol=0)
    np.testing.assert_allclose(d_pub, d_ref, rtol=1e-10, atol=0)


@pytest.mark.parametrize("coils", [1, 3])
def test_gradient_matches_central_finite_difference(coils):
    # d/dnu of the mean vs a central finite difference of the mean itself,
    # across low SNR, the switch-over (~10) and high SNR, negative nu too.
    sigma = 1.7
    nu = sigma * np.array([-40.0, -3.0, -0.2, 0.05, 0.5, 1.0, 2.0, 5.0, 9.5, 10.6, 11.0, 20.0, 300.0])
    h = 1e-5 * np.maximum(1.0, np.abs(nu))
    fd = (rician_mean(nu + h, sigma, coils=coils) - rician_mean(nu - h, sigma, coils=coils)) / (2 * h)
    _, grad = rician_mean_grad(nu, sigma, coils=coils)
    np.testing.assert_allclose(grad, fd, rtol=1e-7, atol=1e-9)
    assert np.all(np.abs(grad) <= 1.0)


def test_one_coil_gradient_closed_form():
    # Brief / Koay & Basser, J Magn Reson 2006;179:317 (derivative of the
    # Rician mean): dE/dnu = sqrt(pi/2) nu/(2 sigma) (i0e(x/2) + i1e(x/2)).
    sigma = 0.9
    nu = np.array([0.1, 1.0, 4.0, 8.0, 15.0, 60.0])
    x = nu**2 / (2 * sigma**2)
    expected = math.sqrt(math.pi / 2) * nu / (2 * sigma) * (special.i0e(x / 2) + special.i1e(x / 2))
    np.testing.assert_allclose(rician_mean_grad(nu, sigma)[1], expected, rtol=1e-10)


# ---------------------------------------------------------------------------
# Noncentral chi (root sum of squares of N coils)
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("coils", [2, 4, 8])
def test_noncentral_chi_mean_matches_ncx2_integration(coils):
    # Constantinides et al., Magn Reson Med 1997;38:852: (M/sigma)^2 is
    # noncentral chi-square with 2N dof and noncentrality nu^2/sigma^2; mean
    # of M = sigma * E[sqrt(ncx2)], integrated numerically by scipy.
    sigma = 1.9
    snr = np.array([0.0, 0.3, 1.0, 2.5, 6.0, 15.0, 45.0])
    expected = []
    for b in snr:
        if b == 0:
            expected.append(sigma * stats.chi(2 * coils).mean())  # central chi
        else:
            dist = stats.ncx2(2 * coils, b * b)
            expected.append(sigma * dist.expect(np.sqrt, epsrel=1e-12, epsabs=0.0))
    np.testing.assert_allclose(rician_mean(snr * sigma, sigma, coils=coils), expected, rtol=1e-8)


@pytest.mark.parametrize(("coils", "snr"), [(1, 1.0), (4, 0.0), (4, 2.0), (8, 5.0)])
def test_noncentral_chi_mean_matches_monte_carlo(coils, snr):
    # Independent simulation: root sum of squares of N complex Gaussian
    # channels (Constantinides et al. 1997). Tolerance: 4 MC standard errors.
    rng = np.random.default_rng(1997 + coils)
    sigma = 3.0
    m = _sos_magnitude(rng, snr * sigma, sigma, coils, 200_000)
    se = m.std(ddof=1) / math.sqrt(m.size)
    assert abs(rician_mean(snr * sigma, sigma, coils=coils) - m.mean()) < 4 * se


def test_noncentral_chi_reduces_to_rician_for_one_coil():
    # Constantinides et al. 1997: N = 1 is the Rician case. The general
    # hypergeometric form sqrt(2) Gamma(N+1/2)/Gamma(N) 1F1(-1/2; N; -x) with
    # N = 1 vs the Bessel form used for one coil, and ncx2(2 dof) vs rice.
    sigma = 1.1
    nu = sigma * np.array([0.0, 0.5, 2.0, 5.0, 9.0])
    x = nu**2 / (2 * sigma**2)
    general = sigma * math.sqrt(2) * special.gamma(1.5) / special.gamma(1.0) * special.hyp1f1(-0.5, 1.0, -x)
    np.testing.assert_allclose(rician_mean(nu, sigma, coils=1), general, rtol=1e-12)
    b = 2.0
    via_ncx2 = sigma * stats.ncx2(2, b * b).expect(np.sqrt, epsrel=1e-12, epsabs=0.0)
    assert rician_mean(b * sigma, sigma, coils=1) == pytest.approx(via_ncx2, rel=1e-9)


# ---------------------------------------------------------------------------
# Array handling
# ---------------------------------------------------------------------------


def test_broadcasting_dtype_and_blocks():
    # Broadcasting (5,1) x (3,) and float32 input -> float64 output equal to
    # element-wise scalar calls.
    nu = np.linspace(0, 20, 5, dtype=np.float32)[:, None]
    sigma = np.array([0.5, 1.0, 2.0])
    e, d = rician_mean_grad(nu, sigma, coils=2)
    assert e.shape == d.shape == (5, 3) and e.dtype == d.dtype == np.float64
    scalar = [[float(rician_mean(float(n), float(s), coils=2)) for s in sigma] for n in nu[:, 0]]
    np.testing.assert_array_equal(e, scalar)
    # A large array spanning several blocks, mixing low- and high-SNR
    # elements (per-element sigma), agrees with the Bessel form everywhere.
    rng = np.random.default_rng(7)
    sig = rng.uniform(0.5, 2.0, 50_000)
    nu = sig * rng.uniform(-40.0, 40.0, sig.size)
    x = nu**2 / (2 * sig**2)
    bessel = sig * math.sqrt(math.pi / 2) * ((1 + x) * special.i0e(x / 2) + x * special.i1e(x / 2))
    np.testing.assert_allclose(rician_mean(nu, sig), bessel, rtol=1e-10)


def test_special_arguments_and_bad_options():
    assert rician_mean(3.0, 0.0) == 3.0  # noise-free limit
    assert rician_mean(0.0, 0.0) == 0.0
    assert np.isnan(rician_mean(np.nan, 1.0))
    with pytest.raises(ValueError, match="sigma"):
        rician_mean(1.0, -1.0)
    with pytest.raises(ValueError, match="coils"):
        rician_mean(1.0, 1.0, coils=0)


# ---------------------------------------------------------------------------
# Sigma from the background
# ---------------------------------------------------------------------------


def _sphere(shape, radius, centre=None):
    grid = np.indices(shape, dtype=float)
    centre = np.array(shape) / 2 - 0.5 if centre is None else np.asarray(centre, float)
    r2 = sum((g - c) ** 2 for g, c in zip(grid, centre))
    return r2 <= radius**2


def _dice(a, b):
    """Dice overlap 2|A&B| / (|A| + |B|) (common practice for mask agreement)."""
    return 2 * np.count_nonzero(a & b) / (np.count_nonzero(a) + np.count_nonzero(b))


def _noisy_magnitude(rng, amplitude, sigma):
    """|amplitude + complex Gaussian noise|: Rician magnitude (Gudbjartsson & Patz 1995)."""
    re = amplitude + sigma * rng.standard_normal(amplitude.shape)
    im = sigma * rng.standard_normal(amplitude.shape)
    return np.hypot(re, im)


def test_simulated_background_is_rayleigh():
    # Sanity check of the simulation used below: background mean
    # sigma sqrt(pi/2) = 1.253314 sigma and sd sigma sqrt(2 - pi/2) =
    # 0.655136 sigma (Gudbjartsson & Patz, Magn Reson Med 1995;34:910).
    rng = np.random.default_rng(34)
    sigma = 4.0
    bg = _noisy_magnitude(rng, np.zeros(200_000), sigma)
    assert math.sqrt(2 - math.pi / 2) == pytest.approx(0.655136, abs=5e-7)
    # relative SE of the sd ~ 1/sqrt(2n) * sqrt(kurtosis factor) ~ 0.2 %
    assert bg.std() == pytest.approx(0.655136 * sigma, rel=0.01)
    assert bg.mean() == pytest.approx(rician_mean(0.0, sigma), rel=0.005)


@pytest.mark.parametrize("coils", [1, 4])
def test_sigma_from_pure_noise_background(coils):
    # Object (amplitude 100) in the middle, complex Gaussian noise
    # everywhere; the robust estimate must be within 5 % of the truth.
    rng = np.random.default_rng(910 + coils)
    shape = (48, 48, 24)
    sigma = 4.0
    obj = _sphere(shape, 12)
    amp = np.where(obj, 100.0, 0.0)
    if coils == 1:
        data = _noisy_magnitude(rng, amp, sigma)
    else:
        data = np.sqrt(sum(_noisy_magnitude(rng, amp / math.sqrt(coils), sigma) ** 2 for _ in range(coils)))
    est, n = estimate_sigma_background(data, obj, coils=coils)
    assert est == pytest.approx(sigma, rel=0.05)
    assert n == np.count_nonzero(~ndimage.binary_dilation(obj, iterations=3))


def test_sigma_pools_volumes_ignores_zero_fill_and_resists_ghosts():
    rng = np.random.default_rng(2006)
    shape = (40, 40, 20)
    sigma = 2.0
    obj = _sphere(shape, 10)
    decay = np.array([1.0, 0.6, 0.3, 0.1])
    data = _noisy_magnitude(rng, np.where(obj, 80.0, 0.0)[..., None] * decay, sigma)
    data[:, :4] = 0.0  # zero filling outside the field of view
    data[0, 10, 0, 0] = np.nan
    # The automatic mask instead of the true one.
    est_auto, _ = estimate_sigma_background(data, auto_mask(data))
    assert est_auto == pytest.approx(sigma, rel=0.05)
    # 5 % of the background values are bright ghosts (30x the noise): a
    # plain median would be 4 % high; the clipped median stays close.
    ghosts = (rng.random(data.shape) < 0.05) & ~obj[..., None]
    data[ghosts] *= 30.0
    est, n = estimate_sigma_background(data, obj)
    assert est == pytest.approx(sigma, rel=0.02)
    bg = ~ndimage.binary_dilation(obj, iterations=3)
    bg[:, :4] = False
    assert n == np.count_nonzero(bg)


def test_sigma_too_little_background_raises():
    rng = np.random.default_rng(3)
    shape = (24, 24, 12)
    obj = np.zeros(shape, bool)
    obj[2:22, 2:22, 1:11] = True  # tightly cropped: 2 voxels of margin
    data = _noisy_magnitude(rng, np.where(obj, 50.0, 0.0), 1.0)
    # 64 corner voxels outside the grown object: 64 samples give 0.7213 / 8 = 9 % > the 5 % aimed at
    # (ceil((0.7213 / 0.05)^2) = 209 samples)
    with pytest.raises(InputError, match=r"only 64 background voxels \(64 samples\).*209 samples needed"):
        estimate_sigma_background(data, obj)


def test_sigma_background_with_signal_raises():
    # The mask misses half of the object: the "background" holds signal.
    rng = np.random.default_rng(4)
    shape = (48, 48, 24)
    obj = np.zeros(shape, bool)
    obj[4:44, 4:44, 2:22] = True
    data = _noisy_magnitude(rng, np.where(obj, 50.0, 0.0), 1.0)
    half = obj.copy()
    half[:24] = False
    # Under half of the background is signal: the median alone passes it
    # (and gives sigma about 2x too large); the far-above-noise fraction does not.
    with pytest.raises(InputError, match="not pure noise"):
        estimate_sigma_background(data, half)
    # Most of the "background" is signal: median above a third of the object's.
    sliver = obj.copy()
    sliver[:40] = False
    with pytest.raises(InputError, match=r"not pure noise \(background median"):
        estimate_sigma_background(data, sliver, min_voxels=10)
    with pytest.raises(InputError, match="no object"):
        estimate_sigma_background(data, np.zeros(shape, bool))
    with pytest.raises(InputError, match="negative values, so this is not a magnitude image"):
        estimate_sigma_background(data - 5.0, obj & ~half)


# ---------------------------------------------------------------------------
# Otsu threshold and automatic mask
# ---------------------------------------------------------------------------


def test_otsu_bimodal_between_modes_and_matches_brute_force():
    # Otsu, IEEE Trans Syst Man Cybern 1979;9:62: maximise the between-class
    # variance w0 w1 (m0 - m1)^2. Brute force on the raw values as reference.
    rng = np.random.default_rng(1979)
    values = np.concatenate([rng.normal(10, 3, 6000), rng.normal(50, 5, 3000)])
    thr = otsu_threshold(values)
    assert 10 < thr < 50
    candidates = np.linspace(values.min(), values.max(), 2001)
    s = np.sort(values)
    csum = np.concatenate([[0.0], np.cumsum(s)])
    k = np.searchsorted(s, candidates, side="right")
    w0, w1 = k, s.size - k
    ok = (w0 > 0) & (w1 > 0)
    m0 = csum[k[ok]] / w0[ok]
    m1 = (csum[-1] - csum[k[ok]]) / w1[ok]
    score = w0[ok] * w1[ok] * (m0 - m1) ** 2

    def score_at(t):
        kk = np.searchsorted(s, t, side="right")
        a0, a1 = csum[kk] / kk, (csum[-1] - csum[kk]) / (s.size - kk)
        return kk * (s.size - kk) * (a0 - a1) ** 2

    # any threshold inside the maximising plateau is an Otsu threshold (the classes are separated
    # by an empty gap here); qmap takes the middle of the plateau
    assert score_at(thr) >= score.max() * (1 - 1e-3)
    plateau = candidates[ok][score >= score.max() * (1 - 1e-9)]
    assert plateau.min() - 1e-9 <= thr <= plateau.max() + (values.max() - values.min()) / 256
    assert otsu_threshold(np.full(5, 3.0)) == 3.0
    with pytest.raises(ValueError):
        otsu_threshold([1.0, np.nan])


def test_auto_mask_recovers_sphere_in_inversion_recovery_series():
    # IR magnitude |M0 (1 - 2 exp(-TI/T1))| (Bernstein et al. 2004): one TI
    # near the null of the core (T1 ln 2), a dim outer shell (M0 = 0.35).
    rng = np.random.default_rng(5)
    shape = (40, 40, 40)
    obj = _sphere(shape, 13)
    core = _sphere(shape, 7)
    m0 = np.where(core, 1.0, np.where(obj, 0.35, 0.0))
    t1 = np.where(core, 1.4, 0.8)
    ti = np.array([0.05, 1.4 * math.log(2), 1.5, 4.0])
    amp = np.abs(m0[..., None] * (1 - 2 * np.exp(-ti / t1[..., None])))
    data = _noisy_magnitude(rng, amp, 0.02)
    data[20, 20, 20, 1] = np.nan  # a non-finite sample inside the object
    mask = auto_mask(data)
    assert mask.shape == shape and mask.dtype == bool
    assert _dice(mask, obj) > 0.95
    assert mask[20, 20, 20]
    # 3D input, and an image with no signal.
    assert _dice(auto_mask(data[..., 3]), obj) > 0.95
    assert not auto_mask(np.zeros(shape)).any()


def test_chi_quantiles_without_scipy_stats_match_it():
    """The sigma estimate's chi median and 1-1e-6 quantile (closed forms via the incomplete gamma) agree with
    scipy.stats.chi, the reference library, for 1 to 32 coils."""
    from scipy import stats

    from qmap.noise_level import _chi_median, _chi_tail

    for coils in (1, 2, 3, 8, 32):
        ref = stats.chi(2 * coils)
        assert abs(_chi_median(coils) / ref.median() - 1) < 1e-12
        assert abs(_chi_tail(coils) / ref.isf(1e-6) - 1) < 1e-12
