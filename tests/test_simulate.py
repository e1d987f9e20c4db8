"""qmap.simulate: signal equations against Bloch integration, noise statistics, files, sidecars and truth."""

from __future__ import annotations

import csv
import json

import nibabel as nib
import numpy as np
import pytest
from scipy import stats

from qmap.cli import main
from qmap.simulate import grid_affine, lowres_grid, signals, simulate
from qmap.simulate.phantoms import TEMP_COEFF, VIALS, b1_field, make_phantom, vial_properties
from tests.reference.bloch import Tissue, afi_signals_bloch, ir_signal_bloch, spgr_signal_bloch


# ----------------------------------------------------------------------------- signal equations
def test_ir_with_finite_tr_matches_bloch_integration():
    # Independent reference: Bloch equations integrated with solve_ivp (tests/reference/bloch.py),
    # inversion of efficiency k, crusher, 90 deg readout, spoiler, wait TR - TI, repeated to steady state.
    ti = np.array([0.05, 0.3, 0.9, 2.5])
    t1, t2, tr, k = 0.8, 0.09, 3.0, 0.94
    # 1 us pulses: T2 decay while the magnetisation passes the transverse plane during a pulse costs
    # ~pulse/T2 (1e-4 with the default 10 us pulses), which the closed form ignores
    ref = ir_signal_bloch(ti, Tissue(t1, t2), efficiency=k, tr=tr, pulse_duration=1e-6)
    got = signals.ir(ti, tr=tr, te=0.0, t1=[t1], t2=[t2], pd=[1.0], efficiency=k)[0]
    np.testing.assert_allclose(got, ref, rtol=0, atol=3e-5)


@pytest.mark.parametrize("fa", [3.0, 12.0, 30.0])
def test_spgr_and_dam_match_bloch_steady_state(fa):
    # Ernst & Anderson 1966 steady state vs repeated-TR Bloch integration (tests/reference/bloch.py),
    # 1 us pulses (relaxation during a pulse is outside the closed form)
    t1, tr, b1 = 0.9, 0.015, 1.1
    ref = spgr_signal_bloch(fa * b1, tr, Tissue(t1, 0.05), pulse_duration=1e-6)
    got = signals.spgr([fa], tr=tr, te=0.0, t1=[t1], t2star=[np.inf], pd=[1.0], b1=[b1])[0, 0]
    np.testing.assert_allclose(got, ref, rtol=2e-5)
    # double angle with finite TR is the same steady state at a and 2a
    dam = signals.dam(fa, tr=tr, t1=[t1], pd=[1.0], b1=[b1])[0]
    np.testing.assert_allclose(dam[1], spgr_signal_bloch(2 * fa * b1, tr, Tissue(t1, 0.05), pulse_duration=1e-6), rtol=2e-5)


def test_afi_with_t1_matches_bloch_and_reduces_to_yarnykh_ratio():
    # Yarnykh, Magn Reson Med 2007;57:192: exact steady state vs Bloch integration ...
    t1 = 0.3
    s = signals.afi(60.0, tr1=0.02, tr2=0.1, t1=[t1], pd=[1.0], b1=[1.0])[0]
    ref = afi_signals_bloch(60.0, 0.02, 0.1, Tissue(t1, 0.05), pulse_duration=1e-6)
    np.testing.assert_allclose(s, ref, rtol=2e-5)
    # ... and for TR << T1 the ratio tends to (1 + n cos a)/(n + cos a): a = 60 deg, n = 5 -> 0.636364
    s = signals.afi(60.0, tr1=0.0002, tr2=0.001, t1=[100.0], pd=[1.0], b1=[1.0])[0]
    assert s[1] / s[0] == pytest.approx(0.636364, abs=2e-5)


def test_mese_with_perfect_refocusing_is_exponential():
    # Hennig 1988: with 180 deg refocusing the CPMG train is exactly PD exp(-TE/T2)
    s = signals.mese(esp=0.01, n_echoes=8, refocus_deg=180.0, t1=[1.0], t2=[0.05], pd=[0.7], b1=[1.0])[0]
    te = 0.01 * np.arange(1, 9)
    np.testing.assert_allclose(s, 0.7 * np.exp(-te / 0.05), rtol=1e-10)


# ----------------------------------------------------------------------------- noise
def test_rician_noise_moments():
    # Rice 1944 / scipy.stats.rice: E|nu + noise| at nu = sigma is 1.548572 sigma (scipy.stats.rice(1).mean())
    rng = np.random.default_rng(7)
    m = signals.magnitude_noise(np.full(200_000, 2.0), 2.0, rng)
    assert m.mean() == pytest.approx(1.548572 * 2.0, rel=0.005)
    assert m.std() == pytest.approx(stats.rice(b=1.0, scale=2.0).std(), rel=0.01)


