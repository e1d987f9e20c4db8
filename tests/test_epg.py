"""Tests of the CPMG extended-phase-graph simulator (qmap.epg).

External checks: the closed-form mono-exponential decay for perfect
refocusing, hand-derived first two echoes, an independent brute-force
isochromat simulation (tests/reference/isochromat.py, no code shared with
qmap.epg) and central finite differences for the derivatives.
"""

from __future__ import annotations

import numpy as np
import pytest

from qmap import epg
from qmap.epg import cpmg_echoes, cpmg_echoes_grad
from qmap.errors import InputError, UsageError
from tests.reference.isochromat import cpmg_isochromats

ESP = 0.010  # s
N_ECHOES = 32
T1 = 1.0  # s


def test_perfect_refocusing_is_pure_exponential() -> None:
    # Hennig, J Magn Reson 1988;78:397; Weigel, J Magn Reson Imaging
    # 2015;41:266: with ideal 180 degree refocusing every echo is the plain
    # spin echo, S(TE) = M0 exp(-TE/T2).
    t2 = np.array([0.005, 0.02, 0.06, 0.2, 1.5])
    te = ESP * np.arange(1, N_ECHOES + 1)
    expected = np.exp(-te[None, :] / t2[:, None])
    for t1 in (0.3, 1.0, 3.0):  # T1 must not matter at 180 degrees
        s = cpmg_echoes(t2, np.ones_like(t2), esp=ESP, n_echoes=N_ECHOES, t1=t1)
        assert s.shape == (t2.size, N_ECHOES)
        np.testing.assert_allclose(s, expected, rtol=1e-10, atol=0)


@pytest.mark.parametrize("t2", [0.020, 0.060, 0.200])
@pytest.mark.parametrize(("refocus_deg", "b1"), [(150.0, 1.0), (150.0, 0.8), (120.0 / 0.8, 0.8)])
def test_matches_isochromat_simulation(t2: float, refocus_deg: float, b1: float) -> None:
    # Done-when criterion of issue 6: EPG vs an independent brute-force
    # isochromat simulation (many isochromats over a full dephasing cycle,
    # hard pulses as rotations, Bloch relaxation in between) within 0.5 % per
    # echo. b1 scales both pulses, so the reference gets b1 * each angle.
    s = cpmg_echoes([t2], [b1], esp=ESP, n_echoes=N_ECHOES, t1=T1, refocus_deg=refocus_deg)[0]
    ref = cpmg_isochromats(t2, T1, ESP, N_ECHOES, b1 * refocus_deg, excite_deg=b1 * 90.0)
    rel = np.abs(s / ref - 1.0)
    assert rel.max() < 0.005
    # Stronger: on an equally spaced grid of N isochromats the mean transverse
    # magnetisation is an exact discrete Fourier coefficient, so it equals the
    # configuration-state sum whenever N exceeds the highest order reached
    # (2 * n_echoes + 1); the two must then agree to rounding (common practice).
    assert rel.max() < 1e-9


@pytest.mark.parametrize("n_echoes", [1, 2, 3, 4, 7])
def test_short_trains_match_isochromats(n_echoes: int) -> None:
    # Exercises the state truncation at its edges (same reference as above).
    for t2, refocus_deg in ((0.03, 130.0), (0.1, 160.0)):
        s = cpmg_echoes([t2], [1.0], esp=0.007, n_echoes=n_echoes, t1=0.5, refocus_deg=refocus_deg)[0]
        ref = cpmg_isochromats(t2, 0.5, 0.007, n_echoes, refocus_deg, n_iso=512)
        np.testing.assert_allclose(s, ref, rtol=1e-9)


