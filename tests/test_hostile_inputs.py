"""Hostile inputs for every command: refuse cleanly, or proceed and say so (issue 10).

Every refused case must give (README, "Exit codes"): exit code 2, exactly
one line on stderr naming the problem and the fix, no traceback, and no trace in
the file system -- a fresh output folder is not created, and a folder holding a
previous run's outputs (replaced with ``--overwrite``) is byte-identical
afterwards. Inputs are never modified either: the whole ``tmp_path`` is
snapshotted before and after each run.

Cases where the run can proceed (NaN voxels, unsorted echo times, a sidecar
disagreeing with the command line, integer data with scaling slopes) check the
documented outcome against an independent reference run on clean input.

The reference numbers are the NIfTI-1 standard (scl_slope / scl_inter: "y =
scl_slope * x + scl_inter", nifti1.h, NIfTI DFWG 2004) and the BIDS
specification (EchoTime / InversionTime / RepetitionTime in seconds,
FlipAngle in degrees).
"""

from __future__ import annotations

import errno
import gzip
import json
import os
import re
import shutil
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

import qmap.io.writer as writer_mod
from qmap.cli import main
from tests.conftest import decay_phantom, snapshot, write_nifti

TE = np.arange(1, 9) * 0.005  # 5..40 ms, 8 echoes
TE_MS = ",".join(f"{t * 1e3:g}ms" for t in TE)
AFFINE = np.diag([2.0, 2.0, 3.0, 1.0])


def cli(argv, capsys):
    """Run ``qmap`` in-process; returns (exit code, stdout, stderr)."""
    capsys.readouterr()
    rc = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return rc, out, err


def one_line(err: str) -> str:
    lines = err.strip("\n").splitlines()
    assert "Traceback" not in err, err
    assert len(lines) == 1, f"expected one line on stderr, got {len(lines)}:\n{err}"
    return lines[0]


@pytest.fixture(scope="module")
def phantom():
    """Rician-noise decay phantom (32x32x3, 8 echoes) shared by the module (read-only)."""
    data, _te, t2, obj = decay_phantom(te=TE)
    return data.astype(np.float32), t2, obj


# --------------------------------------------------------------------------- case builders
# Each builder gets the input folder and the phantom and returns the argument list
# after the command name (series and case-specific options).


def _good4d(d: Path, data, name="sub-01_MEGRE.nii.gz", sidecar=True):
    return write_nifti(d / name, data, affine=AFFINE, sidecar={"EchoTime": TE.tolist()} if sidecar else None)


def _echo_files(d: Path, data, *, affines=None, shapes_cut=None, sidecar=lambda i: {"EchoTime": float(TE[i])}):
    files = []
    for i in range(data.shape[3]):
        vol = data[..., i]
        if shapes_cut is not None and i == shapes_cut:
            vol = vol[:-1]
        aff = AFFINE if affines is None else affines(i)
        files.append(write_nifti(d / f"sub-01_echo-{i + 1}_MEGRE.nii.gz", vol, affine=aff, sidecar=sidecar(i)))
    return files


