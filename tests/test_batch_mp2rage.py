"""`qmap batch` with MP2RAGE series: discovery of *_UNIT1 + *_inv-<i>_MP2RAGE + the session's TB1map.

Invented dataset: a disc of four T1 values (0.6, 1.0, 1.5, 2.2 s) in a noise-only background; the
inversion images come from the pulse-by-pulse reference simulation (tests/reference/mp2rage_pulses.py)
of a 3 T-like protocol (TR_prep 5 s, TI 0.7/2.5 s, 4/5 deg, 176 shots of 7 ms; values from memory) at
B1 = 0.9, with complex Gaussian noise; UNI = Re(S1* S2)/(|S1|^2 + |S2|^2) (Marques et al., NeuroImage
2010) stored as the 12-bit export round((UNI + 0.5) x 4095) (common practice).

- sub-01: UNIT1 (sidecar without the protocol) + both inversions (their sidecars complete it) + a
  TB1map in percent;
- sub-02: UNIT1 alone, protocol in its sidecar, no B1 map;
- sub-03: inversion images without a UNIT1 -> that series fails, the others are fitted (exit 4).
"""

from __future__ import annotations

import json
import shlex
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from qmap.batch.plan import discover
from qmap.batch.series import equivalent_argv
from qmap.cli import get_parser, main
from tests.reference.mp2rage_pulses import simulate

SHAPE = (40, 40, 2)
AFFINE = np.diag([2.0, 2.0, 3.0, 1.0])
PROTO = {"RepetitionTimePreparation": 5.0, "RepetitionTimeExcitation": 0.007, "NumberShots": 176}
TI, FA, B1 = (0.7, 2.5), (4.0, 5.0), 0.9
T1S = (0.6, 1.0, 1.5, 2.2)


def _save(path: Path, data, sidecar=None, dtype=np.float32):
    path.parent.mkdir(parents=True, exist_ok=True)
    nib.save(nib.Nifti1Image(np.asarray(data, dtype), AFFINE), str(path))
    if sidecar is not None:
        path.with_name(path.name.removesuffix(".nii.gz") + ".json").write_text(json.dumps(sidecar))


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    root = tmp_path_factory.mktemp("bids")
    rng = np.random.default_rng(8)
    s1, s2 = simulate(np.array(T1S), B1, ti=TI, fa=FA, tr_prep=5.0, tr_exc=0.007, shots=176)
    x, y, _ = np.indices(SHAPE)
    r2 = (x - 19.5) ** 2 + (y - 19.5) ** 2
    obj = r2 < 12.0**2
    quadrant = (x >= 20).astype(int) + 2 * (y >= 20).astype(int)
    truth = np.where(obj, np.array(T1S)[quadrant], np.nan)
    sig1 = np.where(obj, 1000 * s1[quadrant], 0.0)
    sig2 = np.where(obj, 1000 * s2[quadrant], 0.0)
    sigma = 0.3
    z1 = sig1 + rng.normal(0, sigma, SHAPE) + 1j * rng.normal(0, sigma, SHAPE)
    z2 = sig2 + rng.normal(0, sigma, SHAPE) + 1j * rng.normal(0, sigma, SHAPE)
    uni = np.real(np.conj(z1) * z2) / (np.abs(z1) ** 2 + np.abs(z2) ** 2)
    uni12 = np.round((uni + 0.5) * 4095)
    full = dict(PROTO, InversionTime=list(TI), FlipAngle=list(FA))
    for sub in ("01", "03"):
        a = root / f"sub-{sub}" / "anat"
        for k in (0, 1):
            _save(a / f"sub-{sub}_inv-{k + 1}_MP2RAGE.nii.gz", np.abs((z1, z2)[k]),
                  dict(PROTO, InversionTime=TI[k], FlipAngle=FA[k]))
    _save(root / "sub-01" / "anat" / "sub-01_UNIT1.nii.gz", uni12, {"Description": "UNI"}, np.uint16)
    _save(root / "sub-01" / "fmap" / "sub-01_TB1map.nii.gz", np.full(SHAPE, 100 * B1), {"Units": "percent"})
    _save(root / "sub-02" / "anat" / "sub-02_UNIT1.nii.gz", uni12, full, np.uint16)
    return root, truth, obj


def test_discovery_of_mp2rage_series(dataset, tmp_path):
    root, _, _ = dataset
    plan = discover(root, tmp_path / "d")
    by = {p.subject: p for p in plan.series}
    assert sorted(by) == ["01", "02", "03"]
    p1 = by["01"]
    assert p1.suffix == "MP2RAGE" and p1.prefix == "sub-01_acq-mp2rage"
    assert p1.uni.endswith("sub-01_UNIT1.nii.gz") and [Path(f).name for f in p1.inputs] == [
        "sub-01_inv-1_MP2RAGE.nii.gz", "sub-01_inv-2_MP2RAGE.nii.gz"]
    assert p1.b1.endswith("sub-01_TB1map.nii.gz") and p1.b1_scale == "percent" and p1.error is None
    assert by["02"].inputs == [] and by["02"].b1 is None and by["02"].error is None
    assert "without the combined image" in by["03"].error
    # the recorded command line is the single-series command
    args = get_parser().parse_args(equivalent_argv(p1)[1:])
    assert args.command == "t1-mp2rage" and args.uni == p1.uni and args.inv2 == p1.inputs[1]
    assert args.b1 == p1.b1 and args.b1_scale == "percent"


def test_batch_fits_mp2rage_and_reruns_nothing(dataset, tmp_path, capsys):
    root, truth, obj = dataset
    deriv = tmp_path / "deriv"
    assert main(["batch", str(root), "-o", str(deriv), "-j", "1"]) == 4  # sub-03 fails, the rest is fitted
    out = capsys.readouterr()
    assert "without the combined image" in out.out + out.err
    a1 = deriv / "sub-01" / "anat"
    t1 = np.asarray(nib.load(str(a1 / "sub-01_acq-mp2rage_T1map.nii.gz")).dataobj)
    st = np.asarray(nib.load(str(a1 / "sub-01_acq-mp2rage_desc-status_fitmap.nii.gz")).dataobj)
    good = obj & (st == 0)
    assert good.sum() > 0.9 * obj.sum()
    assert np.median(np.abs(t1[good] / truth[good] - 1)) < 0.015  # B1-corrected through the TB1map
    assert (a1 / "sub-01_acq-mp2rage_M0map.nii.gz").exists()
    prov = json.loads((a1 / "sub-01_acq-mp2rage_provenance.json").read_text())
    assert prov["acquisition"]["InversionTime"] == list(TI) and prov["options"]["b1_scale"] == "percent"
    t1_02 = np.asarray(nib.load(str(deriv / "sub-02" / "anat" / "sub-02_acq-mp2rage_T1map.nii.gz")).dataobj)
    # without the B1 map (0.9 of nominal) the error is larger
    assert np.median(np.abs(t1_02[good] / truth[good] - 1)) > 2 * np.median(np.abs(t1[good] / truth[good] - 1))
    stamp = {p: p.stat().st_mtime_ns for p in deriv.rglob("*") if p.is_file()}
    assert main(["batch", str(root), "-o", str(deriv), "-j", "1", "-q"]) == 4
    assert stamp == {p: p.stat().st_mtime_ns for p in deriv.rglob("*") if p.is_file()}
    assert shlex.join(prov["command_line"]).startswith("qmap t1-mp2rage ")
