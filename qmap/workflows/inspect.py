"""``qmap inspect``: one voxel of a finished fit -- its samples, the fitted curve and the numbers.

The fit is rebuilt from ``{prefix}_provenance.json`` alone: the series files
(absolute paths), the acquisition values actually used, the model and its
settings, the noise handling and sigma, and the per-voxel inputs (B1). The
voxel is fitted again with the same engine (the solvers give the same result
for one voxel as inside a volume) to draw the curve; the numbers printed are
read from the written maps, so they equal the maps exactly.

What a workflow must record for its fits to be inspectable
----------------------------------------------------------
* ``model["name"]``: a name in one of the tables of :data:`qmap.models.KINDS` (``"monoexp"``, ``"ir"``,
  ``"vfa"``, ``"dam"``, ``"mp2rage"``, ``"t2spectrum"``, ...), whose class rebuilds itself with
  ``from_provenance(model, acquisition, x)``; its kind (:func:`qmap.models.model_kind`) says how the
  voxel is drawn;
* ``model["parameters"]``: the fitted parameter names (``run_fit`` adds them);
* the model's constructor settings under ``model`` (``"signal"`` and
  ``"look_locker"`` for ``ir``; ``"refocus_deg"``, ``"t1"`` for ``epg``; ...);
* ``acquisition``: the varied key (one value per volume used, in the order
  fitted) and scalars such as ``RepetitionTime``;
* ``options["drop_first_echo"]`` when the first volume was not fitted;
* per-voxel inputs as ``options["b1"]`` (absolute path of the B1 map),
  ``options["b1_scale"]`` (``"fraction"`` or ``"percent"``) and
  ``options["b1_smooth_fwhm_mm"]`` (as :func:`qmap.b1.load_b1_map` takes them);
* the series files first in ``inputs``, extra inputs (B1 map) after them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError, UsageError, warn
from ..io.nifti import load_image, read_sidecar
from ..io.writer import AtomicWriter, sha256_file
from ..models import KINDS, model_class, model_kind

__all__ = ["VoxelReport", "find_prefixes", "inspect_voxel", "parse_voxel", "parse_world", "round_to_se"]


@dataclass
class VoxelReport:
    """What ``qmap inspect`` found at one voxel."""

    prefix: str
    voxel: tuple[int, int, int]
    status: int
    status_text: str
    values: list = field(default_factory=list)  # (parameter, value, stderr, units), as in the maps
    quality: dict = field(default_factory=dict)  # name -> (value, units)
    png: Path | None = None
    notes: list = field(default_factory=list)
    convention: str | None = None  # how the standard errors were computed ("noise" / "residual")

    def text(self) -> str:
        i, j, k = self.voxel
        out = [f"{self.prefix}: voxel ({i}, {j}, {k}), status {self.status} ({self.status_text})"]
        for name, v, se, units in self.values:
            u = "" if units in ("1",) else f" {units}"
            out.append(f"  {name} = {round_to_se(v, se)}{u}")
        if self.convention:
            out.append(f"  (+/- is 1 standard error, {CONVENTIONS_SHOWN.get(self.convention, self.convention)})")
        for name, (v, units) in self.quality.items():
            u = "" if units in ("1",) else f" {units}"
            out.append(f"  fit {name} = {_num(v)}{u}")
        out.extend(f"  note: {n}" for n in self.notes)
        if self.png is not None:
            out.append(f"plot: {self.png}")
        return "\n".join(out)


#: how ``inspect`` names each standard-error convention (see qmap.fitting.uncertainty)
CONVENTIONS_SHOWN = {"noise": "from the noise sd: sigma^2 (J^T J)^-1",
                     "residual": "from this voxel's residual variance RSS/(m-P)",
                     # a model that is not fitted (registry kinds closed_form, lookup): nothing has a J^T J
                     "noise, propagated": "from the noise sd of the images, propagated to first order through "
                                          "the estimate's formula"}


def _num(v) -> str:
    """The map value as written (float32), shortest text that reads back to it."""
    return "nan" if not np.isfinite(v) else str(np.float32(v))


def round_to_se(value: float, se: float) -> str:
    """``value +/- se`` with the value rounded to the standard error's two significant digits.

    Without a finite positive standard error the value is shown as written (float32).

    Examples
    --------
    >>> round_to_se(1.234567, 0.0123), round_to_se(1234.567, 56.0), round_to_se(0.5, float("nan"))
    ('1.235 +/- 0.012', '1235 +/- 56', '0.5 +/- nan')
    """
    if not (np.isfinite(value) and np.isfinite(se) and se > 0):
        return f"{_num(value)} +/- {_num(se)}"
    decimals = 1 - int(np.floor(np.log10(se)))  # two significant digits of the standard error
    if decimals > 0:
        return f"{value:.{decimals}f} +/- {se:.{decimals}f}"
    return f"{round(value, decimals):.0f} +/- {round(se, decimals):.0f}"


def find_prefixes(out_dir: str | Path) -> list[str]:
    """Prefixes of the fits in ``out_dir`` (one per ``{prefix}_provenance.json``)."""
    d = Path(out_dir)
    return sorted(p.name[: -len("_provenance.json")] for p in d.glob("*_provenance.json"))


def parse_voxel(text: str) -> tuple[int, int, int]:
    """``"I,J,K"`` -> (I, J, K), 0-based indices."""
    parts = [t.strip() for t in str(text).split(",")]
    try:
        ijk = tuple(int(t) for t in parts)
    except ValueError:
        ijk = ()
    if len(ijk) != 3 or min(ijk) < 0:
        raise UsageError(f"voxel={text!r}: expected three 0-based indices I,J,K such as 12,30,4")
    return ijk


def parse_world(text: str) -> tuple[float, float, float]:
    """``"X,Y,Z"`` (mm, scanner coordinates of the NIfTI affine) -> (X, Y, Z)."""
    try:
        xyz = tuple(float(t) for t in str(text).split(","))
    except ValueError:
        xyz = ()
    if len(xyz) != 3 or not all(np.isfinite(xyz)):
        raise UsageError(f"world={text!r}: expected three coordinates X,Y,Z in mm such as -12.5,30,4")
    return xyz


def _choose_prefix(out_dir: Path, prefix: str | None) -> str:
    if not out_dir.is_dir():
        raise InputError(f"{out_dir}: no such folder; give the -o folder of a qmap fit")
    found = find_prefixes(out_dir)
    if prefix is not None:
        if prefix not in found:
            avail = ", ".join(found) if found else "none"
            raise InputError(f"{out_dir}: no {prefix}_provenance.json (fits found: {avail}); check prefix=")
        return prefix
    if not found:
        raise InputError(f"{out_dir}: holds no qmap fit (no *_provenance.json); give the -o folder of a fitting command")
    if len(found) > 1:
        raise UsageError(f"{out_dir} holds {len(found)} fits ({', '.join(found)}); choose one with prefix=NAME")
    return found[0]


def _read_json(path: Path) -> dict:
    import json

    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable provenance file ({exc}); rerun the fit") from None


def _map_value(path: Path, ijk) -> float:
    img = load_image(path, what="map")
    return float(np.asarray(img.dataobj[ijk[0], ijk[1], ijk[2]]))


def _series_paths(prov: dict, n_volumes: int) -> list[Path]:
    """The leading ``inputs`` that hold the ``n_volumes`` volumes of the series."""
    paths, total = [], 0
    for entry in prov.get("inputs", []):
        p = Path(entry["path"])
        img = load_image(p, what="series (from the provenance)")
        shape = img.shape
        total += int(shape[3]) if len(shape) > 3 else 1
        paths.append(p)
        if sha256_file(p) != entry.get("sha256"):
            warn(f"{p} has changed since the fit (SHA-256 differs); the plot shows the file as it is now")
        if total >= n_volumes:
            break
    if total != n_volumes:
        raise InputError(
            f"the inputs named in the provenance hold {total} volumes, the fit used {n_volumes}; "
            f"were the series files replaced?"
        )
    return paths


def _voxel_samples(paths: list[Path], ijk, key: str, used: np.ndarray, drop_first: bool) -> np.ndarray:
    """The voxel's samples in the order the fit used them (sorted by ``key``, first dropped if so)."""
    i, j, k = ijk
    vals: list[np.ndarray] = []
    sc_vals: list[np.ndarray | None] = []
    for p in paths:
        img = load_image(p, what="series")
        if not all(a < b for a, b in zip(ijk, img.shape[:3])):
            raise UsageError(f"voxel=({i}, {j}, {k}) lies outside the series grid {img.shape[:3]} ({p})")
        v = np.atleast_1d(np.asarray(img.dataobj[i, j, k]))
        vals.append(v.reshape(-1))
        sc = read_sidecar(p).get(key)
        sc_vals.append(np.atleast_1d(np.asarray(sc, float)).reshape(-1) if isinstance(sc, (int, float, list)) else None)
    y = np.concatenate(vals)
    known = [v for v in sc_vals if v is not None]
    if len(known) == len(sc_vals):
        s = np.concatenate(known)
        if s.size == y.size:
            order = np.argsort(s, kind="stable")
            cand = s[order][1:] if drop_first else s[order]
            if cand.size == used.size and np.allclose(cand, used, rtol=1e-3, atol=1e-9):
                y = y[order]
    return y[1:] if drop_first else y