def b_truncated_gz(d, data):
    p = _good4d(d, data)
    raw = p.read_bytes()
    p.write_bytes(raw[: len(raw) // 2])  # cut mid-stream: header readable, data not
    return [p]


def b_truncated_nii(d, data):
    p = d / "sub-01_MEGRE.nii"
    nib.save(nib.Nifti1Image(data, AFFINE), str(p))
    raw = p.read_bytes()
    p.write_bytes(raw[: len(raw) // 3])
    return [p, "--te", TE_MS]


def b_corrupt_gzip_payload(d, data):
    p = d / "sub-01_MEGRE.nii.gz"
    rng = np.random.default_rng(1)
    p.write_bytes(gzip.compress(rng.integers(0, 256, 4096, dtype=np.uint8).tobytes()))  # valid gzip, no NIfTI inside
    return [p, "--te", TE_MS]


def b_bitflip_gz(d, data):
    p = _good4d(d, data)
    raw = bytearray(p.read_bytes())
    for k in range(len(raw) // 2, len(raw) // 2 + 64):  # corrupt the deflate stream (CRC / stream error)
        raw[k] ^= 0xFF
    p.write_bytes(bytes(raw))
    return [p]


def b_text_as_nifti(d, data):
    p = d / "sub-01_MEGRE.nii.gz"
    p.write_text("EchoTime,Signal\n0.005,1000\n")
    return [p, "--te", TE_MS]


def b_png(d, data):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    p = d / "sub-01_MEGRE.png"
    plt.imsave(p, np.random.default_rng(0).random((8, 8)))
    return [p, "--te", TE_MS]


def b_png_named_nifti(d, data):
    src = b_png(d, data)[0]
    p = d / "sub-01_MEGRE.nii.gz"
    p.write_bytes(src.read_bytes())
    src.unlink()
    return [p, "--te", TE_MS]


def b_empty_file(d, data):
    p = d / "sub-01_MEGRE.nii.gz"
    p.write_bytes(b"")
    return [p, "--te", TE_MS]


def b_missing_file(d, data):
    return [d / "sub-01_MEGRE.nii.gz", "--te", TE_MS]


def b_folder_as_series(d, data):
    (d / "dicom").mkdir()
    return [d / "dicom", "--te", TE_MS]


def b_5d(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", np.stack([data, data], axis=-1), affine=AFFINE,
                        sidecar={"EchoTime": TE.tolist()})]


def b_single_3d(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", data[..., 0], affine=AFFINE, sidecar={"EchoTime": 0.005})]


def b_mixed_4d_and_3d(d, data):
    p4 = _good4d(d, data)
    p3 = write_nifti(d / "extra.nii.gz", data[..., 0], affine=AFFINE, sidecar={"EchoTime": 0.045})
    return [p4, p3]


def b_complex(d, data):
    ph = np.exp(1j * np.linspace(0, 2, data.shape[3]))
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", (data * ph).astype(np.complex64), affine=AFFINE,
                        sidecar={"EchoTime": TE.tolist()})]


def b_rgb(d, data):
    rgb = np.zeros(data.shape, dtype=[("R", "u1"), ("G", "u1"), ("B", "u1")])
    p = d / "sub-01_MEGRE.nii.gz"
    nib.save(nib.Nifti1Image(rgb, AFFINE), str(p))
    return [p, "--te", TE_MS]


def b_all_zero(d, data):
    return [_good4d(d, np.zeros_like(data))]


def b_constant(d, data):
    return [_good4d(d, np.full_like(data, 123.0))]


def b_all_nan(d, data):
    return [_good4d(d, np.full_like(data, np.nan))]


def b_negative(d, data):
    return [_good4d(d, data - 0.5 * data.max())]


def b_te_count(d, data):
    return [_good4d(d, data, sidecar=False), "--te", "5ms,10ms,15ms"]


def b_sidecar_list_length(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": TE[:5].tolist()})]


def b_sidecar_scalar_for_4d(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": 0.005})]


def b_duplicated_te(d, data):
    te = TE.copy()
    te[4] = te[3]
    return [_good4d(d, data, sidecar=False), "--te", ",".join(f"{t * 1e3:g}ms" for t in te)]


def b_duplicated_te_sidecars(d, data):
    return _echo_files(d, data, sidecar=lambda i: {"EchoTime": float(TE[min(i, 6)])})  # echoes 7 and 8 share 35 ms


def b_bare_ms(d, data):
    return [_good4d(d, data, sidecar=False), "--te", ",".join(f"{t * 1e3:g}" for t in TE)]


def b_sidecar_ms(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": (TE * 1e3).tolist()})]


def b_te_zero(d, data):
    return [_good4d(d, data, sidecar=False), "--te", "0," + ",".join(f"{t * 1e3:g}ms" for t in TE[1:])]


def b_te_garbage(d, data):
    return [_good4d(d, data, sidecar=False), "--te", "5ms;10ms"]


def _sidecar_case(value):
    def build(d, data):
        return [write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": value})]

    return build


def b_sidecar_missing_key(d, data):
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", data, affine=AFFINE, sidecar={"RepetitionTime": 0.05})]


def b_sidecar_missing_one_file(d, data):
    return _echo_files(d, data, sidecar=lambda i: {} if i == 5 else {"EchoTime": float(TE[i])})


def b_sidecar_malformed(d, data):
    p = _good4d(d, data, sidecar=False)
    (d / "sub-01_MEGRE.json").write_text('{"EchoTime": [0.005, 0.010,')
    return [p]


def b_sidecar_not_object(d, data):
    p = _good4d(d, data, sidecar=False)
    (d / "sub-01_MEGRE.json").write_text(json.dumps(TE.tolist()))
    return [p]


def b_sidecar_binary(d, data):
    p = _good4d(d, data, sidecar=False)
    (d / "sub-01_MEGRE.json").write_bytes(b"\xff\xfe\x00\x01garbage")
    return [p]


def b_affine_differs(d, data):
    def aff(i):
        a = AFFINE.copy()
        if i == 4:
            a[0, 3] = 1.0  # echo 5 shifted by half a voxel
        return a

    return _echo_files(d, data, affines=aff)


def b_shape_differs(d, data):
    return _echo_files(d, data, shapes_cut=2)


def b_mask_wrong_grid(d, data):
    m = write_nifti(d / "mask.nii.gz", np.ones((5, 5, 5), np.uint8), affine=AFFINE)
    return [_good4d(d, data), "--mask", m]


def b_mask_empty(d, data):
    m = write_nifti(d / "mask.nii.gz", np.zeros(data.shape[:3], np.uint8), affine=AFFINE)
    return [_good4d(d, data), "--mask", m]


def b_sigma_negative(d, data):
    return [_good4d(d, data), "--sigma", "-3"]


def b_sigma_no_background(d, data):
    # the object fills the field of view (no background to estimate the noise from) and three echoes leave
    # too few degrees of freedom in the residuals of the two-parameter fit (at least 4 samples needed)
    crop = data[10:22, 10:22, :, :3]
    return [write_nifti(d / "sub-01_MEGRE.nii.gz", crop, affine=AFFINE, sidecar={"EchoTime": TE[:3].tolist()}),
            "--mask", "none"]


def b_jobs_zero(d, data):
    return [_good4d(d, data), "-j", "0"]


def b_bad_prefix(d, data):
    return [_good4d(d, data), "--prefix", "../escape"]


def b_unknown_option(d, data):
    return [_good4d(d, data), "--echo-times", TE_MS]


def b_out_under_regular_file(d, data):
    (d / "notes.txt").write_text("not a folder\n")
    return [_good4d(d, data), "-o", d / "notes.txt" / "maps"]


def b_out_is_regular_file(d, data):
    (d / "notes.txt").write_text("not a folder\n")
    return [_good4d(d, data), "-o", d / "notes.txt"]


# -- t1-vfa and b1: signals from the textbook closed forms, written independently of qmap's models
FA = np.array([3.0, 8.0, 15.0, 25.0])
TR = 0.015


def _disc(shape=(32, 32, 3)):
    x, y, _ = np.indices(shape)
    return x, y, (x - 15.5) ** 2 + (y - 15.5) ** 2 < 9.6**2


def _vfa_data():
    """Spoiled GRE steady state S = M0 sin(a) (1 - E1) / (1 - cos(a) E1), E1 = exp(-TR/T1) (Ernst & Anderson 1966)."""
    x, _, obj = _disc()
    t1 = np.where(obj, 0.5 + 1.5 * x / 31, 1.0)[..., None]
    a = np.deg2rad(FA)
    e1 = np.exp(-TR / t1)
    s = np.where(obj[..., None], 3000 * np.sin(a) * (1 - e1) / (1 - np.cos(a) * e1), 0.0)
    return _noisy(s, 1)


def _noisy(s, seed):
    rng = np.random.default_rng(seed)
    return np.abs(s + rng.normal(0, 3, s.shape) + 1j * rng.normal(0, 3, s.shape)).astype(np.float32)


def _afi_data(fa=60.0, tr1=0.02, tr2=0.1, t1=1.0):
    """AFI steady state (Yarnykh 2007, eq. 2): S1, S2 for TR1, TR2 with the actual angle a = B1 * nominal."""
    _, y, obj = _disc()
    a = np.deg2rad(fa * np.where(obj, 0.8 + 0.4 * y / 31, 1.0))
    e1, e2 = np.exp(-tr1 / t1), np.exp(-tr2 / t1)
    den = 1 - e1 * e2 * np.cos(a) ** 2
    s1 = np.sin(a) * (1 - e2 + (1 - e1) * e2 * np.cos(a)) / den
    s2 = np.sin(a) * (1 - e1 + (1 - e2) * e1 * np.cos(a)) / den
    return _noisy(np.where(obj[..., None], 3000 * np.stack([s1, s2], -1), 0.0), 2)


def _dam_data(fa=45.0):
    """Double angle with full recovery: S(a) = M0 sin(a) (Insko & Bolinger 1993)."""
    _, y, obj = _disc()
    b1 = np.where(obj, 0.8 + 0.4 * y / 31, 1.0)
    a = np.deg2rad(fa * b1)[..., None] * np.array([1.0, 2.0])
    return _noisy(np.where(obj[..., None], 3000 * np.sin(a), 0.0), 3)


def _vfa(d, *, sidecar=True, data=None, name="sub-01_VFA.nii.gz", **sc):
    meta = {"FlipAngle": FA.tolist(), "RepetitionTime": TR} if sidecar else None
    if meta is not None:
        meta.update(sc)
    return write_nifti(d / name, _vfa_data() if data is None else data, affine=AFFINE, sidecar=meta)


def _b1map(d, value=1.0, affine=AFFINE, shape=(32, 32, 3), name="b1.nii.gz"):
    return write_nifti(d / name, np.full(shape, value, np.float32), affine=affine)


def _far(dx=500.0):
    a = AFFINE.copy()
    a[:3, 3] = dx
    return a


def _afi(d, data=None):
    return write_nifti(d / "sub-01_AFI.nii.gz", _afi_data() if data is None else data, affine=AFFINE)


def _dam(d, data=None):
    return write_nifti(d / "sub-01_DAM.nii.gz", _dam_data() if data is None else data, affine=AFFINE)


@dataclass
class Case:
    id: str
    command: str
    build: Callable
    expect: tuple  # regexes the stderr line must match: what is wrong ... and how to fix it
    own_out: bool = False  # the case sets -o itself
    marks: list = field(default_factory=list)
    style: str = "fit"  # fit: -o/--prefix/-q (+ --overwrite); plain: -o/-q (+ --overwrite); none: nothing added

    def harness(self, out, previous: bool) -> list:
        if self.style == "none":
            return []
        opts = ["-o", out] + (["--prefix", "run"] if self.style == "fit" else []) + (["-q"] if self.quiet else [])
        return opts + (["--overwrite"] if previous else [])

    @property
    def quiet(self) -> bool:
        return self.command != "simulate"

    def param(self):
        return pytest.param(self, id=f"{self.command}-{self.id}", marks=self.marks)


T2S = "t2star"
REFUSED = [
    # unreadable files
    Case("truncated-gz", T2S, b_truncated_gz, (r"truncated|corrupt",)),
    Case("truncated-nii", T2S, b_truncated_nii, (r"truncated|corrupt", r"sub-01_MEGRE\.nii")),
    Case("gzip-of-noise", T2S, b_corrupt_gzip_payload, (r"not a readable NIfTI", r"\.nii")),
    Case("bitflip-gz", T2S, b_bitflip_gz, (r"truncated|corrupt",)),
    Case("text-named-nii-gz", T2S, b_text_as_nifti, (r"not a readable NIfTI", r"\.nii")),
    Case("png", T2S, b_png, (r"\.png", r"NIfTI")),
    Case("png-named-nii-gz", T2S, b_png_named_nifti, (r"not a readable NIfTI",)),
    Case("empty-file", T2S, b_empty_file, (r"not a readable NIfTI|empty",)),
    Case("missing-file", T2S, b_missing_file, (r"no such file", r"check the path")),
    Case("folder-as-series", T2S, b_folder_as_series, (r"folder", r"NIfTI")),
    # wrong dimensionality / kind of data
    Case("5d", T2S, b_5d, (r"5D", r"4D series")),
    Case("single-3d-volume", T2S, b_single_3d, (r"single 3D volume", r"several")),
    Case("4d-mixed-with-3d", T2S, b_mixed_4d_and_3d, (r"3D volume", r"single 4D")),
    Case("complex-for-magnitude", T2S, b_complex, (r"complex", r"magnitude")),
    Case("rgb-voxels", T2S, b_rgb, (r"RGB|structured", r"scalar")),
    # no usable signal
    Case("all-zero", T2S, b_all_zero, (r"no signal", r"0")),
    Case("constant", T2S, b_constant, (r"no signal", r"123")),
    Case("all-nan", T2S, b_all_nan, (r"NaN",)),
    Case("negative-magnitude", T2S, b_negative, (r"negative", r"magnitude")),
    # acquisition parameters
    Case("te-count-mismatch", T2S, b_te_count, (r"--te", r"3 values.*8 volumes", r"one per volume")),
    Case("sidecar-list-length", T2S, b_sidecar_list_length, (r"EchoTime", r"5 values.*8 volumes", r"--te")),
    Case("sidecar-scalar-for-4d", T2S, b_sidecar_scalar_for_4d, (r"one value.*8 volumes", r"--te")),
    Case("duplicated-te", T2S, b_duplicated_te, (r"repeated EchoTime", r"own value")),
    Case("duplicated-te-sidecars", T2S, b_duplicated_te_sidecars, (r"repeated EchoTime",)),
    Case("te-bare-ms", T2S, b_bare_ms, (r"implausible", r"5ms,10ms")),
    Case("sidecar-te-in-ms", T2S, b_sidecar_ms, (r"implausible", r"seconds", r"ms")),
    Case("te-zero", T2S, b_te_zero, (r"EchoTime", r"positive")),
    Case("te-unparsable", T2S, b_te_garbage, (r"5ms;10ms", r"unit")),
    Case("sidecar-te-string", T2S, _sidecar_case("0.005,0.010"), (r"EchoTime", r"str", r"number")),
    Case("sidecar-te-dict", T2S, _sidecar_case({"value": 0.005, "unit": "s"}), (r"EchoTime", r"dict", r"number")),
    Case("sidecar-te-bool", T2S, _sidecar_case(True), (r"EchoTime", r"True", r"number")),
    Case("sidecar-te-null", T2S, _sidecar_case(None), (r"EchoTime", r"None", r"number")),
    Case("sidecar-te-nested", T2S, _sidecar_case([[t] for t in TE.tolist()]), (r"EchoTime", r"list of numbers")),
    Case("sidecar-missing-key", T2S, b_sidecar_missing_key, (r"no EchoTime", r"--te")),
    Case("sidecar-missing-in-one-file", T2S, b_sidecar_missing_one_file, (r"echo-6", r"lacks EchoTime")),
    Case("sidecar-malformed-json", T2S, b_sidecar_malformed, (r"sub-01_MEGRE\.json", r"JSON", r"fix or remove")),
    Case("sidecar-not-an-object", T2S, b_sidecar_not_object, (r"JSON object", r"list")),
    Case("sidecar-not-utf8", T2S, b_sidecar_binary, (r"sub-01_MEGRE\.json", r"fix or remove")),
    # grids
    Case("affine-differs-between-echoes", T2S, b_affine_differs, (r"echo-5", r"affine", r"one voxel grid")),
    Case("shape-differs-between-echoes", T2S, b_shape_differs, (r"echo-3", r"grid", r"resample")),
    Case("mask-on-other-grid", T2S, b_mask_wrong_grid, (r"--mask", r"grid")),
    Case("mask-selects-nothing", T2S, b_mask_empty, (r"--mask", r"selects nothing")),
    # options
    Case("sigma-negative", T2S, b_sigma_negative, (r"--sigma", r"positive")),
    Case("sigma-auto-no-background", T2S, b_sigma_no_background, (r"noise", r"--sigma VALUE")),
    Case("sigma-not-a-file", T2S, lambda d, data: [_good4d(d, data), "--sigma", "abc"], (r"--sigma abc", r"no such file")),
    Case("sigma-map-other-grid", T2S, lambda d, data: [
        _good4d(d, data), "--sigma", write_nifti(d / "sd.nii.gz", np.full((5, 5, 5), 5.0), affine=AFFINE)],
         (r"--sigma", r"grid")),
    Case("sigma-map-4d", T2S, lambda d, data: [
        _good4d(d, data), "--sigma", write_nifti(d / "sd.nii.gz", np.full(data.shape, 5.0), affine=AFFINE)],
         (r"--sigma", r"3D noise map")),
    Case("sigma-map-not-positive", T2S, lambda d, data: [
        _good4d(d, data), "--sigma", write_nifti(d / "sd.nii.gz", np.full(data.shape[:3], -5.0), affine=AFFINE)],
         (r"--sigma", r"no positive value")),
    Case("coils-zero", T2S, lambda d, data: [_good4d(d, data), "--coils", "0"], (r"--coils", r"positive")),
    Case("noise-floor-unknown", T2S, lambda d, data: [_good4d(d, data), "--noise-floor", "bias"],
         (r"--noise-floor", r"rician")),
    Case("jobs-zero", T2S, b_jobs_zero, (r"-j 0", r"positive")),
    Case("prefix-with-path", T2S, b_bad_prefix, (r"--prefix", r"file-name stem")),
    Case("unknown-option", T2S, b_unknown_option, (r"--echo-times", r"--help")),
    # output folder
    Case("out-under-regular-file", T2S, b_out_under_regular_file, (r"output folder", r"-o"), own_out=True),
    Case("out-is-regular-file", T2S, b_out_is_regular_file, (r"output folder|not a folder", r"-o"), own_out=True),
]

VFA, B1 = "t1-vfa", "b1"
REFUSED += [
    Case("fa-count-mismatch", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "3,8,15", "--tr", "15ms"],
         (r"--fa", r"3 values.*4 volumes", r"one per volume")),
    Case("no-tr", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "3,8,15,25"], (r"no RepetitionTime", r"--tr")),
    Case("tr-bare-ms", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "3,8,15,25", "--tr", "15"],
         (r"implausible", r"15ms")),
    Case("fa-radians", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "0.05,0.14,0.26,0.44", "--tr", "15ms"],
         (r"radians", r"degrees")),
    Case("fa-duplicated", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "3,8,8,25", "--tr", "15ms"],
         (r"repeated FlipAngle",)),
    Case("fa-above-180", VFA, lambda d, _: [_vfa(d, sidecar=False), "--fa", "3,8,15,250", "--tr", "15ms"],
         (r"--fa", r"\(0, 180\]")),
    Case("sidecar-tr-in-ms", VFA, lambda d, _: [_vfa(d, RepetitionTime=15)], (r"RepetitionTime", r"implausible")),
    Case("sidecar-tr-per-volume-differs", VFA, lambda d, _: [_vfa(d, RepetitionTime=[0.015, 0.015, 0.02, 0.015])],
         (r"RepetitionTime differs between volumes",)),
    Case("sidecar-fa-string", VFA, lambda d, _: [_vfa(d, FlipAngle="3,8,15,25")], (r"FlipAngle", r"str", r"number")),
    Case("single-angle", VFA, lambda d, _: [write_nifti(d / "one.nii.gz", _vfa_data()[..., :1], affine=AFFINE),
                                            "--fa", "3", "--tr", "15ms"], (r"at least two|single 3D volume",)),
    Case("complex-for-magnitude", VFA, lambda d, _: [_vfa(d, data=_vfa_data().astype(np.complex64))],
         (r"complex", r"magnitude")),
    Case("b1-no-overlap", VFA, lambda d, _: [_vfa(d), "--b1", _b1map(d, affine=_far())],
         (r"--b1", r"does not overlap")),
    Case("b1-percent-as-fraction", VFA, lambda d, _: [_vfa(d), "--b1", _b1map(d, 100.0), "--b1-scale", "fraction"],
         (r"--b1", r"percent")),
    Case("b1-4d", VFA, lambda d, _: [_vfa(d), "--b1", _b1map(d, shape=(32, 32, 3, 2))], (r"--b1", r"3D")),
    Case("b1-all-nan", VFA, lambda d, _: [_vfa(d), "--b1", _b1map(d, np.nan)], (r"--b1", r"check the file")),
    Case("b1-not-nifti", VFA, lambda d, _: [_vfa(d), "--b1", b_text_as_nifti(d, None)[0]],
         (r"--b1", r"not a readable NIfTI")),
    Case("afi-three-volumes", B1, lambda d, _: [_afi(d, np.concatenate([_afi_data()] * 2, -1)[..., :3]),
                                                "--method", "afi", "--fa", "60", "--tr", "20ms,100ms,150ms"],
         (r"AFI takes two images",)),
    Case("afi-no-tr", B1, lambda d, _: [_afi(d), "--method", "afi", "--fa", "60"], (r"no RepetitionTime", r"--tr")),
    Case("afi-one-tr", B1, lambda d, _: [_afi(d), "--method", "afi", "--fa", "60", "--tr", "20ms"],
         (r"--tr", r"2 volumes")),
    Case("afi-equal-tr", B1, lambda d, _: [_afi(d), "--method", "afi", "--fa", "60", "--tr", "20ms,20ms"],
         (r"repeated RepetitionTime",)),
    Case("afi-two-angles", B1, lambda d, _: [_afi(d), "--method", "afi", "--fa", "60,70", "--tr", "20ms,100ms"],
         (r"--fa", r"one nominal flip angle")),
    Case("afi-tr-bare-ms", B1, lambda d, _: [_afi(d), "--method", "afi", "--fa", "60", "--tr", "20,100"],
         (r"implausible", r"20ms,100ms")),
    Case("afi-images-in-swapped-order", B1,
         lambda d, _: [_afi(d, _afi_data()[..., ::-1]), "--method", "afi", "--fa", "60", "--tr", "20ms,100ms"],
         (r"order|swapped", r"TR")),
    Case("dam-angles-not-double", B1, lambda d, _: [_dam(d), "--method", "dam", "--fa", "45,80"],
         (r"a and 2a",)),
    Case("method-missing", B1, lambda d, _: [_dam(d), "--fa", "45,90"], (r"--method", r"--help")),
    Case("negative-magnitude", B1, lambda d, _: [_dam(d, _dam_data() - 1000), "--method", "dam", "--fa", "45"],
         (r"negative", r"magnitude")),
    Case("complex-for-magnitude", B1, lambda d, _: [_dam(d, _dam_data().astype(np.complex64)), "--method", "dam",
                                                    "--fa", "45"], (r"complex", r"magnitude")),
    Case("affine-differs", B1, lambda d, _: [
        write_nifti(d / "dam_fa-1.nii.gz", _dam_data()[..., 0], affine=AFFINE),
        write_nifti(d / "dam_fa-2.nii.gz", _dam_data()[..., 1], affine=_far(1.0)), "--method", "dam", "--fa", "45,90"],
         (r"affine", r"one voxel grid")),
    Case("all-zero", B1, lambda d, _: [_dam(d, np.zeros((32, 32, 3, 2), np.float32)), "--method", "dam",
                                       "--fa", "45"], (r"no signal",)),
]


_FIT_TEMPLATE: list = []  # the previous_run folder, for the inspect cases' builders


@pytest.fixture(autouse=True, scope="module")
def _fit_template(previous_run):
    _FIT_TEMPLATE[:] = [previous_run]


def _fit_copy(d: Path, edit=None) -> Path:
    """A copy of a real t2star output folder (prefix ``run``), optionally edited."""
    out = d / "fit"
    shutil.copytree(_FIT_TEMPLATE[0], out)
    (out / "README.txt").unlink()
    if edit:
        edit(out)
    return out


def _bids(d: Path, *, corrupt_mese=False, data=None) -> Path:
    """A one-subject BIDS dataset with a MEGRE series (and a MESE series, optionally corrupt)."""
    anat = d / "bids" / "sub-01" / "anat"
    anat.mkdir(parents=True)
    if data is not None:
        for i, t in enumerate(TE):
            write_nifti(anat / f"sub-01_echo-{i + 1}_MEGRE.nii.gz", data[..., i], affine=AFFINE,
                        sidecar={"EchoTime": float(t)})
    if corrupt_mese:
        for i in range(3):
            (anat / f"sub-01_echo-{i + 1}_MESE.nii.gz").write_bytes(b"\x1f\x8b\x08 truncated")
            (anat / f"sub-01_echo-{i + 1}_MESE.json").write_text(json.dumps({"EchoTime": 0.01 * (i + 1)}))
    return d / "bids"


def _a_file(d: Path) -> Path:
    (d / "notes.txt").write_text("not a folder\n")
    return d / "notes.txt"


INS, BAT, SIM = "inspect", "batch", "simulate"
REFUSED += [
    Case("out-name-too-long", T2S, lambda d, data: [_good4d(d, data), "-o", d.parent / "out" / ("x" * 300)],
         (r"cannot create the output folder", r"-o"), own_out=True),
    Case("voxel-outside-grid", INS, lambda d, _: [_fit_copy(d), "--voxel", "40,1,1"], (r"outside", r"0-based")),
    Case("voxel-syntax", INS, lambda d, _: [_fit_copy(d), "--voxel", "1,2"], (r"--voxel", r"I,J,K")),
    Case("folder-missing", INS, lambda d, _: [d / "nowhere", "--voxel", "1,2,0"], (r"no such folder", r"-o folder")),
    Case("no-provenance", INS, lambda d, _: [_fit_copy(d, lambda o: (o / "run_provenance.json").unlink()),
                                             "--voxel", "1,2,0"], (r"no qmap fit|provenance",)),
    Case("provenance-malformed", INS, lambda d, _: [_fit_copy(d, lambda o: (o / "run_provenance.json").write_text("{")),
                                                    "--voxel", "1,2,0"], (r"provenance", r"rerun")),
    Case("unknown-prefix", INS, lambda d, _: [_fit_copy(d), "--voxel", "1,2,0", "--prefix", "other"],
         (r"other_provenance\.json", r"--prefix")),
    Case("png-below-a-file", INS, lambda d, _: [_fit_copy(d), "--voxel", "16,16,1", "-o",
                                                _a_file(d) / "x.png"], (r"-o",)),
    Case("dataset-missing", BAT, lambda d, _: [d / "nowhere"], (r"no such folder", r"BIDS")),
    Case("dataset-without-subjects", BAT, lambda d, _: [d], (r"no sub-\*", r"BIDS")),
    Case("jobs-zero", BAT, lambda d, data: [_bids(d, data=data), "-j", "0"], (r"-j 0", r"positive")),
    Case("out-below-a-file", BAT, lambda d, data: [_bids(d, data=data), "-o",
                                                   _a_file(d) / "deriv"], (r"-o",),
         own_out=True),
    Case("shape-2d", SIM, lambda d, _: ["--shape", "48,48"], (r"--shape", r"X,Y,Z")),
    Case("snr-negative", SIM, lambda d, _: ["--snr", "-5"], (r"--snr", r"positive")),
    Case("protocol-unknown", SIM, lambda d, _: ["--protocol", "ir,fse"], (r"--protocol", r"ir, vfa")),
    Case("ti-bare-ms", SIM, lambda d, _: ["--ti", "100,200,400"], (r"implausible", r"100ms")),
    Case("b1-range-reversed", SIM, lambda d, _: ["--b1-range", "1.2,0.8"], (r"--b1-range", r"MIN <= MAX")),
    Case("echoes-too-few", SIM, lambda d, _: ["--echoes", "1"], (r"--echoes", r"at least 2")),
]


def _phantom(d: Path, *, labels=None, ref=None, maps=None, extra=("--temperature", "21.5")):
    """``qmap phantom`` arguments on the invented eight-vial phantom of tests/qa/phantom_factory.py."""
    from tests.qa import phantom_factory as pf

    ph = pf.make_phantom(d / "ph")
    lab = ph["labels"] if labels is None else labels(d, pf)
    refp = ph["ref"] if ref is None else _text(d / "reference.csv", ref)
    args = ["--labels", lab, "--reference", refp]
    for m in ([ph["t1"], ph["t2"]] if maps is None else maps(d, pf)):
        args += ["--map", m]
    return args + list(extra)


def _text(path: Path, content) -> Path:
    path.write_bytes(content if isinstance(content, bytes) else content.encode())
    return path


def _labels(array_fn, affine_fn=None):
    def build(d, pf):
        aff = pf.AFFINE if affine_fn is None else affine_fn(pf)
        return pf.write_nifti(d / "case_dseg.nii.gz", array_fn(pf), affine=aff)

    return build


def _map(array_fn, units="s", name="case_T1map.nii.gz", affine_fn=None):
    def build(d, pf):
        aff = pf.AFFINE if affine_fn is None else affine_fn(pf)
        return [pf.write_nifti(d / name, array_fn(pf), affine=aff, sidecar={"Units": units})]

    return build


def _far_from(pf):
    a = pf.AFFINE.copy()
    a[:3, 3] += 900.0
    return a


PH = "phantom"
_int_labels = lambda pf: pf.true_labels().astype(np.int16)
REFUSED += [
    Case("labels-not-integer", PH, lambda d, _: _phantom(d, labels=_labels(lambda pf: _int_labels(pf) + 0.3)),
         (r"--labels", r"non-integer", r"integer label image")),
    Case("labels-all-zero", PH, lambda d, _: _phantom(d, labels=_labels(lambda pf: 0 * _int_labels(pf))),
         (r"--labels", r"no label")),
    Case("labels-4d", PH, lambda d, _: _phantom(d, labels=_labels(lambda pf: np.stack([_int_labels(pf)] * 2, -1))),
         (r"--labels", r"3D")),
    Case("labels-negative", PH, lambda d, _: _phantom(d, labels=_labels(lambda pf: -_int_labels(pf))),
         (r"--labels", r"negative")),
    Case("labels-no-overlap", PH, lambda d, _: _phantom(d, labels=_labels(_int_labels, _far_from)),
         (r"--labels", r"overlap")),
    Case("map-no-overlap", PH, lambda d, _: _phantom(d, maps=_map(lambda pf: np.ones((10, 10, 3)),
                                                                   affine_fn=_far_from)),
         (r"--map", r"overlap")),
    Case("map-all-nan", PH, lambda d, _: _phantom(d, maps=_map(lambda pf: np.full(pf.SHAPE, np.nan))),
         (r"--map", r"finite|NaN")),
    Case("map-4d", PH, lambda d, _: _phantom(d, maps=_map(lambda pf: np.ones(pf.SHAPE + (2,)))), (r"--map", r"3D")),
    Case("map-unknown-units", PH, lambda d, _: _phantom(d, maps=_map(lambda pf: np.ones(pf.SHAPE), units="furlong")),
         (r"Units 'furlong'", r"fix the sidecar")),
    Case("map-unnamed-parameter", PH, lambda d, _: _phantom(d, maps=_map(lambda pf: np.ones(pf.SHAPE),
                                                                          name="vials.nii.gz")),
         (r"which parameter", r"--param")),
    Case("no-map", PH, lambda d, _: _phantom(d, maps=lambda d, pf: []), (r"--map",)),
    Case("reference-without-label-column", PH, lambda d, _: _phantom(d, ref="name,T1_ms,T2_ms\nA,100,50\n"),
         (r"'label' column",)),
    Case("reference-not-a-number", PH, lambda d, _: _phantom(d, ref="label,T1_ms,T2_ms\n1,abc,50\n"),
         (r"row 2", r"not a number")),
    Case("reference-empty", PH, lambda d, _: _phantom(d, ref=""), (r"empty", r"header")),
    Case("reference-unknown-unit", PH, lambda d, _: _phantom(d, ref="label,T1_min,T2_ms\n1,3,50\n"),
         (r"T1_min", r"T1_s")),
    Case("reference-not-utf8", PH, lambda d, _: _phantom(d, ref=b"\xff\xfe\x00\x01"), (r"UTF-8", r"CSV")),
    Case("temperature-outside-table", PH, lambda d, _: _phantom(d, extra=("--temperature", "40")),
         (r"outside", r"extrapolated")),
    Case("temperature-missing", PH, lambda d, _: _phantom(d, extra=()), (r"--temperature",)),
    Case("tolerance-negative", PH, lambda d, _: _phantom(d, extra=("--temperature", "21.5", "--tolerance", "-5")),
         (r"--tolerance", r"positive")),
]

TI = np.array([0.05, 0.15, 0.4, 0.8, 1.5, 3.0])
TI_MS = ",".join(f"{t * 1e3:g}ms" for t in TI)


def _ir_complex():
    """Inversion recovery S = M0 (1 - 2 exp(-TI/T1)) (common practice) with a constant phase of 0.7 rad and noise."""
    x, _, obj = _disc()
    t1 = np.where(obj, 0.3 + 1.5 * x / 31, 1.0)[..., None]
    rng = np.random.default_rng(4)
    s = np.where(obj[..., None], 2000 * (1 - 2 * np.exp(-TI / t1)), 0.0) * np.exp(0.7j)
    return (s + rng.normal(0, 5, s.shape) + 1j * rng.normal(0, 5, s.shape)).astype(np.complex64)


def _ir(d, kind="magnitude", sidecar=True, n=None, name="sub-01_IRT1.nii.gz", **sc):
    c = _ir_complex()
    data = {"magnitude": np.abs(c), "complex": c, "real": (c * np.exp(-0.7j)).real, "phase": np.angle(c)}[kind]
    data = data[..., :n] if n else data
    meta = {"InversionTime": TI[: data.shape[-1]].tolist()} if sidecar else None
    if meta is not None:
        meta.update(sc)
    return write_nifti(d / name, data, affine=AFFINE, sidecar=meta)


IR = "t1-ir"
REFUSED += [
    Case("magnitude-as-complex", IR, lambda d, _: [_ir(d), "--signal", "complex"],
         (r"--signal complex", r"real values", r"--phase")),
    Case("complex-as-magnitude", IR, lambda d, _: [_ir(d, "complex")], (r"complex", r"--signal complex")),
    Case("signed-real-as-magnitude", IR, lambda d, _: [_ir(d, "real")], (r"negative", r"--signal real")),
    Case("phase-in-degrees", IR, lambda d, _: [
        _ir(d), "--signal", "complex", "--phase",
        write_nifti(d / "phase.nii.gz", np.degrees(np.angle(_ir_complex())), affine=AFFINE)],
         (r"--phase", r"radians")),
    Case("phase-count-mismatch", IR, lambda d, _: [
        _ir(d), "--signal", "complex", "--phase", _ir(d, "phase", sidecar=False, n=3, name="phase.nii.gz")],
         (r"--phase", r"3 phase volumes for 6", r"one phase image per inversion time")),
    Case("phase-without-complex", IR, lambda d, _: [_ir(d), "--phase", _ir(d, "phase", False, name="ph.nii.gz")],
         (r"--phase", r"--signal complex")),
    Case("phase-with-complex-series", IR, lambda d, _: [
        _ir(d, "complex"), "--signal", "complex", "--phase", _ir(d, "phase", False, name="ph.nii.gz")],
         (r"--phase", r"not both")),
    Case("ti-count-mismatch", IR, lambda d, _: [_ir(d, sidecar=False), "--ti", "50ms,150ms"],
         (r"--ti", r"2 values.*6 volumes")),
    Case("ti-bare-ms", IR, lambda d, _: [_ir(d, sidecar=False), "--ti", "50,150,400,800,1500,3000"],
         (r"implausible", r"50ms,150ms")),
    Case("ti-duplicated", IR, lambda d, _: [_ir(d, sidecar=False), "--ti", "50ms,150ms,150ms,800ms,1.5s,3s"],
         (r"repeated InversionTime",)),
    Case("ti-negative", IR, lambda d, _: [_ir(d, sidecar=False), "--ti=-50ms,150ms,400ms,800ms,1.5s,3s"],
         (r"InversionTime", r"negative")),
    Case("sidecar-ti-string", IR, lambda d, _: [_ir(d, InversionTime="50ms")], (r"InversionTime", r"str")),
    Case("sidecar-ti-in-ms", IR, lambda d, _: [_ir(d, InversionTime=(TI * 1e3).tolist())],
         (r"InversionTime", r"implausible", r"divide them by 1000")),
    Case("too-few-inversion-times", IR, lambda d, _: [_ir(d, n=3)], (r"3 volumes", r"at least 4")),
    Case("tr-shorter-than-ti", IR, lambda d, _: [_ir(d), "--tr", "1s"], (r"RepetitionTime", r"--tr")),
]


ESP_TE = np.arange(1, 17) * 0.01  # a CPMG train: TE_k = k x 10 ms


def _mese(d, *, sidecar=True, data=None, te=ESP_TE, name="sub-01_MESE.nii.gz"):
    if data is None:
        data = decay_phantom(te=te, t2_range=(0.04, 0.12))[0]
    return write_nifti(d / name, data, affine=AFFINE, sidecar={"EchoTime": te.tolist()} if sidecar else None)


def _ms(te):
    return ",".join(f"{t * 1e3:.6g}ms" for t in te)


T2 = "t2"
REFUSED += [
    Case("epg-unequal-spacing", T2, lambda d, _: [_mese(d, sidecar=False), "--epg", "--te",
                                                  _ms(ESP_TE + np.where(np.arange(16) >= 5, 0.003, 0.0))],
         (r"--epg needs equally spaced echoes", r"echo 6", r"without --epg")),
    Case("epg-train-not-starting-at-esp", T2, lambda d, _: [_mese(d, sidecar=False), "--epg", "--te",
                                                            _ms(ESP_TE + 0.005)], (r"TE_k = k x ESP",)),
    Case("epg-with-drop-first", T2, lambda d, _: [_mese(d), "--epg", "--drop-first"], (r"--drop-first", r"--epg")),
    Case("epg-too-few-echoes", T2, lambda d, _: [_mese(d, te=ESP_TE[:2], data=decay_phantom(te=ESP_TE[:2])[0]),
                                                 "--epg"], (r"at least 4 echoes",)),
    Case("refocus-without-epg", T2, lambda d, _: [_mese(d), "--refocus", "160"], (r"--refocus", r"add --epg")),
    Case("t1-without-epg", T2, lambda d, _: [_mese(d), "--t1", "1s"], (r"--t1", r"add --epg")),
    Case("refocus-above-180", T2, lambda d, _: [_mese(d), "--epg", "--refocus", "200"], (r"--refocus", r"180")),
    Case("refocus-in-radians", T2, lambda d, _: [_mese(d), "--epg", "--refocus", "2.8"], (r"--refocus", r"radians")),
    Case("refocus-two-values", T2, lambda d, _: [_mese(d), "--epg", "--refocus", "160,170"],
         (r"--refocus", r"one nominal refocusing angle")),
    Case("t1-bare-ms", T2, lambda d, _: [_mese(d), "--epg", "--t1", "1200"], (r"implausible", r"1200ms")),
    Case("t1-zero", T2, lambda d, _: [_mese(d), "--epg", "--t1", "0"], (r"--t1", r"positive")),
    Case("complex-for-magnitude", T2, lambda d, _: [_mese(d, data=decay_phantom(te=ESP_TE)[0].astype(np.complex64))],
         (r"complex", r"magnitude")),
    Case("te-count-mismatch", T2, lambda d, _: [_mese(d, sidecar=False), "--te", "10ms,20ms"],
         (r"--te", r"2 values.*16 volumes")),
    Case("negative-magnitude", T2, lambda d, _: [_mese(d, data=decay_phantom(te=ESP_TE)[0] - 500)],
         (r"negative", r"magnitude")),
]

# ------------------------------------------------------------------ realistic exports (issue 20)
TE12 = np.arange(1, 13) * 0.005  # 12 echoes: a shell glob sorts e10, e11, e12 before e2


def _glob_echoes(d: Path, *, sidecars: bool):
    """Twelve 3D echo files e1..e12 listed in shell-glob order (e1, e10, e11, e12, e2, ..., e9)."""
    data = decay_phantom(te=TE12)[0]
    files = [write_nifti(d / f"sub-01_e{i + 1}_MEGRE.nii.gz", data[..., i], affine=AFFINE,
                         sidecar={"EchoTime": float(TE12[i])} if sidecars else None) for i in range(12)]
    return sorted(files, key=lambda p: p.name)


def _phase_0_4095(d: Path):
    """A GRE phase series stored as integers 0..4095 (phase = phi0 + 2 pi df TE, wrapped; df = 40 Hz)."""
    rng = np.random.default_rng(11)
    phi = np.mod(rng.uniform(0, 2 * np.pi, (32, 32, 3))[..., None] + 2 * np.pi * 40.0 * TE, 2 * np.pi)
    return _good4d(d, np.round(phi / (2 * np.pi) * 4095).astype(np.int16))


def _vfa_swapped(d: Path):
    """VFA volumes in the order 8, 3, 25, 15 deg while the sidecar says 3, 8, 15, 25."""
    return _vfa(d, data=_vfa_data()[..., [1, 0, 3, 2]])


SERIES_CHECK = r"--no-series-check"
REFUSED += [
    Case("te-typed-for-glob-ordered-files", T2S, lambda d, _: [*_glob_echoes(d, sidecars=False), "--te", _ms(TE12)],
         (r"does not decay with echo time", r"rises from \d+ ms to \d+ ms", r"shell-glob order", r"sort -V",
          SERIES_CHECK)),
    Case("te-reorders-the-sidecars", T2S, lambda d, _: [*_glob_echoes(d, sidecars=True), "--te", _ms(TE12)],
         (r"--te lists the sidecars' EchoTime values in another order", r"leave --te out", SERIES_CHECK)),
    Case("phase-image-0-4095", T2S, lambda d, _: [_phase_0_4095(d), "--sigma", "5"],
         (r"does not decay", r"looks like a phase image", r"magnitude images", SERIES_CHECK)),
    Case("ti-files-out-of-order", IR, lambda d, _: [
        *[write_nifti(d / f"inv-{i}.nii.gz", np.abs(_ir_complex())[..., i], affine=AFFINE) for i in (0, 3, 1, 2, 4, 5)],
        "--ti", TI_MS], (r"does not fall to one null and recover", r"order", SERIES_CHECK)),
    Case("fa-volumes-out-of-order", VFA, lambda d, _: [_vfa_swapped(d)],
         (r"does not have one maximum over the flip angles", SERIES_CHECK)),
    Case("fa-reorders-the-sidecar", VFA, lambda d, _: [_vfa(d), "--fa", "8,3,25,15"],
         (r"--fa lists the sidecars' FlipAngle values in another order",)),
    Case("large-negatives-are-not-undershoot", T2S, lambda d, data: [_good4d(d, data - 0.06 * data.max())],
         (r"negative values", r"6\.\d+ % of the maximum", r"up to 5 % is clipped", r"real/phase image")),
    Case("full-te-list-in-each-echo-sidecar", T2S, lambda d, data: _echo_files(
        d, data, sidecar=lambda i: {"EchoTime": TE.tolist()}), (r"holds 8 values for a single 3D volume", r"command line")),
    Case("epg-te-rounded-beyond-0.1ms", T2, lambda d, _: [
        _mese(d, te=np.round(ESP_TE * 1.0145, 3), data=decay_phantom(te=ESP_TE * 1.0145, t2_range=(0.04, 0.12))[0]),
        "--epg"], (r"--epg needs equally spaced echoes",)),
    Case("readout-tr-on-the-command-line", IR, lambda d, _: [_ir(d), "--tr", "8ms"], (r"RepetitionTime", r"--tr")),
]

for _c in REFUSED:
    if _c.command in (INS,):
        _c.style = "none"
    elif _c.command in (BAT, SIM, PH):
        _c.style = "plain"


@pytest.fixture(scope="module")
def previous_run(tmp_path_factory, phantom):
    """A real earlier t2star run (prefix ``run``) to copy into output folders."""
    data, *_ = phantom
    d = tmp_path_factory.mktemp("previous")
    p = _good4d(d, data)
    out = d / "out"
    assert main(["t2star", str(p), "-o", str(out), "--prefix", "run", "-q", "--sigma", "5"]) == 0
    (out / "README.txt").write_text("an earlier run; must survive untouched\n")
    return out


def _assert_refused(case, rc, err, before, tmp_path):
    line = one_line(err)
    assert rc == 2, f"exit code {rc}: {line}"
    assert line.startswith("qmap: error: "), line
    for pat in case.expect:
        assert re.search(pat, line, re.IGNORECASE), f"{pat!r} not in: {line}"
    assert snapshot(tmp_path) == before, "files changed"


@pytest.mark.parametrize("case", [c.param() for c in REFUSED])
def test_refused_fresh_folder(case, tmp_path, phantom, capsys):
    """Refused: exit 2, one line, and the output folder is not even created."""
    data, *_ = phantom
    inp = tmp_path / "in"
    inp.mkdir()
    args = case.build(inp, data)
    out = tmp_path / "out"
    before = snapshot(tmp_path)
    rc, _, err = cli([case.command, *case.harness(out, False), *args], capsys)
    _assert_refused(case, rc, err, before, tmp_path)
    assert not out.exists()


@pytest.mark.parametrize("case", [c.param() for c in REFUSED if not c.own_out and c.style != "none"])
def test_refused_leaves_previous_run_untouched(case, tmp_path, phantom, previous_run, capsys):
    """Refused with --overwrite over an earlier run: the earlier outputs are byte-identical afterwards."""
    data, *_ = phantom
    inp = tmp_path / "in"
    inp.mkdir()
    args = case.build(inp, data)
    out = tmp_path / "out"
    shutil.copytree(previous_run, out)
    before = snapshot(tmp_path)
    rc, _, err = cli([case.command, *case.harness(out, True), *args], capsys)
    _assert_refused(case, rc, err, before, tmp_path)


# --------------------------------------------------------------------------- output folder faults


def test_existing_outputs_without_overwrite(tmp_path, phantom, previous_run, capsys):
    data, *_ = phantom
    p = _good4d(tmp_path, data)
    out = tmp_path / "out"
    shutil.copytree(previous_run, out)
    before = snapshot(tmp_path)
    rc, _, err = cli(["t2star", p, "-o", out, "--prefix", "run", "-q", "--sigma", "5"], capsys)
    line = one_line(err)
    assert rc == 2 and re.search(r"exists already", line) and "--overwrite" in line, line
    assert snapshot(tmp_path) == before


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="root may write into a mode-500 folder")
def test_unwritable_output_folder(tmp_path, phantom, capsys):
    data, *_ = phantom
    p = _good4d(tmp_path, data)
    out = tmp_path / "locked"
    out.mkdir()
    out.chmod(0o500)
    try:
        before = snapshot(tmp_path)
        rc, _, err = cli(["t2star", p, "-o", out, "-q", "--sigma", "5"], capsys)
        line = one_line(err)
        assert rc == 2 and "not writable" in line and "-o" in line, line
        assert snapshot(tmp_path) == before
    finally:
        out.chmod(0o700)


def test_unwritable_output_folder_below(tmp_path, phantom, capsys):
    """A new folder inside a read-only one (root: below a regular file, which no permission makes a folder)."""
    data, *_ = phantom
    p = _good4d(tmp_path, data)
    if hasattr(os, "geteuid") and os.geteuid() == 0:
        parent = tmp_path / "notes.txt"
        parent.write_text("a file\n")
    else:
        parent = tmp_path / "locked"
        parent.mkdir()
        parent.chmod(0o500)
    try:
        before = snapshot(tmp_path)
        rc, _, err = cli(["t2star", p, "-o", parent / "a" / "b", "-q", "--sigma", "5"], capsys)
        line = one_line(err)
        assert rc == 2 and "output folder" in line and "-o" in line, line
        assert snapshot(tmp_path) == before
    finally:
        if parent.is_dir():
            parent.chmod(0o700)


def _enospc():
    return OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))


