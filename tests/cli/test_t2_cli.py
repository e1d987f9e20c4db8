"""`qmap t2` end to end through the command line (the README's contract, issue 6).

The series are CPMG trains from the independent isochromat simulation
(tests/reference/isochromat.py) with Rician noise.
"""

import json

import nibabel as nib
import numpy as np
import pytest

from qmap.cli import main
from tests.conftest import rician, write_nifti
from tests.reference.isochromat import cpmg_isochromats

ESP = 0.010
N_ECHOES = 24
TE = ESP * np.arange(1, N_ECHOES + 1)
#: (T2 s, refocusing scale) per quadrant of the object
TISSUES = [(0.04, 0.85), (0.08, 0.95), (0.12, 0.9), (0.06, 1.0)]
SIGMA = 8.0


def _phantom(seed=0, shape=(48, 48, 2)):
    """A disc of four tissues (quadrants) with a partial-volume rim, in a noise-only background."""
    rng = np.random.default_rng(seed)
    x, y, _ = np.indices(shape)
    c = (shape[0] - 1) / 2
    r = np.hypot(x - c, y - c)
    obj = r < 9.0
    rim = np.clip(11.0 - r, 0.0, 2.0) / 2.0  # 1 inside, falling to 0 over two voxels
    quad = (x > c).astype(int) + 2 * (y > c).astype(int)
    trains = np.array([cpmg_isochromats(t2, 1.0, ESP, N_ECHOES, 180 * s, excite_deg=90 * s, n_iso=512)
                       for t2, s in TISSUES])
    clean = 1000.0 * rim[..., None] * trains[quad]
    t2 = np.where(obj, np.array([t for t, _ in TISSUES])[quad], np.nan)
    scale = np.where(obj, np.array([s for _, s in TISSUES])[quad], np.nan)
    return rician(clean, SIGMA, rng), t2, scale, obj


@pytest.fixture
def mese(tmp_path):
    data, t2, scale, obj = _phantom()
    path = write_nifti(tmp_path / "sub-01_MESE.nii.gz", data, sidecar={"EchoTime": TE.tolist()})
    return path, t2, scale, obj


def _run(*args):
    return main(["t2", *map(str, args), "-q"])


def _map(out, name):
    return nib.load(str(out / name)).get_fdata()


def test_epg_outputs_maps_and_provenance(mese, tmp_path):
    path, t2, _scale, obj = mese
    out = tmp_path / "out"
    assert _run(path, "-o", out, "--epg", "--t1", "1200ms") == 0
    prov = json.loads((out / "sub-01_acq-mese_provenance.json").read_text())
    assert prov["model"]["name"] == "epg_t2"
    assert prov["model"]["refocus_deg"] == 180.0 and prov["model"]["t1_s"] == pytest.approx(1.2)
    assert prov["model"]["echo_spacing_s"] == pytest.approx(ESP)
    assert prov["options"]["epg"] is True and prov["options"]["t1_s"] == pytest.approx(1.2)
    assert prov["noise"]["mode"] == "rician" and prov["noise"]["sigma"] > 0  # the default, sigma from background
    assert prov["acquisition"]["EchoTime"] == pytest.approx(TE.tolist())
    assert sum(prov["status_counts"].values()) == obj.size
    for p in ("T2", "R2", "M0", "RefocusScale"):
        assert f"sub-01_acq-mese_{p}map.nii.gz" in prov["outputs"]
        assert f"sub-01_acq-mese_desc-stderr_{p}map.nii.gz" in prov["outputs"]
    assert prov["outputs"]["sub-01_acq-mese_RefocusScalemap.nii.gz"] == {
        "parameter": "RefocusScale", "kind": "estimate", "units": "fraction"}
    assert prov["outputs"]["sub-01_acq-mese_T2map.nii.gz"]["units"] == "s"
    side = json.loads((out / "sub-01_acq-mese_RefocusScalemap.json").read_text())
    assert side["Units"] == "fraction" and side["Description"]
    status = _map(out, "sub-01_acq-mese_desc-status_fitmap.nii.gz")
    good = obj & (status == 0)
    assert good.sum() > 0.85 * obj.sum()
    # per tissue: median T2 within 2 % and refocusing scale within 0.03 of the simulated truth
    t2map, scalemap = _map(out, "sub-01_acq-mese_T2map.nii.gz"), _map(out, "sub-01_acq-mese_RefocusScalemap.nii.gz")
    for t, s in TISSUES:
        sel = good & (t2 == t)
        assert abs(np.median(t2map[sel]) / t - 1) < 0.02
        assert abs(np.median(scalemap[sel]) - s) < 0.03