def inspect_voxel(
    out_dir: str | Path,
    voxel=None,
    *,
    world=None,
    prefix: str | None = None,
    out_png: str | Path | None = None,
) -> VoxelReport:
    """Print-ready report and PNG plot of one voxel of a finished fit.

    Parameters
    ----------
    out_dir : path-like
        The ``-o`` folder of a fitting command.
    voxel : str or (3,) sequence of int, optional
        0-based indices in NIfTI array order (``"12,30,4"``).
    world : str or (3,) sequence of float, optional
        Instead of ``voxel``: scanner coordinates in mm (``"-12.5,30,4"``); the voxel whose centre is
        nearest (through the maps' affine).
    prefix : str, optional
        Which fit, when ``out_dir`` holds several.
    out_png : path-like, optional
        Plot file (default ``out_dir/{prefix}_voxel-I-J-K.png``).

    Returns
    -------
    VoxelReport
    """
    from ..plots import plot_voxel_fit

    out_dir = Path(out_dir)
    if (voxel is None) == (world is None):
        raise UsageError("give the voxel either as voxel=(I, J, K) (indices) or as world=(X, Y, Z) (mm), not both")
    prefix = _choose_prefix(out_dir, prefix)
    prov = _read_json(out_dir / f"{prefix}_provenance.json")
    outputs = prov.get("outputs", {})
    status_file = next((n for n, o in outputs.items() if o.get("kind") == "status"), None)
    if status_file is None or not (out_dir / status_file).exists():
        raise InputError(f"{out_dir}: the status map of {prefix} is missing; rerun the fit")
    status_img = load_image(out_dir / status_file)
    shape = status_img.shape[:3]
    if world is not None:
        xyz = parse_world(world) if isinstance(world, str) else tuple(float(v) for v in world)
        ijk = tuple(int(v) for v in np.rint(np.linalg.solve(status_img.affine, [*xyz, 1.0])[:3]))
        if not all(0 <= a < b for a, b in zip(ijk, shape)):
            raise UsageError(f"world=({', '.join(f'{v:g}' for v in xyz)}) mm lies outside the maps (nearest voxel "
                             f"{','.join(map(str, ijk))}, grid {tuple(shape)})")
    else:
        ijk = parse_voxel(voxel) if isinstance(voxel, str) else tuple(int(v) for v in voxel)
    if not all(0 <= a < b for a, b in zip(ijk, shape)) or len(ijk) != 3:
        raise UsageError(f"voxel=({', '.join(map(str, ijk))}) lies outside the map grid {tuple(shape)} "
                         f"(indices are 0-based: 0..{shape[0] - 1}, 0..{shape[1] - 1}, 0..{shape[2] - 1})")
    status = round(_map_value(out_dir / status_file, ijk))
    codes = prov.get("status_codes", {})
    rep = VoxelReport(prefix=prefix, voxel=ijk, status=status, status_text=codes.get(str(status), "unknown code"))
    # the numbers: straight from the written maps
    by_param: dict[str, dict[str, tuple[str, str]]] = {}
    for name, o in outputs.items():
        if o.get("kind") in ("estimate", "stderr"):
            by_param.setdefault(o["parameter"], {})[o["kind"]] = (name, o.get("units", ""))
    for param, kinds in by_param.items():
        if "estimate" not in kinds or len(load_image(out_dir / kinds["estimate"][0]).shape) > 3:
            continue  # no estimate, or a 4D output (a T2 spectrum) with no single value
        v = _map_value(out_dir / kinds["estimate"][0], ijk)
        se = _map_value(out_dir / kinds["stderr"][0], ijk) if "stderr" in kinds else float("nan")
        rep.values.append((param, v, se, kinds["estimate"][1]))
    rep.convention = next((o["convention"] for o in outputs.values() if o.get("kind") == "stderr"
                           and o.get("convention")), None)
    for name, o in outputs.items():
        if o.get("kind") == "quality":
            rep.quality[o["parameter"]] = (_map_value(out_dir / name, ijk), o.get("units", ""))
    # the curve: rebuild the model through the registry and fit this voxel again
    mname = str(prov.get("model", {}).get("name"))
    try:
        kind = model_kind(mname)
    except KeyError:
        known = sorted(name for table in KINDS.values() for name in table)
        raise UsageError(f"{prefix}: model {mname!r} has no curve to draw; inspect redraws the models "
                         f"{', '.join(known)}") from None
    if kind in ("closed_form", "lookup") and rep.convention == "noise":  # no least-squares fit behind the maps
        rep.convention = "noise, propagated"
    if kind == "spectrum":  # the spectrum is read from the maps: no model to rebuild
        return _inspect_spectrum(prov, out_dir, ijk, rep, out_png)
    draw = {"fitted": _figure, "closed_form": _closed_form_figure, "lookup": _lookup_figure}[kind]
    fig = draw(model_class(mname), prov, ijk, rep)
    png = Path(out_png) if out_png is not None else out_dir / f"{prefix}_voxel-{ijk[0]}-{ijk[1]}-{ijk[2]}.png"
    with AtomicWriter(png.parent, overwrite=True) as w:
        w.stage_with(png.name, lambda p: plot_voxel_fit(p, **fig))
        w.commit()
    rep.png = png
    return rep


