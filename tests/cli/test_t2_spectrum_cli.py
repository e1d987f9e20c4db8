"""`qmap t2-spectrum` end to end through the command line (issue 17).

Two-pool CPMG trains from the independent complex-state EPG
(tests/reference/epg_states.py), Rician noise, integer storage with a scale
factor and a zero-filled (noise-free) background, as real exports have.
"""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.conftest import rician, snapshot, write_nifti
from tests.reference.epg_states import cpmg_reference

ESP, N_ECHOES = 0.010, 32
TE = ESP * np.arange(1, N_ECHOES + 1)
SIGMA = 4.0


def _volume(shape=(8, 6, 2), seed=1):
    """Short fraction rising along x (0-0.3), B1 0.8-1.0 along y; a one-voxel zero border."""
    rng = np.random.default_rng(seed)
    x, y, _ = np.indices(shape)
    frac = 0.3 * x / (shape[0] - 1)
    b1 = 0.8 + 0.2 * y / (shape[1] - 1)
    short = cpmg_reference(np.full(frac.size, 0.02), 180 * b1.ravel(), esp=ESP, n_echoes=N_ECHOES)
    long_ = cpmg_reference(np.full(frac.size, 0.08), 180 * b1.ravel(), esp=ESP, n_echoes=N_ECHOES)
    clean = 1200.0 * (frac.ravel()[:, None] * short + (1 - frac.ravel())[:, None] * long_)
    data = rician(clean.reshape(*shape, N_ECHOES), SIGMA, rng)
    obj = np.zeros(shape, bool)
    obj[1:-1, 1:-1, :] = True
    data[~obj] = 0.0
    return data, frac, b1, obj


@pytest.fixture
def series(tmp_path):
    data, frac, b1, obj = _volume()
    img = nib.Nifti1Image(np.round(data / 0.5).astype(np.int16), np.diag([2.0, 2.0, 3.0, 1.0]))
    img.header.set_slope_inter(0.5, 0.0)  # integer storage with a scale factor
    path = tmp_path / "sub-01_MESE.nii.gz"
    nib.save(img, str(path))
    (tmp_path / "sub-01_MESE.json").write_text(json.dumps({"EchoTime": TE.tolist(), "RefocusingFlipAngle": 180}))
    return path, frac, b1, obj