def test_monoexponential_default_and_drop_first(mese, tmp_path):
    path, t2, _scale, obj = mese
    assert _run(path, "-o", tmp_path / "a", "--sigma", SIGMA) == 0
    assert _run(path, "-o", tmp_path / "b", "--sigma", SIGMA, "--drop-first", "--units", "ms") == 0
    prov = json.loads((tmp_path / "b/sub-01_acq-mese_provenance.json").read_text())
    assert prov["model"]["name"] == "monoexp" and prov["options"]["drop_first_echo"] is True
    assert prov["acquisition"]["EchoTime"] == pytest.approx(TE[1:].tolist())
    assert prov["outputs"]["sub-01_acq-mese_T2map.nii.gz"]["units"] == "ms"
    assert not (tmp_path / "a/sub-01_acq-mese_RefocusScalemap.nii.gz").exists()
    a = _map(tmp_path / "a", "sub-01_acq-mese_T2map.nii.gz")
    b = _map(tmp_path / "b", "sub-01_acq-mese_T2map.nii.gz") / 1000
    # poorly refocused tissue (scale 0.85): the mono-exponential fit overestimates T2 (stimulated echoes;
    # Lebel & Wilman 2010); without the first echo the bias is smaller (common practice)
    sel = obj & (t2 == 0.04)
    bias_all, bias_dropped = np.median(a[sel]) / 0.04 - 1, np.median(b[sel]) / 0.04 - 1
    assert bias_all > 0.03 and abs(bias_dropped) < 0.5 * bias_all


@pytest.mark.parametrize("from_sidecar", [True, False])
def test_unequal_echo_spacing_with_epg_is_one_line_exit_2(tmp_path, capsys, from_sidecar):
    te = TE.copy()
    te[5] += 0.003
    data, *_ = _phantom()
    path = write_nifti(tmp_path / "mese.nii.gz", data, sidecar={"EchoTime": te.tolist()} if from_sidecar else None)
    out = tmp_path / "out"
    extra = [] if from_sidecar else ["--te", ",".join(f"{1e3 * t:g}ms" for t in te)]
    code = main(["t2", str(path), "--epg", *extra, "-o", str(out), "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert "equally spaced" in err and "echo 6 is at 63 ms, expected 60 ms" in err, err
    assert not out.exists()
    # without --epg the same series is a valid mono-exponential fit
    assert main(["t2", str(path), *extra, "-o", str(out), "--sigma", str(SIGMA), "-q"]) == 0


@pytest.mark.parametrize(
    ("args", "expect"),
    [
        (["--refocus", "160"], "--epg"),  # EPG-only options without --epg
        (["--epg", "--drop-first"], "drop-first"),
        (["--epg", "--refocus", "200"], "--refocus"),
        (["--epg", "--t1", "1000"], "1000ms"),
    ],
)
def test_bad_options_exit_2(mese, tmp_path, capsys, args, expect):
    path, *_ = mese
    out = tmp_path / "out"
    code = main(["t2", str(path), *args, "-o", str(out), "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2, err
    assert len(err.splitlines()) == 1 and expect in err, err
    assert not out.exists()


def test_refocus_option_is_used(mese, tmp_path):
    # the same data described with a nominal 160 deg refocusing: the fitted angle is unchanged, so
    # RefocusScale scales by 180/160 (capped at 180 deg, i.e. 1.125)
    path, t2, _scale, obj = mese
    assert _run(path, "-o", tmp_path / "a", "--epg", "--sigma", SIGMA) == 0
    assert _run(path, "-o", tmp_path / "b", "--epg", "--refocus", "160", "--sigma", SIGMA) == 0
    prov = json.loads((tmp_path / "b/sub-01_acq-mese_provenance.json").read_text())
    assert prov["model"]["refocus_deg"] == 160.0 and prov["options"]["refocus_deg"] == 160.0
    sa = _map(tmp_path / "a", "sub-01_acq-mese_RefocusScalemap.nii.gz")
    sb = _map(tmp_path / "b", "sub-01_acq-mese_RefocusScalemap.nii.gz")
    ta, tb = _map(tmp_path / "a", "sub-01_acq-mese_T2map.nii.gz"), _map(tmp_path / "b", "sub-01_acq-mese_T2map.nii.gz")
    sel = obj & (t2 == 0.08)
    np.testing.assert_allclose(np.median(sb[sel]), np.median(sa[sel]) * 180 / 160, rtol=1e-3)
    np.testing.assert_allclose(np.median(tb[sel]), np.median(ta[sel]), rtol=1e-3)
    assert np.nanmax(sb) <= 180 / 160 + 1e-12


def test_help_states_default_noise_floor_and_why_drop_first(capsys):
    assert main(["t2", "--help"]) == 0
    text = " ".join(capsys.readouterr().out.split())
    assert "default rician" in text
    assert "stimulated-echo contribution" in text
    assert "default 1s" in text
