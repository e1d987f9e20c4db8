"""The interpolated EPG stand-in (qmap.models.epg_t2.EpgT2Table) and the fit it speeds up.

References outside the project: scipy.optimize.least_squares (trust-region
reflective, tight tolerances) on the exact EPG model decides where the minimum
is; the exact kernel is itself checked against an independent isochromat
simulation in tests/test_epg.py.
"""

import numpy as np
from scipy.optimize import least_squares

from qmap.epg import cpmg_echoes
from qmap.fitting.noise_floor import NoiseFloor
from qmap.fitting.solver import fit_chunk
from qmap.models.epg_t2 import EpgT2, EpgT2Table

E, ESP = 32, 0.01


def _data(n, seed=3):
    rng = np.random.default_rng(seed)
    t2 = rng.uniform(0.04, 0.12, n)
    b1 = rng.uniform(0.85, 1.0, n)
    s = 1000.0 * cpmg_echoes(t2, b1, esp=ESP, n_echoes=E, refocus_deg=180.0)
    return np.abs(s + rng.normal(0, 8, s.shape) + 1j * rng.normal(0, 8, s.shape))


def test_table_reproduces_the_kernel_between_nodes():
    m = EpgT2(np.arange(1, E + 1) * ESP)
    tab = m.surrogate()
    assert isinstance(tab, EpgT2Table) and m.surrogate() is tab  # built once per protocol
    rng = np.random.default_rng(0)
    th = np.column_stack([np.exp(rng.uniform(np.log(0.01), np.log(0.5), 3000)), rng.uniform(-1.0, -0.6, 3000)])
    exact, tabbed = m._train(th, grad=True), tab._train(th, grad=True)
    err = np.abs(exact[0] - tabbed[0])
    # the table holds the signed amplitudes (smooth) and takes the magnitude after interpolating: no smeared kinks
    # where a late echo changes sign (interpolating magnitudes gave 1e-3 at the 99th percentile here)
    assert np.median(err) < 1e-7 and np.percentile(err, 99) < 1e-6
    assert np.max(np.abs(exact[1] - tabbed[1]) * th[:, :1]) < 1e-4  # T2 dE/dT2
    assert np.percentile(np.abs(exact[2] - tabbed[2]), 99) < 1e-4  # dE/dc
    # just beyond 180 degrees (where noise puts half of the perfectly refocused voxels): nodes 0.0025 apart in c
    th2 = np.column_stack([np.exp(rng.uniform(np.log(0.02), np.log(0.3), 3000)), rng.uniform(-1.03, -1.0, 3000)])
    err = np.abs(m._train(th2) - tab._train(th2))
    assert np.median(err) < 1e-6 and np.percentile(err, 99) < 2e-5
    # element-wise: a sub-batch gives the very same numbers
    part = tab._train(th[:77], grad=True)
    assert all(np.array_equal(p, q[:77]) for p, q in zip(part, tabbed))


def test_fit_ends_at_an_exact_model_minimum_same_as_before():
    y = _data(240)
    fast = EpgT2(np.arange(1, E + 1) * ESP)
    exact = EpgT2(np.arange(1, E + 1) * ESP)
    exact.surrogate = None  # the previous path: every iteration on the exact kernel
    a, b = fit_chunk(exact, y), fit_chunk(fast, y)
    se = np.sqrt(b.cov[:, 1, 1])
    assert np.all(np.isfinite(se)) and np.all(b.status == 0)
    # where the previous path ran out of iterations (status 4: a slow crawl along c near 180 degrees, 60 steps)
    # the new one converges, to no higher RSS (to 1e-7 relative: both stop on that flat valley, some 1e-2
    # standard errors of c short of scipy's minimum, whose RSS is below both)
    crawl = a.status != 0
    assert np.array_equal(a.status == 0, b.status == 0) or np.all(b.rss[crawl] <= a.rss[crawl] * (1 + 1e-7))
    same = np.abs(a.params[:, 1] - b.params[:, 1]) <= 0.01 * se
    # near 180 degrees the objective can have two close minima in c; a different start may pick the other one
    assert same.mean() >= 0.97
    assert np.max(np.abs(b.params[same, 1] / a.params[same, 1] - 1)) < 1e-4
    # the covariance is the exact model's at the solution
    assert np.allclose(b.cov[same, 1, 1], a.cov[same, 1, 1], rtol=0.02)
    lo, hi = fast.bounds()
    for k in range(0, 240, 40):  # scipy polishing from the result: the point does not move beyond 1e-2 SE
        r = least_squares(lambda p, k=k: p[0] * exact._train(p[None, 1:])[0] - y[k], b.params[k],
                          bounds=([-np.inf, *lo], [np.inf, *hi]), xtol=1e-14, ftol=1e-14, gtol=1e-14)
        assert abs(r.x[1] - b.params[k, 1]) <= 0.01 * se[k]
        assert 2 * r.cost <= b.rss[k] * (1 + 1e-9) + 1e-9 and b.rss[k] <= 2 * r.cost * (1 + 1e-6)


