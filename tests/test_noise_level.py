"""The noise-level chain (``--sigma auto`` / ``local``), the automatic mask, and their diagnoses.

References used below:
- Rayleigh / Rice / chi distributions: ``scipy.stats.rayleigh``, ``rice``, ``chi`` (magnitude noise of one
  coil and of N sum-of-squares coils; Gudbjartsson & Patz, Magn Reson Med 1995;34:910; Constantinides et al.,
  Magn Reson Med 1997;38:852).
- Asymptotic standard error of a sample median, 1 / (2 f(m) sqrt(n)) (common practice; e.g. Kendall's
  Advanced Theory of Statistics; from memory).
- Residual variance of a least-squares fit, E[RSS] = sigma^2 (m - p) (common practice; any regression text).
"""

from __future__ import annotations

import json
import math

import nibabel as nib
import numpy as np
import pytest
from scipy import stats

from qmap.cli import main
from qmap.errors import InputError
from qmap.models.monoexp import MonoExponential
from qmap.noise_level import (
    ArraySource,
    _median_sigma,
    auto_mask,
    background_estimate,
    estimate_noise,
    median_relative_se,
    residual_estimate,
)
from tests.conftest import rician, write_nifti

TE = np.linspace(0.002, 0.040, 12)  # 12 echoes, 2-40 ms


def _square(shape, lo: int, hi: int) -> np.ndarray:
    """An object mask: the in-plane square [lo, hi) x [lo, hi) in every slice."""
    obj = np.zeros(shape, bool)
    obj[lo:hi, lo:hi] = True
    return obj


def _decay_volume(shape, *, rim=0, sigma=5.0, m0=100.0, seed=0, zero_fill=False, t2_lo=0.004, t2_hi=0.06):
    """T2* rising along x across the object (t2_lo..t2_hi), object = everything but a rim of ``rim`` voxels."""
    rng = np.random.default_rng(seed)
    X = shape[0]
    x = np.indices(shape)[0]
    obj = np.zeros(shape, bool)
    obj[rim:X - rim, rim:shape[1] - rim, :] = True
    frac = np.clip((x - rim) / max(X - 2 * rim - 1, 1), 0, 1)
    t2 = t2_lo + (t2_hi - t2_lo) * frac
    s = np.where(obj[..., None], m0 * np.exp(-TE / t2[..., None]), 0.0)
    d = rician(s, sigma, rng)
    if zero_fill:
        d[~obj] = 0.0
    return d.astype(np.float32), t2, obj


# ---------------------------------------------------------------------------
# Precision of the median-based background estimate
# ---------------------------------------------------------------------------


def test_median_relative_se_rederived_from_the_rayleigh_density_and_monte_carlo():
    # sample-median asymptotics: se(median) = 1 / (2 f(m) sqrt(n)); for the Rayleigh density
    # (scipy.stats.rayleigh) m = sqrt(2 ln 2) = 1.17741 and f(m) = m exp(-m^2 / 2) = m / 2
    m = stats.rayleigh.median()
    assert m == pytest.approx(1.17741, abs=1e-5)
    c = 1.0 / (2.0 * stats.rayleigh.pdf(m) * m)  # relative se of sigma = median / m, times sqrt(n)
    assert c == pytest.approx(0.7213, abs=1e-4)
    assert median_relative_se(1) == pytest.approx(c, rel=1e-12)
    # and for 4 coils against scipy.stats.chi(8)
    m4 = stats.chi(8).median()
    assert median_relative_se(4) == pytest.approx(1.0 / (2.0 * stats.chi(8).pdf(m4) * m4), rel=1e-9)
    # Monte-Carlo: the spread of sigma-hat = median / 1.17741 from n = 300 samples
    rng = np.random.default_rng(11)
    est = np.median(stats.rayleigh.rvs(size=(4000, 300), random_state=rng), axis=1) / m
    assert np.std(est) == pytest.approx(c / math.sqrt(300), rel=0.06)  # 0.7213 / sqrt(300) = 4.2 %