def test_first_two_echoes_closed_form() -> None:
    # Derived by hand from the pulse rotations (the pathways of Hennig 1988):
    # echo 1 = sin(b) sin^2(a/2) E2;
    # echo 2 = sin(b) [sin^4(a/2) E2^2 + sin^2(a)/2 E1 E2]
    # (spin echo of the spin echo plus the stimulated echo stored along z for
    # one echo spacing), E2 = exp(-esp/T2), E1 = exp(-esp/T1).
    t2, t1, esp = 0.08, 0.9, 0.012
    for b1, refocus_deg in ((1.0, 150.0), (0.85, 140.0), (1.1, 100.0)):
        a = np.deg2rad(b1 * refocus_deg)
        sb = np.sin(np.deg2rad(b1 * 90.0))
        e2, e1 = np.exp(-esp / t2), np.exp(-esp / t1)
        echo1 = sb * np.sin(a / 2) ** 2 * e2
        echo2 = sb * (np.sin(a / 2) ** 4 * e2**2 + 0.5 * np.sin(a) ** 2 * e1 * e2)
        s = cpmg_echoes([t2], [b1], esp=esp, n_echoes=2, t1=t1, refocus_deg=refocus_deg)[0]
        np.testing.assert_allclose(s, [echo1, echo2], rtol=1e-13)


@pytest.mark.parametrize("refocus_deg", [150.0, 120.0])
def test_stimulated_echo_odd_even_pattern(refocus_deg: float) -> None:
    # Common practice (Hennig 1988; Lebel & Wilman 2010): with refocusing
    # below 180 degrees and T2 >> echo spacing, the stimulated echo adds to
    # the second echo, which then exceeds the first, and the early echoes
    # alternate low/high (odd/even).
    t2 = np.array([0.2, 0.5, 1.0])
    s = cpmg_echoes(t2, np.ones_like(t2), esp=ESP, n_echoes=N_ECHOES, refocus_deg=refocus_deg)
    assert (s[:, 1] > s[:, 0]).all()
    assert (s[:, 2] < s[:, 1]).all()
    # the independent reference shows the same
    ref = cpmg_isochromats(0.2, T1, ESP, 3, refocus_deg)
    assert ref[1] > ref[0] and ref[2] < ref[1]
    # with 180 degrees the train decays monotonically
    s180 = cpmg_echoes(t2, np.ones_like(t2), esp=ESP, n_echoes=N_ECHOES)
    assert (np.diff(s180, axis=1) < 0).all()


def test_odd_even_oscillation_persists_for_long_t2() -> None:
    # 150 degrees, T2 1 s: the first six echoes alternate (common practice).
    s = cpmg_echoes([1.0], [1.0], esp=ESP, n_echoes=6, refocus_deg=150.0)[0]
    assert (np.sign(np.diff(s)) == [1, -1, 1, -1, 1]).all()


def test_excitation_scaling_choice() -> None:
    # Scaling the excitation by b1 multiplies the whole train by sin(b1*90)
    # (derived: the excitation only sets the initial transverse amplitude).
    t2 = np.array([0.03, 0.09, 0.25])
    b1 = np.array([0.7, 0.9, 1.15])
    both = cpmg_echoes(t2, b1, esp=ESP, n_echoes=N_ECHOES, refocus_deg=165.0)
    refocus_only = cpmg_echoes(t2, b1, esp=ESP, n_echoes=N_ECHOES, refocus_deg=165.0, scale_excitation=False)
    np.testing.assert_allclose(
        both / refocus_only, np.repeat(np.sin(np.deg2rad(90 * b1))[:, None], N_ECHOES, 1), rtol=1e-12
    )
    ref = cpmg_isochromats(0.09, T1, ESP, N_ECHOES, 0.9 * 165.0, excite_deg=90.0, n_iso=256)
    np.testing.assert_allclose(refocus_only[1], ref, rtol=1e-9)


def _central_differences(t2: np.ndarray, b1: np.ndarray, h: float, **kw: float) -> tuple[np.ndarray, np.ndarray]:
    """Five-point central differences (truncation error O(h^4)); the T2 step is relative."""

    def stencil(f, x: np.ndarray, dx: np.ndarray) -> np.ndarray:
        num = -f(x + 2 * dx) + 8 * f(x + dx) - 8 * f(x - dx) + f(x - 2 * dx)
        return num / (12 * dx[:, None])

    fd_t2 = stencil(lambda x: cpmg_echoes(x, b1, **kw), t2, h * t2)
    fd_b1 = stencil(lambda x: cpmg_echoes(t2, x, **kw), b1, np.full_like(b1, h))
    return fd_t2, fd_b1