def test_noncentral_chi_noise_background():
    # Constantinides et al. 1997: root sum of squares of N coils of pure noise is sigma * chi(2N)
    rng = np.random.default_rng(8)
    m = signals.magnitude_noise(np.zeros(200_000), 1.5, rng, coils=4)
    assert m.mean() == pytest.approx(1.5 * stats.chi(df=8).mean(), rel=0.005)
    # and the noise-free root sum of squares is the signal itself
    np.testing.assert_allclose(signals.magnitude_noise(np.full(3, 5.0), 0.0, rng, coils=4), 5.0)


# ----------------------------------------------------------------------------- the written data set
@pytest.fixture(scope="module")
def sim(tmp_path_factory):
    out = tmp_path_factory.mktemp("sim") / "vials"
    manifest = simulate(out, shape=(32, 32, 4), snr=50, seed=3, temperature_c=22.0)
    return out, manifest


def test_sidecars_and_manifest_agree(sim):
    out, man = sim
    for s in man["series"].values():
        for rel, value in zip(s["files"], s["values"]):
            side = json.loads((out / rel.replace(".nii.gz", ".json")).read_text())
            assert side[s["key"]] == pytest.approx(value)
            for k, v in s["sidecar"].items():
                assert side[k] == v
    assert man["series"]["ir"]["values"] == pytest.approx([0.05, 0.1, 0.2, 0.35, 0.6, 1.0, 1.6, 2.6, 4.0, 6.0])
    te = man["series"]["mese"]["values"]
    assert te == pytest.approx(0.01 * np.arange(1, 33))
    # file names sort in acquisition order (zero-padded indices)
    files = man["series"]["mese"]["files"]
    assert files == sorted(files)


def test_truth_maps_hold_the_phantom_values(sim):
    out, man = sim
    lab = np.asarray(nib.load(str(out / man["labels"])).dataobj)
    t1 = nib.load(str(out / man["truth"]["T1"])).get_fdata()
    assert set(np.unique(lab)) == set(range(10))
    for t in VIALS:
        expected = t.t1 * (1 + TEMP_COEFF["t1"] * 2.0)  # invented coefficient, 22 C
        np.testing.assert_allclose(t1[lab == t.label], expected, rtol=1e-6)
        assert man["truth_values"][str(t.label)]["T1_s"] == pytest.approx(expected)
    side = json.loads((out / man["truth"]["T1"].replace(".nii.gz", ".json")).read_text())
    assert side["Units"] == "s"


def test_reference_table_interpolates_to_the_simulated_truth(sim):
    out, _ = sim
    with open(out / "phantom_reference.csv") as fh:
        rows = list(csv.DictReader(fh))
    assert {float(r["temperature_C"]) for r in rows} == {20.0, 24.0}
    for t in VIALS:
        r20, r24 = (next(r for r in rows if int(r["label"]) == t.label and float(r["temperature_C"]) == T)
                    for T in (20.0, 24.0))
        interp = float(r20["T2_ms"]) + (float(r24["T2_ms"]) - float(r20["T2_ms"])) * (22.0 - 20.0) / 4.0
        assert interp == pytest.approx(vial_properties(t, 22.0).t2 * 1e3, abs=2e-3)


def test_noise_level_in_the_background(sim):
    # background (air) voxels are pure Rayleigh noise: mean sigma sqrt(pi/2) (Gudbjartsson & Patz 1995)
    out, man = sim
    ph = make_phantom("vials", (32, 32, 4))
    air = sum(ph.fractions.values()) == 0  # no compartment at all in the voxel (partial volume excluded)
    vol = nib.load(str(out / man["series"]["ir"]["files"][0])).get_fdata()
    bg = vol[air]
    assert bg.size > 1000
    sigma = man["series"]["ir"]["noise_sigma"]
    assert bg.mean() == pytest.approx(sigma * np.sqrt(np.pi / 2), rel=0.06)


def test_lowres_b1_grid_is_the_block_average(sim):
    out, man = sim
    hi = nib.load(str(out / man["truth"]["TB1"]))
    lo = nib.load(str(out / man["truth"]["TB1_lowres"]))
    assert lo.shape == (16, 16, 2)
    assert not np.allclose(lo.affine, hi.affine)
    # the centre of low-res voxel (i, j, k) is the mean of the centres of its 2x2x2 block
    for ijk in [(0, 0, 0), (5, 9, 1)]:
        block = [hi.affine @ [2 * ijk[0] + a, 2 * ijk[1] + b, 2 * ijk[2] + c, 1] for a in (0, 1) for b in (0, 1)
                 for c in (0, 1)]
        np.testing.assert_allclose(lo.affine @ [*ijk, 1], np.mean(block, axis=0), atol=1e-9)
        want = hi.get_fdata()[2 * ijk[0]:2 * ijk[0] + 2, 2 * ijk[1]:2 * ijk[1] + 2, 2 * ijk[2]:2 * ijk[2] + 2].mean()
        assert lo.get_fdata()[ijk] == pytest.approx(want, rel=1e-6)