def test_outputs_values_and_provenance(series, tmp_path):
    path, frac, b1, obj = series
    out = tmp_path / "out"
    code = main(["t2-spectrum", str(path), "-o", str(out), "--mask", "none", "--sigma", str(SIGMA), "-q",
                 "--units", "ms", "--se-subsample", "24", "-j", "2", "--chunk-size", "20"])
    assert code == 0
    pre = "sub-01_acq-mesespectrum"
    mwf = nib.load(out / f"{pre}_MWFmap.nii.gz").get_fdata()
    status = nib.load(out / f"{pre}_desc-status_fitmap.nii.gz").get_fdata()
    fitted = obj & (status == 0)
    assert fitted.sum() >= 0.9 * obj.sum()
    assert np.median(np.abs(mwf[fitted] - frac[fitted])) < 0.03
    assert (status[~obj] == 5).all()  # zero-filled background: all samples equal, nothing to fit
    assert np.isnan(mwf[~obj]).all()
    angle = nib.load(out / f"{pre}_RefocusAnglemap.nii.gz").get_fdata()
    assert np.median(np.abs(angle[fitted] - 180 * b1[fitted])) < 4.0
    long_ = nib.load(out / f"{pre}_desc-long_T2map.nii.gz").get_fdata()
    assert np.median(long_[fitted]) == pytest.approx(80.0, rel=0.05)  # ms (--units ms)
    se = nib.load(out / f"{pre}_desc-stderr_MWFmap.nii.gz").get_fdata()
    assert np.all(se[fitted] > 0) and np.median(se[fitted]) < 0.05
    spec = nib.load(out / f"{pre}_desc-spectrum_T2distmap.nii.gz")
    side = json.loads((out / f"{pre}_desc-spectrum_T2distmap.json").read_text())
    assert spec.shape == (*frac.shape, 40) and len(side["T2Values"]) == 40 and side["T2Units"] == "ms"
    assert side["T2Values"][0] == pytest.approx(10.0) and side["Units"] == "a.u."
    prov = json.loads((out / f"{pre}_provenance.json").read_text())
    assert list(prov) == ["qmap_version", "command_line", "inputs", "acquisition", "options", "model", "noise",
                          "status_counts", "status_codes", "wall_time_s", "outputs"]
    assert sum(prov["status_counts"].values()) == frac.size
    assert prov["outputs"][f"{pre}_MWFmap.nii.gz"] == {"parameter": "MWF", "kind": "estimate", "units": "fraction"}
    assert prov["outputs"][f"{pre}_desc-short_T2map.nii.gz"]["units"] == "ms"
    assert "10" in prov["status_codes"] and prov["model"]["se_calibration"]["n_voxels"] == 24
    for name in prov["outputs"]:
        assert (out / name).exists()
        assert json.loads((out / name.replace(".nii.gz", ".json")).read_text())["Units"]
    for q in ("rsquared", "rmse", "chi2", "regweight", "snr"):
        assert (out / f"{pre}_desc-{q}_fitmap.nii.gz").exists()
    # inspect: the numbers of the maps, and a plot of the train and the spectrum
    from qmap.workflows.inspect import inspect_voxel

    rep = inspect_voxel(out, "5,3,1")
    values = {name: v for name, v, _, _ in rep.values}
    assert values["MWF"] == pytest.approx(mwf[5, 3, 1]) and rep.status == status[5, 3, 1]
    assert rep.png.is_file() and rep.png.stat().st_size > 10_000
    from qmap.workflows.inspect_spectrum import spectrum_voxel

    sv = spectrum_voxel(prov, out, (5, 3, 1), np.asarray(nib.load(path).dataobj[5, 3, 1], float))
    rms = np.sqrt(np.mean((sv["fitted"] - np.asarray(nib.load(path).dataobj[5, 3, 1], float)) ** 2))
    assert rms < 2.5 * SIGMA  # the fitted train (spectrum x basis at the mapped angle) matches the samples


def _series_files(tmp_path, te, shape=(4, 4, 1)):
    rng = np.random.default_rng(0)
    clean = 1000 * np.exp(-np.asarray(te) / 0.08)
    data = rician(np.broadcast_to(clean, (*shape, len(te))), 3.0, rng)
    return write_nifti(tmp_path / "bad_MESE.nii.gz", data, sidecar={"EchoTime": list(map(float, te))})


def test_t2_and_t2_spectrum_of_one_series_do_not_share_a_default_prefix(series, tmp_path):
    # regression: both used sub-01_acq-mese, so the second run into the same folder was refused (or, with
    # --overwrite, replaced the first one's T2map); the spectrum fit is named as batch --t2-spectrum names it
    from qmap.batch.plan import SPECTRUM_KIND, _prefix

    path = series[0]
    out = tmp_path / "out"
    assert main(["t2", str(path), "-o", str(out), "--mask", "none", "--sigma", str(SIGMA), "-q"]) == 0
    t2_before = (out / "sub-01_acq-mese_T2map.nii.gz").read_bytes()
    assert main(["t2-spectrum", str(path), "-o", str(out), "--mask", "none", "--sigma", str(SIGMA), "-q",
                 "--se-subsample", "8"]) == 0
    spectrum = _prefix("01", None, None, SPECTRUM_KIND.method, [])
    assert spectrum == "sub-01_acq-mesespectrum"
    assert (out / f"{spectrum}_MWFmap.nii.gz").is_file() and (out / f"{spectrum}_provenance.json").is_file()
    assert (out / "sub-01_acq-mese_T2map.nii.gz").read_bytes() == t2_before  # the t2 fit is untouched
    assert json.loads((out / "sub-01_acq-mese_provenance.json").read_text())["command_line"][1] == "t2"