def _inspect_spectrum(prov: dict, out_dir: Path, ijk, rep: VoxelReport, out_png) -> VoxelReport:
    """A t2-spectrum fit: the echo train with its fitted train, and the spectrum (read from the maps)."""
    from .inspect_spectrum import plot_voxel_spectrum, spectrum_voxel

    y, te, _ = _voxel_inputs(prov, ijk, "EchoTime")
    y = np.abs(y).astype(float)
    sv = spectrum_voxel(prov, out_dir, ijk, y)
    lines = [f"{name} = {v:.4g}" + (f" +/- {se:.2g}" if np.isfinite(se) else "") + f" {u}"
             for name, v, se, u in rep.values if np.isfinite(v)]
    lines += [f"{q} = {v:.4g}" for q, (v, _) in rep.quality.items() if np.isfinite(v)]
    if not np.all(np.isfinite(sv["fitted"])):
        rep.notes.append("this voxel was not fitted; the plot shows its samples only")
    title = f"{rep.prefix}  voxel ({ijk[0]}, {ijk[1]}, {ijk[2]})  status {rep.status}: {rep.status_text}"
    png = Path(out_png) if out_png is not None else out_dir / f"{rep.prefix}_voxel-{ijk[0]}-{ijk[1]}-{ijk[2]}.png"
    with AtomicWriter(png.parent, overwrite=True) as w:
        w.stage_with(png.name, lambda p: plot_voxel_spectrum(p, te=te, y=y, fitted=sv["fitted"], t2=sv["t2"],
                                                             spectrum=sv["spectrum"], window=sv["window"],
                                                             title=title, lines=lines))
        w.commit()
    rep.png = png
    return rep


