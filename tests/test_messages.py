"""Messages in the caller's words: the library names its arguments, the command line its options.

A function called from Python says ``b1=PATH`` / ``b1_scale='percent'`` (what the caller typed); the
command line turns each ``name=value`` into the option the user typed (``--b1 PATH``, ``--b1-scale
percent``) through :func:`qmap.cli.as_options` -- for errors and for warnings alike.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from qmap.b1 import load_b1_map, load_b1_stderr
from qmap.cli import ARGUMENT_OPTIONS, as_options, main
from qmap.errors import InputError, OutputExistsError, QmapWarning, UsageError
from qmap.simulate import Protocols, simulate
from tests.conftest import write_nifti

SHAPE = (6, 5, 2)
AFFINE = np.diag([2.0, 2.0, 3.0, 1.0])
FA = (3.0, 8.0, 15.0, 25.0)
TR = 0.015


def _no_option(message: str) -> None:
    """A library message names no command-line option (``--x`` or ``-o``)."""
    assert not re.search(r"(?<![\w-])--?[a-z]", message), message


def _usage_cases(cases) -> None:
    """Each ``(call, library, cli)``: ``call()`` raises a UsageError that starts with ``library`` (no option
    named) and reads as ``cli`` on the command line."""
    for call, library, cli in cases:
        with pytest.raises(UsageError) as exc:
            call()
        msg = str(exc.value)
        assert msg.startswith(library), msg
        _no_option(msg)
        assert as_options(msg).startswith(cli), as_options(msg)


def _vfa(d):
    """A small VFA series (SPGR signal, Fram et al. 1987), one 3D file per flip angle with its sidecar."""
    a = np.deg2rad(np.asarray(FA))
    e1 = np.exp(-TR / 1.0)
    s = 1000.0 * np.sin(a) * (1 - e1) / (1 - e1 * np.cos(a))
    return [str(write_nifti(d / f"vfa_flip-{i + 1}.nii.gz", np.full(SHAPE, v), AFFINE,
                            {"FlipAngle": FA[i], "RepetitionTime": TR})) for i, v in enumerate(s)]


def _one_error(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("qmap: error: "), err
    return err[0]


# --------------------------------------------------------------------- B1 maps
def test_b1_map_messages_name_arguments_in_the_library_and_options_on_the_command_line(tmp_path, capsys):
    pct = write_nifti(tmp_path / "b1pct.nii.gz", np.full(SHAPE, 98.0), AFFINE)
    with pytest.raises(InputError) as exc:
        load_b1_map(pct, shape=SHAPE, affine=AFFINE)
    msg = str(exc.value)
    assert msg.startswith(f"b1={pct}: median value 98 is far from 1") and "b1_scale='percent'" in msg
    _no_option(msg)
    with pytest.raises(InputError, match=r"^b1=\S*missing\.nii\.gz: no such file") as exc:
        load_b1_map(tmp_path / "missing.nii.gz", shape=SHAPE, affine=AFFINE)
    _no_option(str(exc.value))
    frac = write_nifti(tmp_path / "b1.nii.gz", np.full(SHAPE, 0.98), AFFINE)
    with pytest.raises(UsageError, match=r"^b1_smooth=-2\.0: give a non-negative FWHM in mm$"):
        load_b1_map(frac, shape=SHAPE, affine=AFFINE, b1_smooth=-2.0)
    with pytest.raises(UsageError, match=r"^b1_scale='permille': expected fraction or percent$"):
        load_b1_map(frac, shape=SHAPE, affine=AFFINE, b1_scale="permille")
    # the same cases on the command line: the options
    files = _vfa(tmp_path)
    assert main(["t1-vfa", *files, "--b1", str(pct), "-o", str(tmp_path / "o"), "-q", "--sigma", "5"]) == 2
    line = _one_error(capsys)
    assert line.startswith(f"qmap: error: --b1 {pct}: median value 98 is far from 1")
    assert "pass --b1-scale percent (" in line and "=" not in line
    assert main(["t1-vfa", *files, "--b1", str(frac), "--b1-smooth", "-2", "-o", str(tmp_path / "o"), "-q",
                 "--sigma", "5"]) == 2
    assert _one_error(capsys) == "qmap: error: --b1-smooth -2.0: give a non-negative FWHM in mm"


def test_b1_stderr_messages_and_the_units_warning(tmp_path, capsys):
    nan = write_nifti(tmp_path / "se.nii.gz", np.full(SHAPE, np.nan), AFFINE)
    with pytest.raises(InputError) as exc:
        load_b1_stderr(nan, shape=SHAPE, affine=AFFINE)
    msg = str(exc.value)
    assert msg.startswith(f"b1_se={nan}: holds no finite non-negative value") and msg.endswith("or b1_se='none'")
    _no_option(msg)
    # a B1 sidecar saying percent while the caller says fraction: a warning in the caller's words
    b1 = write_nifti(tmp_path / "b1.nii.gz", np.full(SHAPE, 0.98), AFFINE, {"Units": "percent"})
    with pytest.warns(QmapWarning, match=r"^b1_scale='fraction' differs from the B1 sidecar Units 'percent'; "
                                         r"using b1_scale='fraction'$"):
        load_b1_map(b1, shape=SHAPE, affine=AFFINE, b1_scale="fraction")
    files = _vfa(tmp_path)
    plain = write_nifti(tmp_path / "plain_b1.nii.gz", np.full(SHAPE, 0.98), AFFINE)
    assert main(["t1-vfa", *files, "--b1", str(plain), "--b1-stderr", str(nan), "-o", str(tmp_path / "o"), "-q",
                 "--sigma", "5"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err[-1] == (f"qmap: error: --b1-stderr {nan}: holds no finite non-negative value; give the B1 map's "
                       f"standard error (e.g. the desc-stderr TB1map of qmap b1) or --b1-stderr none")
    assert main(["t1-vfa", *files, "--b1", str(b1), "--b1-scale", "fraction", "-o", str(tmp_path / "w"), "-q",
                 "--sigma", "5"]) == 0
    warned = [w for w in capsys.readouterr().err.splitlines() if "sidecar Units" in w]
    assert warned == [("qmap: warning: --b1-scale fraction differs from the B1 sidecar Units 'percent'; "
                       "using --b1-scale fraction")]


# --------------------------------------------------------------------- simulate
LIBRARY_CASES = [
    # (keyword arguments of simulate, the message's start in the library, the same on the command line)
    ({"protocols": ["ir", "dwi"]}, "protocols=('ir', 'dwi'): expected some of", ["--protocol", "ir,dwi"],
     "--protocol ir,dwi: expected some of"),
    ({"shape": (20, 48, 2)}, "shape=(20, 48, 2): expected shape=(X, Y, Z) with X and Y at least 24",
     ["--shape", "20,48,2"], "--shape 20,48,2: expected --shape X,Y,Z with X and Y at least 24 (e.g. --shape 48,48,4)"),
    ({"b1_range": (1.2, 0.8)}, "b1_range=(1.2, 0.8): expected 0 < MIN <= MAX", ["--b1-range", "1.2,0.8"],
     "--b1-range 1.2,0.8: expected 0 < MIN <= MAX (fractions, e.g. --b1-range 0.85,1.15)"),
    ({"snr": -1.0}, "snr=-1.0: must be a positive number", ["--snr", "-1"], "--snr -1.0: must be a positive number"),
    ({"b1_snr": 0.0}, "b1_snr=0.0: must be a positive number", ["--b1-snr", "0"],
     "--b1-snr 0.0: must be a positive number"),
    ({"coils": 0}, "coils=0: must be a positive integer", ["--coils", "0"], "--coils 0: must be a positive integer"),
    ({"subject": "a-b"}, "subject='a-b': a BIDS label", ["--subject", "a-b"], "--subject a-b: a BIDS label"),
    ({"settings": "ir_tr"}, "ir_tr=3: the time between inversions (s) must exceed the longest inversion time, 6 s",
     ["--ir-tr", "3s"], "--ir-tr 3: the time between inversions (s) must exceed the longest inversion time, 6 s"),
    ({"settings": "echoes"}, "mese_echoes=1: a spin-echo train needs at least 2 echoes", ["--echoes", "1"],
     "--echoes 1: a spin-echo train needs at least 2 echoes"),
]


@pytest.mark.parametrize("kwargs, library, argv, cli", LIBRARY_CASES, ids=lambda v: str(v)[:20])
def test_simulate_messages_name_arguments_and_the_command_line_its_options(tmp_path, capsys, kwargs, library, argv,
                                                                          cli):
    with pytest.raises(UsageError) as exc:
        if kwargs.get("settings") == "ir_tr":
            Protocols(ir_tr=3.0)
        elif kwargs.get("settings") == "echoes":
            Protocols(mese_echoes=1)
        else:
            simulate(tmp_path / "lib", **kwargs)
    assert str(exc.value).startswith(library), str(exc.value)
    _no_option(str(exc.value))
    assert not (tmp_path / "lib").exists()
    assert main(["simulate", "-o", str(tmp_path / "cli"), *argv]) == 2
    assert _one_error(capsys).startswith(f"qmap: error: {cli}")


def test_simulate_output_folder_messages(tmp_path, capsys):
    out = tmp_path / "full"
    out.mkdir()
    (out / "x.txt").write_text("kept")
    with pytest.raises(OutputExistsError) as exc:
        simulate(out, protocols=["ir"], shape=(24, 24, 1))
    assert str(exc.value) == (f"out_dir={out}: the folder is not empty; pass overwrite=True to replace it, "
                              f"or choose another folder")
    assert main(["simulate", "-o", str(out), "--protocol", "ir", "--shape", "24,24,1"]) == 2
    assert _one_error(capsys) == (f"qmap: error: -o {out}: the folder is not empty; pass --overwrite to replace it, "
                                  f"or choose another folder")


def test_every_translated_argument_is_an_option_of_some_command():
    # the table behind as_options names real options (a renamed option would otherwise leave a stale entry)
    from qmap.cli import get_parser

    parser = get_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    options = {s for p in sub.choices.values() for a in p._actions for s in a.option_strings}
    assert set(ARGUMENT_OPTIONS.values()) <= options, set(ARGUMENT_OPTIONS.values()) - options
    assert as_options("coils=(1, 2) and overwrite=True") == "--coils 1,2 and --overwrite"


def test_scheduler_message_names_the_argument_and_the_command_line_its_option():
    # qmap.engine.dask_client serves the array API's scheduler= and the commands' --scheduler; a closed port
    # on the loopback address is refused (nothing is sent anywhere else)
    from qmap.engine import dask_client

    with pytest.raises(UsageError) as exc:
        dask_client("tcp://127.0.0.1:1", timeout=1)
    msg = str(exc.value)
    assert msg.startswith("scheduler='tcp://127.0.0.1:1': cannot reach the Dask scheduler") and "check the address" in msg
    _no_option(msg)
    assert as_options(msg).startswith("--scheduler tcp://127.0.0.1:1: cannot reach the Dask scheduler")


# --------------------------------------------------------------------- phantom QA and ROI statistics
def _qa_case(name, d, p):
    """(library call, its message's start, command line, the command line's message start) of one bad input."""
    from qmap.qa.history import read_history
    from qmap.qa.inputs import label_names, load_labels, load_map
    from qmap.qa.layout import read_layout
    from qmap.workflows.phantom import run_phantom

    base = ["phantom", "--reference", str(p["ref"]), "--temperature", "21.5", "-o", str(d / "cli")]
    lab = ["--labels", str(p["labels"])]
    if name == "stderr map":
        se = write_nifti(d / "sess_desc-stderr_T1map.nii.gz", np.ones((4, 4, 2)), AFFINE)
        return (lambda: load_map(se), f"map={se}: is a standard-error map", [*base, *lab, "--map", str(se)],
                f"--map {se}: is a standard-error map")
    if name == "param":
        return (lambda: load_map(p["t1"], "T9"), "param='T9': unknown parameter",
                [*base, *lab, "--map", str(p["t1"]), "--param", "T9"], "--param T9: unknown parameter")
    if name == "labels":
        neg = write_nifti(d / "neg.nii.gz", -np.ones((4, 4, 2), np.int16), AFFINE)
        return (lambda: load_labels(neg), f"labels={neg}: holds negative values",
                [*base, "--labels", str(neg), "--map", str(p["t1"])], f"--labels {neg}: holds negative values")
    if name == "layout":
        empty = d / "layout.csv"
        empty.write_text("")
        return (lambda: read_layout(empty), f"layout={empty}: the file is empty",
                [*base, "--layout", str(empty), "--map", str(p["t1"])], f"--layout {empty}: the file is empty")
    if name == "history":
        hist = d / "history.csv"
        hist.write_text("a,b\n1,2\n")
        return (lambda: read_history(hist), f"history={hist}: not a qmap phantom history",
                [*base, *lab, "--map", str(p["t1"]), "--history", str(hist)],
                f"--history {hist}: not a qmap phantom history")
    if name == "names":
        missing = d / "names.tsv"
        return (lambda: label_names(p["labels"], missing), f"names={missing}: no such file",
                ["roi", "--labels", str(p["labels"]), "--map", str(p["t1"]), "--names", str(missing), "-o",
                 str(d / "roi")], f"--names {missing}: no such file")
    # two maps of one parameter: each needs its tag (or its parameter)
    copy = d / "vfa_T1map.nii.gz"
    copy.write_bytes(Path(p["t1"]).read_bytes())
    return (lambda: run_phantom([p["t1"], copy], reference=p["ref"], labels=p["labels"], temperature=21.5,
                                out_dir=d / "lib"),
            (f"map={copy} and map={p['t1']} both hold T1; give each map its tag=TAG to tell them apart "
            f"(e.g. tag='ir' and tag='vfa'), or its param=NAME to say what it holds"),
            [*base, *lab, "--map", str(p["t1"]), "--map", str(copy)],
            (f"--map {copy} and --map {p['t1']} both hold T1; give each map its --tag TAG to tell them apart "
            f"(e.g. --tag ir and --tag vfa), or its --param NAME to say what it holds"))


@pytest.mark.parametrize("name", ["stderr map", "param", "labels", "layout", "history", "names", "two T1 maps"])
def test_phantom_qa_messages_name_arguments_and_the_command_line_its_options(tmp_path, capsys, name):
    from tests.qa.phantom_factory import make_phantom

    p = make_phantom(tmp_path / "in")
    call, library, argv, cli = _qa_case(name, tmp_path, p)
    with pytest.raises(InputError) as exc:
        call()
    msg = str(exc.value)
    assert msg.startswith(library), msg
    _no_option(msg)
    assert main(argv) == 2
    assert _one_error(capsys).startswith(f"qmap: error: {cli}")


def test_phantom_argument_checks_name_arguments():
    # the checks of run_phantom's own arguments, in the library's words and, through as_options, the command's
    from qmap.workflows.phantom import run_phantom

    cases = [({"tolerance": -5.0}, "tolerance=-5.0: give a positive percentage", "--tolerance -5.0: give"),
             ({"erode": -1}, "erode=-1: give 0 or a positive number of voxels", "--erode -1: give 0"),
             ({"min_voxels": 0}, "min_voxels=0: give a positive number of voxels", "--min-voxels 0: give"),
             ({"layout": "l.csv"}, ("give either labels=FILE (a label image) or layout=FILE (vial positions), not "
                                   "both or neither"), "give either --labels FILE (a label image) or --layout FILE")]
    for kwargs, library, cli in cases:
        args = {"labels": "lab.nii.gz", **kwargs}
        with pytest.raises(UsageError) as exc:
            run_phantom(["m_T1map.nii.gz"], reference="ref.csv", out_dir="out", **args)
        assert str(exc.value).startswith(library), str(exc.value)
        _no_option(str(exc.value))
        assert as_options(str(exc.value)).startswith(cli), as_options(str(exc.value))
    # a bare argument name reads as the option alone
    assert (as_options("check that labels= and map= belong to the same scan; choose another out_dir=")
            == "check that --labels and --map belong to the same scan; choose another -o")


# --------------------------------------------------------------------- the T2 model choice
def test_epg_messages_name_the_argument_and_the_command_line_its_option(tmp_path, capsys):
    from qmap.workflows.t2 import fit_t2

    te = np.array([0.01, 0.02, 0.03])
    data = np.tile(1000.0 * np.exp(-te / 0.08), (2, 1))  # mono-exponential decay (the signal's definition)
    with pytest.raises(InputError) as exc:
        fit_t2(data, te, epg=True)
    assert str(exc.value) == "epg=True fits M0, T2 and the refocusing angle and needs at least 4 echoes, got 3"
    with pytest.raises(UsageError) as exc2:
        fit_t2(np.tile(1000.0 * np.exp(-np.arange(1, 7) * 0.01 / 0.08), (2, 1)), np.arange(1, 7) * 0.01, epg=True,
               drop_first=True)
    assert str(exc2.value).startswith("drop_first=True is for the mono-exponential fit: the EPG model (epg=True)")
    for m in (str(exc.value), str(exc2.value)):
        _no_option(m)
    series = write_nifti(tmp_path / "mese.nii.gz", np.broadcast_to(1000.0 * np.exp(-te / 0.08), (*SHAPE, 3)).copy(),
                         AFFINE, {"EchoTime": te.tolist()})
    assert main(["t2", str(series), "--epg", "-o", str(tmp_path / "o"), "--sigma", "5", "-q"]) == 2
    assert _one_error(capsys) == ("qmap: error: --epg fits M0, T2 and the refocusing angle and needs at least 4 "
                                  "echoes, got 3")
    assert as_options(str(exc2.value)).startswith("--drop-first is for the mono-exponential fit: the EPG model (--epg)")


# --------------------------------------------------------------------- shared options of the fitting commands
def test_shared_fit_options_and_the_noise_level_name_arguments(tmp_path, capsys):
    from qmap.io.series import load_series
    from qmap.pipeline import CommonOptions, resolve_mask, resolve_sigma

    files = _vfa(tmp_path)
    series = load_series(files, key="FlipAngle", option="--fa")
    empty = write_nifti(tmp_path / "empty_mask.nii.gz", np.zeros(SHAPE), AFFINE)
    cases = [
        (lambda: resolve_sigma("-3", series), "sigma=-3: must be a positive number", ["--sigma", "-3"],
         "--sigma -3: must be a positive number"),
        (lambda: resolve_mask(str(empty), series), f"mask={empty}: no voxel is > 0", ["--sigma", "5", "--mask",
                                                                                        str(empty)],
         f"--mask {empty}: no voxel is > 0"),
    ]
    for call, library, argv, cli in cases:
        with pytest.raises(InputError) as exc:
            call()
        assert str(exc.value).startswith(library), str(exc.value)
        _no_option(str(exc.value))
        assert main(["t1-vfa", *files, "-o", str(tmp_path / "o"), "-q", *argv]) == 2
        assert _one_error(capsys).startswith(f"qmap: error: {cli}")
    for kwargs, library, cli in [({"units": "min"}, "units='min': expected s or ms", "--units min: expected"),
                                 ({"prefix": "a/b"}, "prefix='a/b': give a plain file-name stem", "--prefix a/b:"),
                                 ({"stderr": "x"}, "stderr='x': expected noise or residual", "--stderr x:")]:
        with pytest.raises(UsageError) as uexc:
            CommonOptions(out_dir=tmp_path / "o", **kwargs)
        assert str(uexc.value).startswith(library) and as_options(str(uexc.value)).startswith(cli)
    # the noise level's diagnosis, as the array functions and as the command line say it
    fix = ("give a mask file (mask=FILE), give the noise level with sigma=VALUE (signal units), or fit without the "
           "noise floor (noise_floor='none')")
    assert as_options(fix) == ("give a mask file (--mask FILE), give the noise level with --sigma VALUE (signal "
                               "units), or fit without the noise floor (--noise-floor none)")
    assert (as_options("the background's moments fit about 3.9 coils, not the coils=1 given; check coils=")
            == "the background's moments fit about 3.9 coils, not the --coils 1 given; check --coils")


# --------------------------------------------------------------------- inspect, t1-vfa and b1 arguments
def test_inspect_vfa_and_b1_messages_name_arguments(tmp_path, capsys):
    from qmap.pipeline import CommonOptions
    from qmap.workflows.b1 import run_b1
    from qmap.workflows.inspect import parse_voxel, parse_world
    from qmap.workflows.vfa import run_t1_vfa

    common = CommonOptions(out_dir=tmp_path / "o")
    files = _vfa(tmp_path)
    cases = [
        (lambda: parse_voxel("1,2"), "voxel='1,2': expected three 0-based indices", "--voxel 1,2: expected"),
        (lambda: parse_world("a,b,c"), "world='a,b,c': expected three coordinates", "--world a,b,c: expected"),
        (lambda: run_t1_vfa(files, common=common, method="quick"), "method='quick': expected nonlinear or linear",
         "--method quick: expected"),
        (lambda: run_t1_vfa(files, common=common, fa=[10, 10, 10, 10]),
         "fa=(10, 10, 10, 10): VFA T1 needs at least two different flip angles", "--fa 10,10,10,10: VFA T1 needs"),
        (lambda: run_t1_vfa(files, common=common, b1_scale="percent"), "b1_scale= / b1_smooth= need b1=B1MAP",
         "--b1-scale / --b1-smooth need --b1 B1MAP"),
        (lambda: run_b1(files[:2], common=common, method="dam", fa=[10, 20, 30]),
         "fa=(10, 20, 30): the double-angle method takes one angle a or two", "--fa 10,20,30: the double-angle"),
        (lambda: run_b1(files[:2], common=CommonOptions(out_dir=tmp_path / "o", units="ms"), method="dam"),
         "units='ms' does not apply to B1 maps", "--units ms does not apply to B1 maps"),
    ]
    _usage_cases(cases)
    assert main(["t1-vfa", *files, "--method", "linear", "--engine", "lmfit", "-o", str(tmp_path / "o"), "-q"]) == 2
    assert _one_error(capsys) == ("qmap: error: --engine lmfit applies to --method nonlinear; the linear method is a "
                                  "closed-form regression")


# --------------------------------------------------------------------- t2-spectrum, t1-mp2rage and t1-ir arguments
def test_spectrum_mp2rage_and_ir_messages_name_arguments(tmp_path):
    from qmap.workflows.ir import run_t1_ir
    from qmap.workflows.mp2rage import resolve_protocol, run_t1_mp2rage
    from qmap.workflows.t2_spectrum import fit_t2_spectrum

    te = 0.01 * np.arange(1, 33)
    data = np.tile(1000.0 * np.exp(-te / 0.08), (2, 1))  # mono-exponential decay
    common = _common(tmp_path)
    uni = write_nifti(tmp_path / "uni.nii.gz", np.zeros(SHAPE), AFFINE)
    cases = [
        (lambda: fit_t2_spectrum(data, te, sigma=4.0, window=(0.04, 0.01)),
         "window=(0.04, 0.01) s: give (LO, HI) with 0 < LO < HI", "--window 0.04,0.01 s: give"),
        (lambda: fit_t2_spectrum(data, te, sigma=4.0, chi2_factor=0.5), "chi2_factor=0.5: must be >= 1",
         "--chi2-factor 0.5: must be"),
        (lambda: fit_t2_spectrum(data, te, sigma=4.0, n_t2=5), "n_t2=5: use at least 10 T2 values", "--n-t2 5: use"),
        (lambda: resolve_protocol({}, "uni.nii.gz", fa=(4.0, 5.0, 6.0)),
         "fa=(4, 5, 6): MP2RAGE has two flip angles (one per block), got 3", "--fa 4,5,6: MP2RAGE has two"),
        (lambda: run_t1_mp2rage(uni, common=common, inv1=uni), "inv1= and inv2= go together",
         "--inv1 and --inv2 go together"),
        (lambda: run_t1_mp2rage(uni, common=common, efficiency=1.5), "efficiency=1.5: expected a number in (0, 1]",
         "--inversion-efficiency 1.5: expected"),
        (lambda: run_t1_ir([uni], common=common, signal="phase"), "signal='phase': expected one of",
         "--signal phase: expected one of"),
        (lambda: run_t1_ir([uni], common=common, phase=[uni]),
         "phase= is for complex data: add signal='complex' (or leave phase= out)",
         "--phase is for complex data: add --signal complex (or leave --phase out)"),
    ]
    _usage_cases(cases)


def _common(tmp_path):
    from qmap.pipeline import CommonOptions

    return CommonOptions(out_dir=tmp_path / "o")


def test_series_check_and_mp2rage_timing_name_arguments(tmp_path, capsys):
    from qmap.checks import check_reordered
    from qmap.models.mp2rage import MP2RAGEProtocol

    with pytest.raises(InputError) as exc:
        check_reordered([0.02, 0.01, 0.03], [0.01, 0.02, 0.03], option="te", key="EchoTime", where="3 files")
    assert exc.value.args[0].endswith("or pass series_check=False to use te as given")
    assert as_options(str(exc.value)).endswith("or pass --no-series-check to use te as given")
    # an impossible timing (the second inversion before the first block ends)
    with pytest.raises(InputError) as exc2:
        MP2RAGEProtocol(ti=(0.7, 0.75), fa=(4.0, 5.0), tr_prep=5.0, tr_exc=0.007, shots=176).check()
    msg = str(exc2.value)
    assert msg.endswith("check ti= / shots= / tr_exc= / tr_prep= or the sidecar"), msg
    _no_option(msg)
    assert as_options(msg).endswith("check --ti / --shots / --tr-exc / --tr-prep or the sidecar")


def test_ir_phase_and_timing_messages_read_as_options():
    # qmap.workflows.ir's phase and timing messages in the command line's words
    assert (as_options("phase=: 3 phase volumes for 6 magnitude volumes; give one phase image per inversion time")
            == "--phase: 3 phase volumes for 6 magnitude volumes; give one phase image per inversion time")
    assert (as_options("InversionTime up to 4 s is not shorter than RepetitionTime 3 s; check ti= / tr= and their "
                       "units (seconds, e.g. tr=6.0)")
            == "InversionTime up to 4 s is not shorter than RepetitionTime 3 s; check --ti / --tr and their units "
               "(seconds, e.g. --tr 6.0)")


def test_batch_config_message_names_the_argument(tmp_path, capsys):
    from qmap.batch.run import fit_options

    bad = tmp_path / "bad.toml"
    bad.write_text("[DWI]\nsigma = 3\n")
    with pytest.raises(UsageError) as exc:
        fit_options(None, bad)
    assert str(exc.value).startswith(f"config={bad}: unknown table [DWI]; expected all, ")
    _no_option(str(exc.value).split("; expected")[0])
    (tmp_path / "bids").mkdir()
    assert main(["batch", str(tmp_path / "bids"), "-o", str(tmp_path / "d"), "--config", str(bad)]) == 2
    assert _one_error(capsys).startswith(f"qmap: error: --config {bad}: unknown table [DWI]; expected all, ")


# --------------------------------------------------------------------- acquisition values, outputs, EPG spacing
def test_series_values_outputs_and_echo_spacing_name_arguments(tmp_path, capsys):
    from qmap.pipeline import CommonOptions
    from qmap.workflows.t2 import fit_t2
    from qmap.workflows.vfa import run_t1_vfa

    files = _vfa(tmp_path)
    # a wrong number of flip angles: the library says fa=, the command line --fa
    with pytest.raises(InputError) as exc:
        run_t1_vfa(files, fa=(3.0, 8.0, 15.0), common=CommonOptions(out_dir=tmp_path / "v"))
    assert str(exc.value).startswith("fa=: 3 values given for a series of 4 volumes"), str(exc.value)
    _no_option(str(exc.value))
    assert main(["t1-vfa", *files, "--fa", "3,8,15", "-o", str(tmp_path / "v"), "-q"]) == 2
    assert _one_error(capsys).startswith("qmap: error: --fa: 3 values given for a series of 4 volumes")
    # outputs that exist: overwrite=True / out_dir= in the library, --overwrite / -o on the command line
    assert main(["t1-vfa", *files, "--sigma", "5", "-o", str(tmp_path / "v"), "-q"]) == 0
    with pytest.raises(OutputExistsError) as oexc:
        run_t1_vfa(files, sigma=5.0, common=CommonOptions(out_dir=tmp_path / "v"))
    assert str(oexc.value).endswith("pass overwrite=True to replace them, or choose another out_dir= / prefix=")
    assert main(["t1-vfa", *files, "--sigma", "5", "-o", str(tmp_path / "v"), "-q"]) == 2
    assert _one_error(capsys).endswith("pass --overwrite to replace them, or choose another -o / --prefix")
    # the writer's own check (an output that appeared after the up-front check)
    from qmap.io.writer import AtomicWriter

    with pytest.raises(OutputExistsError) as wexc:
        AtomicWriter(tmp_path / "v").stage_json("vfa_M0map.json", {})
    assert str(wexc.value).endswith("exists already; pass overwrite=True to replace it, or choose another out_dir=")
    _no_option(str(wexc.value).split(" exists already")[1])
    assert as_options(str(wexc.value)).endswith("exists already; pass --overwrite to replace it, or choose another -o")
    # unevenly spaced echoes for the EPG model (a CPMG train has TE_k = k x ESP: common practice)
    te = np.array([0.01, 0.02, 0.035, 0.04])
    with pytest.raises(InputError) as eexc:
        fit_t2(np.tile(1000.0 * np.exp(-te / 0.08), (2, 1)), te, epg=True)
    assert str(eexc.value).startswith("te=: epg=True needs equally spaced echoes")
    assert str(eexc.value).endswith("or fit without epg=True")
    assert as_options(str(eexc.value)).startswith("--te: --epg needs equally spaced echoes")
    # the run summary's notes are printed in option words (library: max_memory=, sigma=VALUE)
    assert as_options("read in 3 slabs to stay within max_memory=") == "read in 3 slabs to stay within --max-memory"
    assert as_options("(give sigma=VALUE)") == "(give --sigma VALUE)"
    # and a note from a real run is printed that way (a VFA run without a B1 map notes b1=B1MAP)
    assert main(["t1-vfa", *files, "--sigma", "5", "-o", str(tmp_path / "w")]) == 0
    out = capsys.readouterr().out
    assert "--b1 B1MAP" in out and "b1=" not in out, out


def test_mp2rage_inversion_images_name_their_arguments(tmp_path, capsys):
    from qmap.pipeline import CommonOptions
    from qmap.workflows.mp2rage import run_t1_mp2rage

    data = Path(__file__).resolve().parents[1] / "sample_data" / "sub-phantom" / "anat"
    uni, inv2 = data / "sub-phantom_UNIT1.nii.gz", data / "sub-phantom_inv-2_MP2RAGE.nii.gz"
    four_d = write_nifti(tmp_path / "inv1.nii.gz", np.ones((48, 48, 4, 3)))  # not one 3D volume
    with pytest.raises(InputError) as exc:
        run_t1_mp2rage(uni, inv1=four_d, inv2=inv2, common=CommonOptions(out_dir=tmp_path / "o"))
    assert str(exc.value) == f"inv1={four_d}: has shape (48, 48, 4, 3); expected one 3D volume"
    _no_option(str(exc.value).replace(str(four_d), ""))
    assert main(["t1-mp2rage", str(uni), "--inv1", str(four_d), "--inv2", str(inv2), "-o", str(tmp_path / "o"),
                 "-q"]) == 2
    assert _one_error(capsys) == f"qmap: error: --inv1 {four_d}: has shape (48, 48, 4, 3); expected one 3D volume"
