"""Things written once and shared: numpydoc parameter entries (qmap.docstrings) and the option sets of
the decay, spectrum and MP2RAGE commands (one TypedDict each, documented in it, defaults in one place)."""

from __future__ import annotations

import inspect

import numpy as np
import pytest

import qmap
from qmap.docstrings import PARAMETERS, shared_parameters
from qmap.maps import Execution
from qmap.noise_level import background_estimate, estimate_noise
from qmap.workflows.decay import DecayOptions, DecaySettings, T2Options, run_t2star
from qmap.workflows.ir import fit_t1_ir, run_t1_ir
from qmap.workflows.mp2rage import ProtocolOverrides, resolve_protocol, run_t1_mp2rage
from qmap.workflows.t2 import run_t2
from qmap.workflows.t2_spectrum import SpectrumOptions, SpectrumSettings, fit_t2_spectrum, run_t2_spectrum


def _entries(func) -> list[str]:
    """The names of the entries of ``func``'s Parameters section, in order."""
    lines = inspect.getdoc(func).splitlines()
    start = lines.index("Parameters") + 2
    names = []
    for line in lines[start:]:
        if line and set(line) == {"-"}:
            names.pop()  # the header of the next section
            break
        if line and not line[0].isspace():
            names.append(line.split(" : ")[0])
    return names


def test_shared_entries_are_placed_in_signature_order():
    @shared_parameters("execution", "mask")
    def f(data, te, *, mask=None, noise=0.0, **execution):
        """Summary.

        Parameters
        ----------
        data : ndarray
            The data.
        te : ndarray
            Echo times.
        noise : float
            Noise.

        Returns
        -------
        None
        """

    assert _entries(f) == ["data", "te", "mask", "noise", "**execution"]
    doc = inspect.getdoc(f)
    assert PARAMETERS["mask"].splitlines()[1].strip() in doc
    assert doc.rstrip().endswith("Returns\n-------\nNone")


def test_unknown_entry_or_missing_section_is_an_error_at_definition():
    with pytest.raises(KeyError, match="no_such_entry"):
        shared_parameters("no_such_entry")
    with pytest.raises(ValueError, match="Parameters"):
        @shared_parameters("mask")
        def g(mask=None):
            """No sections."""


@pytest.mark.parametrize("func, names", [
    (run_t1_ir, ["inputs", "common", "ti"]),
    (fit_t1_ir, ["mask", "**execution"]),
    (background_estimate, ["source", "coils", "obj", "max_bytes"]),
    (estimate_noise, ["source", "model"]),
    (qmap.fit_decay, ["data", "te", "param", "mask", "**options"]),
])
def test_public_docstrings_hold_the_shared_entries(func, names):
    # help() and the doctests see the full text, in the signature's order
    entries = _entries(func)
    assert [n for n in entries if n in names] == names
    assert "%(" not in inspect.getdoc(func)


def test_decay_defaults_live_in_one_place():
    s = DecaySettings()
    assert (s.noise_floor, s.sigma, s.coils, s.drop_first, s.epg) == ("rician", "auto", None, False, False)
    assert set(T2Options.__optional_keys__) - set(DecayOptions.__optional_keys__) == {"epg", "refocus_deg", "t1"}
    # every option has a setting with a default, and nothing else
    fields = set(inspect.signature(DecaySettings).parameters)
    assert fields == set(T2Options.__optional_keys__)
    spectrum = set(inspect.signature(SpectrumSettings).parameters)
    assert spectrum == set(SpectrumOptions.__optional_keys__)


def test_misspelt_or_foreign_options_are_type_errors(tmp_path):
    te = np.arange(1, 9) * 0.005
    data = 1000 * np.exp(-te / 0.03) * np.ones((2, 2, 1, 1))
    with pytest.raises(TypeError, match="noise_flor"):
        qmap.fit_t2star(data, te, noise_flor="none")
    with pytest.raises(TypeError, match="n_job"):
        qmap.fit_t2(data, te, noise_floor="none", n_job=1)
    # t2star has no EPG model: epg= is refused before any file is read
    with pytest.raises(TypeError, match="'epg'"):
        run_t2star([tmp_path / "missing.nii.gz"], common=None, epg=True)
    with pytest.raises(TypeError, match="'refocus'"):
        run_t2([tmp_path / "missing.nii.gz"], common=None, refocus=150.0)
    with pytest.raises(TypeError, match="'tr'"):
        resolve_protocol({}, "test", tr=3.0)
    assert "efficiency" in ProtocolOverrides.__optional_keys__


def test_array_fits_take_the_options_by_keyword_as_before():
    te = np.arange(1, 17) * 0.01
    data = 1000 * np.exp(-te / 0.08) * np.ones((2, 1, 1, 1))
    a = qmap.fit_t2(data, te, noise_floor="none", drop_first=True, n_jobs=1)
    b = qmap.fit_decay(data, te, param="T2", noise_floor="none", drop_first=True, n_jobs=1)
    np.testing.assert_array_equal(a["T2"], b["T2"])
    np.testing.assert_allclose(a["T2"], 0.08, rtol=1e-9)


@pytest.mark.parametrize("func, sets", [
    (qmap.fit_decay, (DecayOptions, Execution)),
    (qmap.fit_t2star, (DecayOptions, Execution)),
    (qmap.fit_t2, (T2Options, Execution)),
    (qmap.fit_t1_ir, (Execution,)),
    (qmap.fit_t1_vfa, (Execution,)),
    (run_t2star, (DecayOptions,)),
    (run_t2, (T2Options,)),
    (fit_t2_spectrum, (SpectrumOptions,)),
    (run_t2_spectrum, (SpectrumOptions,)),
    (run_t1_mp2rage, (ProtocolOverrides,)),
])
def test_keyword_options_are_documented_in_other_parameters(func, sets):
    # every key of the option sets a function takes as **kwargs is in its help() text, written once (in the
    # TypedDict's Keys section)
    doc = inspect.getdoc(func)
    other = doc[doc.index("Other Parameters\n----------------"):]
    documented = {n.strip() for line in other.splitlines()[2:] if line and not line[0].isspace()
                  for n in line.split(" : ")[0].split(",")}
    for cls in sets:
        assert set(cls.__optional_keys__) <= documented, (func.__name__, cls.__name__)
