"""Planning a cohort batch: which relaxometry series a BIDS dataset holds, and which fit each gets.

Discovery follows the BIDS quantitative-MRI file naming. In ``anat/`` of
every subject (and session):

========  ================  ===========  =================================
suffix    volume entity     fit          acquisition keys (sidecars)
========  ================  ===========  =================================
IRT1      ``inv-<i>``       ``t1-ir``    InversionTime (RepetitionTime)
VFA       ``flip-<i>``      ``t1-vfa``   FlipAngle, RepetitionTime
MESE      ``echo-<i>``      ``t2``       EchoTime (EPG model)
MEGRE     ``echo-<i>``      ``t2star``   EchoTime
MP2RAGE   ``inv-<i>``       ``t1-mp2rage``  the UNIT1 image, InversionTime, FlipAngle, ...
========  ================  ===========  =================================

Files of one suffix are grouped into a series by all their other entities
(``acq-``, ``run-``, ...). Non-magnitude parts (``part-phase|real|imag``) are
not fitted. An MP2RAGE series is its ``*_UNIT1`` image (the same entities, no
``inv-``) with the two ``*_inv-<i>_MP2RAGE`` magnitudes when present (then M0
and standard errors are written too); a UNIT1 alone is fitted from its own
sidecar. A VFA or MP2RAGE series uses the ``fmap/*_TB1map`` of its
subject/session when there is one (the one its sidecar ``IntendedFor`` names,
or with the same ``acq`` label, when there are several).

Outputs of a series go to ``DERIV/sub-<s>[/ses-<t>]/anat/`` with the prefix
``sub-<s>[_ses-<t>]_acq-<acq><method>[_<other entities>]``: ``method`` is the
lowercase suffix and ``acq`` the raw series' own acquisition label, if any.

Everything here is plain data (picklable), so a plan can be shipped to local
worker processes or Dask workers on other machines; every path is absolute.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from ..b1 import b1_units_scale
from ..errors import InputError, UsageError
from ..io.nifti import read_sidecar, split_bids_stem

__all__ = ["FIT_KINDS", "BatchPlan", "FitKind", "SeriesPlan", "discover", "parse_bids_name"]

_NII = (".nii.gz", ".nii")


@dataclass(frozen=True)
class FitKind:
    """How one BIDS suffix is fitted."""

    suffix: str  #: BIDS suffix of the raw files, e.g. ``"VFA"``
    index: str  #: entity numbering the volumes of a series, e.g. ``"flip"``
    method: str  #: lowercase method label used in the output prefix
    command: str  #: the equivalent qmap command
    module: str  #: workflow module
    function: str  #: workflow function in ``module``


FIT_KINDS = {
    k.suffix: k
    for k in (
        FitKind("IRT1", "inv", "irt1", "t1-ir", "qmap.workflows.ir", "run_t1_ir"),
        FitKind("VFA", "flip", "vfa", "t1-vfa", "qmap.workflows.vfa", "run_t1_vfa"),
        FitKind("MESE", "echo", "mese", "t2", "qmap.workflows.t2", "run_t2"),
        FitKind("MEGRE", "echo", "megre", "t2star", "qmap.workflows.decay", "run_t2star"),
        FitKind("MP2RAGE", "inv", "mp2rage", "t1-mp2rage", "qmap.workflows.mp2rage", "run_t1_mp2rage"),
    )
}
#: the combined MP2RAGE image that goes with ``*_inv-<i>_MP2RAGE`` files of the same entities
UNI_SUFFIX = "UNIT1"
#: suffixes whose fit uses the session's TB1map
_B1_CORRECTED = ("VFA", "MP2RAGE")

#: the extra fit of a MESE series with ``--t2-spectrum`` (outputs ``..._acq-mesespectrum_*``)
SPECTRUM_KIND = FitKind("MESE", "echo", "mesespectrum", "t2-spectrum", "qmap.workflows.t2_spectrum", "run_t2_spectrum")

#: ``part-`` labels that are magnitude images (absent = magnitude)
_MAGNITUDE_PARTS = (None, "mag")

#: sidecar ``Units`` of a TB1map -> scale name
def parse_bids_name(path: str | Path) -> tuple[list[tuple[str, str]], str] | None:
    """Entities (in file order) and suffix of a BIDS NIfTI name; None when it is not one.

    ``sub-01_ses-1_echo-2_MEGRE.nii.gz`` -> ``([("sub", "01"), ("ses", "1"), ("echo", "2")], "MEGRE")``.
    """
    name = Path(path).name
    for ext in _NII:
        if name.endswith(ext):
            stem = name[: -len(ext)]
            break
    else:
        return None
    return split_bids_stem(stem)


@dataclass
class SeriesPlan:
    """One series of one subject/session and the fit planned for it (plain data, absolute paths).

    Attributes
    ----------
    subject, session : str, str or None
        BIDS labels (without ``sub-`` / ``ses-``).
    suffix : str
        ``IRT1``, ``VFA``, ``MESE`` or ``MEGRE``.
    label : str
        Human-readable name of the raw series (``sub-01_echo-*_MEGRE``).
    inputs : list of str
        The NIfTI files of the series, ordered by their volume index.
    prefix, out_dir : str
        Output name stem and the (absolute) folder of the outputs.
    b1, b1_scale : str or None
        The TB1map used by a VFA or MP2RAGE fit and its scale (``fraction``/``percent``).
    uni : str or None
        MP2RAGE: the UNIT1 image (``inputs`` then holds the inversion images, possibly none).
    error : str or None
        Why the series cannot be fitted as found (reported as a failure).
    notes : list of str
        Remarks on choices made while planning.
    spectrum : bool
        A MESE series fitted by ``t2-spectrum`` (multi-component T2) instead of ``t2 --epg``.
    options : dict of str -> str
        Fit options given by the user for this series type (command-line spelling without the
        dashes, e.g. ``{"sigma": "local", "mask": "none"}``; see :func:`qmap.batch.fit_options`).
    """

    subject: str
    session: str | None
    suffix: str
    label: str
    inputs: list
    prefix: str
    out_dir: str
    b1: str | None = None
    b1_scale: str | None = None
    error: str | None = None
    notes: list = field(default_factory=list)
    uni: str | None = None
    spectrum: bool = False
    options: dict = field(default_factory=dict)

    @property
    def kind(self) -> FitKind:
        return SPECTRUM_KIND if self.spectrum else FIT_KINDS[self.suffix]

    @property
    def key(self) -> str:
        """Unique name of the series in the batch: its output path stem."""
        return str(Path(self.out_dir) / self.prefix)

    @property
    def all_inputs(self) -> list[str]:
        """Every file the fit reads (series + UNIT1 + B1 map), absolute."""
        return ([self.uni] if self.uni else []) + list(self.inputs) + ([self.b1] if self.b1 else [])

    def fit_description(self) -> str:
        """Short text of the fit chosen, for the plan table."""
        k = self.kind
        if k.suffix == "IRT1":
            return "t1-ir (magnitude)"
        if k.suffix == "VFA":
            if self.b1:
                return f"t1-vfa (nonlinear, B1 {Path(self.b1).name} [{self.b1_scale or 'scale from its data'}])"
            return "t1-vfa (nonlinear, no B1 map)"
        if self.spectrum:
            return "t2-spectrum (regularised NNLS, EPG basis)"
        if k.suffix == "MESE":
            return "t2 (EPG)"
        if k.suffix == "MP2RAGE":
            inv = "with the inversion images" if self.inputs else "UNIT1 only"
            b1 = f"B1 {Path(self.b1).name}" if self.b1 else "no B1 map"
            return f"t1-mp2rage ({inv}, {b1})"
        return "t2star (default noise floor)"


@dataclass
class BatchPlan:
    """Every series found in a dataset, plus the files that were passed over and why."""

    bids_dir: str
    deriv_dir: str
    series: list
    ignored: list = field(default_factory=list)  #: (path, reason)
    n_sessions: int = 0


def _sessions(bids: Path) -> list[tuple[str, str | None, Path]]:
    out: list[tuple[str, str | None, Path]] = []
    for sub in sorted(p for p in bids.glob("sub-*") if p.is_dir()):
        s = sub.name[4:]
        sessions = sorted(p for p in sub.glob("ses-*") if p.is_dir())
        if sessions:
            out.extend((s, ses.name[4:], ses) for ses in sessions)
        else:
            out.append((s, None, sub))
    return out


def _niftis(folder: Path) -> list[Path]:
    if not folder.is_dir():
        return []
    return sorted(p for p in folder.iterdir() if p.is_file() and p.name.endswith(_NII) and not p.name.startswith("."))


def _index_sort_key(value: str):
    return (0, int(value), value) if value.isdigit() else (1, 0, value)


def _matches_session(ents: dict, subject: str, session: str | None) -> bool:
    return ents.get("sub") == subject and ents.get("ses") == session


def _prefix(subject: str, session: str | None, acq: str | None, method: str, others: list[tuple[str, str]]) -> str:
    head = f"sub-{subject}" + (f"_ses-{session}" if session else "")
    tail = "".join(f"_{k}-{v}" for k, v in others)
    return f"{head}_acq-{acq or ''}{method}{tail}"


def _intended_for(meta: dict) -> list[str]:
    v = meta.get("IntendedFor")
    if isinstance(v, str):
        v = [v]
    if not isinstance(v, list):
        return []
    out = []
    for item in v:
        if isinstance(item, str):
            out.append(item.removeprefix("bids::").replace("\\", "/"))
    return out


def _acq_of(path: Path) -> str | None:
    """The ``acq`` entity of a BIDS file name (None when absent or not a BIDS name)."""
    parsed = parse_bids_name(path)
    return None if parsed is None else dict(parsed[0]).get("acq")


def _choose_b1(candidates: list[Path], series_files: list[Path], acq: str | None, bids: Path) -> tuple[Path | None, str | None]:
    """The TB1map for a VFA or MP2RAGE series: (path, None) or (None, reason) when the choice is ambiguous."""
    if not candidates:
        return None, None
    if len(candidates) == 1:
        return candidates[0], None
    wanted = {str(f.relative_to(bids)).replace("\\", "/") for f in series_files}
    named = []
    for c in candidates:
        targets = _intended_for(read_sidecar(c))
        # IntendedFor is relative to the subject folder (or, as a bids:: URI, to the dataset)
        subj = c.relative_to(bids).parts[0]
        full = {t if t.startswith("sub-") else f"{subj}/{t}" for t in targets}
        if full & wanted:
            named.append(c)
    if len(named) == 1:
        return named[0], None
    pool = named or candidates
    same_acq = [c for c in pool if _acq_of(c) == acq]
    if len(same_acq) == 1:
        return same_acq[0], None
    names = ", ".join(c.name for c in pool)
    return None, (f"several TB1 maps fit this series ({names}); name the right one in its sidecar "
                  f"IntendedFor, or keep one TB1map per session")


def _b1_scale(path: Path) -> tuple[str | None, str | None]:
    """Scale of a TB1map from its sidecar ``Units``: (scale, None) or (None, reason)."""
    try:
        meta = read_sidecar(path)
    except InputError as exc:
        return None, str(exc)
    units = meta.get("Units")
    if units is None or (isinstance(units, str) and not units.strip()):
        return None, None  # the fit then takes fraction, and rejects a map whose values look like percent
    scale = b1_units_scale(str(units))
    if scale is None:
        return None, (f"{path}: sidecar Units {units!r}; a TB1map is expected in fraction (1 = nominal) or "
                      f"percent (100 = nominal); fix the sidecar")
    return scale, None


def discover(bids_dir: str | Path, deriv_dir: str | Path, *, t2_spectrum: bool = False) -> BatchPlan:
    """Find every relaxometry series of a BIDS dataset and plan its fit.

    Parameters
    ----------
    bids_dir : path-like
        Root of the raw BIDS dataset (holds ``sub-*`` folders).
    deriv_dir : path-like
        Root of the derivatives the batch writes.
    t2_spectrum : bool
        Also fit every MESE series by ``t2-spectrum`` (prefix method ``mesespectrum``).

    Returns
    -------
    BatchPlan
        Series sorted by subject, session and output prefix.

    Raises
    ------
    UsageError
        When ``bids_dir`` is not a folder or the derivatives would go inside a subject folder.
    InputError
        When the dataset holds no ``sub-*`` folder or no relaxometry series at all.
    """
    bids = Path(bids_dir).expanduser().absolute()
    deriv = Path(deriv_dir).expanduser().absolute()
    if not bids.is_dir():
        raise UsageError(f"{bids}: no such folder; give the root of a BIDS dataset (the folder holding sub-*)")
    if deriv == bids:
        raise UsageError(f"-o {deriv} is the raw dataset itself; write derivatives elsewhere "
                         f"(e.g. {bids / 'derivatives' / 'qmap'})")
    if deriv.is_relative_to(bids) and any(part.startswith("sub-") for part in deriv.relative_to(bids).parts):
        raise UsageError(f"-o {deriv} lies inside a subject folder of {bids}; use e.g. {bids / 'derivatives' / 'qmap'}")
    sessions = _sessions(bids)
    if not sessions:
        raise InputError(f"{bids}: holds no sub-* folders; is this the root of a BIDS dataset?")
    plans: list[SeriesPlan] = []
    ignored: list[tuple[str, str]] = []
    for subject, session, folder in sessions:
        groups: dict[tuple, list[tuple[str | None, Path]]] = {}
        unis: dict[tuple, Path] = {}
        for f in _niftis(folder / "anat"):
            parsed = parse_bids_name(f)
            if parsed is None:
                continue
            ents_list, suffix = parsed
            if suffix == UNI_SUFFIX:  # joins the MP2RAGE series of the same entities
                ents = dict(ents_list)
                if _matches_session(ents, subject, session) and ents.get("part") in _MAGNITUDE_PARTS:
                    key = ("MP2RAGE",) + tuple((k, v) for k, v in ents_list if k != "part")
                    unis[key] = f
                    groups.setdefault(key, [])
                continue
            kind = FIT_KINDS.get(suffix)
            if kind is None:
                continue
            ents = dict(ents_list)
            if not _matches_session(ents, subject, session):
                ignored.append((str(f), "its sub-/ses- entities do not match its folder"))
                continue
            if ents.get("part") not in _MAGNITUDE_PARTS:
                ignored.append((str(f), f"part-{ents['part']}: only magnitude images are fitted"))
                continue
            key = (suffix,) + tuple((k, v) for k, v in ents_list
                                    if k != kind.index and not (suffix == "MP2RAGE" and k == "part"))
            groups.setdefault(key, []).append((ents.get(kind.index), f))
        fmap = [f for f in _niftis(folder / "fmap")
                if (p := parse_bids_name(f)) and p[1] == "TB1map" and _matches_session(dict(p[0]), subject, session)]
        for key, members in groups.items():
            plans.append(_plan_series(bids, deriv, subject, session, key, members, fmap, unis.get(key)))
            if t2_spectrum and key[0] == "MESE":
                plans.append(_plan_series(bids, deriv, subject, session, key, members, fmap, unis.get(key),
                                          spectrum=True))
    if not plans:
        raise InputError(
            f"{bids}: no relaxometry series in {len(sessions)} subject/session folders; expected anat/ files named "
            f"*_inv-<i>_IRT1, *_flip-<i>_VFA, *_echo-<i>_MESE, *_echo-<i>_MEGRE or *_UNIT1 (+ *_inv-<i>_MP2RAGE) "
            f"(.nii/.nii.gz)"
        )
    plans.sort(key=lambda p: (p.subject, p.session or "", p.prefix, p.label))
    _check_unique(plans)
    return BatchPlan(bids_dir=str(bids), deriv_dir=str(deriv), series=plans, ignored=ignored,
                     n_sessions=len({(p.subject, p.session) for p in plans}))


def _plan_series(bids, deriv, subject, session, key, members, fmap, uni=None, *,
                 spectrum: bool = False) -> SeriesPlan:
    suffix, others = key[0], list(key[1:])
    kind = SPECTRUM_KIND if spectrum else FIT_KINDS[suffix]
    acq = dict(others).get("acq")
    rest = [(k, v) for k, v in others if k not in ("sub", "ses", "acq", "part")]
    out_dir = deriv / f"sub-{subject}" / (f"ses-{session}" if session else "") / "anat"
    prefix = _prefix(subject, session, acq, kind.method, rest)
    numbered = sorted((m for m in members if m[0] is not None), key=lambda m: _index_sort_key(m[0]))
    plain = [m for m in members if m[0] is None]
    files = [f for _, f in numbered] + [f for _, f in plain]
    label = files[0].name if files else uni.name
    if numbered:  # the raw name with the volume index as a wildcard: sub-01_acq-fast_echo-*_MEGRE
        stem = label[: -len(".nii.gz")] if label.endswith(".nii.gz") else label[: -len(".nii")]
        label = "_".join(f"{kind.index}-*" if part == f"{kind.index}-{numbered[0][0]}" else part
                         for part in stem.split("_"))
    plan = SeriesPlan(subject=subject, session=session, suffix=suffix, label=label,
                      inputs=[str(f) for f in files], prefix=prefix, out_dir=str(out_dir.absolute()),
                      spectrum=spectrum)
    labels = [m[0] for m in numbered]
    if suffix == "MP2RAGE":
        plan.uni = None if uni is None else str(uni)
        if uni is None:
            plan.error = (f"{label}: MP2RAGE inversion images without the combined image; qmap t1-mp2rage needs the "
                          f"*_UNIT1 image of the same entities beside them")
        elif files and len(files) != 2:
            plan.error = (f"{label}: {len(files)} MP2RAGE inversion images; expected two (inv-1 and inv-2) beside "
                          f"{uni.name}")
    if plan.error is not None:
        pass
    elif len(set(labels)) != len(labels):
        dup = next(v for v in labels if labels.count(v) > 1)
        plan.error = (f"{label}: several files with {kind.index}-{dup}; every volume of a series needs its own "
                      f"{kind.index} index")
    elif plain and numbered:
        plan.error = (f"{plain[0]}: has no {kind.index}- entity while {len(numbered)} files of the same series have "
                      f"one; name every volume file with {kind.index}-<index> (or keep one 4D file)")
    elif len(plain) > 1:
        plan.error = (f"{plain[0].name} and {plain[1].name}: several files of one series without a "
                      f"{kind.index}- entity; number them with {kind.index}-<index>")
    if suffix in _B1_CORRECTED and plan.error is None:
        b1, why = _choose_b1(fmap, files + ([uni] if uni is not None else []), acq, bids)
        if why:
            plan.error = why
        elif b1 is not None:
            scale, why = _b1_scale(b1)
            plan.b1, plan.b1_scale, plan.error = str(b1), scale, why
        else:
            plan.notes.append("no fmap/*_TB1map for this session: fitted without B1 correction")
    return plan


def _check_unique(plans: list[SeriesPlan]) -> None:
    """A series whose outputs would land on those of an earlier one is not fitted (reported)."""
    seen: dict[str, SeriesPlan] = {}
    for p in plans:
        other = seen.get(p.key)
        if other is not None:
            p.error = (f"{p.label}: its outputs {p.prefix}_* would replace those of {other.label}; "
                       f"give the two series different acq- labels")
        else:
            seen[p.key] = p
