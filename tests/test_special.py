"""qmap.special against scipy.special / scipy.stats (independent reference implementations) and closed forms.

The functions replace ``scipy.special`` in a fitting run (its import costs start-up time); they must agree
with it to within a few units of the last place wherever qmap uses them: the Rician expectation of one coil
(Bessel functions of SNR^2/4 up to ~30, and beyond for safety) and the noise-level statistics (chi-squared
quantiles for 0.5-200 degrees of freedom, tail probabilities down to 1e-6).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats

from qmap import special as qs


def test_bessel_matches_scipy_to_a_few_ulp():
    z = np.concatenate([np.linspace(0.0, 80.0, 40001), np.geomspace(1e-10, 1e4, 3001)])
    i0, i1 = qs.i01e(z)
    # scipy.special.i0e / i1e (Cephes Chebyshev expansions): an independent implementation
    np.testing.assert_allclose(i0, special.i0e(z), rtol=1e-14, atol=0)
    np.testing.assert_allclose(i1, special.i1e(z), rtol=1e-14, atol=1e-300)
    np.testing.assert_array_equal(qs.i0e(z), i0)
    np.testing.assert_array_equal(qs.i1e(z), i1)


def test_bessel_worked_values_and_edges():
    # I0(1) = 1.2660658777520082, I1(1) = 0.5651591039924851 (Abramowitz & Stegun, Table 9.8; values from memory)
    assert qs.i0e(1.0) == pytest.approx(1.2660658777520082 * math.exp(-1), rel=1e-15)
    assert qs.i1e(1.0) == pytest.approx(0.5651591039924851 * math.exp(-1), rel=1e-15)
    assert qs.i0e(0.0) == 1.0 and qs.i1e(0.0) == 0.0
    assert qs.i0e(np.inf) == 0.0 and qs.i1e(np.inf) == 0.0  # e^-z I(z) ~ 1/sqrt(2 pi z)
    assert np.isnan(qs.i0e(-1.0)) and np.isnan(qs.i1e(np.nan))
    assert qs.i01e(np.ones((2, 3)))[0].shape == (2, 3)


@pytest.mark.parametrize("p", [1e-10, 1e-6, 1e-4, 0.01, 0.25, 0.5, 0.75, 0.99, 1 - 1e-6])
def test_chi2_quantiles_match_scipy(p):
    k = np.concatenate([np.geomspace(0.2, 300.0, 120), np.arange(1.0, 65.0)])
    # chi2 quantile = 2 x the inverse regularised incomplete gamma at k/2 (DLMF 8.2.4); scipy's gammaincinv
    np.testing.assert_allclose(qs.chi2_ppf(p, k), 2.0 * special.gammaincinv(k / 2.0, p), rtol=1e-11)
    np.testing.assert_allclose(qs.chi2_isf(p, k), 2.0 * special.gammainccinv(k / 2.0, p), rtol=1e-11)


def test_chi2_distribution_functions_match_scipy():
    x = np.geomspace(1e-4, 400.0, 160)[:, None]
    k = np.concatenate([np.geomspace(0.2, 300.0, 60), np.arange(1.0, 33.0)])[None, :]
    np.testing.assert_allclose(qs.chi2_cdf(x, k), stats.chi2.cdf(x, k), rtol=1e-12, atol=1e-15)
    sf = stats.chi2.sf(x, k)
    ok = sf > 1e-280
    np.testing.assert_allclose(qs.chi2_sf(x, k)[ok], sf[ok], rtol=1e-11)
    np.testing.assert_allclose(qs.chi2_pdf(x, k), stats.chi2.pdf(x, k), rtol=1e-12, atol=1e-300)


def test_chi2_closed_forms_and_edges():
    # two degrees of freedom: exponential with mean 2 (common practice): F(x) = 1 - exp(-x/2)
    assert qs.chi2_ppf(0.5, 2.0) == pytest.approx(2.0 * math.log(2.0), rel=1e-14)
    assert qs.chi2_isf(1e-6, 2.0) == pytest.approx(-2.0 * math.log(1e-6), rel=1e-14)
    assert qs.chi2_cdf(3.0, 2.0) == pytest.approx(1.0 - math.exp(-1.5), rel=1e-14)
    # the median of chi2(1) is the square of the normal quartile z_0.75 = 0.6744897501960817 (value from memory)
    assert qs.chi2_ppf(0.5, 1.0) == pytest.approx(0.6744897501960817**2, rel=1e-13)
    assert qs.chi2_ppf(0.0, 3.0) == 0.0 and qs.chi2_ppf(1.0, 3.0) == np.inf
    assert qs.chi2_isf(1.0, 3.0) == 0.0 and qs.chi2_isf(0.0, 3.0) == np.inf
    assert np.isnan(qs.chi2_ppf(0.5, 0.0)) and np.isnan(qs.chi2_ppf(0.5, -1.0))
    assert qs.chi2_ppf(0.5, np.full((2, 2), 4.0)).shape == (2, 2)


def test_noise_estimates_unchanged_from_scipy():
    """The noise-level statistics give scipy's numbers: pooled sigma from residuals of fractional dof."""
    from qmap.noise_level import pooled_relative_se, pooled_sigma

    rng = np.random.default_rng(5)
    dof = rng.uniform(3.0, 10.0, 4000)
    rss = 4.0 * rng.chisquare(dof)
    ref = math.sqrt(float(np.median(rss / (2.0 * special.gammaincinv(dof / 2.0, 0.5)))))
    assert pooled_sigma(rss, dof) == pytest.approx(ref, rel=1e-12)
    k = float(np.median(dof))
    q = float(stats.chi2.median(k))
    assert pooled_relative_se(dof) == pytest.approx(1.0 / (4.0 * stats.chi2.pdf(q, k) * q * math.sqrt(dof.size)),
                                                    rel=1e-12)


def test_bessel_values_do_not_depend_on_what_else_is_evaluated_with_them():
    """A few values go through one series loop for all bands, many through one loop per band: each value's
    result is the same to the bit either way (a fit's results must not depend on how its voxels are batched)."""
    from qmap import special

    rng = np.random.default_rng(4)
    z = np.concatenate([[0.0, 1e-300, 2.0, 2.0000001, 6.0, 12.0, 20.0, 30.0, 30.5], rng.uniform(0, 32, 5000),
                        rng.exponential(3.0, 5000)])
    whole = special.i01e(z)  # banded: more values than special._FEW
    assert z.size > special._FEW
    for part in np.array_split(np.arange(z.size), 400):  # 25 values a call: one loop for every band
        got = special.i01e(z[part])
        assert np.array_equal(got[0], whole[0][part]) and np.array_equal(got[1], whole[1][part])