def test_grouped_median_undoes_integer_rounding():
    # integer storage of Rayleigh noise of about one unit: the plain median is a whole number, so
    # sigma = median / 1.1774 could only be a multiple of 0.849; the fraction below a rounding
    # boundary (k + 1/2) is the Rayleigh distribution function there (scipy.stats.rayleigh)
    rng = np.random.default_rng(5)
    for sigma in (0.8, 1.0, 1.3, 1.7, 2.4):
        v = np.round(stats.rayleigh.rvs(scale=sigma, size=400_000, random_state=rng))
        plain = np.median(v) / stats.rayleigh.median()
        grouped = _median_sigma(v, 1.0, 1)
        assert grouped == pytest.approx(sigma, rel=0.01), sigma
        if sigma in (1.0, 1.3):
            assert abs(plain / sigma - 1) > 0.1  # the snapping the grouped median removes


def test_integer_background_near_one_unit_is_estimated_in_the_chain():
    rng = np.random.default_rng(6)
    shape = (48, 48, 4)
    obj = _square(shape, 14, 34)
    for sigma in (0.9, 1.3):
        d = np.round(rician(np.where(obj, 60.0, 0.0)[..., None] * np.ones(3), sigma, rng))
        est = background_estimate(ArraySource(d))
        assert est.value == pytest.approx(sigma, rel=0.05)
        assert est.details.get("quantum") == 1.0


# ---------------------------------------------------------------------------
# The chain against the true sigma (Monte-Carlo over SNR and object size)
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("snr", [5, 20, 200])
def test_background_source_over_snr(snr):
    # background Rayleigh noise drawn with scipy.stats.rayleigh, object signal with scipy.stats.rice
    rng = np.random.default_rng(100 + snr)
    shape = (32, 32, 3)
    sigma = 2.0
    obj = _square(shape, 10, 22)
    errs, precs = [], []
    for _ in range(8):
        d = stats.rayleigh.rvs(scale=sigma, size=shape + (6,), random_state=rng)
        nu = snr * sigma
        d[obj] = stats.rice.rvs(nu / sigma, scale=sigma, size=(int(obj.sum()), 6), random_state=rng)
        est = estimate_noise(ArraySource(d))
        assert est.source == "background"
        errs.append(est.value / sigma - 1)
        precs.append(est.relative_precision)
    assert abs(np.mean(errs)) < 0.02
    assert np.std(errs) < 2.0 * np.mean(precs)  # the stated precision is honest (not optimistic)


@pytest.mark.parametrize(("snr", "side"), [(10, 8), (20, 8), (20, 24), (200, 16)])
def test_residual_source_over_snr_and_object_size(snr, side):
    # a field of view cropped to the object: only the residuals can give sigma
    rng = np.random.default_rng(7 * snr + side)
    sigma = 3.0
    model = MonoExponential(TE)
    errs, precs = [], []
    for k in range(6):
        t2 = rng.uniform(0.02, 0.2, (side, side, 2))
        d = rician(snr * sigma * np.exp(-TE / t2[..., None]), sigma, rng)
        est = residual_estimate(ArraySource(d), model, mask=np.ones(d.shape[:3], bool))
        errs.append(est.value / sigma - 1)
        precs.append(est.relative_precision)
    prec = float(np.mean(precs))
    assert abs(np.mean(errs)) < max(0.02, 2.5 * prec / math.sqrt(len(errs)))
    assert np.std(errs) < 2.0 * prec + 0.005


def test_residual_and_background_estimates_agree():
    d, _, _ = _decay_volume((40, 40, 3), rim=8, sigma=4.0, seed=21)
    src = ArraySource(d)
    bg = background_estimate(src)
    res = residual_estimate(src, MonoExponential(TE), mask=auto_mask(d))
    assert bg.value == pytest.approx(4.0, rel=0.05)
    assert res.value == pytest.approx(4.0, rel=0.05)
    assert abs(math.log(bg.value / res.value)) < 3 * math.hypot(bg.relative_precision, res.relative_precision)
    est = estimate_noise(src, model=MonoExponential(TE))
    assert est.source == "background" and "residual_sigma" in est.details and not est.warnings