def _series_and_out(tmp_path: Path, phantom, previous_run: Path, fresh: bool) -> tuple[Path, Path]:
    """The phantom series in ``tmp_path`` and the output folder: absent (``fresh``) or holding an earlier run."""
    data, *_ = phantom
    p = _good4d(tmp_path, data)
    out = tmp_path / "out"
    if not fresh:
        shutil.copytree(previous_run, out)
    return p, out


def _rerun(p: Path, out: Path, capsys) -> tuple[int, str]:
    """``qmap t2star`` with prefix ``run`` and --overwrite into ``out``: (exit code, the one error line)."""
    rc, _, err = cli(["t2star", p, "-o", out, "--prefix", "run", "--overwrite", "-q", "--sigma", "5"], capsys)
    return rc, one_line(err)


class _FailAt:
    """Wrap ``fn``: the ``k``-th call raises ``exc()`` instead (1-based); counts calls."""

    def __init__(self, fn, k, exc):
        self.fn, self.k, self.exc, self.calls = fn, k, exc, 0

    def __call__(self, *a, **kw):
        self.calls += 1
        if self.calls == self.k:
            raise self.exc()
        return self.fn(*a, **kw)


@pytest.mark.parametrize("k", [1, 4, 9])  # the first, a middle and the last NIfTI (t2star writes 9)
@pytest.mark.parametrize("fresh", [True, False], ids=["fresh", "previous"])
def test_disk_full_while_writing_nifti(k, fresh, tmp_path, phantom, previous_run, capsys, monkeypatch):
    # the maps are streamed into their files as they are fitted: the k-th write of map data fails
    p, out = _series_and_out(tmp_path, phantom, previous_run, fresh)
    fail = _FailAt(writer_mod.NiftiStream._put, k, _enospc)
    monkeypatch.setattr(writer_mod.NiftiStream, "_put", lambda self, raw: fail(self, raw))
    before = snapshot(tmp_path)
    rc, line = _rerun(p, out, capsys)
    assert fail.calls >= k  # the staging threads may finish the files they had started
    assert rc == 2 and re.search(r"cannot write .*run_.*map\.nii\.gz", line) and "space" in line, line
    assert snapshot(tmp_path) == before
    assert out.exists() != fresh


