"""Signal models, one module each, and the registry that describes them to the CLI, the workflows and ``inspect``.

Every model has one :class:`ModelEntry` in :data:`MODELS`: its provenance name, its class, how it is
estimated (its kind), what it is in one line, and the units of the maps it writes. Every fitting
command has one :class:`ModelChoice` in :data:`COMMAND_MODELS`: the option that chooses among its
models (``t2 --epg``, ``t1-vfa --method``, ``b1 --method``; none where a command has one model), and
for each value a :class:`Choice` -- the model it selects, the estimator, the settings the command
fixes (``param="T2"``) and the model settings the user may give (``--refocus``, ``--t1``). The
command line builds that option from here (choices, default and help: :func:`qmap.cli.common.add_model_option`)
and refuses the settings of a model it did not choose; the workflows build the chosen model with
:func:`build_model`.

A fit records its model's ``name`` and settings in the provenance; :func:`model_class` maps the name
back to the class, whose ``from_provenance`` rebuilds the model (``qmap inspect`` redraws any fit that
way), and :func:`model_kind` says how it was estimated, which decides how ``inspect`` draws a voxel:

* ``"fitted"`` (:data:`REGISTRY`): separable least-squares models (the fitted curve through the samples);
* ``"closed_form"`` (:data:`CLOSED_FORMS`): estimates computed in closed form from two images (B1 by AFI
  or the double-angle method; the relation that was inverted);
* ``"lookup"`` (:data:`LOOKUPS`): a signal model inverted through a table (MP2RAGE: UNI against T1 at
  the voxel's B1);
* ``"spectrum"`` (:data:`SPECTRA`): a non-negative spectrum over a basis (multi-component T2: the echo
  train and the spectrum read from the maps).

This module imports nothing heavy (the command line reads it for ``--help``); classes are imported on
first use.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from typing import Any

__all__ = [
    "ALIASES",
    "CLOSED_FORMS",
    "COMMAND_MODELS",
    "KINDS",
    "LOOKUPS",
    "MODELS",
    "REGISTRY",
    "SPECTRA",
    "Choice",
    "ModelChoice",
    "ModelEntry",
    "build_model",
    "choose",
    "model_class",
    "model_entry",
    "model_kind",
]


@dataclass(frozen=True)
class ModelEntry:
    """One model as the registry knows it.

    Attributes
    ----------
    name : str
        The name recorded in the provenance (``model.name``).
    target : str
        ``"module:Class"`` of the class that describes it (imported on use).
    kind : {"fitted", "closed_form", "lookup", "spectrum"}
        How it is estimated.
    summary : str
        What it is, in one line (signal equation and source).
    units : tuple of (str, str)
        ``(map name, units)`` of every estimate map it can write (times in ``s``: ``--units ms`` rescales
        them; rates ``1/s``; amplitudes ``a.u.``; ratios ``fraction``).
    """

    name: str
    target: str
    kind: str
    summary: str
    units: tuple[tuple[str, str], ...]

    @property
    def cls(self) -> Any:
        """The class (imported on first use)."""
        module, cls = self.target.split(":")
        return getattr(importlib.import_module(module), cls)


@dataclass(frozen=True)
class Choice:
    """One value of a command's model option and what it selects.

    Attributes
    ----------
    value : str or bool
        The option's value (``True`` / ``False`` for a flag such as ``--epg``).
    model : str
        The :class:`ModelEntry` name it selects.
    help : str
        What the value does (the option's help is made of these).
    maps : tuple of str
        The estimate maps it writes (a noise-floor offset may add ``Offset``).
    method : str, optional
        The estimator asked of the engine (``"linear"``: the model's linearised regression); None: the
        command's ``--engine``.
    fixed : tuple of (str, object)
        Keyword arguments of the model's class that the command fixes (``("param", "T2")``).
    settings : tuple of str
        Keyword arguments of the model's class that the user may set, with ``options`` the command-line
        options that set them (same order): only this choice takes them.
    label : str
        How messages name this choice (``"the EPG model"``).
    """

    value: str | bool
    model: str
    help: str
    maps: tuple[str, ...]
    method: str | None = None
    fixed: tuple[tuple[str, Any], ...] = ()
    settings: tuple[str, ...] = ()
    options: tuple[str, ...] = ()
    label: str = ""


@dataclass(frozen=True)
class ModelChoice:
    """The models of one command and the option that chooses among them.

    Attributes
    ----------
    command : str
        The command (``"t2"``).
    option : str or None
        The choosing option (``"--epg"``, ``"--method"``); None when the command has one model.
    dest : str or None
        The argument name behind it (``args.epg``; the workflow's keyword argument of the same name).
    choices : tuple of Choice
        In the order ``--help`` lists them.
    default : str, bool or None
        The value used when the option is not given (None with ``required``).
    required : bool
        The option must be given (``b1 --method``).
    group : str or None
        Title of the ``--help`` group the option goes in (None: the command's own options).
    noise : {"sigma", "floor", "own"}
        How the command's models meet the noise: ``"sigma"``, the noise level serves the standard errors
        (``--sigma``, ``--stderr``); ``"floor"``, the fit also models the noise floor of magnitude data
        (``--noise-floor``, ``--coils``); ``"own"``, the command words its own ``--sigma``.
    """

    command: str
    option: str | None
    dest: str | None
    choices: tuple[Choice, ...]
    default: str | bool | None = None
    required: bool = False
    group: str | None = None
    noise: str = "sigma"

    @property
    def entries(self) -> tuple[ModelEntry, ...]:
        """The registry entries of the models it can fit, once each."""
        return tuple(MODELS[name] for name in dict.fromkeys(c.model for c in self.choices))

    @property
    def engine_choice(self) -> bool:
        """Its models are all fitted by least squares, so the engine can be chosen (``--engine fast|lmfit``)."""
        return all(e.kind == "fitted" for e in self.entries)

    @property
    def time_maps(self) -> bool:
        """It writes a map of a time (seconds), so ``--units ms`` applies."""
        return any(u == "s" for e in self.entries for _, u in e.units)

    @property
    def flag(self) -> bool:
        """The option is a flag (``--epg``): its values are False and True."""
        return all(isinstance(c.value, bool) for c in self.choices) and len(self.choices) == 2

    @property
    def values(self) -> tuple:
        return tuple(c.value for c in self.choices)

    def choose(self, value=None) -> Choice:
        """The choice for ``value`` (None: the default); ValueError naming the argument for an unknown one."""
        value = self.default if value is None else value
        for c in self.choices:
            if c.value == value and type(c.value) is type(value):
                return c
        if self.flag and isinstance(value, (bool, int)):
            return self.choose(bool(value))
        raise ValueError(f"{self.dest}={value!r}; expected one of {', '.join(map(repr, self.values))}")

    def help(self) -> str:
        """The option's ``--help`` text, from the choices.

        A flag shows what it switches on; a choice of values lists each as ``value (default): help``,
        or just the values when they need no words.

        Examples
        --------
        >>> print(COMMAND_MODELS["b1"].help())
        afi or dam
        >>> print(COMMAND_MODELS["t1-vfa"].help()[:64])
        nonlinear (default): least squares on the signals (M0 closed for
        """
        if self.flag:
            return self.choose(True).help
        if not all(c.help for c in self.choices):
            return " or ".join(str(v) for v in self.values)
        return "; ".join(f"{c.value}{' (default)' if c.value == self.default else ''}: {c.help}" for c in self.choices)

    def foreign_settings(self, value, given: dict) -> tuple[Choice | None, list[str]]:
        """The options of another choice than the one ``value`` selects, among those ``given``.

        Parameters
        ----------
        value : str, bool or None
            The model option's value (None: the default).
        given : dict
            Option (``"--refocus"``) -> its value, None when not given.

        Returns
        -------
        choice, options
            The choice those options belong to and the options given (None and [] when all is well).
        """
        chosen = self.choose(value)
        for c in self.choices:
            got = [opt for opt in c.options if given.get(opt) is not None]
            if c is not chosen and got:
                return c, got
        return None, []


def _times(*pairs: str) -> tuple[tuple[str, str], ...]:
    """``("T2", "R2")`` -> the units of a time and its rate, after ``("M0", "a.u.")``."""
    out = [("M0", "a.u.")]
    for t in pairs:
        out += [(t, "s"), ("R" + t[1:], "1/s")]
    return tuple(out)


#: every model, by its provenance name
MODELS: dict[str, ModelEntry] = {e.name: e for e in (
    ModelEntry("monoexp", "qmap.models.monoexp:MonoExponential", "fitted",
               "S = M0 exp(-TE/T) (T = T2 or T2*), by separable least squares",
               _times("T2", "T2star") + (("Offset", "a.u."),)),
    ModelEntry("epg_t2", "qmap.models.epg_t2:EpgT2", "fitted",
               "S_k = M0 EPG_k(T2, refocusing angle; ESP, T1), extended phase graphs of a CPMG train "
               "(Hennig 1988; Weigel 2015)",
               _times("T2") + (("RefocusScale", "fraction"), ("Offset", "a.u."))),
    ModelEntry("ir", "qmap.models.ir:InversionRecovery", "fitted",
               "S = M0 (1 - (1 + k) exp(-TI/T1)), fitted as a + b exp(-TI/T1)",
               _times("T1") + (("InversionEfficiency", "fraction"), ("ApparentT1", "s"))),
    ModelEntry("vfa", "qmap.models.vfa:SpoiledGRE", "fitted",
               "S = M0 sin(a) (1 - E1) / (1 - E1 cos a), E1 = exp(-TR/T1), a = B1 x nominal angle "
               "(spoiled gradient echo; Fram et al. 1987)",
               _times("T1")),
    ModelEntry("afi", "qmap.b1:B1ClosedForm", "closed_form",
               "a = arccos((r n - 1)/(n - r)), r = S2/S1, n = TR2/TR1 (Yarnykh 2007)", (("TB1", "fraction"),)),
    ModelEntry("dam", "qmap.b1:B1ClosedForm", "closed_form",
               "a = arccos(S(2a) / (2 S(a))) (Insko & Bolinger 1993)", (("TB1", "fraction"),)),
    ModelEntry("mp2rage", "qmap.models.mp2rage:MP2RAGEProtocol", "lookup",
               "UNI(T1, B1) of the MP2RAGE steady state (Marques et al. 2010), inverted through a table",
               _times("T1")),
    ModelEntry("t2spectrum", "qmap.models.t2_spectrum:SpectrumModel", "spectrum",
               "S_k = sum_j A_j EPG_k(T2_j, refocusing angle), non-negative and regularised (Whittall & MacKay "
               "1989; Prasloski et al. 2012)",
               (("MWF", "fraction"), ("RefocusAngle", "deg"), ("T2short", "s"), ("T2long", "s"),
                ("T2spectrum", "a.u."))),
)}

_MONO_T2 = "S = M0 exp(-TE/T2)"
#: each fitting command's models and the option that chooses among them
COMMAND_MODELS: dict[str, ModelChoice] = {m.command: m for m in (
    ModelChoice("t2star", None, None, (Choice("monoexp", "monoexp", "", ("T2star", "R2star", "M0"),
                                              fixed=(("param", "T2star"),)),), default="monoexp", noise="floor"),
    ModelChoice("t2", "--epg", "epg", (
        Choice(False, "monoexp", _MONO_T2, ("T2", "R2", "M0"), fixed=(("param", "T2"),), label="the mono-exponential"),
        Choice(True, "epg_t2",
               "fit the echo train by extended phase graphs: M0, T2 and a per-voxel refocusing scale (written as "
               "the RefocusScale map, actual / nominal angle). The echoes must be equally spaced at TE_k = k x ESP",
               ("T2", "R2", "M0", "RefocusScale"), settings=("refocus_deg", "t1"), options=("--refocus", "--t1"),
               label="the EPG model"),
    ), default=False, group="stimulated-echo correction (extended phase graphs)", noise="floor"),
    ModelChoice("t1-ir", None, None, (Choice("ir", "ir", "", ("T1", "R1", "M0", "InversionEfficiency"),
                                             settings=("signal", "look_locker")),), default="ir"),
    ModelChoice("t1-vfa", "--method", "method", (
        Choice("nonlinear", "vfa", "least squares on the signals (M0 closed form, T1 iterative)", ("T1", "R1", "M0"),
               settings=("tr",)),
        Choice("linear", "vfa", "the reweighted linearised regression (Deoni et al. 2003) S/sin a = E1 S/tan a + "
               "M0 (1-E1)", ("T1", "R1", "M0"), method="linear", settings=("tr",)),
    ), default="nonlinear"),
    ModelChoice("b1", "--method", "method", (
        Choice("afi", "afi", "", ("TB1",)),
        Choice("dam", "dam", "", ("TB1",)),
    ), required=True, noise="own"),
    ModelChoice("t1-mp2rage", None, None, (Choice("mp2rage", "mp2rage", "", ("T1", "R1", "M0")),), default="mp2rage",
                noise="own"),
    ModelChoice("t2-spectrum", None, None, (Choice("t2spectrum", "t2spectrum", "",
                                                   ("MWF", "RefocusAngle", "T2short", "T2long", "T2spectrum")),),
                default="t2spectrum", noise="own"),
)}


def choose(command: str, value=None) -> Choice:
    """The model choice of ``command`` for the value of its model option (None: the default).

    Examples
    --------
    >>> choose("t2", True).model, choose("t2").model, choose("t1-vfa", "linear").method
    ('epg_t2', 'monoexp', 'linear')
    """
    return COMMAND_MODELS[command].choose(value)


def build_model(command: str, value, x, **settings):
    """The model that ``command`` fits for the option value ``value``, at sample positions ``x``.

    The class comes from the registry; the command's fixed settings and those of ``settings`` that the
    choice takes (:attr:`Choice.settings`) are passed to it; other settings are ignored.

    Returns
    -------
    model, choice
        The model instance and its :class:`Choice`.

    Examples
    --------
    >>> model, choice = build_model("t2", False, [0.01, 0.02, 0.03], refocus_deg=150.0)
    >>> type(model).__name__, model.param_names, choice.model
    ('MonoExponential', ('M0', 'T2'), 'monoexp')
    """
    choice = choose(command, value)
    kw = dict(choice.fixed)
    kw.update({k: settings[k] for k in choice.settings if k in settings})
    return MODELS[choice.model].cls(x, **kw), choice


def _table(kind: str) -> dict[str, str]:
    return {e.name: e.target for e in MODELS.values() if e.kind == kind}


#: model name (as recorded in provenance) -> "module:Class", by kind (views of :data:`MODELS`)
REGISTRY = _table("fitted")
CLOSED_FORMS = _table("closed_form")
LOOKUPS = _table("lookup")
SPECTRA = _table("spectrum")

#: the tables above by kind
KINDS = {"fitted": REGISTRY, "closed_form": CLOSED_FORMS, "lookup": LOOKUPS, "spectrum": SPECTRA}

#: names written by earlier versions -> current name
ALIASES = {"spgr": "vfa"}


def model_entry(name: str) -> ModelEntry:
    """The registry entry of the model recorded as ``name`` (earlier names accepted); KeyError if none is."""
    return MODELS[ALIASES.get(name, name)]


def model_class(name: str):
    """The class registered under ``name`` (a fitted model or a closed form); KeyError if none is.

    Examples
    --------
    >>> model_class("vfa").__name__, model_class("spgr").__name__, model_class("dam").__name__
    ('SpoiledGRE', 'SpoiledGRE', 'B1ClosedForm')
    >>> model_class("mp2rage").__name__
    'MP2RAGEProtocol'
    """
    return model_entry(name).cls


def model_kind(name: str) -> str:
    """How the model registered under ``name`` is estimated (a key of :data:`KINDS`); KeyError if none is.

    Examples
    --------
    >>> model_kind("monoexp"), model_kind("dam"), model_kind("mp2rage"), model_kind("t2spectrum")
    ('fitted', 'closed_form', 'lookup', 'spectrum')
    """
    return model_entry(name).kind