def test_table_fit_does_not_depend_on_the_chunk():
    y = _data(90, seed=5)
    m = EpgT2(np.arange(1, E + 1) * ESP)
    whole = fit_chunk(m, y)
    part = fit_chunk(m, y[30:60])
    assert np.array_equal(whole.params[30:60], part.params) and np.array_equal(whole.cov[30:60], part.cov)
    nf, sig = NoiseFloor("rician"), np.full(90, 8.0)
    whole, part = fit_chunk(m, y, noise=nf, sigma=sig), fit_chunk(m, y[30:60], noise=nf, sigma=sig[30:60])
    assert np.array_equal(whole.params[30:60], part.params) and np.array_equal(whole.cov[30:60], part.cov)


def _rician_mean(nu, sigma):
    # E|nu + noise| for complex Gaussian noise (Rice 1944; Gudbjartsson & Patz, Magn Reson Med 1995;34:910),
    # written with scipy's scaled Bessel functions, independently of qmap.noise
    from scipy.special import i0e, i1e

    x = nu**2 / (4 * sigma**2)
    return sigma * np.sqrt(np.pi / 2) * ((1 + 2 * x) * i0e(x) + 2 * x * i1e(x))


def _rician_fits(y):
    """The exact model alone and the fast path (the table) fitting ``y`` under the Rician objective with sigma 8.

    Returns (exact model, fast model, exact fit, fast fit); both fits must succeed in every voxel.
    """
    exact, fast = EpgT2(np.arange(1, E + 1) * ESP), EpgT2(np.arange(1, E + 1) * ESP)
    exact.surrogate = None
    nf, sig = NoiseFloor("rician"), np.full(len(y), 8.0)
    a, b = fit_chunk(exact, y, noise=nf, sigma=sig), fit_chunk(fast, y, noise=nf, sigma=sig)
    assert np.all(a.status == 0) and np.all(b.status == 0)
    return exact, fast, a, b


def test_rician_fit_through_the_table_matches_the_exact_model_fit():
    # the default noise floor (rician) on a 32-echo train decaying into the floor: every voxel takes the Rician
    # objective; the fast path (table fits, a looser plain fit, then the exact Rician fit stopped at 1e-2 of the
    # standard-error floor) must land on the exact-only path's minimum within 0.02 standard errors
    rng = np.random.default_rng(11)
    n = 120
    t2 = rng.uniform(0.03, 0.12, n)
    s = 1000.0 * cpmg_echoes(t2, rng.uniform(0.85, 1.0, n), esp=ESP, n_echoes=E)
    y = np.abs(s + rng.normal(0, 8, s.shape) + 1j * rng.normal(0, 8, s.shape))
    exact, fast, a, b = _rician_fits(y)
    se = np.sqrt(np.einsum("npp->np", b.cov))
    assert np.all(np.abs(a.params - b.params) <= 0.02 * se)
    assert np.allclose(b.rss, a.rss, rtol=1e-5)
    lo, hi = fast.bounds()
    for k in range(0, n, 30):  # scipy polishing of the Rician objective from the result: < 0.02 SE
        r = least_squares(lambda p, k=k: _rician_mean(p[0] * exact._train(p[None, 1:])[0], 8.0) - y[k],
                          b.params[k], bounds=([-np.inf, *lo], [np.inf, *hi]), xtol=1e-14, ftol=1e-14, gtol=1e-14)
        assert np.all(np.abs(r.x - b.params[k]) <= 0.02 * se[k])