@pytest.mark.parametrize("te, extra, message", [
    (ESP * np.arange(1, 7), [], "at least 8 echoes"),
    (np.r_[ESP * np.arange(1, 16), 0.2], [], "equally spaced"),
    (ESP * np.arange(1, 17), ["--refocus", "3.1"], "radians"),
    (ESP * np.arange(1, 17), ["--refocus", "abc"], "--refocus"),
    (ESP * np.arange(1, 17), ["--window", "40ms,10ms"], "--window"),
    (ESP * np.arange(1, 17), ["--chi2-factor", "0.9"], "--chi2-factor"),
])
def test_bad_input_exit_2_nothing_written(tmp_path, capsys, te, extra, message):
    path = _series_files(tmp_path, te)
    before = snapshot(tmp_path)
    code = main(["t2-spectrum", str(path), "-o", str(tmp_path / "out"), "-q", "--mask", "none", *extra])
    assert code == 2
    err = capsys.readouterr().err.strip()
    assert message in err and len(err.splitlines()) == 1
    assert snapshot(tmp_path) == before and not (tmp_path / "out").exists()


def test_sidecar_refocusing_angle_without_value_is_refused(tmp_path, capsys):
    """A sidecar that names a refocusing angle must give a number of degrees (not radians, not text)."""
    path = _series_files(tmp_path, ESP * np.arange(1, 17))
    side = tmp_path / "bad_MESE.json"
    meta = json.loads(side.read_text())
    meta["RefocusingFlipAngle"] = 3.14
    side.write_text(json.dumps(meta))
    assert main(["t2-spectrum", str(path), "-o", str(tmp_path / "out"), "-q", "--mask", "none"]) == 2
    assert "RefocusingFlipAngle" in capsys.readouterr().err


def test_array_sigma_auto_takes_the_background():
    """sigma="auto" of the array API, as the command's default: the noise level from the image background
    (Rician noise of sd SIGMA around a two-pool object), within 3 % of the sd the data were simulated with;
    the maps are those of an explicit sigma of that value."""
    from qmap.workflows.t2_spectrum import fit_t2_spectrum

    rng = np.random.default_rng(21)
    shape = (24, 24, 4)
    x, y, _ = np.indices(shape)
    obj = (abs(x - 11.5) < 5) & (abs(y - 11.5) < 5)
    frac = np.where(obj, 0.15, 0.0)
    short = cpmg_reference(np.full(frac.size, 0.02), np.full(frac.size, 170.0), esp=ESP, n_echoes=N_ECHOES)
    long_ = cpmg_reference(np.full(frac.size, 0.08), np.full(frac.size, 170.0), esp=ESP, n_echoes=N_ECHOES)
    clean = 1000.0 * obj.ravel()[:, None] * (frac.ravel()[:, None] * short + (1 - frac.ravel())[:, None] * long_)
    data = rician(clean.reshape(*shape, N_ECHOES), SIGMA, rng)  # background: Rician noise of pure noise
    maps, extra = fit_t2_spectrum(data, TE, sigma="auto", mask=obj, se_subsample=6, n_jobs=1)
    noise = extra["noise"]
    assert noise["source"] == "background"
    assert noise["sigma"] == pytest.approx(SIGMA, rel=0.03)
    ref, _ = fit_t2_spectrum(data, TE, sigma=noise["sigma"], mask=obj, se_subsample=6, n_jobs=1)
    np.testing.assert_array_equal(maps["MWF"], ref["MWF"])
    np.testing.assert_array_equal(maps.stderr["MWF"], ref.stderr["MWF"])
    with pytest.raises(ValueError, match="sigma='local'"):
        fit_t2_spectrum(data, TE, sigma="local", mask=obj)


