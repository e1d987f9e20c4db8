"""Noise-floor handling on Monte-Carlo magnitude data (issue: noise floor).

Rician noise is made as the modulus of complex Gaussian noise (Gudbjartsson &
Patz, Magn Reson Med 1995;34:910; Rice 1944) -- independent of qmap's Rician
expectation, which is what the default mode fits.
"""

import numpy as np
import pytest

from qmap.api import fit_t2star
from qmap.fitting.noise_floor import DEFAULT_MODE
from tests.conftest import rician

TE = np.linspace(0.002, 0.040, 12)  # 12 echoes 2-40 ms
SNR = 20.0
T2S = np.array([0.003, 0.005, 0.008, 0.012, 0.02, 0.03, 0.045, 0.06])
NREP = 400


@pytest.fixture(scope="module")
def low_snr():
    rng = np.random.default_rng(20)
    sigma = 1.0
    m0 = SNR * sigma
    truth = np.repeat(T2S, NREP)
    signal = m0 * np.exp(-TE / truth[:, None])
    return rician(signal, sigma, rng), truth, sigma


def _median_bias(maps, truth):
    out = {}
    for t in T2S:
        sel = truth == t
        est = maps["T2star"][sel]
        out[t] = np.median(est[np.isfinite(est)]) / t - 1
    return out


def test_default_mode_is_unbiased_and_none_is_not(low_snr):
    y, truth, sigma = low_snr
    assert DEFAULT_MODE == "rician"
    default = _median_bias(fit_t2star(y, TE, sigma=sigma), truth)
    plain = _median_bias(fit_t2star(y, TE, noise_floor="none"), truth)
    for t in T2S[T2S >= 0.005]:
        assert abs(default[t]) < 0.03, (t, default[t])
    # the plain exponential is pulled up by the floor where the decay reaches it (short T2*)
    assert plain[0.003] > 0.15 and plain[0.005] > 0.10, plain
    assert plain[0.005] > 3 * abs(default[0.005])


def test_truncate_reduces_the_floor_bias(low_snr):
    y, truth, sigma = low_snr
    plain = _median_bias(fit_t2star(y, TE, noise_floor="none"), truth)
    trunc = _median_bias(fit_t2star(y, TE, noise_floor="truncate", sigma=sigma), truth)
    for t in (0.003, 0.005, 0.008):
        assert abs(trunc[t]) < abs(plain[t]), (t, trunc[t], plain[t])


def test_offset_overcorrects_at_low_snr(low_snr):
    # documented behaviour (README): at SNR 20 the free offset absorbs part of the decay itself, so
    # T2* comes out low -- the opposite sign of the plain fit's bias (cf. Milford et al. 2015, memory)
    y, truth, _sigma = low_snr
    offset = _median_bias(fit_t2star(y, TE, noise_floor="offset"), truth)
    assert all(v < 0 for v in offset.values()), offset
    assert offset[0.003] > -0.35


def test_rician_standard_errors_are_calibrated(low_snr):
    # the reported standard error should match the spread of the estimates (within 20 % at SNR 20)
    y, truth, sigma = low_snr
    maps = fit_t2star(y, TE, sigma=sigma)
    for t in (0.008, 0.02, 0.045):
        sel = (truth == t) & (maps.status == 0)
        est = maps["T2star"][sel]
        robust_sd = 1.4826 * np.median(np.abs(est - np.median(est)))
        se = np.median(maps.stderr["T2star"][sel])
        assert 0.8 < se / robust_sd < 1.25, (t, se, robust_sd)


def test_truncate_reports_samples_used(low_snr):
    y, truth, sigma = low_snr
    maps = fit_t2star(y, TE, noise_floor="truncate", sigma=sigma)
    n = maps.quality["nsamples"]
    assert n.min() >= 3 and n.max() == TE.size
    assert np.median(n[truth == 0.003]) < np.median(n[truth == 0.06])


def test_offset_map_written_and_nonnegative(low_snr):
    y, truth, sigma = low_snr
    maps = fit_t2star(y, TE, noise_floor="offset")
    assert np.nanmin(maps["Offset"]) >= 0
    # with pure floor at late echoes the offset approaches the Rayleigh mean sigma*sqrt(pi/2) (Gudbjartsson & Patz)
    assert abs(np.nanmedian(maps["Offset"][truth == 0.003]) / (sigma * np.sqrt(np.pi / 2)) - 1) < 0.2


def test_rician_refit_leaves_high_snr_voxels_alone():
    # far above the floor the default mode gives the Gaussian least-squares answer exactly
    rng = np.random.default_rng(4)
    y = 1000 * np.exp(-TE / 0.02) + rng.normal(0, 1.0, (50, TE.size))
    a = fit_t2star(y, TE, sigma=1.0)
    b = fit_t2star(y, TE, noise_floor="none")
    np.testing.assert_array_equal(a["T2star"], b["T2star"])


def test_noise_only_voxels_take_the_fast_path():
    """Pure-noise voxels get status NOISE_ONLY and NaN maps; voxels with signal are fitted as before."""
    from qmap.fitting import status as st

    rng = np.random.default_rng(31)
    sigma = 2.0
    n_noise, n_sig = 4000, 400
    truth = np.full(n_sig, 0.02)
    signal = np.concatenate([np.zeros((n_noise, TE.size)), 40 * np.exp(-TE / truth[:, None])])
    data = rician(signal, sigma, rng)  # modulus of complex Gaussian noise (Gudbjartsson & Patz 1995)
    maps = fit_t2star(data, TE, noise_floor="rician", sigma=sigma)
    noise_status = maps.status[:n_noise]
    # pure noise passes the mean + 3 SE limit in about 0.13 % of voxels (normal tail; allow 0.6 %)
    assert np.mean(noise_status == st.NOISE_ONLY) > 0.994
    assert np.all(np.isnan(maps["T2star"][:n_noise][noise_status == st.NOISE_ONLY]))
    assert not np.any(maps.status[n_noise:] == st.NOISE_ONLY)  # SNR 20 at TE 0: never mistaken for noise
    # the signal voxels are fitted exactly as without the noise-only voxels in the same call
    alone = fit_t2star(data[n_noise:], TE, noise_floor="rician", sigma=sigma)
    np.testing.assert_array_equal(maps["T2star"][n_noise:], alone["T2star"])
    np.testing.assert_array_equal(maps.status[n_noise:], alone.status)


@pytest.mark.parametrize("coils", [1, 4])
def test_noise_only_limit_uses_the_central_chi_moments(coils):
    """The limit is mean + 3 sd / sqrt(m) of the central chi distribution with 2N dof (scipy.stats.chi)."""
    from scipy import stats

    from qmap.fitting.noise_floor import NOISE_ONLY_Z, NoiseFloor

    chi = stats.chi(2 * coils)
    m = 12
    limit = chi.mean() + NOISE_ONLY_Z * chi.std() / np.sqrt(m)
    y = np.repeat(np.array([[limit * (1 - 1e-9)], [limit * (1 + 1e-9)]]), m, axis=1)
    assert NoiseFloor("rician", coils=coils).noise_only(y, 1.0).tolist() == [True, False]
    assert not NoiseFloor("none").noise_only(y, 1.0).any()