def _open_failing_for(suffix):
    real_open = open

    def fake(path, mode="r", *a, **kw):
        if "w" in mode and str(path).endswith(suffix):
            raise _enospc()
        return real_open(path, mode, *a, **kw)

    return fake


@pytest.mark.parametrize("fresh", [True, False], ids=["fresh", "previous"])
def test_disk_full_while_writing_provenance(fresh, tmp_path, phantom, previous_run, capsys, monkeypatch):
    """The last file staged (the provenance JSON) fails: every map staged before it is discarded."""
    p, out = _series_and_out(tmp_path, phantom, previous_run, fresh)
    monkeypatch.setattr(writer_mod, "open", _open_failing_for("run_provenance.json"), raising=False)
    before = snapshot(tmp_path)
    rc, line = _rerun(p, out, capsys)
    assert rc == 2 and "run_provenance.json" in line and "space" in line, line
    assert snapshot(tmp_path) == before


@pytest.mark.parametrize("k", [1, 10, 19])
@pytest.mark.parametrize("fresh", [True, False], ids=["fresh", "previous"])
def test_rename_fails_during_commit(k, fresh, tmp_path, phantom, previous_run, capsys, monkeypatch):
    """An OSError between the renames of the commit (e.g. the folder vanished, EIO) rolls everything back."""
    p, out = _series_and_out(tmp_path, phantom, previous_run, fresh)
    fail = _FailAt(os.replace, k, lambda: OSError(errno.EIO, os.strerror(errno.EIO)))
    monkeypatch.setattr(writer_mod.os, "replace", fail)
    before = snapshot(tmp_path)
    rc, _, err = cli(["t2star", p, "-o", out, "--prefix", "run", "--overwrite", "-q", "--sigma", "5"], capsys)
    monkeypatch.undo()
    line = one_line(err)
    assert fail.calls >= k
    assert rc == 2 and "cannot" in line and str(out) in line, line
    assert snapshot(tmp_path) == before
    assert out.exists() != fresh