def test_model_misfit_is_reported_when_both_sources_exist():
    # a two-compartment decay fitted as one exponential: the residuals overestimate the noise
    rng = np.random.default_rng(3)
    shape = (40, 40, 3)
    obj = _square(shape, 8, 32)
    s = np.where(obj[..., None], 300 * (0.5 * np.exp(-TE / 0.004) + 0.5 * np.exp(-TE / 0.08)), 0.0)
    d = rician(s, 2.0, rng)
    est = estimate_noise(ArraySource(d), model=MonoExponential(TE))
    assert est.source == "background" and est.value == pytest.approx(2.0, rel=0.05)
    assert any("disagree" in n for n in est.warnings)


# ---------------------------------------------------------------------------
# Multi-coil backgrounds, uneven noise
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("coils", [4, 8])
def test_sum_of_squares_background_is_recognised_from_its_moments(coils):
    rng = np.random.default_rng(40 + coils)
    shape = (40, 40, 3)
    sigma = 2.0
    obj = _square(shape, 12, 28)
    # background: sigma * chi(2N) drawn with scipy.stats.chi
    d = stats.chi(2 * coils).rvs(size=shape + (4,), random_state=rng) * sigma
    d[obj] = 200.0 + rng.normal(0, sigma, (int(obj.sum()), 4))
    est = background_estimate(ArraySource(d))
    assert est.coils == coils
    assert est.value == pytest.approx(sigma, rel=0.05)
    assert any(f"{coils} coils" in n for n in est.notes)
    # with --coils 1 given, it says so instead of changing it
    told = background_estimate(ArraySource(d), coils=1)
    assert told.coils == 1 and any(n.endswith("not the coils=1 given; check coils=") for n in told.warnings)


def test_rayleigh_background_is_not_mistaken_for_several_coils():
    rng = np.random.default_rng(77)
    for _ in range(5):
        d = stats.rayleigh.rvs(scale=3.0, size=(40, 40, 3, 2), random_state=rng)
        d[12:28, 12:28] = 300.0
        assert background_estimate(ArraySource(d)).coils == 1


def test_uneven_background_noise_suggests_local():
    rng = np.random.default_rng(9)
    shape = (48, 48, 3)
    x = np.indices(shape)[0]
    sig = 2.0 * 2.5 ** (x / 47.0)
    obj = _square(shape, 16, 32)
    d = rician(np.where(obj, 200.0, 0.0)[..., None] * np.ones(4), sig[..., None], rng)
    est = background_estimate(ArraySource(d))
    assert any("consider sigma='local'" in n for n in est.warnings)
    even = rician(np.where(obj, 200.0, 0.0)[..., None] * np.ones(4), 2.0, rng)
    assert not background_estimate(ArraySource(even)).warnings


# ---------------------------------------------------------------------------
# Hostile inputs: a clear cause, or a documented fallback
# ---------------------------------------------------------------------------


def test_constant_background_is_not_noise_and_the_residuals_take_over():
    d, _t2, obj = _decay_volume((32, 32, 3), rim=6, sigma=4.0, seed=2)
    d[~obj] = 7.0  # a constant offset outside the object
    with pytest.raises(InputError, match="does not scatter like noise"):
        background_estimate(ArraySource(d))
    est = estimate_noise(ArraySource(d), model=MonoExponential(TE))
    assert est.source == "residuals" and est.value == pytest.approx(4.0, rel=0.1)


def test_nan_slices_are_left_out():
    d, _t2, _obj = _decay_volume((40, 40, 4), rim=10, sigma=3.0, seed=4)
    d[:, :, 1] = np.nan
    est = estimate_noise(ArraySource(d), model=MonoExponential(TE))
    assert est.value == pytest.approx(3.0, rel=0.06)


def test_no_object_and_no_degrees_of_freedom_is_a_clear_error():
    rng = np.random.default_rng(8)
    noise_only = stats.rayleigh.rvs(scale=2.0, size=(24, 24, 3, 12), random_state=rng)
    with pytest.raises(InputError, match=r"cannot estimate the noise level: .*sigma=VALUE"):
        estimate_noise(ArraySource(noise_only), model=MonoExponential(TE))
    zero_filled = np.zeros((24, 24, 3, 3))
    zero_filled[4:20, 4:20] = 100 * np.exp(-TE[:3] / 0.03) + rng.normal(0, 1, (16, 16, 3, 3))
    with pytest.raises(InputError, match=r"zero-filled.*too few degrees of freedom"):
        estimate_noise(ArraySource(zero_filled), model=MonoExponential(TE[:3]))