def test_partial_volume_fractions():
    ph = make_phantom("vials", (48, 48, 2))
    total = sum(ph.fractions.values())
    assert np.all(total <= 1 + 1e-12)
    edge = (total > 0) & (total < 1)
    assert edge.any()  # the container edge is partly filled
    # the container (radius 0.75 of the half field of view) covers pi 0.75^2 / 4 of each slice
    assert total[:, :, 0].sum() / 48**2 == pytest.approx(np.pi * 0.75**2 / 4, rel=0.01)
    # region labels hold only voxels entirely inside a vial
    for lab in range(1, 10):
        np.testing.assert_allclose(ph.fractions[lab][ph.roi == lab], 1.0)


def test_b1_field_is_smooth_and_spans_the_range():
    b = b1_field((40, 40, 4), (2, 2, 4), low=0.8, high=1.2)
    assert b.min() == pytest.approx(0.8) and b.max() == pytest.approx(1.2)
    assert np.max(np.abs(np.diff(b, axis=0))) < 0.03  # no jumps between neighbours


def test_same_seed_same_data_other_seed_other_noise(tmp_path):
    a = simulate(tmp_path / "a", protocols=["megre"], shape=(24, 24, 1), seed=5)
    simulate(tmp_path / "b", protocols=["megre"], shape=(24, 24, 1), seed=5)
    simulate(tmp_path / "c", protocols=["megre"], shape=(24, 24, 1), seed=6)
    f = a["series"]["megre"]["files"][0]
    da, db, dc = (nib.load(str(tmp_path / d / f)).get_fdata() for d in "abc")
    np.testing.assert_array_equal(da, db)
    assert not np.array_equal(da, dc)


def test_grid_helpers():
    aff = grid_affine((4, 4, 2), (2.0, 2.0, 3.0))
    np.testing.assert_allclose(aff @ [1.5, 1.5, 0.5, 1], [0, 0, 0, 1])  # centred on the origin
    shape, _, f = lowres_grid((4, 6, 3), aff, 2)
    assert shape == (2, 3, 3) and f == (2, 2, 1)  # an odd axis is kept at full resolution


# ----------------------------------------------------------------------------- command line
def test_cli_simulate_and_errors(tmp_path, capsys):
    out = tmp_path / "head"
    assert main(["simulate", "-o", str(out), "--phantom", "head", "--protocol", "ir,megre", "--shape", "32,32,2",
                 "--coils", "2", "--seed", "4"]) == 0
    man = json.loads((out / "simulation.json").read_text())
    assert set(man["series"]) == {"ir", "megre"} and man["coils"] == 2
    assert (out / "sub-head" / "anat" / "sub-head_desc-head_dseg.tsv").read_text().splitlines()[1:] == \
        ["1\tCSF", "2\tGM", "3\tWM"]
    assert main(["simulate", "-o", str(out)]) == 2  # not empty, no --overwrite
    assert main(["simulate", "-o", str(tmp_path / "x"), "--protocol", "ir,dwi"]) == 2
    assert main(["simulate", "-o", str(tmp_path / "y"), "--shape", "10,10,1"]) == 2
    assert main(["simulate", "-o", str(tmp_path / "z"), "--megre-te", "3,6,9"]) == 2  # seconds implausible
    assert not (tmp_path / "x").exists() and not (tmp_path / "y").exists() and not (tmp_path / "z").exists()
    assert "error" in capsys.readouterr().err


def test_pools_phantom_two_and_three_pool_signals(tmp_path):
    """The multi-pool disc: each voxel's train is the fraction-weighted sum of its pools' EPG trains."""
    from qmap.epg import cpmg_echoes
    from qmap.simulate import Protocols
    from qmap.simulate.phantoms import POOLS, POOLS_FREE, pools_phantom

    ph = pools_phantom((24, 24, 1))
    total = sum(ph.fractions.values())
    obj = ph.labels > 0
    np.testing.assert_allclose(total[obj], 1.0)
    assert ph.fractions[3][ph.roi == 1].max() == 0 and np.all(ph.fractions[3][ph.roi == 2] == POOLS_FREE)
    short = ph.extra_truth["MWF"][0]
    assert 0 <= np.nanmin(short) < 0.02 and 0.28 < np.nanmax(short) <= 0.30
    man = simulate(tmp_path / "sim", phantom="pools", protocols=["mese"], shape=(24, 24, 1), snr=1e9, seed=1,
                   b1_range=(1.0, 1.0), settings=Protocols(mese_echoes=16))
    files = [tmp_path / "sim" / f for f in man["series"]["mese"]["files"]]
    data = np.stack([nib.load(str(f)).get_fdata() for f in files], axis=-1)
    v = tuple(np.argwhere((ph.roi == 2) & (short > 0.1))[0])
    trains = cpmg_echoes([p.t2 for p in POOLS], 1.0, esp=0.01, n_echoes=16, t1=[p.t1 for p in POOLS],
                         scale_excitation=False)
    expect = sum(ph.fractions[k + 1][v] * trains[k] for k in range(3)) * man["signal_scale"]
    np.testing.assert_allclose(data[v], expect, rtol=1e-3)
    assert (tmp_path / "sim" / man["truth"]["MWF"]).is_file()