# --------------------------------------------------------------------------- output integrity


def _corrupting_finish(kind):
    """Complete a streamed map, then damage the T2* map's file (as a faulty disk or filesystem would)."""
    real_finish = writer_mod.NiftiStream.finish

    def finish(self):
        real_finish(self)
        if "_T2starmap.nii.gz" not in self.path.name or "stderr" in self.path.name:
            return
        img = nib.load(str(self.path))
        data = np.asanyarray(img.dataobj)
        aff = img.affine.copy()
        if kind == "affine":
            aff[0, 3] += 5.0
        elif kind == "shape":
            data = data[:-1]
        elif kind == "nonfinite":
            data = np.full_like(data, np.nan)
        nib.save(nib.Nifti1Image(data, aff), str(self.path))

    return finish


@pytest.mark.parametrize("kind", ["affine", "shape", "nonfinite"])
def test_written_file_that_does_not_read_back_is_refused(kind, tmp_path, phantom, previous_run, capsys, monkeypatch):
    """AtomicWriter re-reads each NIfTI (shape, affine, finite where status 0) before anything is committed."""
    p, out = _series_and_out(tmp_path, phantom, previous_run, fresh=False)
    monkeypatch.setattr(writer_mod.NiftiStream, "finish", _corrupting_finish(kind))
    before = snapshot(tmp_path)
    rc, line = _rerun(p, out, capsys)
    assert rc == 2 and "run_T2starmap.nii.gz" in line, line
    assert snapshot(tmp_path) == before