def test_mask_swallowing_the_image_is_named():
    # SNR 2: the automatic mask takes in most of the image; the message says so and suggests --mask
    rng = np.random.default_rng(12)
    d = rician(2.0 * np.ones((16, 16, 3, 3)), 1.0, rng)
    with pytest.raises(InputError, match=r"mask covers .*\(mask=FILE\)"):
        estimate_noise(ArraySource(d), model=MonoExponential(TE[:3]))


# ---------------------------------------------------------------------------
# The automatic mask keeps dim regions that are clearly above the noise
# ---------------------------------------------------------------------------


def test_auto_mask_keeps_an_insert_at_20_percent_of_its_surroundings():
    rng = np.random.default_rng(0)
    shape = (64, 64, 6)
    x, y, _ = np.indices(shape)
    r2 = (x - 31.5) ** 2 + (y - 31.5) ** 2
    obj, ins = r2 < 26**2, r2 < 10**2
    amp = np.where(obj, 100.0, 0.0)
    amp[ins] = 20.0  # 10x the noise sd; the insert runs through every slice (not an enclosed hole)
    d = rician(amp[..., None] * np.exp(-TE / 0.05), 2.0, rng)
    m = auto_mask(d)
    assert m[ins].mean() > 0.98 and m[obj].mean() > 0.98
    assert m[~obj].mean() < 0.01


# ---------------------------------------------------------------------------
# Command line: the "Done when" figures
# ---------------------------------------------------------------------------


def _short_bias(t2map, t2, sel):
    """Mean over the true T2* values <= 10 ms of |mean estimate / truth - 1|."""
    sel = sel & (t2 <= 0.010) & np.isfinite(t2map)
    vals = np.unique(np.round(t2[sel], 7))
    return float(np.mean([abs(np.mean(t2map[sel][np.round(t2[sel], 7) == v]) / v - 1) for v in vals]))


@pytest.mark.parametrize(("case", "shape", "rim", "zero"), [
    ("cropped", (32, 32, 3), 0, False),
    ("zero-filled", (40, 40, 3), 8, True),
    ("rim", (16, 16, 3), 2, False),
])
def test_defaults_work_on_cropped_zero_filled_and_tiny_series(tmp_path, case, shape, rim, zero):
    d, t2, obj = _decay_volume(shape, rim=rim, sigma=5.0, seed=len(case), zero_fill=zero)  # SNR 20
    path = write_nifti(tmp_path / "sub-01_T2starw.nii.gz", d, sidecar={"EchoTime": TE.tolist()})
    out = tmp_path / "out"
    assert main(["t2star", str(path), "-o", str(out), "-q", "--prefix", "sub-01_T2starw"]) == 0
    prov = json.loads((out / "sub-01_T2starw_provenance.json").read_text())
    noise = prov["noise"]
    assert noise["mode"] == "rician" and noise["sigma_mode"] == "auto"
    assert {"sigma", "source", "n_voxels", "relative_precision"} <= set(noise)
    if case != "rim":
        assert noise["sigma"] == pytest.approx(5.0, rel=0.10)
    t2map = nib.load(out / "sub-01_T2starw_T2starmap.nii.gz").get_fdata()
    status = nib.load(out / "sub-01_T2starw_desc-status_fitmap.nii.gz").get_fdata()
    assert _short_bias(t2map, t2, obj & (status == 0)) < 0.03
    if case == "cropped":
        assert main(["t2star", str(path), "-o", str(tmp_path / "plain"), "-q", "--noise-floor", "none",
                     "--prefix", "sub-01_T2starw"]) == 0
        plain = nib.load(tmp_path / "plain" / "sub-01_T2starw_T2starmap.nii.gz").get_fdata()
        assert _short_bias(plain, t2, obj) > 0.1  # what the noise floor fixes