def test_noise_free_trains_fit_as_with_the_exact_model_alone():
    # noise-free trains (T2 20-200 ms, refocusing scales 0.6-1) under the Rician objective with sigma 8 (SNR 125 at
    # the first echo): the fast path (the signed table for the start and iterations, the exact trains with the
    # table's derivatives for the finish) against the exact model alone, which decides where the minimum is and
    # what its covariance is: estimates within 1e-4 relative and 0.01 standard errors, standard errors within 0.5 %
    rng = np.random.default_rng(4)
    n = 150
    t2, b1 = rng.uniform(0.02, 0.2, n), rng.uniform(0.6, 1.0, n)
    y = 1000.0 * cpmg_echoes(t2, b1, esp=ESP, n_echoes=E, scale_excitation=False)
    _, fast, a, b = _rician_fits(y)
    se_a, se_b = (np.sqrt(np.einsum("npp->np", f.cov)) for f in (a, b))
    assert np.max(np.abs(b.params[:, 1] / a.params[:, 1] - 1)) < 1e-4
    assert np.all(np.abs(b.params - a.params) <= 0.01 * se_b)
    assert np.allclose(se_b, se_a, rtol=5e-3)
    # and without the noise floor the trains are recovered exactly (the finish's values are the exact kernel's)
    c = fit_chunk(fast, y)
    assert np.max(np.abs(c.params[:, 1] / t2 - 1)) < 1e-9 and np.max(np.abs(fast.to_scale(c.params[:, 2]) - b1)) < 1e-9


def test_grid_start_is_each_voxels_own_for_any_grouping():
    """The dictionary match picks the same atom for a voxel whatever voxels share its BLAS product.

    The float32 product rounds a row differently with other rows beside it (measured), and the EPG grid
    holds many nearly identical trains, so a voxel's best atoms lie within that rounding of each other
    (88 % of the sample data's voxels): the near ones are scored again exactly, per voxel. Reference: the
    exact double-precision argmax of |<y, atom>| / ||atom|| over the whole grid (numpy, one voxel at a time).
    """
    from qmap.fitting.solver import _dictionary_match

    rng = np.random.default_rng(9)
    n = 700
    t2 = np.concatenate([rng.uniform(0.005, 0.02, n // 2), rng.uniform(0.5, 3.0, n - n // 2)])  # first echo / flat
    b1 = rng.uniform(0.8, 1.0, n)
    s = 1000.0 * cpmg_echoes(t2, b1, esp=ESP, n_echoes=E, refocus_deg=180.0)
    y = np.abs(s + rng.normal(0, 2, s.shape) + 1j * rng.normal(0, 2, s.shape))
    y /= np.max(y, axis=1, keepdims=True)
    table = EpgT2(np.arange(1, E + 1) * ESP).surrogate()
    phi = table.basis(np.asarray(table.grid(), float), None)[:, :, 0]
    whole = _dictionary_match(phi, y)
    for size in (1, 2, 7, 64, 333):
        parts = np.concatenate([_dictionary_match(phi, y[i:i + size]) for i in range(0, n, size)])
        np.testing.assert_array_equal(parts, whole)
    atoms = phi / np.sqrt(np.sum(phi * phi, axis=1))[:, None]
    exact = np.array([np.argmax(np.abs(atoms @ row)) for row in y])
    score = np.abs(np.einsum("nm,nm->n", y, atoms[whole]))
    best = np.abs(np.einsum("nm,nm->n", y, atoms[exact]))
    # the same atom, or one whose exact score equals the best to double-precision rounding
    assert np.all(score >= best * (1 - 1e-13))


def test_epg_maps_do_not_depend_on_the_chunk_size():
    """t2 --epg maps are bit-identical for any chunk size (they differed in the last float32 bit before the
    dictionary match became each voxel's own)."""
    from qmap.maps import fit_volume

    vol = _data(6 * 7 * 5, seed=11).reshape(6, 7, 5, E)
    m = EpgT2(np.arange(1, E + 1) * ESP)
    kw = {"noise": NoiseFloor("rician"), "sigma": 8.0, "dtype": np.float32, "n_jobs": 1}
    ref = fit_volume(m, vol, **kw)
    for size in (1, 13, 64):
        other = fit_volume(m, vol, chunk_size=int(size), **kw)
        for name in ref.estimates:
            np.testing.assert_array_equal(other.estimates[name], ref.estimates[name])
            np.testing.assert_array_equal(other.stderr[name], ref.stderr[name])