# --------------------------------------------------------------------------- runs that proceed


def _maps(folder: Path, prefix: str) -> dict:
    return {p.name.removeprefix(prefix): np.asanyarray(nib.load(str(p)).dataobj)
            for p in sorted(folder.glob(f"{prefix}_*.nii.gz"))}


def _assert_same_maps(a: dict, b: dict):
    assert a.keys() == b.keys() and a
    for k, v in a.items():
        assert np.array_equal(v, b[k], equal_nan=True), k


def test_integer_data_with_scaling_slope_is_honoured(tmp_path, phantom, capsys):
    """int16 + scl_slope 0.5 + scl_inter 10 gives the maps of the float series it encodes (NIfTI-1: y = slope*x + inter)."""
    data, *_ = phantom
    raw = np.round((data - 10.0) / 0.5).astype(np.int16)
    assert raw.max() < np.iinfo(np.int16).max
    img = nib.Nifti1Image(raw, AFFINE)
    img.header.set_slope_inter(0.5, 10.0)
    pi = tmp_path / "sub-01_acq-int_MEGRE.nii.gz"
    nib.save(img, str(pi))
    (tmp_path / "sub-01_acq-int_MEGRE.json").write_text(json.dumps({"EchoTime": TE.tolist()}))
    decoded = raw.astype(np.float32) * np.float32(0.5) + np.float32(10.0)
    pf = write_nifti(tmp_path / "sub-01_acq-float_MEGRE.nii.gz", decoded, affine=AFFINE,
                     sidecar={"EchoTime": TE.tolist()})
    for p, o in ((pi, "i"), (pf, "f")):
        rc, _, err = cli(["t2star", p, "-o", tmp_path / o, "--prefix", "x", "-q", "--sigma", "5"], capsys)
        assert rc == 0 and err == "", err
    mi, mf = _maps(tmp_path / "i", "x"), _maps(tmp_path / "f", "x")
    _assert_same_maps(mi, mf)
    # and the amplitude is in the decoded units, not the stored integers (which are ~2x larger)
    st = mi["_desc-status_fitmap.nii.gz"] == 0
    m0 = mi["_M0map.nii.gz"][st]
    assert np.nanmedian(m0) == pytest.approx(np.nanmedian(mf["_M0map.nii.gz"][st]))
    assert 800 < np.nanmedian(m0) < 1200  # decay_phantom M0 = 1000


def test_nonfinite_voxels_are_flagged_and_neighbours_unaffected(tmp_path, phantom, capsys):
    """NaN / +inf / -inf samples: exit 0, status 2 there, NaN estimates, every other voxel as in the clean run."""
    data, _t2, obj = phantom
    bad = data.copy()
    spots = {(16, 16, 1, 3): np.nan, (14, 15, 0, 0): np.inf, (17, 14, 2, 7): -np.inf, (12, 18, 0, 5): np.nan}
    for idx, v in spots.items():
        bad[idx] = v
    pc = write_nifti(tmp_path / "clean.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": TE.tolist()})
    pb = write_nifti(tmp_path / "bad.nii.gz", bad, affine=AFFINE, sidecar={"EchoTime": TE.tolist()})
    mask = write_nifti(tmp_path / "mask.nii.gz", obj.astype(np.uint8), affine=AFFINE)
    for p, o in ((pc, "c"), (pb, "b")):
        rc, _, err = cli(["t2star", p, "-o", tmp_path / o, "--prefix", "x", "-q", "--sigma", "5", "--mask", mask],
                         capsys)
        assert rc == 0 and err == "", err
    mc, mb = _maps(tmp_path / "c", "x"), _maps(tmp_path / "b", "x")
    hit = np.zeros(obj.shape, bool)
    for idx in spots:
        hit[idx[:3]] = True
    assert np.all(mb["_desc-status_fitmap.nii.gz"][hit] == 2)
    assert np.all(np.isnan(mb["_T2starmap.nii.gz"][hit])) and np.all(np.isnan(mb["_desc-stderr_T2starmap.nii.gz"][hit]))
    for k in mc:
        assert np.array_equal(mc[k][~hit], mb[k][~hit], equal_nan=True), k
    prov = json.loads((tmp_path / "b" / "x_provenance.json").read_text())
    assert prov["status_counts"]["2"] == len(spots)