def test_sigma_local_on_noise_varying_2_5x(tmp_path):
    rng = np.random.default_rng(3)
    shape = (40, 40, 3)
    x, y, _ = np.indices(shape)
    t2 = 0.004 + 0.056 * (y % 10) / 9.0
    sig = 100 / 33 * 2.5 ** (x / (shape[0] - 1))  # SNR 33 .. 13, a cropped field of view
    d = rician(100 * np.exp(-TE / t2[..., None]), sig[..., None], rng).astype(np.float32)
    path = write_nifti(tmp_path / "sub-01_T2starw.nii.gz", d, sidecar={"EchoTime": TE.tolist()})
    out = tmp_path / "out"
    assert main(["t2star", str(path), "-o", str(out), "-q", "--sigma", "local", "--prefix", "sub-01_T2starw"]) == 0
    t2map = nib.load(out / "sub-01_T2starw_T2starmap.nii.gz").get_fdata()
    smap = nib.load(out / "sub-01_T2starw_desc-noise_sigmamap.nii.gz").get_fdata()
    assert np.median(smap / sig) == pytest.approx(1.0, abs=0.03)
    for half in (x < 20, x >= 20):
        assert _short_bias(t2map, t2, half) < 0.03
    prov = json.loads((out / "sub-01_T2starw_provenance.json").read_text())
    assert prov["noise"]["sigma_mode"] == "local" and prov["noise"]["source"] == "local"
    assert prov["noise"]["sigma"] == pytest.approx(float(np.median(smap[smap > 0])), rel=1e-4)
    assert prov["outputs"]["sub-01_T2starw_desc-noise_sigmamap.nii.gz"]["units"] == "a.u."


def test_pure_noise_voxels_with_a_given_sigma_are_not_fitted(tmp_path):
    # very low SNR: the automatic mask takes in background; with --sigma given those voxels must not be status 0
    rng = np.random.default_rng(31)
    shape = (24, 24, 3)
    obj = _square(shape, 3, 21)  # most of the image: the series as a whole decays (qmap's pre-fit check)
    d = rician(np.where(obj, 6.0, 0.0)[..., None] * np.exp(-TE / 0.05), 1.0, rng)
    path = write_nifti(tmp_path / "lo.nii.gz", d, sidecar={"EchoTime": TE.tolist()})
    out = tmp_path / "out"
    assert main(["t2star", str(path), "-o", str(out), "-q", "--sigma", "1", "--mask", "none", "--prefix", "lo"]) == 0
    from qmap.fitting import status as st

    status = nib.load(out / "lo_desc-status_fitmap.nii.gz").get_fdata()
    assert np.mean(status[~obj] == 0) < 0.01  # a pure-noise voxel passes about once in a thousand
    assert np.mean(status[~obj] == st.NOISE_ONLY) > 0.98
    assert np.mean(status[obj] == 0) > 0.95


def test_epg_cropped_series_runs_with_defaults(tmp_path):
    # 32 echoes, refocusing at 150 deg; echo amplitudes from the independent isochromat simulation
    from tests.reference.isochromat import cpmg_isochromats

    esp, n = 0.01, 32
    te = esp * np.arange(1, n + 1)
    t2s = np.array([0.04, 0.08, 0.12])
    trains = np.stack([cpmg_isochromats(t2, 1.0, esp, n, 150.0, n_iso=512) for t2 in t2s])
    rng = np.random.default_rng(2)
    shape = (12, 12, 2)
    which = np.indices(shape)[0] % 3
    d = rician(500 * trains[which], 5.0, rng)  # SNR 100 at TE 0 (cropped: no background)
    path = write_nifti(tmp_path / "sub-01_MESE.nii.gz", d, sidecar={"EchoTime": te.tolist()})
    out = tmp_path / "out"
    assert main(["t2", str(path), "--epg", "-o", str(out), "-q", "--prefix", "sub-01_MESE"]) == 0
    t2map = nib.load(out / "sub-01_MESE_T2map.nii.gz").get_fdata()
    for k, t2 in enumerate(t2s):
        assert np.median(t2map[which == k]) == pytest.approx(t2, rel=0.03)
    prov = json.loads((out / "sub-01_MESE_provenance.json").read_text())
    assert prov["noise"]["source"] == "residuals" and prov["noise"]["sigma"] == pytest.approx(5.0, rel=0.1)


# ---------------------------------------------------------------------------
# Array API
# ---------------------------------------------------------------------------


