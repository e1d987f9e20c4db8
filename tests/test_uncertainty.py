"""Standard errors that mean what they say: coverage of estimate +/- 1.96 SE on Monte-Carlo truth.

The data are simulated here, independently of qmap's models: closed forms written out below (the
published signal equations) and, for the spin-echo train, the brute-force isochromat simulation in
tests/reference. The references are

* the Cramer-Rao lower bound of each model, sqrt(diag((J^T J / sigma^2)^-1)) with J the numerical
  derivatives of the signal functions below (Kay, Fundamentals of Statistical Signal Processing:
  Estimation Theory, 1993, ch. 3): at these SNRs the estimators are efficient, so the standard errors
  equal it up to the spread of the fitted values;
* ``scipy.optimize.curve_fit(..., sigma=sigma, absolute_sigma=True)`` on a subsample: the same
  covariance as qmap's noise convention, voxel by voxel;
* coverage: with a correct 1-sigma standard error, |estimate - truth| <= 1.96 SE in 95 % of the
  voxels and the robust SD (IQR / 1.349) of z = (estimate - truth) / SE is 1.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit

from qmap.fitting import status as st
from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.uncertainty import add_input_covariance, combine_se, input_sensitivity
from qmap.maps import fit_volume
from qmap.models.epg_t2 import EpgT2
from qmap.models.ir import InversionRecovery
from qmap.models.monoexp import MonoExponential
from qmap.models.vfa import SpoiledGRE
from qmap.noise_level import ArraySource
from qmap.pipeline import resolve_sigma
from tests.reference.isochromat import cpmg_isochromats

M0 = 1000.0


def _rician(s, sigma, rng):
    return np.hypot(s + rng.normal(0.0, sigma, s.shape), rng.normal(0.0, sigma, s.shape))


def _coverage(est, truth, se):
    z = (est - truth) / se
    z = z[np.isfinite(z)]
    q25, q75 = np.percentile(z, [25, 75])
    return float(np.mean(np.abs(z) <= 1.96)), float((q75 - q25) / 1.3489795)


def _crlb(func, p, sigma, k, h=1e-6):
    """sqrt of the k-th diagonal element of (J^T J / sigma^2)^-1, J by central differences of ``func``."""
    p = np.asarray(p, float)
    cols = []
    for i in range(p.size):
        d = np.zeros_like(p)
        d[i] = h * max(abs(p[i]), 1e-3)
        cols.append((func(p + d) - func(p - d)) / (2 * d[i]))
    J = np.array(cols)
    return float(np.sqrt(np.linalg.inv(J @ J.T / sigma**2)[k, k]))


def _volume(signals, sigma, rng, side=96, obj=56):
    """A (side, side, 1, m) magnitude volume: ``signals`` in a central square, noise-only background."""
    n, m = signals.shape
    assert n == obj * obj
    vol = np.zeros((side, side, 1, m))
    a = (side - obj) // 2
    vol[a : a + obj, a : a + obj, 0] = signals.reshape(obj, obj, m)
    mask = np.zeros((side, side, 1), bool)
    mask[a : a + obj, a : a + obj] = True
    return _rician(vol, sigma, rng), mask


def _check(est, truth, se, *, lo=0.93, hi=0.97):
    cov95, rsd = _coverage(est, truth, se)
    assert lo <= cov95 <= hi, cov95
    assert 0.90 <= rsd <= 1.10, rsd
    return cov95


# --------------------------------------------------------------------- T2*, SNR 50, Rician noise floor
TE = np.arange(1, 13) * 0.004


def _monoexp(p):  # S = M0 exp(-TE/T2*), common practice
    return p[0] * np.exp(-TE / p[1])


def test_t2star_snr50_coverage_given_and_estimated_sigma():
    rng = np.random.default_rng(21)
    n = 56 * 56
    t2 = rng.uniform(0.010, 0.060, n)
    sigma = M0 / 50
    vol, mask = _volume(M0 * np.exp(-TE / t2[:, None]), sigma, rng)
    model, noise = MonoExponential(TE), NoiseFloor("rician")
    given = fit_volume(model, vol, mask=mask, noise=noise, sigma=sigma)
    ok = given.status[mask] == st.FITTED
    assert ok.mean() > 0.99
    c_given = _check(given["T2star"][mask][ok], t2[ok], given.stderr["T2star"][mask][ok])
    # the noise level estimated from the data instead of given: same calibration within one point
    est_sigma, _info = resolve_sigma("auto", ArraySource(vol))
    assert est_sigma == pytest.approx(sigma, rel=0.03)
    est = fit_volume(model, vol, mask=mask, noise=noise, sigma=est_sigma)
    c_est = _check(est["T2star"][mask][ok], t2[ok], est.stderr["T2star"][mask][ok])
    assert abs(c_est - c_given) <= 0.01
    assert given.info["stderr"]["convention"] == "noise"
    # reference: the Cramer-Rao bound at the truth (high SNR: the Gaussian bound), median over voxels
    sel = np.flatnonzero(ok & (t2 > 0.03))[:200]
    crlb = np.array([_crlb(_monoexp, [M0, t], sigma, 1) for t in t2[sel]])
    ratio = given.stderr["T2star"][mask][sel] / crlb
    assert np.median(ratio) == pytest.approx(1.0, abs=0.03)


# --------------------------------------------------------------------- EPG T2, SNR 80
def test_epg_t2_snr80_coverage_against_isochromat_truth():
    # truth from the brute-force isochromat simulation (tests/reference), 16 (T2, angle) pairs
    rng = np.random.default_rng(22)
    esp, n_echoes, t1 = 0.01, 16, 1.0
    te = esp * np.arange(1, n_echoes + 1)
    pairs = [(t2, ang) for t2 in (0.04, 0.06, 0.09, 0.14) for ang in (130.0, 150.0, 165.0, 180.0)]
    trains = np.array([cpmg_isochromats(t2, t1, esp, n_echoes, ang, n_iso=512) for t2, ang in pairs])
    reps = 90
    truth = np.repeat([p[0] for p in pairs], reps)
    s = M0 * np.repeat(trains, reps, axis=0)
    sigma = M0 / 80
    y = _rician(s, sigma, rng)
    maps = fit_volume(EpgT2(te, refocus_deg=180.0, t1=t1), y, noise=NoiseFloor("rician"), sigma=sigma)
    ok = maps.status == st.FITTED
    assert ok.mean() > 0.97
    _check(maps["T2"][ok], truth[ok], maps.stderr["T2"][ok])
    # reference: the Cramer-Rao bound of (M0, T2, angle) from the isochromat simulation itself, for the pairs
    # whose train stays well above the noise floor (Gaussian bound), below 180 deg (inside the angle's range)
    for j, (t2, ang) in enumerate(pairs):
        if t2 < 0.09 or ang == 180.0:
            continue
        crlb = _crlb(lambda p: p[0] * cpmg_isochromats(p[1], t1, esp, n_echoes, p[2], n_iso=512), [M0, t2, ang],
                     sigma, 1)
        sel = slice(j * reps, (j + 1) * reps)
        assert np.median(maps.stderr["T2"][sel][ok[sel]]) / crlb == pytest.approx(1.0, abs=0.05)


# --------------------------------------------------------------------- magnitude IR, SNR 30, T1 <= 3 s
TI = np.array([0.05, 0.1, 0.2, 0.4, 0.7, 1.0, 1.5, 2.2, 3.2, 5.0])


def _ir(ti, a, b, t1):  # S = a + b exp(-TI/T1) (Barral et al. 2010), signed
    return a + b * np.exp(-ti / t1)


def _ir_voxels(rng, n: int):
    """n voxels: T1 uniform in 0.3-3 s, inversion efficiency k in 0.9-1; returns T1, k and the signed signal (n, TI)."""
    t1 = rng.uniform(0.3, 3.0, n)
    k = rng.uniform(0.9, 1.0, n)
    return t1, k, _ir(TI, M0, -M0 * (1 + k)[:, None], t1[:, None])


def test_ir_magnitude_snr30_coverage_crlb_and_curve_fit():
    rng = np.random.default_rng(23)
    t1, k, s = _ir_voxels(rng, 56 * 56)
    sigma = M0 / 30
    vol, mask = _volume(np.abs(s), sigma, rng)
    model = InversionRecovery(TI)
    given = fit_volume(model, vol, mask=mask, sigma=sigma)
    ok = given.status[mask] == st.FITTED
    assert ok.mean() > 0.99
    est1, se1 = given["T1"][mask], given.stderr["T1"][mask]
    c_given = _check(est1[ok], t1[ok], se1[ok], lo=0.92)
    est_sigma, _ = resolve_sigma("auto", ArraySource(vol))
    est = fit_volume(model, vol, mask=mask, sigma=est_sigma)
    c_est = _check(est["T1"][mask][ok], t1[ok], est.stderr["T1"][mask][ok], lo=0.92)
    assert abs(c_est - c_given) <= 0.01
    # curve_fit with absolute sigma on voxels with no sample near the null (there qmap's rule widens the
    # interval, tested below): the same standard errors
    y = vol[mask]
    far = np.flatnonzero(ok & (np.min(np.abs(s), axis=1) > 6 * sigma))
    for i in far[:25]:
        ysgn = y[i] * np.where(TI < t1[i] * np.log(1 + k[i]), -1.0, 1.0)  # the sign the truth gives
        _p, c = curve_fit(_ir, TI, ysgn, p0=[M0, -2 * M0, t1[i]], sigma=np.full(TI.size, sigma), absolute_sigma=True)
        assert se1[i] == pytest.approx(np.sqrt(c[2, 2]), rel=0.02)
    # Cramer-Rao bound at the truth for those voxels
    crlb = np.array([_crlb(lambda p: _ir(TI, *p), [M0, -M0 * (1 + k[i]), t1[i]], sigma, 2) for i in far[:200]])
    assert np.median(se1[far[:200]] / crlb) == pytest.approx(1.0, abs=0.05)


def test_ir_near_null_rule_widens_and_keeps_low_snr_coverage():
    # the documented rule: samples whose fitted magnitude is below 2 sigma carry no information in the
    # standard errors (sign guessed, Rician error). Without it the 95 % interval covers only ~90 % of the
    # voxels with such a sample; with it coverage stays >= 93 % down to SNR 15
    rng = np.random.default_rng(24)
    t1, _, s = _ir_voxels(rng, 4000)
    sigma = M0 / 15
    y = _rician(s, sigma, rng)
    maps = fit_volume(InversionRecovery(TI), y, sigma=sigma)
    ok = maps.status == st.FITTED
    cov95, rsd = _coverage(maps["T1"][ok], t1[ok], maps.stderr["T1"][ok])
    assert 0.93 <= cov95 <= 0.97 and 0.9 <= rsd <= 1.1
    # the plain Fisher information (the real-valued model, where no sign is lost) is narrower: the rule widens
    real = fit_volume(InversionRecovery(TI, signal="real"), y * np.sign(s), sigma=sigma)
    near = ok & (np.min(np.abs(s), axis=1) < 2 * sigma)
    assert near.mean() > 0.3
    assert np.median(maps.stderr["T1"][near] / real.stderr["T1"][near]) > 1.02


# --------------------------------------------------------------------- 4-angle VFA with a B1 map, SNR 200
FA = np.array([3.0, 8.0, 15.0, 25.0])
TR = 0.015


def _spgr(fa, m0, t1, b1):  # Ernst-Anderson steady state, actual angle = B1 x nominal (Cheng & Wright 2006)
    a = np.deg2rad(b1 * fa)
    e1 = np.exp(-TR / t1)
    return m0 * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))


def test_vfa_snr200_b1_map_with_its_own_error_propagated():
    rng = np.random.default_rng(25)
    n = 56 * 56
    t1 = rng.uniform(0.5, 2.5, n)
    b1 = rng.uniform(0.8, 1.2, n)
    b1_se = 0.01
    b1_map = b1 + rng.normal(0.0, b1_se, n)  # the B1 map the fit is given: itself uncertain
    s = _spgr(FA, M0, t1[:, None], b1[:, None])
    sigma = s.max() / 200
    vol, mask = _volume(s, sigma, rng)
    b1_vol = np.full(mask.shape, 1.0)
    b1_vol[mask] = b1_map
    model = SpoiledGRE(FA, TR)
    ctx = {"b1": b1_vol}
    given = fit_volume(model, vol, mask=mask, ctx_maps=ctx, sigma=sigma, input_se={"b1": np.full(mask.shape, b1_se)})
    ok = given.status[mask] == st.FITTED
    assert ok.mean() > 0.99
    c_given = _check(given["T1"][mask][ok], t1[ok], given.stderr["T1"][mask][ok])
    assert given.info["stderr"]["propagated_inputs"] == ["b1"]
    # without the propagation the B1 error is ignored and the interval is far too narrow
    plain = fit_volume(model, vol, mask=mask, ctx_maps=ctx, sigma=sigma)
    c_plain, _ = _coverage(plain["T1"][mask][ok], t1[ok], plain.stderr["T1"][mask][ok])
    assert c_plain < 0.85
    # noise level estimated from the background instead: same calibration within one point
    est_sigma, _ = resolve_sigma("auto", ArraySource(vol))
    est = fit_volume(model, vol, mask=mask, ctx_maps=ctx, sigma=est_sigma, input_se={"b1": np.full(mask.shape, b1_se)})
    c_est = _check(est["T1"][mask][ok], t1[ok], est.stderr["T1"][mask][ok])
    assert abs(c_est - c_given) <= 0.01
    # reference for the propagated term: dT1/dB1 by central differences of the closed form at fixed data,
    # i.e. of T1 solving the two-parameter fit -> curve_fit on noise-free signals at B1 +/- h
    i = np.flatnonzero(ok)[0]
    yi = s[i]
    h = 1e-4

    def t1_at(bb):
        p, _ = curve_fit(lambda fa, m0, tt: _spgr(fa, m0, tt, bb), FA, yi, p0=[M0, t1[i]])
        return p[1]

    dt1 = (t1_at(b1[i] + h) - t1_at(b1[i] - h)) / (2 * h)
    g = input_sensitivity(model, np.array([[M0, t1[i]]]), {"b1": np.array([b1[i]])}, "b1")
    assert g[0, 1] == pytest.approx(dt1, rel=1e-3)
    # curve_fit with absolute sigma gives the fit part of the standard error
    _p, c = curve_fit(lambda fa, m0, tt: _spgr(fa, m0, tt, b1_map[i]), FA, vol[mask][i], p0=[M0, t1[i]],
                      sigma=np.full(FA.size, sigma), absolute_sigma=True)
    assert plain.stderr["T1"][mask][i] == pytest.approx(np.sqrt(c[1, 1]), rel=0.02)
    assert given.stderr["T1"][mask][i] == pytest.approx(float(combine_se(np.sqrt(c[1, 1]), dt1, b1_se)), rel=0.03)


def test_add_input_covariance_and_combine_se_agree():
    rng = np.random.default_rng(26)
    cov = np.einsum("npq,nrq->npr", *(2 * [rng.normal(size=(5, 2, 2))]))
    g = rng.normal(size=(5, 2))
    se = np.array([0.1, 0.0, np.nan, 0.3, 1.0])
    out = add_input_covariance(cov, g, se)
    np.testing.assert_allclose(np.sqrt(out[:, 1, 1]), combine_se(np.sqrt(cov[:, 1, 1]), g[:, 1], se), rtol=1e-12)
    np.testing.assert_array_equal(out[2], cov[2])  # an unknown input error adds nothing


# --------------------------------------------------------------------- bounds and conventions
def test_estimate_at_a_bound_never_gets_a_small_standard_error():
    te = np.arange(1, 9) * 0.005
    y = np.vstack([np.full(8, 500.0), 500.0 * np.exp(-te / 0.03)])  # no decay at all -> T2* at its upper bound
    maps = fit_volume(MonoExponential(te), y + np.array([0.0, 1.0] * 4), sigma=2.0)
    assert maps.status[0] == st.AT_BOUND and maps.status[1] == st.FITTED
    assert not np.isfinite(maps.stderr["T2star"][0]) or maps.stderr["T2star"][0] > maps["T2star"][0]
    assert np.isfinite(maps.stderr["T2star"][1])


def test_residual_convention_is_the_relative_sigma_of_curve_fit():
    rng = np.random.default_rng(27)
    te = np.arange(1, 9) * 0.005
    y = 800.0 * np.exp(-te / 0.025) + rng.normal(0.0, 5.0, (30, 8))
    res = fit_volume(MonoExponential(te), y, sigma=5.0, stderr="residual")
    noise = fit_volume(MonoExponential(te), y, sigma=5.0)
    assert res.info["stderr"]["convention"] == "residual" and noise.info["stderr"]["convention"] == "noise"
    for i in range(5):
        _p, c = curve_fit(lambda t, m, tt: m * np.exp(-t / tt), te, y[i], p0=[800, 0.025])
        assert res.stderr["T2star"][i] == pytest.approx(np.sqrt(c[1, 1]), rel=1e-3)
        _p, c = curve_fit(lambda t, m, tt: m * np.exp(-t / tt), te, y[i], p0=[800, 0.025], sigma=np.full(8, 5.0),
                          absolute_sigma=True)
        assert noise.stderr["T2star"][i] == pytest.approx(np.sqrt(c[1, 1]), rel=1e-3)
    # the residual sd sqrt(RSS / (m - P)) is kept as a quality map
    fitted = res["M0"][:, None] * np.exp(-te / res["T2star"][:, None])
    np.testing.assert_allclose(res.quality["residualsd"], np.sqrt(np.sum((y - fitted) ** 2, 1) / 6), rtol=1e-6)


def test_ir_noise_level_from_the_residual_chain_when_there_is_no_background():
    # a tightly cropped volume (no background): the chain estimates sigma from the residuals of a first fit
    # inside the object (pooled over many voxels); the standard errors are then as well calibrated as with
    # sigma given, within one percentage point
    rng = np.random.default_rng(28)
    t1, _, s = _ir_voxels(rng, 56 * 56)
    sigma = M0 / 30
    vol = _rician(np.abs(s), sigma, rng).reshape(56, 56, 1, TI.size)
    model = InversionRecovery(TI)
    est_sigma, info = resolve_sigma("auto", ArraySource(vol), model=model, mask=np.ones((56, 56, 1), bool))
    assert info["source"] == "residuals"
    assert est_sigma == pytest.approx(sigma, rel=0.05)
    given = fit_volume(model, vol, sigma=sigma)
    est = fit_volume(model, vol, sigma=float(est_sigma))
    ok = (given.status == st.FITTED) & (est.status == st.FITTED)
    c_given = _check(given["T1"][ok], t1.reshape(56, 56, 1)[ok], given.stderr["T1"][ok], lo=0.92)
    c_est = _check(est["T1"][ok], t1.reshape(56, 56, 1)[ok], est.stderr["T1"][ok], lo=0.92)
    assert abs(c_est - c_given) <= 0.01


# --------------------------------------------------------------------- one convention per map
@pytest.mark.parametrize("method", ["fast", "lmfit"])
def test_noise_map_holes_get_nan_standard_errors_never_the_residual_variance(method):
    # one convention per standard-error map: with a noise map, a voxel where it has no positive value gets
    # a NaN standard error (the noise sd is not known there), not the residual variance of the other
    # convention; its estimate is the plain least-squares one, unchanged
    rng = np.random.default_rng(41)
    te = np.linspace(0.005, 0.06, 8)
    shape = (4, 3, 2) if method == "lmfit" else (6, 5, 2)
    t2 = rng.uniform(0.02, 0.08, shape)
    sigma = 10.0
    vol = M0 * np.exp(-te / t2[..., None]) + rng.normal(0.0, sigma, shape + (te.size,))
    smap = np.full(shape, sigma)
    holes = np.zeros(shape, bool)
    holes[0, 0, 0] = holes[1, 2, 1] = holes[3, 1, 0] = True
    smap[0, 0, 0], smap[1, 2, 1], smap[3, 1, 0] = np.nan, 0.0, -3.0
    model = MonoExponential(te)
    whole = fit_volume(model, vol, sigma=np.full(shape, sigma), method=method)
    holed = fit_volume(model, vol, sigma=smap, method=method)
    assert np.array_equal(whole.status, holed.status) and (holed.status == st.FITTED).all()
    for name in ("T2star", "M0"):
        assert np.array_equal(whole[name], holed[name])  # the estimates do not use sigma
        assert np.isnan(holed.stderr[name][holes]).all()
        assert np.array_equal(whole.stderr[name][~holes], holed.stderr[name][~holes])
    assert holed.info["stderr"]["convention"] == "noise"
    assert holed.info["stderr"]["no_noise_level_voxels"] == 3
    assert whole.info["stderr"]["no_noise_level_voxels"] == 0
    # the kept standard errors are curve_fit's with the known sigma (absolute_sigma=True)
    i = (2, 2, 1)
    _p, c = curve_fit(lambda t, a, tt: a * np.exp(-t / tt), te, vol[i], p0=[M0, 0.04], sigma=np.full(te.size, sigma),
                      absolute_sigma=True)
    assert holed.stderr["T2star"][i] == pytest.approx(np.sqrt(c[1, 1]), rel=0.01)


def test_noise_map_holes_in_the_linear_vfa_method():
    # the linearised VFA regression (Deoni et al. 2003) follows the same rule as the least-squares fit
    rng = np.random.default_rng(43)
    fa = np.array([3.0, 8.0, 15.0, 25.0])
    tr = 0.015
    t1 = rng.uniform(0.6, 2.0, (5, 4, 1))
    a = np.deg2rad(fa)
    e1 = np.exp(-tr / t1)[..., None]
    vol = M0 * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a)) + rng.normal(0.0, 0.5, t1.shape + (fa.size,))
    smap = np.full(t1.shape, 0.5)
    smap[2, 1, 0] = np.nan
    model = SpoiledGRE(fa, tr)
    whole = fit_volume(model, vol, sigma=np.full(t1.shape, 0.5), method="linear")
    holed = fit_volume(model, vol, sigma=smap, method="linear")
    assert np.array_equal(whole["T1"], holed["T1"])
    assert np.isnan(holed.stderr["T1"][2, 1, 0])
    keep = np.ones(t1.shape, bool)
    keep[2, 1, 0] = False
    assert np.array_equal(whole.stderr["T1"][keep], holed.stderr["T1"][keep])
    assert np.isfinite(holed.stderr["T1"][keep]).all()
    assert holed.info["stderr"]["no_noise_level_voxels"] == 1


@pytest.mark.parametrize("method", ["fast", "linear"])
def test_an_exactly_determined_fit_says_its_standard_errors_come_from_the_noise_sd(method):
    # two flip angles for M0 and T1: no voxel has a residual degree of freedom, so under stderr="residual"
    # the known sigma is the only source -- for the whole map, recorded as the "noise" convention (never a
    # map labelled "residual" that holds sigma-based values); the values are the Cramer-Rao bound
    # sigma sqrt([(J^T J)^-1]_T1) (Kay 1993), computed here by central differences of the SPGR signal
    # S = M0 sin a (1 - E1) / (1 - E1 cos a) (Fram et al. 1987)
    fa, tr, t1, m0, sigma = np.array([4.0, 24.0]), 0.015, 1.1, 800.0, 0.4
    a = np.deg2rad(fa)

    def spgr(p):
        e1 = np.exp(-tr / p[1])
        return p[0] * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))

    y = np.tile(spgr(np.array([m0, t1])), (3, 1))
    res = fit_volume(SpoiledGRE(fa, tr), y, sigma=sigma, stderr="residual", method=method)
    noise = fit_volume(SpoiledGRE(fa, tr), y, sigma=sigma, method=method)
    assert res.info["stderr"]["convention"] == "noise"
    np.testing.assert_array_equal(res.stderr["T1"], noise.stderr["T1"])
    np.testing.assert_allclose(res.stderr["T1"], _crlb(spgr, [m0, t1], sigma, 1), rtol=1e-4)
    # with samples to spare the residual convention stays what it says (and without sigma it is all there is)
    fa4 = np.array([3.0, 8.0, 15.0, 25.0])
    y4 = 800.0 * np.sin(np.deg2rad(fa4)) * 0.1 + np.array([0.3, -0.2, 0.1, -0.25])
    assert fit_volume(SpoiledGRE(fa4, tr), y4[None, :], sigma=sigma, stderr="residual",
                      method=method).info["stderr"]["convention"] == "residual"
    assert fit_volume(SpoiledGRE(fa, tr), y, method=method).info["stderr"]["convention"] == "residual"
    assert np.isnan(fit_volume(SpoiledGRE(fa, tr), y, method=method).stderr["T1"]).all()