def test_nonfinite_voxels_flagged_with_auto_mask(tmp_path, phantom, capsys):
    """With the default automatic mask too, an object voxel holding NaN / inf says 'bad input', not 'masked out'."""
    data, _t2, obj = phantom
    bad = data.copy()
    spots = [(16, 16, 0, 3, np.nan), (14, 15, 0, 0, np.inf), (17, 14, 2, 7, -np.inf), (15, 15, 1, 2, np.inf)]
    for i, j, k, e, v in spots:
        assert obj[i, j, k]
        bad[i, j, k, e] = v
    pb = write_nifti(tmp_path / "bad.nii.gz", bad, affine=AFFINE, sidecar={"EchoTime": TE.tolist()})
    rc, _, err = cli(["t2star", pb, "-o", tmp_path / "b", "--prefix", "x", "-q", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    status = _maps(tmp_path / "b", "x")["_desc-status_fitmap.nii.gz"]
    assert [int(status[i, j, k]) for i, j, k, *_ in spots] == [2] * len(spots)


def test_unsorted_echo_files_are_sorted_with_a_warning(tmp_path, phantom, capsys):
    """3D echo files given out of order: sorted by EchoTime, one warning line, maps equal to the ordered run."""
    data, *_ = phantom
    files = _echo_files(tmp_path, data)
    order = [3, 0, 7, 1, 6, 2, 5, 4]
    rc, _, err = cli(["t2star", *files, "-o", tmp_path / "ok", "--prefix", "x", "-q", "--sigma", "5"], capsys)
    assert rc == 0 and err == ""
    rc, _, err = cli(["t2star", *[files[i] for i in order], "-o", tmp_path / "shuf", "--prefix", "x", "-q",
                      "--sigma", "5"], capsys)
    line = one_line(err)
    assert rc == 0 and line.startswith("qmap: warning:") and "sorted" in line and "EchoTime" in line, line
    _assert_same_maps(_maps(tmp_path / "ok", "x"), _maps(tmp_path / "shuf", "x"))
    prov = json.loads((tmp_path / "shuf" / "x_provenance.json").read_text())
    assert prov["acquisition"]["EchoTime"] == pytest.approx(TE.tolist())


def test_unsorted_te_option_sorts_4d_volumes(tmp_path, phantom, capsys):
    """A 4D series whose volumes and --te list are both permuted gives the maps of the ordered series."""
    data, *_ = phantom
    order = np.array([5, 2, 0, 7, 1, 3, 6, 4])
    p_ok = write_nifti(tmp_path / "ok.nii.gz", data, affine=AFFINE)
    p_sh = write_nifti(tmp_path / "sh.nii.gz", data[..., order], affine=AFFINE)
    te_sh = ",".join(f"{TE[i] * 1e3:g}ms" for i in order)
    assert cli(["t2star", p_ok, "--te", TE_MS, "-o", tmp_path / "a", "--prefix", "x", "-q", "--sigma", "5"],
               capsys)[0] == 0
    rc, _, err = cli(["t2star", p_sh, "--te", te_sh, "-o", tmp_path / "b", "--prefix", "x", "-q", "--sigma", "5"],
                     capsys)
    assert rc == 0 and "sorted" in one_line(err)
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))


def test_command_line_wins_over_disagreeing_sidecar(tmp_path, phantom, capsys):
    """--te differing from the sidecar: one warning naming both, exit 0, the command-line values are used."""
    data, *_ = phantom
    te_cli = TE * 1.1
    p_sc = write_nifti(tmp_path / "sc.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": TE.tolist()})
    p_no = write_nifti(tmp_path / "no.nii.gz", data, affine=AFFINE)
    te_arg = ",".join(f"{t * 1e3:.6g}ms" for t in te_cli)
    rc, _, err = cli(["t2star", p_sc, "--te", te_arg, "-o", tmp_path / "a", "--prefix", "x", "-q", "--sigma", "5"],
                     capsys)
    line = one_line(err)
    assert rc == 0 and line.startswith("qmap: warning:") and "--te" in line and "sidecar" in line, line
    assert line.endswith("using the --te given"), line
    rc, _, err = cli(["t2star", p_no, "--te", te_arg, "-o", tmp_path / "b", "--prefix", "x", "-q", "--sigma", "5"],
                     capsys)
    assert rc == 0 and err == ""
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))
    prov = json.loads((tmp_path / "a" / "x_provenance.json").read_text())
    assert prov["acquisition"]["EchoTime"] == pytest.approx(te_cli.tolist(), rel=1e-6)


def test_provenance_sha256_matches_the_input_bytes(tmp_path, phantom, capsys):
    """Provenance ``inputs``: absolute paths with the SHA-256 of each file's bytes (hashlib, FIPS 180-4)."""
    import hashlib

    data, _t2, obj = phantom
    files = _echo_files(tmp_path, data)
    mask = write_nifti(tmp_path / "mask.nii.gz", obj.astype(np.uint8), affine=AFFINE)
    rc, _, err = cli(["t2star", *files, "--mask", mask, "-o", tmp_path / "o", "--prefix", "x", "-q", "--sigma", "5"],
                     capsys)
    assert rc == 0, err
    prov = json.loads((tmp_path / "o" / "x_provenance.json").read_text())
    listed = {e["path"]: e["sha256"] for e in prov["inputs"]}
    for f in [*files, mask]:
        assert listed[str(f.absolute())] == hashlib.sha256(f.read_bytes()).hexdigest(), f


def test_vfa_command_line_tr_wins_over_sidecar(tmp_path, capsys):
    """t1-vfa --tr differing from the sidecar: one warning, exit 0, maps as from the command-line TR alone."""
    p_sc = _vfa(tmp_path)
    p_no = _vfa(tmp_path, sidecar=False, name="plain_VFA.nii.gz")
    rc, _, err = cli(["t1-vfa", p_sc, "--tr", "18ms", "-o", tmp_path / "a", "--prefix", "x", "-q"], capsys)
    line = one_line(err)
    assert rc == 0 and line.startswith("qmap: warning:") and "--tr" in line and "sidecar" in line, line
    rc, _, err = cli(["t1-vfa", p_no, "--fa", "3,8,15,25", "--tr", "18ms", "-o", tmp_path / "b", "--prefix", "x",
                      "-q"], capsys)
    assert rc == 0 and err == "", err
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))
    prov = json.loads((tmp_path / "a" / "x_provenance.json").read_text())
    assert prov["acquisition"]["RepetitionTime"] == pytest.approx(0.018)


def test_dam_images_out_of_order_are_sorted(tmp_path, capsys):
    """b1 --method dam with the 2a image first (3D files with FlipAngle sidecars): sorted with a warning."""
    data = _dam_data()
    f = [write_nifti(tmp_path / f"dam_fa-{i + 1}.nii.gz", data[..., i], affine=AFFINE,
                     sidecar={"FlipAngle": 45.0 * (i + 1), "RepetitionTime": 8.0}) for i in range(2)]
    rc, _, err = cli(["b1", *f, "--method", "dam", "-o", tmp_path / "a", "--prefix", "x", "-q"], capsys)
    assert rc == 0 and err == "", err
    rc, _, err = cli(["b1", f[1], f[0], "--method", "dam", "-o", tmp_path / "b", "--prefix", "x", "-q"], capsys)
    line = one_line(err)
    assert rc == 0 and "sorted" in line and "FlipAngle" in line, line
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))


def test_vfa_b1_map_covering_part_of_the_data(tmp_path, capsys):
    """A B1 map reaching only part of the series: exit 0; voxels beyond its field of view get status 6
    (README: B1 maps are resampled; outside -> documented status), the rest are fitted."""
    x, _, obj = _disc()
    shifted = AFFINE.copy()
    shifted[0, 3] = 40.0  # the B1 grid starts 20 voxels (40 mm) along x; voxel centres at x < 19.5 are outside
    p = _vfa(tmp_path)
    b1 = _b1map(tmp_path, 1.0, affine=shifted)
    rc, _, err = cli(["t1-vfa", p, "--b1", b1, "-o", tmp_path / "o", "--prefix", "x", "-q"], capsys)
    assert rc == 0 and err == "", err
    m = _maps(tmp_path / "o", "x")
    status, t1 = m["_desc-status_fitmap.nii.gz"], m["_T1map.nii.gz"]
    outside = obj & (x < 20)
    inside = obj & (x >= 20)
    assert outside.any() and inside.any()
    assert np.all(status[outside] == 6) and np.all(np.isnan(t1[outside]))
    assert np.mean(status[inside] == 0) > 0.95
    prov = json.loads((tmp_path / "o" / "x_provenance.json").read_text())
    in_mask_outside_b1 = (status != 1) & (x < 20)  # the automatic mask also takes a rim of the disc
    assert np.all(status[in_mask_outside_b1] == 6)
    assert prov["status_counts"]["6"] == int(in_mask_outside_b1.sum())
    assert str(b1.absolute()) in [e["path"] for e in prov["inputs"]]


def test_batch_isolates_a_corrupt_series(tmp_path, phantom, capsys):
    """batch: a corrupt series fails alone (exit 4, listed with its reason); the good one is complete and the
    failed one leaves no file behind (README, batch semantics)."""
    data, *_ = phantom
    bids = _bids(tmp_path, data=data, corrupt_mese=True)
    before = snapshot(bids)
    out = tmp_path / "deriv"
    rc, stdout, err = cli(["batch", bids, "-o", out, "-q", "-j", "1"], capsys)
    assert rc == 4, err
    assert "Traceback" not in err
    failed = [ln for ln in (stdout + err).splitlines() if "MESE" in ln]
    assert failed and any("not a readable NIfTI" in ln for ln in failed), stdout + err
    names = sorted(p.relative_to(out).as_posix() for p in out.rglob("*") if p.is_file())
    assert "dataset_description.json" in names
    assert "sub-01/anat/sub-01_acq-megre_provenance.json" in names
    assert not [n for n in names if "mese" in n.lower() or ".qmap-" in n], names
    prov = json.loads((out / "sub-01/anat/sub-01_acq-megre_provenance.json").read_text())
    assert all((out / "sub-01/anat" / n).is_file() for n in prov["outputs"])
    assert snapshot(bids) == before  # the dataset itself is never written to