def test_array_api_sigma_auto_runs_the_chain():
    import qmap
    from qmap.fitting.noise_floor import NoiseFloor
    from qmap.maps import fit_volume

    d, t2, obj = _decay_volume((20, 20, 3), sigma=5.0, seed=9)
    maps = qmap.fit_t2star(d, TE)  # default sigma="auto"
    assert maps.info["noise"]["source"] == "residuals"
    assert maps.info["noise"]["sigma"] == pytest.approx(5.0, rel=0.1)
    assert _short_bias(maps["T2star"], t2, obj & (maps.status == 0)) < 0.03
    with pytest.raises(ValueError, match="needs sigma"):
        fit_volume(MonoExponential(TE), d, noise=NoiseFloor("rician"), sigma=None)
    with pytest.raises(InputError, match=r"sigma=VALUE"):
        qmap.fit_t2star(d[..., :3], TE[:3])


# ---------------------------------------------------------------------------
# batch: small series fit with the defaults; per-type fit options
# ---------------------------------------------------------------------------


def _small_bids(root, rng):
    """sub-01: a 16x16x3 MEGRE (12 echoes) and MESE (12 echoes, 10 ms) with a 2-voxel noise rim, SNR 20."""
    anat = root / "sub-01" / "anat"
    anat.mkdir(parents=True)
    obj = _square((16, 16, 3), 2, 14)
    te_se = 0.01 * np.arange(1, 13)
    for suffix, te, t2 in (("MEGRE", TE, 0.02), ("MESE", te_se, 0.06)):
        for i, t in enumerate(te, 1):
            vol = rician(np.where(obj, 100.0 * np.exp(-t / t2), 0.0), 5.0, rng)
            write_nifti(anat / f"sub-01_echo-{i}_{suffix}.nii.gz", vol, sidecar={"EchoTime": float(t)})
    (root / "dataset_description.json").write_text(json.dumps({"Name": "small", "BIDSVersion": "1.8.0"}))
    return obj


def test_batch_fits_small_series_with_defaults_and_takes_fit_options(tmp_path, capsys):
    from qmap.batch import fit_options
    from qmap.errors import UsageError

    rng = np.random.default_rng(13)
    obj = _small_bids(tmp_path / "bids", rng)
    deriv = tmp_path / "deriv"
    assert main(["batch", str(tmp_path / "bids"), "-o", str(deriv), "-q", "-j", "1"]) == 0
    anat = deriv / "sub-01" / "anat"
    for stem, param, truth in (("acq-megre", "T2star", 0.02), ("acq-mese", "T2", 0.06)):
        prov = json.loads((anat / f"sub-01_{stem}_provenance.json").read_text())
        assert prov["noise"]["source"] == "residuals"
        assert prov["noise"]["sigma"] == pytest.approx(5.0, rel=0.15)
        est = nib.load(anat / f"sub-01_{stem}_{param}map.nii.gz").get_fdata()
        status = nib.load(anat / f"sub-01_{stem}_desc-status_fitmap.nii.gz").get_fdata()
        assert np.mean(status[obj] == 0) > 0.9
        assert np.median(est[obj & (status == 0)]) == pytest.approx(truth, rel=0.03)
    # per-type options from a TOML file, command line on top
    cfg = tmp_path / "fit.toml"
    cfg.write_text('[all]\nunits = "ms"\n\n[MEGRE]\nsigma = "local"\n\n[MESE]\nnoise-floor = "offset"\n')
    assert main(["batch", str(tmp_path / "bids"), "-o", str(deriv), "-q", "-j", "1", "--config", str(cfg),
                 "--mask", "none"]) == 0
    prov = json.loads((anat / "sub-01_acq-megre_provenance.json").read_text())
    assert prov["options"]["units"] == "ms" and prov["noise"]["sigma_mode"] == "local"
    assert {"--sigma", "local", "--units", "ms", "--mask", "none"} <= set(prov["command_line"])
    assert (anat / "sub-01_acq-megre_desc-noise_sigmamap.nii.gz").is_file()
    prov = json.loads((anat / "sub-01_acq-mese_provenance.json").read_text())
    assert prov["noise"]["mode"] == "offset" and prov["options"]["mask"].startswith("none")
    assert (anat / "sub-01_acq-mese_Offsetmap.nii.gz").is_file()
    capsys.readouterr()
    # bad configurations are refused before anything runs
    bad = tmp_path / "bad.toml"
    bad.write_text('[VFA]\nsigma = 3\n')
    with pytest.raises(UsageError, match="does not apply to VFA"):
        fit_options(None, bad)
    bad.write_text('[MEGRE]\nnoise = "x"\n')
    with pytest.raises(UsageError, match="batch option 'noise'"):
        fit_options(None, bad)
    assert main(["batch", str(tmp_path / "bids"), "-o", str(deriv), "--config", str(tmp_path / "none.toml")]) == 2
    assert "cannot read it as TOML" in capsys.readouterr().err