def _voxel_inputs(prov: dict, ijk, key: str):
    """Samples of the voxel (order and selection as fitted) and the values of ``key`` used."""
    acq = prov.get("acquisition", {})
    if key not in acq:
        raise InputError(f"the provenance lacks acquisition {key}; rerun the fit with this qmap version")
    used = np.atleast_1d(np.asarray(acq[key], float))
    drop = bool(prov.get("options", {}).get("drop_first_echo", False))
    paths = _series_paths(prov, used.size + (1 if drop else 0))
    return _voxel_samples(paths, ijk, key, used, drop), used, paths


def _noise(prov, ijk):
    from ..fitting.noise_floor import NoiseFloor

    info = prov.get("noise") or {}
    mode = info.get("mode") or "none"
    kw = {k: info[k2] for k, k2 in (("coils", "coils"), ("factor", "truncate_factor"), ("min_samples", "min_samples"))
          if info.get(k2) is not None}
    noise = NoiseFloor(mode, **kw)
    sigma = None
    src = str(info.get("sigma_source") or "")
    noise_map = info.get("noise_map")
    if noise_map:  # the run's noise map (a file given, or the map of sigma='local' written beside the maps)
        path = Path(noise_map["path"])
        sigma = _map_value(path, ijk)
        if noise_map.get("sha256") and sha256_file(path) != noise_map["sha256"]:
            warn(f"{path} has changed since the fit (SHA-256 differs); the plot uses the noise map as it is now")
    elif src.startswith("noise map "):  # provenance written before noise.noise_map was recorded
        sigma = _map_value(Path(src[len("noise map "):].split(" (")[0]), ijk)
    elif info.get("sigma") is not None:
        sigma = float(info["sigma"])
    return noise, sigma


