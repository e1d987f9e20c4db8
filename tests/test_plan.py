"""Protocol planning (qmap plan) against independent references.

The Cramér–Rao bound is recomputed here from scratch -- the signal equations
written out below, derivatives by central finite differences, Fisher matrix
J^T J / sigma^2 inverted with numpy (Kay, Fundamentals of Statistical Signal
Processing: Estimation Theory, 1993) -- and the designs are compared with
brute-force grids and scipy's differential evolution on that bound.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy.optimize import differential_evolution

from qmap.cli import main
from qmap.errors import InputError
from qmap.planning import plan, predicted_cv


# --------------------------------------------------------------------------- independent bound
def _signal(method, x, p, tr):
    x = np.asarray(x, float)
    if method == "ir":  # a + b exp(-TI/T1)  (Bernstein, King & Zhou 2004)
        a, b, t1 = p
        return a + b * np.exp(-x / t1)
    if method == "vfa":  # spoiled GRE steady state (Ernst & Anderson 1966)
        m0, t1 = p
        e = np.exp(-tr / t1)
        al = np.radians(x)
        return m0 * np.sin(al) * (1 - e) / (1 - e * np.cos(al))
    m0, t = p
    return m0 * np.exp(-x / t)


def _truth(method, t, tr):
    if method == "ir":  # S = M0 (1 - 2 exp(-TI/T1) + exp(-TR/T1)), M0 = 1
        return np.array([1.0 + (0.0 if tr is None else np.exp(-tr / t)), -2.0, t])
    return np.array([1.0, t])


def ref_cvs(method, x, ts, snr, tr=None):
    """CV of T at every T in ``ts``: central finite differences, Fisher matrix inverted with numpy."""
    x = np.asarray(x, float)[None, :]
    ts = np.atleast_1d(np.asarray(ts, float))
    p = np.stack([_truth(method, t, tr) for t in ts])[:, :, None]  # (R, P, 1)
    J = []
    for k in range(p.shape[1]):
        h = 1e-6 * np.maximum(np.abs(p[:, k]), 1e-3)
        up, dn = p.copy(), p.copy()
        up[:, k] += h
        dn[:, k] -= h
        J.append((_signal(method, x, up.transpose(1, 0, 2), tr) - _signal(method, x, dn.transpose(1, 0, 2), tr))
                 / (2 * h))
    J = np.stack(J, axis=1)  # (R, P, m)
    F = np.einsum("rpm,rqm->rpq", J, J) * snr**2  # sigma = M0 / snr
    try:
        return np.sqrt(np.linalg.inv(F)[:, -1, -1]) / ts
    except np.linalg.LinAlgError:  # a protocol that cannot determine every parameter
        return np.full(ts.shape, np.inf)


def ref_cv(method, x, t, snr, tr=None):
    return float(ref_cvs(method, x, [t], snr, tr)[0])


# --------------------------------------------------------------------------- the bound itself
@pytest.mark.parametrize(
    "method,x,tr",
    [
        ("ir", [0.05, 0.3, 0.8, 1.5, 3.0], 5.0),
        ("ir", [0.1, 0.4, 1.2, 2.5], None),
        ("vfa", [3.0, 8.0, 15.0, 25.0], 0.015),
        ("t2", np.arange(1, 33) * 0.01, None),
        ("t2star", [0.002, 0.005, 0.01, 0.02, 0.035], None),
    ],
)
def test_predicted_cv_matches_independent_crlb(method, x, tr):
    values = {"ir": [0.3, 1.0, 2.5], "vfa": [0.5, 1.0, 2.0]}.get(method, [0.01, 0.04, 0.1])
    got = predicted_cv(method, x, values, snr=80.0, tr=tr)
    want = [ref_cv(method, x, v, 80.0, tr) for v in values]
    np.testing.assert_allclose(got, want, rtol=0.03)  # issue goal: within 3 %
    np.testing.assert_allclose(got, want, rtol=1e-5)  # in fact the same number


def test_singular_protocol_is_infinite():
    # two distinct TIs cannot determine three parameters
    assert np.isinf(predicted_cv("ir", [0.5, 0.5, 1.0], [1.0], snr=50)[0])


# --------------------------------------------------------------------------- designs
def test_vfa_two_angles_reach_published_optimum():
    r = plan("vfa", 1.0, samples=2, tr=0.015, snr=100)
    a1, a2 = r.protocol["FlipAngle"]
    # brute force on the independent bound: 0.01-degree grid around the optimum
    lo = np.arange(3.0, 5.5, 0.05)
    hi = np.arange(20.0, 27.0, 0.1)
    best = min(ref_cv("vfa", [a, b], 1.0, 100.0, 0.015) for a in lo for b in hi)
    assert r.objective <= best * 1.01
    # Deoni, Rutt & Peters 2003; Schabel & Morrell 2009: both signals at 1/sqrt(2) of the Ernst signal
    e1 = np.exp(-0.015 / 1.0)
    ernst = np.degrees(np.arccos(e1))
    s_ernst = _signal("vfa", ernst, (1.0, 1.0), 0.015)
    for a in (a1, a2):
        assert _signal("vfa", a, (1.0, 1.0), 0.015) / s_ernst == pytest.approx(1 / np.sqrt(2), abs=1e-3)
    # check value (brute force on the bound): 4.11 and 23.62 degrees at TR 15 ms, T1 1 s
    assert a1 == pytest.approx(4.11, abs=0.01)
    assert a2 == pytest.approx(23.62, abs=0.01)


def test_ir_design_near_global_optimum_and_better_than_log_spacing():
    r = plan("ir", (0.3, 2.0), samples=5, tr=5.0, snr=50, limits=(0.05, 4.0))
    ti = np.asarray(r.protocol["InversionTime"])
    assert ti.size == 5 and ti.min() >= 0.05 - 1e-12 and ti.max() <= 4.0 + 1e-12
    grid = np.geomspace(0.3, 2.0, 25)

    def worst(x):
        return float(np.max(ref_cvs("ir", np.sort(x), grid, 50.0, 5.0)))

    de = differential_evolution(worst, [(0.05, 4.0)] * 5, seed=1, tol=1e-7, maxiter=60, popsize=12, polish=True)
    assert worst(ti) <= de.fun * 1.05  # issue goal: within 5 % of a global optimum found independently
    log_spaced = np.geomspace(0.05, 4.0, 5)
    assert worst(ti) < worst(log_spaced)
    assert r.objective < r.reference["objective"]


def test_t2_design_is_uniform_train_within_limits():
    r = plan("t2", (0.02, 0.1), samples=24, snr=100, limits=(0.008, 0.3))
    te = np.asarray(r.protocol["EchoTime"])
    assert te.size <= 24
    np.testing.assert_allclose(np.diff(te), te[0], rtol=1e-9)  # uniform echo train TE_k = k ESP
    assert te[0] >= 0.008 - 1e-12 and te[-1] <= 0.3 + 1e-12
    grid = np.geomspace(0.02, 0.1, 25)
    worst = float(np.max(ref_cvs("t2", te, grid, 100.0)))
    # no echo spacing on a fine independent sweep does better (count = min(24, floor(0.3/ESP)))
    sweep = []
    for esp in np.geomspace(0.008, 0.15, 300):
        n = int(min(24, np.floor(0.3 / esp * (1 + 1e-9))))
        sweep.append(float(np.max(ref_cvs("t2", esp * np.arange(1, n + 1), grid, 100.0))))
    assert worst <= min(sweep) * 1.001


def test_t2star_design_beats_even_spacing_and_is_deterministic():
    a = plan("t2star", (0.005, 0.05), samples=6, snr=50, limits=(0.002, 0.08))
    b = plan("t2star", (0.005, 0.05), samples=6, snr=50, limits=(0.002, 0.08))
    assert a.protocol == b.protocol
    grid = np.geomspace(0.005, 0.05, 25)
    assert max(ref_cv("t2star", a.samples, t, 50.0) for t in grid) < max(
        ref_cv("t2star", np.linspace(0.002, 0.08, 6), t, 50.0) for t in grid)


# --------------------------------------------------------------------------- Monte-Carlo of qmap's own fits
@pytest.mark.parametrize(
    "method,x,values,snr,tr",
    [
        ("t2star", [0.003, 0.008, 0.015, 0.025, 0.04], [0.01, 0.03], 100.0, None),
        ("ir", [0.05, 0.4, 1.0, 2.0, 4.0], [0.5, 1.5], 100.0, 5.0),
        ("vfa", [4.11, 23.62], [1.0], 3000.0, 0.015),
    ],
)
def test_predicted_cv_matches_spread_of_qmap_fits(method, x, values, snr, tr):
    from qmap.planning import simulate_spread

    rows = simulate_spread(method, x, values, snr=snr, tr=tr, n=2500, seed=3)
    pred = predicted_cv(method, x, values, snr=snr, tr=tr)
    for row, p in zip(rows, pred, strict=True):
        # least squares is efficient at high SNR: its spread reaches the Cramer-Rao bound (Kay 1993)
        assert row["cv_simulated"] == pytest.approx(p, rel=0.10)
        assert abs(row["median_bias"]) < 0.3 * p


# --------------------------------------------------------------------------- command line
def test_cli_writes_plan_json_and_png(tmp_path, capsys):
    out = tmp_path / "p"
    code = main(["plan", "ir", "--range", "0.3s,2s", "--samples", "5", "--tr", "5s", "--snr", "50",
                 "--limits", "50ms,4s", "-o", str(out)])
    assert code == 0
    doc = json.loads((out / "plan.json").read_text())
    assert doc["method"] == "ir"
    assert len(doc["protocol"]["InversionTime"]) == 5
    assert doc["protocol"]["RepetitionTime"] == [5.0]
    assert len(doc["predicted"]) >= 5
    vals = [r["value_s"] for r in doc["predicted"]]
    assert min(vals) == pytest.approx(0.3) and max(vals) == pytest.approx(2.0)
    assert doc["objective"] == pytest.approx(max(r["cv"] for r in doc["predicted"]), rel=1e-6)
    assert (out / "plan.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    printed = capsys.readouterr().out
    assert "InversionTime" in printed and "worst CV" in printed
    # existing outputs are refused without --overwrite
    assert main(["plan", "ir", "--range", "1s", "-o", str(out)]) == 2


def test_cli_evaluate_vfa(tmp_path):
    out = tmp_path / "e"
    assert main(["plan", "vfa", "--range", "0.8s,1.5s", "--tr", "15ms", "--snr", "200",
                 "--evaluate", "3,8,15,25", "-o", str(out), "-q"]) == 0
    doc = json.loads((out / "plan.json").read_text())
    assert doc["protocol"]["FlipAngle"] == [3.0, 8.0, 15.0, 25.0]
    assert doc["settings"]["evaluated"] is True
    want = max(ref_cv("vfa", [3, 8, 15, 25], t, 200.0, 0.015) for t in np.geomspace(0.8, 1.5, 25))
    assert doc["objective"] == pytest.approx(want, rel=1e-4)


@pytest.mark.parametrize(
    "argv,needle",
    [
        (["plan", "t2star", "--range", "100ms,200ms", "--limits", "2ms,40ms"], "above the sample limits"),
        (["plan", "ir", "--range", "0.3s,2s", "--samples", "2"], "at least 3 samples"),
        (["plan", "ir", "--range", "0.3s,2s", "--tr", "2s", "--limits", "50ms,3s"], "shorter than the largest"),
        (["plan", "ir", "--range", "1s", "--tr", "2s", "--evaluate", "0.1,0.5,1,3"], "shorter than the largest"),
        (["plan", "vfa", "--range", "1s"], "--tr"),
        (["plan", "t2", "--range", "10,50"], "ms"),
        (["plan", "vfa", "--range", "1s", "--tr", "15ms", "--evaluate", "5"], "at least 2"),
    ],
)
def test_cli_bad_input_exit_2(tmp_path, capsys, argv, needle):
    out = tmp_path / "bad"
    assert main(argv + ["-o", str(out)]) == 2
    err = capsys.readouterr().err
    assert needle in err and err.count("\n") == 1 and "Traceback" not in err
    assert not out.exists()


def test_api_is_exposed():
    import qmap

    r = qmap.plan("t2star", 0.02, samples=3, snr=100)
    assert r.method == "t2star" and len(r.protocol["EchoTime"]) == 3
    with pytest.raises(InputError):
        qmap.plan("t2star", (0.05, 0.01))
