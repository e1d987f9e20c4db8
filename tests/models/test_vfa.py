"""Variable-flip-angle T1 model: derivatives, closed-form start, linear vs nonlinear, engines, precision.

References checked against: the spoiled-GRE steady state (Ernst & Anderson,
Rev Sci Instrum 1966; Bernstein, King & Zhou 2004) written out independently
in ``_spgr`` below; the linearised form (Deoni, Rutt & Peters, Magn
Reson Med 2003;49:515); the optimal two-angle protocol at ~0.71 of the Ernst
signal (same paper; Schabel & Morrell, Phys Med Biol 2009;54:N1); the
Cramer-Rao bound (Kay, Fundamentals of Statistical Signal Processing, 1993);
scipy (approx_fprime, minimize, brentq) and lmfit as independent numerics.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import approx_fprime, brentq, minimize

from qmap.fitting import status as st
from qmap.fitting.linearised import fit_chunk_linear
from qmap.maps import fit_volume
from qmap.models.vfa import SpoiledGRE, ernst_angle, optimal_angle_pair, t1_crlb
from qmap.workflows.vfa import fit_t1_vfa, protocol_check

FA = np.array([3.0, 8.0, 15.0, 25.0])
TR = 0.015


def _spgr(fa_deg, tr, t1, m0=1.0, b1=1.0):
    # S = M0 sin a (1 - E1) / (1 - E1 cos a), E1 = exp(-TR/T1), a = B1 x nominal
    # (Ernst & Anderson 1966; Cheng & Wright, Magn Reson Med 2006;55:566) -- written here, not imported
    a = np.radians(np.asarray(b1, float) * np.asarray(fa_deg, float))
    e1 = np.exp(-tr / np.asarray(t1, float))
    return m0 * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))


def _truth(rng, n):
    t1 = rng.uniform(0.5, 2.0, n)
    m0 = rng.uniform(500.0, 1500.0, n)
    b1 = rng.uniform(0.75, 1.25, n)
    return t1, m0, b1, _spgr(FA[None, :], TR, t1[:, None], m0[:, None], b1[:, None])


def test_jacobian_matches_finite_differences():
    # analytic d/d(M0, T1) of the signal vs scipy.optimize.approx_fprime (central-ish, small step)
    model = SpoiledGRE(FA, TR)
    for t1, m0, b1 in [(0.3, 800.0, 0.8), (1.0, 1000.0, 1.0), (2.5, 1200.0, 1.2)]:
        ctx = {"b1": np.array([b1])}
        _, jac = model.signal_jacobian(np.array([[m0, t1]]), ctx)
        for k in range(FA.size):
            def f(p, k=k, b1=b1):
                return float(_spgr(FA[k], TR, p[1], p[0], b1))
            num = approx_fprime(np.array([m0, t1]), f, [1e-6 * m0, 1e-7 * t1])
            np.testing.assert_allclose(jac[0, :, k], num, rtol=2e-5)
        # dbasis (generic path) agrees with the fast path
        d = model.dbasis(np.array([[t1]]), ctx)[0, :, 0, 0]
        np.testing.assert_allclose(m0 * d, jac[0, 1], rtol=1e-12)
        np.testing.assert_allclose(model.predict(np.array([[m0, t1]]), ctx)[0], _spgr(FA, TR, t1, m0, b1), rtol=1e-12)


def test_linearised_regression_exact_on_noise_free_data():
    # Deoni et al. 2003: S/sin a = E1 S/tan a + M0 (1-E1) is exact for noise-free data,
    # so every weighting recovers T1 and M0 to rounding
    rng = np.random.default_rng(1)
    t1, m0, b1, y = _truth(rng, 500)
    for passes in (0, 1, 4):
        fit = fit_chunk_linear(SpoiledGRE(FA, TR), y, ctx={"b1": b1}, passes=passes)
        np.testing.assert_allclose(fit.params[:, 1], t1, rtol=1e-9)
        np.testing.assert_allclose(fit.params[:, 0], m0, rtol=1e-9)
        assert np.all(fit.status == 0)


def test_linear_and_nonlinear_agree_on_noise_free_data():
    # same data, two estimators: both must return the generating T1/M0 (to 1e-6)
    rng = np.random.default_rng(2)
    t1, m0, b1, y = _truth(rng, 2000)
    data, b1v = y.reshape(20, 10, 10, 4), b1.reshape(20, 10, 10)
    lin = fit_t1_vfa(data, FA, TR, b1=b1v, method="linear")
    nl = fit_t1_vfa(data, FA, TR, b1=b1v, method="nonlinear")
    assert np.all(lin.status == 0) and np.all(nl.status == 0)
    for name in ("T1", "R1", "M0"):
        np.testing.assert_allclose(lin[name], nl[name], rtol=1e-6)
    np.testing.assert_allclose(nl["T1"].ravel(), t1, rtol=1e-6)
    np.testing.assert_allclose(lin["M0"].ravel(), m0, rtol=1e-6)


def test_fast_engine_agrees_with_lmfit():
    # the vectorised solver and lmfit's MINPACK LM minimise the same least-squares objective
    rng = np.random.default_rng(3)
    _t1, _m0, b1, y = _truth(rng, 40)
    sigma = 1000 * 0.08 / 100  # SNR ~100 at the largest signal
    y = y + sigma * rng.standard_normal(y.shape)
    model = SpoiledGRE(FA, TR)
    fast = fit_volume(model, y, ctx_maps={"b1": b1})
    ref = fit_volume(model, y, ctx_maps={"b1": b1}, method="lmfit")
    assert np.all(fast.status == 0) and np.all(ref.status == 0)
    np.testing.assert_allclose(fast["T1"], ref["T1"], rtol=1e-4)
    np.testing.assert_allclose(fast["M0"], ref["M0"], rtol=1e-4)
    # lmfit's covariance is also s^2 (J^T J)^-1 (curve_fit convention)
    np.testing.assert_allclose(fast.stderr["T1"], ref.stderr["T1"], rtol=1e-3)


def _crlb_numeric(fa, tr, t1, m0, b1, sigma):
    # Cramer-Rao bound on T1 (Kay 1993) from a central-difference Jacobian of _spgr
    h = np.array([1e-4 * m0, 1e-6])
    jac = np.stack([(_spgr(fa, tr, t1 + (k == 1) * h[1], m0 + (k == 0) * h[0], b1)
                     - _spgr(fa, tr, t1 - (k == 1) * h[1], m0 - (k == 0) * h[0], b1)) / (2 * h[k]) for k in range(2)])
    return math.sqrt(np.linalg.inv(jac @ jac.T / sigma**2)[1, 1])


def test_t1_crlb_matches_numerical_fisher_information():
    for t1 in (0.5, 1.0, 2.0):
        assert t1_crlb(FA, TR, t1, m0=900.0, sigma=0.3) == pytest.approx(_crlb_numeric(FA, TR, t1, 900.0, 1.0, 0.3),
                                                                         rel=1e-6)


@pytest.mark.parametrize("method", ["linear", "nonlinear"])
def test_standard_errors_match_monte_carlo_and_crlb(method):
    # At high SNR both estimators are efficient: their Monte-Carlo sd approaches the
    # Cramer-Rao bound sqrt([F^-1]_T1) with F = J^T J / sigma^2 (Kay 1993), and the reported
    # standard error (s^2 (J^T J)^-1 / error propagation) estimates it.
    rng = np.random.default_rng(4)
    n, t1, m0, b1 = 4000, 1.2, 1000.0, 0.9
    sigma = 0.25  # SNR ~ 300 at the largest signal
    clean = _spgr(FA, TR, t1, m0, b1)
    y = clean[None, :] + sigma * rng.standard_normal((n, FA.size))
    maps = fit_t1_vfa(y, FA, TR, b1=np.full(n, b1), method=method)
    est = maps["T1"]
    mc_sd = float(np.std(est, ddof=1))
    crlb = _crlb_numeric(FA, TR, t1, m0, b1, sigma)
    # sd of a sd estimate from 4000 draws is ~1.1 %: 5 % is four of those
    assert mc_sd == pytest.approx(crlb, rel=0.05)
    # s^2 = RSS/(m-2) is unbiased for sigma^2 but with 2 degrees of freedom its median is
    # 2 ln 2 / 2 = 0.69 of it: compare the root-mean-square standard error
    assert float(np.sqrt(np.mean(maps.stderr["T1"] ** 2))) == pytest.approx(crlb, rel=0.05)
    assert abs(float(np.mean(est)) - t1) < 4 * mc_sd / math.sqrt(n) + 1e-4 * t1


def test_unweighted_regression_is_less_precise():
    # Why the linear method reweights: the plain linearised regression (equal weights on
    # S/sin a) is not efficient (its residuals have unequal variance); the reweighted one
    # reaches the Monte-Carlo sd of the least-squares fit (common practice: weighted least
    # squares with inverse-variance weights)
    # (angles spread up to 60 deg, where the residual variances differ most)
    rng = np.random.default_rng(5)
    n, t1, m0 = 4000, 1.0, 1000.0
    fa = np.array([2.0, 5.0, 20.0, 60.0])
    y = _spgr(fa, TR, t1, m0)[None, :] + 0.5 * rng.standard_normal((n, fa.size))
    sd0 = np.std(fit_chunk_linear(SpoiledGRE(fa, TR), y, passes=0).params[:, 1])
    sd4 = np.std(fit_chunk_linear(SpoiledGRE(fa, TR), y).params[:, 1])
    sd_nl = np.std(fit_t1_vfa(y, fa, TR)["T1"])
    # sd of each sd estimate ~1.1 %: a 20 % gap is far outside chance
    assert sd0 > 1.2 * sd4
    assert sd4 == pytest.approx(sd_nl, rel=0.02)


def test_ernst_angle_and_optimal_pair():
    # Ernst angle arccos(E1): TR 15 ms, T1 1 s -> 9.8991 deg (Ernst & Anderson 1966: cos a_E = exp(-TR/T1))
    assert float(ernst_angle(TR, 1.0)) == pytest.approx(9.8991, abs=5e-5)
    for tr, t1 in [(0.015, 1.0), (0.005, 0.3), (0.03, 2.0)]:
        lo, hi = optimal_angle_pair(tr, t1)
        ae = math.degrees(math.acos(math.exp(-tr / t1)))
        s_e = _spgr(ae, tr, t1)
        # both angles give 1/sqrt(2) ~ 0.71 of the Ernst signal (Deoni 2003; Schabel & Morrell 2009):
        # roots of S(a) - 0.7071 S_E found by brentq on each side of the Ernst angle
        def f(a, tr=tr, t1=t1, s_e=s_e):
            return _spgr(a, tr, t1) - s_e / math.sqrt(2)
        assert lo == pytest.approx(brentq(f, 0.01, ae), abs=1e-7)
        assert hi == pytest.approx(brentq(f, ae, 90.0), abs=1e-7)
        # and they minimise the T1 Cramer-Rao bound over all two-angle protocols (numerical search)
        res = minimize(lambda a, tr=tr, t1=t1: t1_crlb(np.abs(a) + 1e-3, tr, t1), x0=[ae / 2, 2 * ae],
                       method="Nelder-Mead",
                       options={"xatol": 1e-6, "fatol": 1e-12, "maxiter": 4000})
        best = np.sort(np.abs(res.x))
        np.testing.assert_allclose(best, [lo, hi], atol=0.05)


def test_protocol_note_only_for_poor_angles():
    info, note = protocol_check(FA, TR, 1.0)
    assert note is None
    assert info["t1_sd_relative_to_optimal_pair"] < 1.5
    info, note = protocol_check([2.0, 3.0, 4.0], TR, 1.0)
    assert note is not None and "9.9 deg" in note and "4.1 and 23.6 deg" in note
    assert info["t1_sd_relative_to_optimal_pair"] > 1.5
    # the optimal pair itself is the reference: ratio 1
    pair = optimal_angle_pair(TR, 1.0)
    assert protocol_check(pair, TR, 1.0)[0]["t1_sd_relative_to_optimal_pair"] == pytest.approx(1.0, abs=1e-3)


def test_status_codes_nonfinite_outside_b1_and_bound():
    rng = np.random.default_rng(6)
    _, _, _, y = _truth(rng, 6)
    y[1, 2] = np.nan  # bad sample -> status 2
    # signal proportional to sin(a): E1 = 0, i.e. T1 -> 0 (no saturation at all): the lower bound
    y[3] = 100.0 * np.sin(np.radians(FA))
    b1 = np.ones(6)
    b1[4] = np.nan  # no B1 here -> status 6
    for method in ("linear", "nonlinear"):
        maps = fit_t1_vfa(y, FA, TR, b1=b1, method=method)
        assert maps.status.tolist() == [0, st.NONFINITE, 0, st.AT_BOUND, st.OUTSIDE_B1, 0], method
        assert np.isnan(maps["T1"][[1, 4]]).all()
        lo = SpoiledGRE(FA, TR).bounds()[0][0]
        assert maps["T1"][3] == pytest.approx(lo)


@pytest.mark.parametrize("method", ["linear", "nonlinear"])
def test_results_do_not_depend_on_chunk_size(method):
    rng = np.random.default_rng(7)
    _, _, b1, y = _truth(rng, 300)
    y = y + rng.standard_normal(y.shape)
    a = fit_t1_vfa(y, FA, TR, b1=b1, method=method)
    b = fit_t1_vfa(y, FA, TR, b1=b1, method=method, chunk_size=37, n_jobs=2)
    np.testing.assert_array_equal(a["T1"], b["T1"])
    np.testing.assert_array_equal(a.stderr["M0"], b.stderr["M0"])


def test_fit_t1_vfa_rejects_one_angle():
    with pytest.raises(ValueError, match="two different flip angles"):
        fit_t1_vfa(np.ones((3, 2)), [10.0, 10.0], TR)


@pytest.mark.parametrize("method", ["linear", "nonlinear"])
def test_two_angles_use_the_given_sigma_for_standard_errors(method):
    # two angles, two parameters: no residual to estimate the noise from, so a known sigma
    # gives sigma sqrt([(J^T J)^-1]_T1), the Cramer-Rao bound (Kay 1993); without it NaN
    fa = np.array([4.0, 24.0])
    y = _spgr(fa, TR, 1.1, 800.0, 1.05)[None, :] * np.ones((3, 1))
    b1 = np.full(3, 1.05)
    maps = fit_t1_vfa(y, fa, TR, b1=b1, method=method, sigma=0.4)
    np.testing.assert_allclose(maps["T1"], 1.1, rtol=1e-9)
    np.testing.assert_allclose(maps.stderr["T1"], _crlb_numeric(fa, TR, 1.1, 800.0, 1.05, 0.4), rtol=1e-5)
    assert np.all(np.isnan(fit_t1_vfa(y, fa, TR, b1=b1, method=method).stderr["T1"]))