def _ctx(model, prov, ijk, series_path):
    """Per-voxel model inputs as the workflow computed them (the B1 map resampled onto the series grid)."""
    if "b1" not in getattr(model, "voxel_inputs", ()):
        return None
    opts = prov.get("options", {})
    path = opts.get("b1")
    if not path:
        return None
    from ..b1 import load_b1_map

    ref = load_image(series_path)
    b1, _ = load_b1_map(path, shape=ref.shape[:3], affine=ref.affine, b1_scale=opts.get("b1_scale"),
                        b1_smooth=opts.get("b1_smooth_fwhm_mm"))
    return {"b1": np.array([b1[ijk[0], ijk[1], ijk[2]]])}


def _complex_ir_samples(prov: dict, ijk, y: np.ndarray, ti: np.ndarray) -> np.ndarray:
    """Complex IR data as the workflow fitted them: phase-corrected real part (qmap.workflows.ir.phase_correct).

    ``y`` holds complex samples (complex NIfTI) or magnitudes whose phase images are named in the
    provenance options (``phase``, radians, same order).
    """
    from .ir import phase_correct

    if not np.iscomplexobj(y):
        phase_files = prov.get("options", {}).get("phase") or []
        if not phase_files:
            raise InputError("the provenance names no phase images for this complex fit; cannot rebuild its data")
        i, j, k = ijk
        ph = np.concatenate([np.atleast_1d(np.asarray(load_image(p, what="phase").dataobj[i, j, k])).reshape(-1)
                             for p in phase_files]).astype(float)
        if ph.size != y.size:
            raise InputError(f"the phase images hold {ph.size} volumes, the series {y.size}")
        y = y * np.exp(1j * ph)
    return phase_correct(y[None, :], ti)[0]


def _text_lines(rep: VoxelReport) -> list[str]:
    lines = [f"{name} = {round_to_se(v, se)} {u}" for name, v, se, u in rep.values if np.isfinite(v)]
    lines += [f"{q} = {v:.5f}" if q == "rsquared" else f"{q} = {v:.4g}" for q, (v, _) in rep.quality.items()
              if np.isfinite(v)]
    return lines or ["no estimates at this voxel"]


def _title(rep: VoxelReport, ijk) -> str:
    return f"{rep.prefix}  voxel ({ijk[0]}, {ijk[1]}, {ijk[2]})  status {rep.status}: {rep.status_text}"