def test_results_do_not_depend_on_chunks_or_workers():
    from qmap.workflows.t2_spectrum import fit_t2_spectrum

    data, _, _, _ = _volume(shape=(4, 4, 2), seed=4)
    a, ea = fit_t2_spectrum(data, TE, sigma=SIGMA, chunk_size=9, n_jobs=2, se_subsample=6)
    b, eb = fit_t2_spectrum(data, TE, sigma=SIGMA, chunk_size=64, n_jobs=1, se_subsample=6)
    for name in ("MWF", "RefocusAngle"):
        np.testing.assert_array_equal(a[name], b[name])
        np.testing.assert_array_equal(a.stderr[name], b.stderr[name])
    np.testing.assert_array_equal(ea["spectrum"], eb["spectrum"])


def test_sigma_local_follows_noise_that_varies_over_the_image(tmp_path):
    """--sigma local: the noise sd is 3x higher on one half of the image (e.g. a coil's sensitivity); the map
    written follows it (within 20 % away from the step), and the chi2 maps use it: with one noise level for the
    whole image the noisy half's chi2 is about 9x the quiet half's, with the local map about the same."""
    rng = np.random.default_rng(12)
    shape = (22, 12, 3)
    x, y, _ = np.indices(shape)
    obj = (x >= 3) & (x < 19) & (y >= 2) & (y < 10)
    noise = np.where(x < 11, 4.0, 12.0)
    clean = 3000.0 * (0.15 * cpmg_reference(np.full(obj.sum(), 0.02), np.full(obj.sum(), 170.0), esp=ESP,
                                            n_echoes=N_ECHOES)
                      + 0.85 * cpmg_reference(np.full(obj.sum(), 0.08), np.full(obj.sum(), 170.0), esp=ESP,
                                              n_echoes=N_ECHOES))
    signal = np.zeros((*shape, N_ECHOES))
    signal[obj] = clean
    data = rician(signal, noise[..., None], rng)  # noise everywhere, background included (real exports)
    path = write_nifti(tmp_path / "sub-01_MESE.nii.gz", data.astype(np.float32), sidecar={"EchoTime": TE.tolist()})
    pre = "sub-01_acq-mesespectrum"
    chi2 = {}
    for mode in ("auto", "local"):
        out = tmp_path / mode
        assert main(["t2-spectrum", str(path), "-o", str(out), "--sigma", mode, "-q", "--se-subsample", "20"]) == 0
        status = nib.load(out / f"{pre}_desc-status_fitmap.nii.gz").get_fdata()
        c = nib.load(out / f"{pre}_desc-chi2_fitmap.nii.gz").get_fdata()
        inner = obj & (status == 0)
        quiet, noisy = inner & (x < 8), inner & (x >= 14)
        assert quiet.sum() > 50 and noisy.sum() > 50
        chi2[mode] = np.median(c[noisy]) / np.median(c[quiet])
    assert chi2["auto"] == pytest.approx(9.0, rel=0.3)
    assert chi2["local"] == pytest.approx(1.0, abs=0.3)
    sig = nib.load(tmp_path / "local" / f"{pre}_desc-noise_sigmamap.nii.gz").get_fdata()
    assert np.median(sig[quiet]) == pytest.approx(4.0, rel=0.2)
    assert np.median(sig[noisy]) == pytest.approx(12.0, rel=0.2)
    prov = json.loads((tmp_path / "local" / f"{pre}_provenance.json").read_text())
    assert prov["noise"]["sigma_mode"] == "local" and "noise map" in prov["noise"]["sigma_source"]
    assert prov["outputs"][f"{pre}_desc-noise_sigmamap.nii.gz"]["kind"] == "quality"
    assert 4.0 < prov["noise"]["sigma"] < 12.0  # the median of the map


