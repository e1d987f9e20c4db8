"""The model registry (qmap.models) drives the command line's model choice, and fits round-trip through it.

* every model option (``t2 --epg``, ``t1-vfa --method``, ``b1 --method``) is built from
  ``COMMAND_MODELS``: choices, default and help; a value added there reaches ``--help``;
* what each entry says about its model (maps written, their units) is what the model reports;
* a fit of every registered choice, run from the command line, records the model name the registry
  names, and ``model_class(name).from_provenance`` rebuilds the very model the command fitted (same
  class, samples and predictions); ``qmap inspect`` refits a voxel through it and reproduces the maps.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math

import nibabel as nib
import numpy as np
import pytest

from qmap import models
from qmap.cli import get_parser, main
from qmap.models import COMMAND_MODELS, MODELS, Choice, build_model, choose, model_class, model_kind
from qmap.workflows.demo import sample_data_dir
from qmap.workflows.inspect import inspect_voxel


def _action(command: str, option: str) -> argparse.Action:
    parser = get_parser(command)
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return next(a for a in sub.choices[command]._actions if option in a.option_strings)


@pytest.mark.parametrize("command", [c for c, m in COMMAND_MODELS.items() if m.option])
def test_each_model_option_is_built_from_the_registry(command):
    m = COMMAND_MODELS[command]
    act = _action(command, m.option)
    assert act.help == m.help() and act.dest == m.dest
    if m.flag:
        assert isinstance(act, argparse._StoreTrueAction)
    else:
        assert tuple(act.choices) == m.values and act.required == m.required
        assert act.default == (None if m.required else m.default)
    for c in m.choices:  # every choice names a registered model
        assert c.model in MODELS


@pytest.mark.parametrize("command", sorted(COMMAND_MODELS))
def test_the_shared_options_follow_the_registry(command):
    # --engine only where every model is fitted by least squares, --units only where a time map is written,
    # the noise-floor options where the command's models take the noise floor (COMMAND_MODELS[...].noise)
    m = COMMAND_MODELS[command]
    parser = get_parser(command)
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    options = {s for a in sub.choices[command]._actions for s in a.option_strings}
    assert ("--engine" in options) == m.engine_choice == all(MODELS[c.model].kind == "fitted" for c in m.choices)
    assert ("--units" in options) == m.time_maps
    assert ("--noise-floor" in options) == ("--coils" in options) == (m.noise == "floor")
    assert "--sigma" in options and "--stderr" in options if m.noise != "own" else "--sigma" in options
    assert m.time_maps == (command != "b1") and m.engine_choice == (command in ("t2", "t2star", "t1-ir", "t1-vfa"))


def test_a_choice_added_to_the_registry_reaches_the_command_line(monkeypatch):
    m = COMMAND_MODELS["t1-vfa"]
    extra = Choice("weighted", "vfa", "an estimator added to the registry", ("T1", "R1", "M0"), method="linear")
    monkeypatch.setitem(COMMAND_MODELS, "t1-vfa", dataclasses.replace(m, choices=(*m.choices, extra)))
    act = _action("t1-vfa", "--method")
    assert act.choices == ("nonlinear", "linear", "weighted")
    assert act.help.endswith("; weighted: an estimator added to the registry")
    assert choose("t1-vfa", "weighted").method == "linear"


def test_settings_of_a_model_not_chosen_are_refused_in_the_registry_s_words(tmp_path, capsys):
    # --refocus / --t1 belong to the EPG choice of t2 (COMMAND_MODELS["t2"]): without --epg they are refused
    assert main(["t2", str(tmp_path / "x.nii.gz"), "--t1", "1s", "--refocus", "160", "-o", str(tmp_path)]) == 2
    assert capsys.readouterr().err.strip() == ("qmap: error: --refocus and --t1 apply only to the EPG model; add "
                                               "--epg or leave them out")
    assert COMMAND_MODELS["t2"].foreign_settings(True, {"--t1": "1s"}) == (None, [])
    with pytest.raises(ValueError, match=r"^method='fast'; expected one of 'nonlinear', 'linear'$"):
        choose("t1-vfa", "fast")


# x positions and a plausible parameter row [linear..., nonlinear...] for each fitted model
SAMPLES = {
    "t2star": ((np.arange(1, 9) * 0.005,), {}),
    "t2": ((np.arange(1, 13) * 0.01,), {"refocus_deg": 160.0, "t1": 1.2}),
    "t1-ir": ((np.array([0.05, 0.2, 0.5, 1.0, 2.0, 4.0]),), {"signal": "magnitude", "look_locker": False}),
    "t1-vfa": ((np.array([3.0, 8.0, 15.0, 25.0]),), {"tr": 0.015}),
}


@pytest.mark.parametrize("command, value", [(c, v) for c in SAMPLES for v in COMMAND_MODELS[c].values])
def test_the_registry_says_what_each_model_writes(command, value):
    (x,), settings = SAMPLES[command]
    model, choice = build_model(command, value, x, **settings)
    entry = MODELS[choice.model]
    assert model.name == entry.name and model_kind(entry.name) == entry.kind == "fitted"
    P = len(model.param_names)
    lo, hi = model.bounds()
    params = np.concatenate([np.full(len(model.linear), 500.0), 0.5 * (lo + hi)])[None, :]
    reported = model.report(params, np.tile(np.eye(P) * 1e-6, (1, 1, 1)))
    assert tuple(sorted(d.name for d in reported)) == tuple(sorted(choice.maps))
    units = dict(entry.units)
    for d in reported:
        assert d.units == units[d.name], d.name


# ----------------------------------------------------------------- round trip through the provenance
ANAT = "sub-phantom/anat"


def _afi_images(d):
    """AFI image pair (Yarnykh 2007, steady state with perfect spoiling, (memory)) on a small grid."""
    b1 = np.linspace(0.85, 1.15, 6 * 5 * 2).reshape(6, 5, 2)
    a, e1, e2 = np.radians(60.0 * b1), math.exp(-0.02 / 1.0), math.exp(-0.10 / 1.0)
    c = np.cos(a)
    den = 1 - e1 * e2 * c * c
    s1 = 1e4 * np.sin(a) * (1 - e2 + (1 - e1) * e2 * c) / den
    s2 = 1e4 * np.sin(a) * (1 - e1 + (1 - e2) * e1 * c) / den
    paths = []
    for i, (s, tr) in enumerate(((s1, 0.02), (s2, 0.10))):
        p = d / f"afi_{i + 1}.nii.gz"
        nib.save(nib.Nifti1Image(s.astype(np.float32), np.diag([4.0, 4.0, 5.0, 1.0])), str(p))
        p.with_name(f"afi_{i + 1}.json").write_text(json.dumps({"FlipAngle": 60.0, "RepetitionTime": tr}))
        paths.append(str(p))
    return paths


def _runs(d):
    """(command, model-option value, argv) of one run per registered choice of the commands that fit."""
    data = sample_data_dir() / ANAT
    fmap = sample_data_dir() / "sub-phantom/fmap"
    mese = sorted(str(p) for p in data.glob("*_MESE.nii.gz"))
    vfa = sorted(str(p) for p in data.glob("*_VFA.nii.gz"))
    return [
        ("t2star", None, ["t2star", *sorted(str(p) for p in data.glob("*_MEGRE.nii.gz"))]),
        ("t2", False, ["t2", *mese]),
        ("t2", True, ["t2", *mese, "--epg", "--refocus", "170", "--t1", "1.5s"]),
        ("t1-ir", None, ["t1-ir", *sorted(str(p) for p in data.glob("*_IRT1.nii.gz")), "--look-locker"]),
        ("t1-vfa", "nonlinear", ["t1-vfa", *vfa]),
        ("t1-vfa", "linear", ["t1-vfa", *vfa, "--method", "linear", "--b1", str(fmap / "sub-phantom_TB1map.nii.gz")]),
        ("b1", "dam", ["b1", *sorted(str(p) for p in fmap.glob("*_TB1DAM.nii.gz")), "--method", "dam",
                "--mask", "auto"]),
        ("b1", "afi", ["b1", *_afi_images(d), "--method", "afi", "--mask", "none", "--sigma", "5"]),
        ("t1-mp2rage", None, ["t1-mp2rage", str(data / "sub-phantom_UNIT1.nii.gz"), "--inv1",
                              str(data / "sub-phantom_inv-1_MP2RAGE.nii.gz"), "--inv2",
                              str(data / "sub-phantom_inv-2_MP2RAGE.nii.gz")]),
    ]


def test_every_choice_round_trips_through_its_provenance_and_inspect_refits_it(tmp_path, capsys):
    truth = np.asarray(nib.load(str(sample_data_dir() / ANAT / "sub-phantom_desc-truth_T1map.nii.gz")).dataobj)
    mask = np.zeros(truth.shape, np.uint8)
    inner = np.argwhere(truth > 0)
    for ijk in inner[:: max(1, len(inner) // 12)][:12]:  # a dozen object voxels: quick fits
        mask[tuple(ijk)] = 1
    mask_path = tmp_path / "mask.nii.gz"
    nib.save(nib.Nifti1Image(mask, nib.load(str(sample_data_dir() / ANAT / "sub-phantom_desc-truth_T1map.nii.gz"))
                             .affine), str(mask_path))
    seen = set()
    for k, (command, value, argv) in enumerate(_runs(tmp_path)):
        out = tmp_path / f"o{k}"
        extra = [] if "--mask" in argv else ["--mask", str(mask_path)]
        assert main([*argv, *extra, "-o", str(out), "--prefix", "fit", "-q", "-j", "1"]) == 0, argv
        prov = json.loads((out / "fit_provenance.json").read_text())
        choice = choose(command, value)
        name = prov["model"]["name"]
        assert name == choice.model
        # the maps written, and their units, are those the registry names for the model and the choice
        units = dict(MODELS[name].units)
        written = {o["parameter"]: o["units"] for o in prov["outputs"].values() if o["kind"] == "estimate"}
        assert all(units[k] == u for k, u in written.items()), written
        if "--look-locker" not in argv:  # (Look-Locker writes ApparentT1 instead of InversionEfficiency)
            assert set(written) == set(choice.maps), written
        seen.add((command, choice.value))
        cls = model_class(name)
        if model_kind(name) == "fitted":
            model = cls.from_provenance(prov["model"], prov["acquisition"],
                                        np.asarray(prov["acquisition"][cls.varied], float))
            settings = {"refocus_deg": 170.0, "t1": 1.5, "look_locker": True,
                        "tr": prov["acquisition"].get("RepetitionTime")}
            built, _ = build_model(command, value, model.x, **settings)
            assert type(model) is type(built) and model.param_names == built.param_names
            np.testing.assert_array_equal(model.x, built.x)
            lo, hi = built.bounds()
            p = np.concatenate([np.full(len(built.linear), 700.0), lo + 0.37 * (hi - lo)])[None, :]
            np.testing.assert_array_equal(model.predict(p), built.predict(p))
        elif model_kind(name) == "closed_form":
            assert cls.from_provenance(prov["model"], prov["acquisition"]).name == choice.model
        else:  # the MP2RAGE protocol round-trips (its acquisition as recorded)
            assert cls.from_provenance(prov["model"], prov["acquisition"]).as_acquisition() == prov["acquisition"]
        # inspect re-creates the fit of a fitted voxel from the provenance and reproduces the written maps
        status = np.asarray(nib.load(str(out / "fit_desc-status_fitmap.nii.gz")).dataobj)
        ijk = tuple(int(v) for v in np.argwhere(status == 0)[0])
        capsys.readouterr()
        rep = inspect_voxel(out, ijk, prefix="fit", out_png=tmp_path / f"v{k}.png")
        assert rep.status == 0 and not [n for n in rep.notes if "refitting" in n], rep.notes
        # the standard-error wording follows the registry's kind: a closed form has no J^T J
        assert rep.convention == ("noise" if model_kind(name) == "fitted" else "noise, propagated")
    # every choice of every command that fits was run
    assert seen == {(c, v) for c, m in COMMAND_MODELS.items() for v in m.values if c != "t2-spectrum"}
    assert set(models.REGISTRY) | set(models.CLOSED_FORMS) | set(models.LOOKUPS) == {choose(c, v).model
                                                                                    for c, v in seen}