def _closed_form_figure(cls, prov: dict, ijk, rep: VoxelReport) -> dict:
    """Plot of a closed-form estimate (B1): its two samples and the relation it inverted."""
    form = cls.from_provenance(prov.get("model", {}), prov.get("acquisition", {}))
    y, _, _ = _voxel_inputs(prov, ijk, form.varied)
    tb1 = next((v for name, v, _, _ in rep.values if name == "TB1"), float("nan"))
    fig = form.voxel_plot(np.abs(np.asarray(y, float)), tb1)
    notes = [f"model: {prov['model']['equation']}"] if prov.get("model", {}).get("equation") else []
    if not np.isfinite(tb1):
        rep.notes.append("no valid angle at this voxel; the plot shows its samples only")
        fig.update(x_fine=fig["x_fine"][:0], curve=fig["curve"][:0], fitted_at_x=np.full_like(fig["y"], np.nan))
    return dict(fig, lines=_text_lines(rep), notes=notes, title=_title(rep, ijk))


def _lookup_figure(cls, prov: dict, ijk, rep: VoxelReport) -> dict:
    """Plot of a lookup (MP2RAGE): the voxel's UNI on the UNI(T1) curve of the protocol at the voxel's B1."""
    from ..models.mp2rage import mp2rage_uni
    from .mp2rage import UNI_ENCODINGS, _decode, uni_encoding

    minfo, opts = prov.get("model", {}), prov.get("options", {})
    protocol = cls.from_provenance(minfo, prov.get("acquisition", {}))
    path = Path(prov["inputs"][0]["path"])  # the UNI image
    img = load_image(path, what="UNI (from the provenance)")
    if not all(0 <= a < b for a, b in zip(ijk, img.shape[:3])):
        raise UsageError(f"voxel=({', '.join(map(str, ijk))}) lies outside the UNI grid {img.shape[:3]} ({path})")
    raw = np.asarray(img.dataobj[ijk[0], ijk[1], ijk[2]], np.float32).reshape(1)
    encoding = next((k for k, v in UNI_ENCODINGS.items() if v == opts.get("uni_encoding")), None)
    if encoding is None:
        encoding = uni_encoding(-0.5, float(raw[0]) if raw[0] > 0.5 else 0.5, str(path))
    uni = _decode(raw, encoding).astype(float)
    b1 = 1.0
    if opts.get("b1"):
        from ..b1 import load_b1_map

        b1_map, _ = load_b1_map(opts["b1"], shape=img.shape[:3], affine=img.affine, b1_scale=opts.get("b1_scale"),
                                b1_smooth=opts.get("b1_smooth_fwhm_mm"))
        b1 = float(b1_map[ijk[0], ijk[1], ijk[2]])
    lo, hi = (float(v) for v in minfo.get("t1_lookup_range_s", (0.05, 5.0)))
    t1f = np.geomspace(lo, hi, 400)
    curve = mp2rage_uni(t1f, protocol, b1) if np.isfinite(b1) else np.full(t1f.shape, np.nan)
    t1 = next((v for name, v, _, _ in rep.values if name == "T1"), float("nan"))
    at = np.isfinite(t1)
    if not at:
        rep.notes.append("no T1 at this voxel (status above); the plot shows the lookup curve only")
    notes = [f"model: {minfo['equation']}"] if minfo.get("equation") else []
    notes.append(f"B1 at this voxel: {b1:.3g}" if opts.get("b1") else "no B1 correction (B1 = 1)")
    return {"x": np.array([t1]) if at else np.zeros(0), "y": uni if at else np.zeros(0), "x_fine": t1f,
            "curve": curve, "fitted_at_x": mp2rage_uni(np.array([t1]), protocol, b1) if at else np.zeros(0),
            "xlabel": "T1", "x_scale": 1e3, "x_unit": "ms", "x_log": bool(at), "x_limits": (lo, hi),
            "ylabel": "UNI (combined image, -0.5..0.5)",
            "curve_label": "UNI of the signal model at the voxel's B1",
            "lines": [*_text_lines(rep), f"UNI = {uni[0]:.4f}"], "notes": notes, "title": _title(rep, ijk)}