def test_a_run_that_fits_no_voxel_says_so(series, tmp_path, capsys):
    """Every voxel below --min-snr (status 10): exit 0 with the values kept, and one warning naming the status."""
    path, *_ = series
    out = tmp_path / "out"
    capsys.readouterr()
    code = main(["t2-spectrum", str(path), "-o", str(out), "--sigma", str(SIGMA), "-q", "--min-snr", "1e6",
                 "--se-subsample", "24"])
    err = capsys.readouterr().err
    assert code == 0
    status = nib.load(out / "sub-01_acq-mesespectrum_desc-status_fitmap.nii.gz").get_fdata()
    n_mask = int((status != 1).sum())
    assert n_mask > 0 and set(np.unique(status[status != 1])) <= {3, 10}
    assert err.strip().splitlines() == [(
        f"qmap: warning: only 0 of the {n_mask} voxels in the mask were fitted (status 0); most of the others have "
        f"status 10: signal-to-noise ratio too low for a reliable T2 spectrum (values kept; see --min-snr); see the "
        f"status map before using the maps")]


def test_noise_map_with_holes_skips_those_voxels(tmp_path):
    # the spectrum's regularisation and SNR need the noise sd: as the fits that model the noise floor, a voxel
    # where the noise map has no positive value is not fitted (status 2, every map NaN there); the other voxels'
    # estimates are those of a hole-free map, and the provenance names the map (path, SHA-256)
    data, _frac, _b1, _obj = _volume()
    path = write_nifti(tmp_path / "sub-01_MESE.nii.gz", data.astype(np.float32), sidecar={"EchoTime": TE.tolist()})
    full = np.full(data.shape[:3], SIGMA, np.float32)
    holed = full.copy()
    holes = np.zeros(full.shape, bool)
    holes[3, 3, 0] = holes[4, 2, 1] = True
    holed[3, 3, 0], holed[4, 2, 1] = 0.0, np.nan
    maps = {}
    for name, sig in (("full", full), ("holed", holed)):
        sp = write_nifti(tmp_path / f"{name}.nii.gz", sig)
        assert main(["t2-spectrum", str(path), "-o", str(tmp_path / name), "--sigma", str(sp), "-q", "--mask", "none",
                     "--se-subsample", "20", "--prefix", "x"]) == 0
        maps[name] = {f.name: np.asarray(nib.load(str(f)).dataobj) for f in (tmp_path / name).glob("*.nii.gz")}
    a, b = maps["full"], maps["holed"]
    status = b["x_desc-status_fitmap.nii.gz"]
    assert (status[holes] == 2).all() and (a["x_desc-status_fitmap.nii.gz"][holes] == 0).all()
    for name in a:
        if name.startswith("x_desc-status"):
            continue
        assert np.isnan(b[name][holes]).all(), name
        if "stderr" not in name:  # the standard errors are calibrated on a subsample of the fitted voxels
            np.testing.assert_array_equal(a[name][~holes], b[name][~holes], err_msg=name)
    prov = json.loads((tmp_path / "holed" / "x_provenance.json").read_text())
    assert prov["status_counts"]["2"] == 2
    entry = prov["noise"]["noise_map"]
    assert entry["path"] == str((tmp_path / "holed.nii.gz").absolute()) and len(entry["sha256"]) == 64


def _images(folder) -> dict:
    """File name -> (header bytes, voxel bytes) of every NIfTI below ``folder``; sidecars as parsed JSON."""
    res: dict = {}
    for p in sorted(folder.iterdir()):
        if p.name.endswith(".nii.gz"):
            img = nib.load(p)
            res[p.name] = (img.header.binaryblock, np.asarray(img.dataobj).tobytes())
        elif p.name.endswith(".json") and not p.name.endswith("provenance.json"):
            res[p.name] = json.loads(p.read_text())
    return res