@pytest.mark.parametrize("suffix", [".nii.gz", ".json"])
def test_simulate_disk_full(suffix, tmp_path, capsys, monkeypatch):
    """simulate: a full disk while its files are written gives exit 2, one line, and no folder."""
    import qmap.simulate.output as sim_out

    if suffix == ".nii.gz":
        monkeypatch.setattr(sim_out.nib, "save", _FailAt(sim_out.nib.save, 3, _enospc))
    else:
        monkeypatch.setattr(sim_out, "open", _open_failing_for(suffix), raising=False)
    rc, _, err = cli(["simulate", "-o", tmp_path / "sim", "--protocol", "megre"], capsys)
    monkeypatch.undo()
    line = one_line(err)
    assert rc == 2 and "space" in line, line
    assert list(tmp_path.iterdir()) == []


# --------------------------------------------------------------------------- realistic exports that proceed (issue 20)


def _fit(argv, capsys, prefix="x"):
    rc, _, err = cli([*argv, "--prefix", prefix, "-q"], capsys)
    return rc, err


def test_small_negative_undershoot_is_clipped_with_a_warning(tmp_path, phantom, capsys):
    """Spline-resampled magnitudes dip a little below 0: clipped to 0 (tolerance 5 % of the maximum), one warning."""
    data, *_ = phantom
    under = data - np.float32(3.0)  # the noise background (Rayleigh, sigma 5) now dips to about -3
    p = _good4d(tmp_path, under, name="under.nii.gz")
    q = _good4d(tmp_path, np.maximum(under, 0), name="clipped.nii.gz")
    rc, err = _fit(["t2star", p, "-o", tmp_path / "a", "--sigma", "5"], capsys)
    line = one_line(err)
    n_neg = int(np.count_nonzero(under < 0))
    assert rc == 0 and line.startswith("qmap: warning: under.nii.gz: ") and f"{n_neg} negative samples" in line, line
    assert f"min {float(under.min()):g}" in line and "set to 0" in line and "-5 % of the maximum" in line, line
    rc, err = _fit(["t2star", q, "-o", tmp_path / "b", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))


def test_readout_tr_in_an_ir_sidecar_is_ignored_with_a_warning(tmp_path, capsys):
    """A sidecar RepetitionTime of 8 ms (the readout's TR) with TIs up to 3 s: warned about, ignored; same maps."""
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    p = _ir(tmp_path / "a", RepetitionTime=0.008)
    q = _ir(tmp_path / "b")
    rc, err = _fit(["t1-ir", p, "-o", tmp_path / "oa", "--sigma", "5"], capsys)
    line = one_line(err)
    assert rc == 0 and "sidecar RepetitionTime 0.008 s is shorter than the inversion times (up to 3 s)" in line, line
    assert "ignored" in line
    rc, err = _fit(["t1-ir", q, "-o", tmp_path / "ob", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    _assert_same_maps(_maps(tmp_path / "oa", "x"), _maps(tmp_path / "ob", "x"))
    prov = json.loads((tmp_path / "oa" / "x_provenance.json").read_text())
    assert "RepetitionTime" not in prov["acquisition"]


def test_epg_accepts_echo_times_rounded_to_0_1ms(tmp_path, capsys):
    """ESP 11.45 ms written rounded to 0.1 ms (11.5, 22.9, 34.4 ... ms): accepted with a warning (tolerance 0.06 ms);
    T2 agrees with the fit given the exact echo times."""
    esp = 0.01145
    te = esp * np.arange(1, 17)
    data = decay_phantom(te=te, t2_range=(0.04, 0.12))[0]
    te_rounded = np.round(te * 1e4) / 1e4
    assert np.max(np.abs(te_rounded - te)) > 1e-3 * esp  # beyond the strict 0.1 % check of the spacing
    p = write_nifti(tmp_path / "r.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": te_rounded.tolist()})
    q = write_nifti(tmp_path / "e.nii.gz", data, affine=AFFINE, sidecar={"EchoTime": te.tolist()})
    rc, err = _fit(["t2", p, "--epg", "-o", tmp_path / "a", "--sigma", "5"], capsys)
    line = one_line(err)
    assert rc == 0 and "rounded to 0.1 ms" in line and "ESP = 11.45 ms" in line and "up to 0.06 ms" in line, line
    rc, err = _fit(["t2", q, "--epg", "-o", tmp_path / "b", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    a, b = _maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x")
    good = (a["_desc-status_fitmap.nii.gz"] == 0) & (b["_desc-status_fitmap.nii.gz"] == 0)
    assert good.sum() > 500
    ratio = a["_T2map.nii.gz"][good] / b["_T2map.nii.gz"][good]
    assert abs(np.median(ratio) - 1) < 1e-3 and np.percentile(np.abs(ratio - 1), 95) < 5e-3


def test_single_slice_2d_files_are_one_slice(tmp_path, phantom, capsys):
    """Echo files holding one 2D slice (x, y) each: fitted as a (x, y, 1) volume, the maps of the same slice in 3D."""
    data, *_ = phantom
    sl = data[:, :, 1]
    files2d = [write_nifti(tmp_path / f"two_echo-{i + 1}.nii.gz", sl[:, :, i], affine=AFFINE,
                           sidecar={"EchoTime": float(TE[i])}) for i in range(TE.size)]
    assert nib.load(str(files2d[0])).shape == (32, 32)
    files3d = [write_nifti(tmp_path / f"three_echo-{i + 1}.nii.gz", sl[:, :, None, i], affine=AFFINE,
                           sidecar={"EchoTime": float(TE[i])}) for i in range(TE.size)]
    rc, err = _fit(["t2star", *files2d, "-o", tmp_path / "a", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    rc, err = _fit(["t2star", *files3d, "-o", tmp_path / "b", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    a, b = _maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x")
    assert a["_T2starmap.nii.gz"].shape == (32, 32, 1)
    _assert_same_maps(a, b)


@pytest.mark.parametrize("kind", ["strings", "full-list-in-each-echo"])
def test_malformed_sidecars_are_replaced_by_the_command_line(kind, tmp_path, phantom, capsys):
    """Unusable sidecar EchoTime with --te given: one warning, and the maps of the same data without sidecars."""
    data, *_ = phantom
    (tmp_path / "s").mkdir()
    (tmp_path / "n").mkdir()
    if kind == "strings":
        series = [write_nifti(tmp_path / "s" / "sub-01_MEGRE.nii.gz", data, affine=AFFINE,
                              sidecar={"EchoTime": [f"{t:g}" for t in TE]})]
    else:
        series = _echo_files(tmp_path / "s", data, sidecar=lambda i: {"EchoTime": TE.tolist()})
    plain = _echo_files(tmp_path / "n", data, sidecar=lambda i: None) if kind != "strings" else [
        write_nifti(tmp_path / "n" / "sub-01_MEGRE.nii.gz", data, affine=AFFINE)]
    rc, err = _fit(["t2star", *series, "--te", TE_MS, "-o", tmp_path / "a", "--sigma", "5"], capsys)
    line = one_line(err)
    want = "(list)" if kind == "strings" else "holds 8 values for a single 3D volume"
    assert rc == 0 and "sidecar EchoTime" in line and want in line and "ignored: using the --te given" in line, line
    rc, err = _fit(["t2star", *plain, "--te", TE_MS, "-o", tmp_path / "b", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    _assert_same_maps(_maps(tmp_path / "a", "x"), _maps(tmp_path / "b", "x"))


def test_no_series_check_fits_anyway_and_warns_about_the_fit(tmp_path, capsys):
    """Files in shell-glob order with --te in acquisition order, forced with --no-series-check: exit 0, but the
    median R-squared (0.04 here against 0.99 in order) is reported as low."""
    files = _glob_echoes(tmp_path, sidecars=False)
    rc, err = _fit(["t2star", *files, "--te", _ms(TE12), "-o", tmp_path / "a", "--sigma", "5", "--no-series-check"],
                   capsys)
    line = one_line(err)
    m = re.search(r"median R-squared of the fitted voxels is (-?[0-9.]+) \(below 0.5\)", line)
    assert rc == 0 and m and float(m.group(1)) < 0.2, line
    prov = json.loads((tmp_path / "a" / "x_provenance.json").read_text())
    assert prov["options"]["series_check"] is False
    ordered = sorted(files, key=lambda p: int(re.search(r"_e(\d+)_", p.name).group(1)))
    rc, err = _fit(["t2star", *ordered, "--te", _ms(TE12), "-o", tmp_path / "b", "--sigma", "5"], capsys)
    assert rc == 0 and err == "", err
    r2 = _maps(tmp_path / "b", "x")["_desc-rsquared_fitmap.nii.gz"]
    st = _maps(tmp_path / "b", "x")["_desc-status_fitmap.nii.gz"]
    assert np.median(r2[st == 0]) > 0.95


def test_auto_mask_covering_the_whole_image_is_reported(tmp_path, capsys):
    """A tightly cropped export (object everywhere, no background): the automatic mask takes every voxel; a warning."""
    x = np.indices((32, 32, 3))[0]
    t2 = 0.01 + 0.05 * x / 31
    rng = np.random.default_rng(5)
    clean = 1000 * np.exp(-TE / t2[..., None])
    data = np.abs(clean + rng.normal(0, 5, clean.shape) + 1j * rng.normal(0, 5, clean.shape)).astype(np.float32)
    p = _good4d(tmp_path, data)
    rc, err = _fit(["t2star", p, "-o", tmp_path / "a", "--sigma", "5"], capsys)
    line = one_line(err)
    assert rc == 0 and "automatic mask covers the whole image" in line and "--mask FILE" in line, line
    assert np.all(_maps(tmp_path / "a", "x")["_desc-status_fitmap.nii.gz"] != 1)


def test_nan_voxels_status_as_documented(tmp_path, phantom, capsys):
    """README "Status codes": a NaN / inf sample in a fitted voxel is status 2; a NaN background outside the
    automatic mask is status 1 (not fitted because not in the mask); with --mask none it is status 2 too."""
    data, _, obj = phantom
    bad = data.copy()
    bad[~obj] = np.nan  # an export that writes NaN outside the object
    bad[16, 16, 1, :] = np.nan  # a hole inside the object
    bad[14, 16, 1, 3] = np.inf
    p = _good4d(tmp_path, bad)
    for mask, background in (("auto", 1), ("none", 2)):
        rc, err = _fit(["t2star", p, "-o", tmp_path / mask, "--sigma", "5", "--mask", mask], capsys)
        assert rc == 0 and err == "", err
        st = _maps(tmp_path / mask, "x")["_desc-status_fitmap.nii.gz"]
        assert np.all(st[~obj] == background), (mask, np.unique(st[~obj]))
        assert st[16, 16, 1] == 2 and st[14, 16, 1] == 2