def _figure(cls, prov: dict, ijk, rep: VoxelReport) -> dict:
    """Keyword arguments of :func:`qmap.plots.plot_voxel_fit` for this voxel (refits it for the curve).

    Magnitude inversion recovery is drawn signed (the polarity the fit restored) on a log TI axis, so
    that the recovery through the null reads as one curve.
    """
    from ..engine import fit_voxels
    from ..fitting import status as st

    minfo, acq = prov.get("model", {}), prov.get("acquisition", {})
    y, x, paths = _voxel_inputs(prov, ijk, cls.varied)
    model = cls.from_provenance(minfo, acq, x)
    if getattr(model, "signal", None) == "complex":
        y = _complex_ir_samples(prov, ijk, y, x)
    magnitude = not np.iscomplexobj(y) and getattr(model, "signal", "magnitude") == "magnitude"
    y = np.abs(y).astype(float) if magnitude else np.real(y).astype(float)
    noise, sigma = _noise(prov, ijk)
    ctx = _ctx(model, prov, ijk, paths[0])
    signed_ir = model.name == "ir" and magnitude  # polarity restored by the fit: drawn signed
    log_x = model.name == "ir" and bool(np.all(x > 0))
    hi = float(np.max(x))
    if model.discrete:
        xf = model.x
    elif model.angles:
        xf = np.linspace(0.5, min(180.0, 1.15 * hi), 400)
    elif log_x:
        xf = np.geomspace(float(np.min(x)) / 1.5, 1.5 * hi, 400)
    else:
        xf = np.linspace(0.0, 1.05 * hi, 400)
    notes = []
    if minfo.get("equation"):
        notes.append(f"model: {minfo['equation']}")
    notes.append(f"noise floor: {noise.mode}" + (f", sigma {sigma:.4g}" if sigma else ""))
    common = {
        "x": x, "y": y, "xlabel": model.axis_label, "lines": _text_lines(rep),
        "x_scale": 1.0 if model.angles else 1e3, "x_unit": "deg" if model.angles else "ms",
        "noise_sd": sigma, "notes": notes, "x_log": log_x,
    }
    title = _title(rep, ijk)
    keep = (st.FITTED, st.AT_BOUND, st.NOT_CONVERGED, st.ILL_CONDITIONED)
    ok_ctx = ctx is None or all(np.isfinite(v).all() for v in ctx.values())
    if rep.status not in keep or not np.all(np.isfinite(y)) or not ok_ctx:
        rep.notes.append("this voxel was not fitted; the plot shows its samples only")
        return dict(common, x_fine=x[:0], curve=x[:0], fitted_at_x=np.full_like(y, np.nan), title=title)
    sig = None if sigma is None else np.array([sigma])
    method = "linear" if minfo.get("method") == "linear" else minfo.get("engine", "fast")
    fit = fit_voxels(model, y[None, :], ctx=ctx, noise=noise, sigma=sig, n_jobs=1, method=method)
    if fit is None:  # only with on_chunk=
        raise RuntimeError("fit_voxels returned no fit")
    _check_refit(noise.report(model, fit.params, fit.cov), rep)
    curve = noise.wrap(cls.from_provenance(minfo, acq, xf)).predict(fit.params, ctx)[0]
    at_x = noise.wrap(model).predict(fit.params, ctx)[0]
    if signed_ir:
        sign = np.where(at_x < 0, -1.0, 1.0)
        y = y * sign  # the data with the polarity the fit gave them
        common["y"] = y
    elif magnitude:
        curve, at_x = np.abs(curve), np.abs(at_x)
    floor = None
    if noise.rician and sigma:
        floor = noise.expectation(curve, sigma)
        at_x = noise.expectation(at_x, sigma)
    used = noise.weights(np.abs(y)[None, :], sig)[0] > 0
    label = "fitted model" + (" (signed: polarity restored)" if signed_ir else "")
    if model.discrete:
        label += " at the echoes"
    return dict(common, x_fine=xf, curve=curve, fitted_at_x=at_x, title=title, used=used, floor_curve=floor,
                curve_label=label)


def _check_refit(derived, rep: VoxelReport) -> None:
    """Note when the refit of the voxel does not reproduce the written maps."""
    by_name = {d.name: d for d in derived}
    for name, v, _, units in rep.values:
        d = by_name.get(name)
        if d is None or not np.isfinite(v):
            continue
        ref = float(np.asarray(d.value)[0]) * (1e3 if units == "ms" else 1.0)
        if not np.isclose(ref, v, rtol=1e-4, atol=0):
            rep.notes.append(f"refitting this voxel gave {name} = {ref:.6g} {units}, the map holds {v:.6g}; "
                             f"the curve shows the refit")