@pytest.mark.parametrize("refocus_deg", [180.0, 150.0, 120.0])
def test_derivatives_match_finite_differences(refocus_deg: float) -> None:
    # Analytic (forward-mode) derivatives vs five-point central differences,
    # step 1e-4 (truncation ~1e-16, rounding ~1e-12 relative to the signal).
    rng = np.random.default_rng(20240606)
    n = 300
    t2 = rng.uniform(0.01, 0.3, n)
    b1 = rng.uniform(0.6, 1.15, n)
    kw = {"esp": ESP, "n_echoes": N_ECHOES, "t1": T1, "refocus_deg": refocus_deg}
    s, d_t2, d_b1 = cpmg_echoes_grad(t2, b1, **kw)
    np.testing.assert_array_equal(s, cpmg_echoes(t2, b1, **kw))
    h = 1e-4
    fd_t2, fd_b1 = _central_differences(t2, b1, h, **kw)
    # the magnitude has a kink where the real amplitude crosses zero: leave
    # out the few entries whose amplitude is within reach of the stencil
    smooth = s > 100 * h * (np.abs(d_t2) * t2[:, None] + np.abs(d_b1))
    assert smooth.mean() > 0.95
    for analytic, fd in ((d_t2, fd_t2), (d_b1, fd_b1)):
        scale = np.abs(fd).max(axis=1, keepdims=True)
        # relative to each entry, wherever the derivative is not ~0
        big = smooth & (np.abs(fd) > 1e-3 * scale)
        assert big.mean() > 0.8
        rel = np.abs(analytic - fd)[big] / np.abs(fd)[big]
        assert rel.max() < 1e-6
        # and relative to the train's largest derivative everywhere else
        assert (np.abs(analytic - fd)[smooth] < 1e-6 * np.broadcast_to(scale, fd.shape)[smooth]).all()


def test_derivatives_across_sign_change_of_amplitude() -> None:
    # T2 20 ms, 150 degrees: the real amplitude alternates in sign late in the
    # train (the isochromat reference gives the magnitude), so the gradient
    # must be that of the magnitude there too.
    t2, b1 = np.array([0.02]), np.array([1.0])
    kw = {"esp": ESP, "n_echoes": N_ECHOES, "t1": T1, "refocus_deg": 150.0}
    s, d_t2, d_b1 = cpmg_echoes_grad(t2, b1, **kw)
    fd_t2, fd_b1 = _central_differences(t2, b1, 1e-4, **kw)
    np.testing.assert_allclose(d_t2, fd_t2, rtol=1e-6)
    np.testing.assert_allclose(d_b1, fd_b1, rtol=1e-6)
    ref = cpmg_isochromats(0.02, T1, ESP, N_ECHOES, 150.0)
    np.testing.assert_allclose(s[0], ref, rtol=1e-9)


def test_vectorised_equals_one_voxel_at_a_time(monkeypatch: pytest.MonkeyPatch) -> None:
    # The fitter must be deterministic whatever the chunking: a voxel's result
    # may not depend on its neighbours in the call (bit-identical).
    rng = np.random.default_rng(7)
    n = 150
    t2 = rng.uniform(0.005, 0.5, n)
    b1 = rng.uniform(0.5, 1.3, n)
    kw = {"esp": ESP, "n_echoes": N_ECHOES, "refocus_deg": 160.0}
    together = cpmg_echoes_grad(t2, b1, **kw)
    alone = [cpmg_echoes_grad(t2[i : i + 1], b1[i : i + 1], **kw) for i in range(n)]
    for k in range(3):
        np.testing.assert_array_equal(together[k], np.vstack([a[k] for a in alone]))
    # internal voxel blocks of another size (and a ragged last block)
    monkeypatch.setattr(epg, "_BLOCK", 17)
    blocked = cpmg_echoes_grad(t2, b1, **kw)
    for k in range(3):
        np.testing.assert_array_equal(together[k], blocked[k])
    # chunks of the caller's choosing, in another order
    order = rng.permutation(n)
    chunks = np.array_split(order, 4)
    out = np.empty_like(together[0])
    for c in chunks:
        out[c] = cpmg_echoes(t2[c], b1[c], **kw)
    np.testing.assert_array_equal(out, together[0])