@pytest.mark.parametrize("sigma", ["auto", "local"])
def test_streamed_in_many_slabs_bit_identical_to_one_slab(series, tmp_path, monkeypatch, capsys, sigma):
    """The run fits and writes in slabs of about SLAB_VOXELS voxels (the spectra through a temporary file, the
    4D spectrum compressed a T2 value at a time): one slice per slab with --max-memory reading the series in
    slabs and -j 1 gives the same files, bit for bit, as one slab with -j 2, for the noise level from the pooled
    residuals (this series has a zero-filled background: the noise level and every voxel's SNR, chi2 and
    standard errors are set after the fit) and from the local map. The spectrum and the maps are those of the
    array API, which holds every voxel's results in memory."""
    import qmap.workflows.t2_spectrum as wf

    path, *_ = series
    args = ["t2-spectrum", str(path), "--se-subsample", "24", "--sigma", sigma, "--mask", "none", "--prefix", "x"]
    monkeypatch.setattr(wf, "SLAB_VOXELS", 10**9)
    assert main([*args, "-q", "-o", str(tmp_path / "one"), "-j", "2"]) == 0
    monkeypatch.setattr(wf, "SLAB_VOXELS", 1)  # one slice per slab
    capsys.readouterr()
    assert main([*args, "-o", str(tmp_path / "many"), "-j", "1", "--max-memory", "4K"]) == 0
    assert "read in 2 slabs" in capsys.readouterr().out  # the series is read a slice at a time too
    one, many = _images(tmp_path / "one"), _images(tmp_path / "many")
    assert len(one) == (28 if sigma == "local" else 26) and one.keys() == many.keys()  # 13 or 14 maps + sidecars
    for name in one:
        assert one[name] == many[name], name
    if sigma == "auto":  # the array API with the pooled noise level the run found
        data = np.asarray(nib.load(path).dataobj, np.float32)
        pooled = json.loads((tmp_path / "one" / "x_provenance.json").read_text())["noise"]["sigma"]
        maps, extra = wf.fit_t2_spectrum(data, TE, sigma=pooled, se_subsample=24, n_jobs=1)
        spec = nib.load(tmp_path / "many" / "x_desc-spectrum_T2distmap.nii.gz").get_fdata(dtype=np.float32)
        fitted = maps.status == 0
        np.testing.assert_array_equal(spec[fitted], extra["spectrum"][fitted])
        mwf = nib.load(tmp_path / "many" / "x_MWFmap.nii.gz").get_fdata(dtype=np.float32)
        np.testing.assert_allclose(mwf[fitted], maps["MWF"][fitted], rtol=0, atol=1e-6)
        # sigma="auto" of the array API finds what the command found (no usable background: the pooled
        # residuals) and gives the same maps and standard errors
        auto, extra_auto = wf.fit_t2_spectrum(data, TE, sigma="auto", se_subsample=24, n_jobs=1)
        assert extra_auto["noise"]["sigma"] == pytest.approx(pooled, rel=1e-6)
        assert "no usable background" in extra_auto["noise"]["source"]
        np.testing.assert_array_equal(auto.status, maps.status)
        np.testing.assert_allclose(auto["MWF"][fitted], mwf[fitted], rtol=0, atol=1e-6)
        se = nib.load(tmp_path / "many" / "x_desc-stderr_MWFmap.nii.gz").get_fdata(dtype=np.float32)
        np.testing.assert_allclose(auto.stderr["MWF"][fitted], se[fitted], rtol=1e-5)


def test_a_failure_after_the_fit_leaves_nothing(series, tmp_path, monkeypatch, capsys):
    """All or nothing: the maps streamed so far are removed when the run fails while writing."""
    import qmap.workflows.t2_spectrum as wf
    from qmap.errors import OutputError

    path, *_ = series

    def broken(self):
        yield np.zeros(self.shape, np.float32)
        raise OutputError("the disk is full (a test)")

    monkeypatch.setattr(wf._SpectrumFile, "volumes", broken)
    out = tmp_path / "out"
    code = main(["t2-spectrum", str(path), "-o", str(out), "-q", "--sigma", str(SIGMA), "--se-subsample", "8"])
    assert code == 2 and "the disk is full (a test)" in capsys.readouterr().err
    assert snapshot(out) == {}