def test_signed_real_export_is_refused_with_its_cause(tmp_path, capsys):
    rng = np.random.default_rng(17)
    obj = np.zeros((16, 16, 2, 1))
    obj[4:12, 4:12] = 1.0
    d = 100 * np.exp(-TE / 0.03) * obj + rng.normal(0, 5, (16, 16, 2, 12))  # a real (signed) channel
    path = write_nifti(tmp_path / "real.nii.gz", d, sidecar={"EchoTime": TE.tolist()})
    assert main(["t2star", str(path), "-o", str(tmp_path / "o"), "-q"]) == 2
    err = capsys.readouterr().err
    assert "negative values" in err and err.count("\n") == 1


def test_residual_source_is_generic_over_models_magnitude_inversion_recovery():
    # |M0 (1 - 2 exp(-TI/T1))| (common practice; Bernstein et al., Handbook of MRI Pulse Sequences 2004):
    # the fit restores the polarity of the early samples (model.candidates); the residuals must be those
    # of the data variant the fit used, and samples near the null (below 5 sigma) are left out
    from qmap.models.ir import InversionRecovery

    rng = np.random.default_rng(23)
    ti = np.array([0.05, 0.1, 0.2, 0.35, 0.6, 1.0, 1.6, 2.6, 4.0, 6.0])
    t1 = rng.uniform(0.3, 2.0, (16, 16, 2))
    d = rician(500 * np.abs(1 - 2 * np.exp(-ti / t1[..., None])), 5.0, rng)
    est = residual_estimate(ArraySource(d), InversionRecovery(ti, signal="magnitude"),
                            mask=np.ones(d.shape[:3], bool))
    assert est.value == pytest.approx(5.0, rel=0.06)


@pytest.mark.parametrize("shape", [(1, 1, 1), (5, 1, 7), (17, 23, 9)])
@pytest.mark.parametrize("fill", [0.3, 0.7, 0.95])
def test_cross_morphology_matches_scipy_ndimage(shape, fill):
    # reference: scipy.ndimage's binary erosion / dilation / opening with their default structure (the
    # 6-connected cross) and border (outside the array False)
    from scipy import ndimage

    from qmap.noise_level import dilate_cross, erode_cross, fill_holes

    a = np.random.default_rng(int(fill * 100) + shape[0]).random(shape) < fill
    assert np.array_equal(erode_cross(a), ndimage.binary_erosion(a))
    assert np.array_equal(dilate_cross(erode_cross(a)), ndimage.binary_opening(a))
    for it in (1, 3):
        assert np.array_equal(dilate_cross(a, it), ndimage.binary_dilation(a, iterations=it))
    assert np.array_equal(fill_holes(a), ndimage.binary_fill_holes(a))
    assert np.array_equal(fill_holes(~a), ndimage.binary_fill_holes(~a))


def test_fill_holes_matches_scipy_on_a_shell_with_cavities():
    # reference: scipy.ndimage.binary_fill_holes (default cross connectivity)
    from scipy import ndimage

    from qmap.noise_level import fill_holes

    x, y, z = np.indices((24, 26, 22)) - np.array([12, 13, 11])[:, None, None, None]
    r = np.sqrt(x**2 + y**2 + z**2)
    shell = (r < 10) & ~((r > 3) & (r < 5))  # a ball with an enclosed spherical cavity
    shell[12, 13, :3] = False  # a channel from the face that reaches nothing
    shell &= ~((np.abs(x) < 2) & (np.abs(y) < 2) & (z > 6))  # a well open to the outside
    out = fill_holes(shell)
    assert np.array_equal(out, ndimage.binary_fill_holes(shell))
    assert out[12, 13, 11 + 4] and not out[12, 13, 21]  # the cavity filled, the well kept
    assert not fill_holes(np.zeros((3, 4, 5), bool)).any() and fill_holes(np.ones((3, 4, 5), bool)).all()