def test_state_rows_are_few() -> None:
    assert epg.n_state_rows(32) == 17
    assert epg.n_state_rows(1) == 2


def test_dictionary_grid_and_scalars() -> None:
    # a (T2, scale) dictionary as flattened grids; scalars broadcast
    t2g, b1g = np.meshgrid(np.geomspace(0.01, 1.0, 60), np.linspace(0.5, 1.2, 30), indexing="ij")
    d = cpmg_echoes(t2g.ravel(), b1g.ravel(), esp=ESP, n_echoes=N_ECHOES, refocus_deg=180.0)
    assert d.shape == (1800, N_ECHOES)
    assert np.isfinite(d).all() and (d >= 0).all() and (d <= 1).all()
    # scalars broadcast against arrays
    one = cpmg_echoes(t2g[5, 7], b1g[5, 7], esp=ESP, n_echoes=N_ECHOES)
    np.testing.assert_array_equal(one[0], d[5 * 30 + 7])
    mixed = cpmg_echoes(t2g[:, 7], b1g[0, 7], esp=ESP, n_echoes=N_ECHOES)
    np.testing.assert_array_equal(mixed, d.reshape(60, 30, N_ECHOES)[:, 7])
    inf = cpmg_echoes(np.inf, 1.0, esp=ESP, n_echoes=4)
    np.testing.assert_allclose(inf, 1.0, rtol=1e-12)


@pytest.mark.parametrize(
    ("kwargs", "error"),
    [
        ({"t2": [0.05, -0.01], "b1": [1.0, 1.0]}, InputError),
        ({"t2": [0.05, np.nan], "b1": [1.0, 1.0]}, InputError),
        ({"t2": [0.05, 0.06], "b1": [1.0, np.nan]}, InputError),
        ({"t2": [0.05, 0.06], "b1": [1.0, 1.0, 1.0]}, InputError),
        ({"t2": [[0.05, 0.06]], "b1": 1.0}, InputError),
        ({"t2": 0.05, "b1": 1.0, "esp": 0.0}, InputError),
        ({"t2": 0.05, "b1": 1.0, "n_echoes": 0}, UsageError),
        ({"t2": 0.05, "b1": 1.0, "n_echoes": 2.5}, UsageError),
        ({"t2": 0.05, "b1": 1.0, "t1": 0.0}, InputError),
    ],
)
def test_bad_input_is_reported(kwargs: dict, error: type) -> None:
    args = {"esp": ESP, "n_echoes": 8} | kwargs
    with pytest.raises(error):
        cpmg_echoes(**args)


def test_extreme_t2_stays_finite_and_quiet() -> None:
    # Under -W error any overflow/invalid warning fails the test. A T2 far
    # below the echo spacing gives no echo and no gradient; T2 = inf gives no
    # decay at 180 degrees (exp(0) = 1).
    t2 = np.array([5e-324, 1e-200, 1e-5, 1e-3, np.inf])
    s, d_t2, d_b1 = cpmg_echoes_grad(t2, np.full(5, 0.9), esp=ESP, n_echoes=8, refocus_deg=150.0)
    for arr in (s, d_t2, d_b1):
        assert np.isfinite(arr).all()
    np.testing.assert_array_equal(s[:2], 0.0)
    np.testing.assert_array_equal(d_t2[[0, 1, 4]], 0.0)
    np.testing.assert_allclose(cpmg_echoes(np.inf, 1.0, esp=ESP, n_echoes=4), 1.0, rtol=1e-15)