@pytest.mark.parametrize("sweeps", [1, 15, 1000])
def test_fill_holes_matches_scipy_along_a_winding_channel(monkeypatch, sweeps):
    # reference: scipy.ndimage.binary_fill_holes. A channel open to one face that turns 9 times needs many
    # sweeps along whole runs; past FILL_SWEEPS the background is labelled instead (1: at once; 1000: never)
    from scipy import ndimage

    import qmap.noise_level as nl

    monkeypatch.setattr(nl, "FILL_SWEEPS", sweeps)
    block = np.ones((23, 21, 6), bool)
    for k, y in enumerate(range(1, 20, 2)):  # rows of the channel at y = 1, 3, ..., 19, joined at alternate ends
        block[1:22, y, 1:3] = False
        end = 21 if k % 2 == 0 else 1
        if y + 2 < 20:
            block[end, y:y + 3, 1:3] = False
    block[0, 1, 1:3] = False  # the channel's mouth on the x = 0 face
    block[11, 10, 4] = False  # a pocket above the channel, sealed from it: a hole
    out = nl.fill_holes(block)
    assert np.array_equal(out, ndimage.binary_fill_holes(block))
    assert not out[21, 19, 1] and out[11, 10, 4]  # the channel's far end still background; the pocket filled


def test_median64_is_numpys_float64_median_to_the_bit():
    # the object's peak stays float32 (memory); its median must be np.median of the float64 values exactly
    from qmap.noise_level import _median64

    rng = np.random.default_rng(7)
    for n in (1, 2, 3, 10, 1001, 20000):
        x = (rng.lognormal(5.0, 1.0, n)).astype(np.float32)
        assert _median64(x) == float(np.median(x.astype(np.float64))), n
        ties = np.round(x / 50) * 50  # one partition for both middle values: ties around the middle too
        assert _median64(ties.copy(), overwrite=True) == float(np.median(ties.astype(np.float64))), n


def _order_statistic_cases(seed: int, draw):
    """3000 arrays of 1-2000 values ``draw(rng, n)``, float32 and float64 in turn, some with a run of ties,
    some rounded to integers, some with a NaN: (index, size, array)."""
    rng = np.random.default_rng(seed)
    for t in range(3000):
        n = int(rng.integers(1, 2000))
        a = draw(rng, n).astype([np.float32, np.float64][t % 2])
        if t % 5 == 0:
            a[: n // 2] = a[0]
        if t % 7 == 0:
            a = np.round(a)
        if t % 11 == 0:
            a[rng.integers(0, n)] = np.nan
        yield t, n, a


def test_percentile_inplace_is_numpys_bit_for_bit():
    """The automatic mask's clip level (99.9th percentile) by one partition: numpy's value to the bit
    (reference: np.percentile, default linear method), ties, integer values, NaN and the ends included."""
    from qmap.noise_level import percentile_inplace

    for t, n, a in _order_statistic_cases(12, lambda rng, n: rng.gamma(2.0, 100.0, n)):
        q = [99.9, 50.0, 1.0, 99.99, 0.0, 100.0, 37.3][t % 7]
        with np.errstate(invalid="ignore"):
            ref = np.percentile(a.copy(), q, overwrite_input=True)
        got = percentile_inplace(a.copy(), q)
        assert np.asarray(got).dtype == np.asarray(ref).dtype
        assert got == ref or (np.isnan(got) and np.isnan(ref)), (t, n, q)


def test_median_inplace_is_numpys_bit_for_bit():
    """The automatic mask's noise-class median by one partition: np.median's value and type to the bit
    (the mean of the two middle values for an even count, in the values' precision), ties and NaN included."""
    from qmap.noise_level import median_inplace

    for t, n, a in _order_statistic_cases(13, lambda rng, n: rng.rayleigh(10.0, n) * 10 ** rng.uniform(-3, 3)):
        with np.errstate(invalid="ignore"):
            ref = np.median(a.copy(), overwrite_input=True)
        got = median_inplace(a.copy())
        assert type(got) is type(ref), (t, n)
        assert got == ref or (np.isnan(got) and np.isnan(ref)), (t, n)
