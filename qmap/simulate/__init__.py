"""Synthetic MRI series with known ground truth: ``qmap simulate`` and the sample data.

A phantom (:mod:`qmap.simulate.phantoms`: nine invented vials, or a simple
head slab) is placed in a smooth transmit field; each requested protocol
(:mod:`qmap.simulate.protocols`: inversion recovery, variable flip angle,
multi-echo spin echo by extended phase graphs, multi-echo gradient echo,
low-resolution B1-mapping inputs, and MP2RAGE) is synthesised noise-free, complex Gaussian
noise is added and the magnitude taken (Rician; noncentral chi for several
coils), and everything is written as a BIDS-style folder with sidecars, the
true maps, the label image and a manifest (:mod:`qmap.simulate.output`).

Noise level: for every series, sigma (per real channel) is the series'
reference signal divided by ``snr``, the reference being the 95th percentile
over the object of each voxel's largest noise-free magnitude in the series.
The low-resolution B1 inputs use ``b1_snr`` (default twice ``snr``).
MP2RAGE: the two inversion images get complex noise on one channel (``coils``
does not apply); their magnitudes are written with the combined image UNI as
the 12-bit integer export (``sub-S_UNIT1``).
"""

from __future__ import annotations

from dataclasses import asdict
from typing import Any

import numpy as np

from .. import __version__
from ..errors import UsageError
from .output import StagedFolder, save_json, save_nifti, volume_names
from .phantoms import (
    FILL,
    PHANTOMS,
    REFERENCE_TEMPERATURE_C,
    VIALS,
    Phantom,
    b1_field,
    make_phantom,
    vial_layout_rows,
    vial_properties,
)
from .protocols import PROTOCOLS, Protocols, Series, synthesise
from .signals import magnitude_noise

__all__ = ["PHANTOMS", "PROTOCOLS", "Protocols", "grid_affine", "lowres_grid", "reference_rows", "simulate"]

#: temperatures of the reference table written for the vial phantom, degrees C
REFERENCE_TEMPERATURES = (20.0, 24.0)
#: signal scale of PD = 1 (a.u.)
SIGNAL_SCALE = 1000.0


def grid_affine(shape, voxel_size) -> np.ndarray:
    """Voxel-to-world affine (mm) of a grid centred on the world origin."""
    vs = np.asarray(voxel_size, float)
    aff = np.diag(np.append(vs, 1.0))
    aff[:3, 3] = -(np.asarray(shape, float) - 1) / 2 * vs
    return aff


def lowres_grid(shape, affine, factor: int):
    """Shape, affine and per-axis factors of the coarser B1 grid (blocks of ``factor`` voxels)."""
    f = [factor if s % factor == 0 and s >= 2 * factor else 1 for s in shape]
    new_shape = tuple(s // k for s, k in zip(shape, f))
    aff = np.array(affine, float)
    vs = np.diag(aff)[:3].copy()
    aff[:3, :3] = np.diag(vs * f)
    aff[:3, 3] = aff[:3, 3] + (np.asarray(f, float) - 1) / 2 * vs  # centre of the first block
    return new_shape, aff, tuple(f)


def _block_mean(data: np.ndarray, f) -> np.ndarray:
    X, Y, Z = data.shape[:3]
    rest = data.shape[3:]
    d = data.reshape(X // f[0], f[0], Y // f[1], f[1], Z // f[2], f[2], *rest)
    return d.mean(axis=(1, 3, 5))


def reference_rows(temperatures=REFERENCE_TEMPERATURES) -> list[dict]:
    """Rows of the vial reference table (truth at each temperature, ms)."""
    rows = []
    for t in VIALS:
        for temp in temperatures:
            v = vial_properties(t, temp)
            rows.append({"label": t.label, "name": t.name, "temperature_C": temp, "T1_ms": round(v.t1 * 1e3, 3),
                         "T2_ms": round(v.t2 * 1e3, 3), "T2star_ms": round(v.t2star * 1e3, 3)})
    return rows


def _sigma(series: Series, mask: np.ndarray, snr: float) -> float:
    obj = mask if not series.lowres else None
    peak = np.max(np.abs(series.data), axis=3)
    vals = peak[obj] if obj is not None else peak[peak > 0]
    ref = float(np.percentile(vals, 95)) if vals.size else 1.0
    return ref / snr


def simulate(
    out_dir,
    *,
    phantom: str = "vials",
    protocols=PROTOCOLS,
    shape=(48, 48, 4),
    voxel_size=(2.0, 2.0, 4.0),
    snr: float = 100.0,
    b1_snr: float | None = None,
    coils: int = 1,
    seed: int = 1,
    b1_range=(0.85, 1.15),
    temperature_c: float = REFERENCE_TEMPERATURE_C,
    settings: Protocols | None = None,
    subject: str | None = None,
    overwrite: bool = False,
    command_line: list[str] | None = None,
) -> dict:
    """Simulate series with known ground truth and write them to ``out_dir``.

    Parameters
    ----------
    out_dir : path-like
        Folder to create (must be empty or absent unless ``overwrite``).
    phantom : {"vials", "head"}
    protocols : sequence of str
        Any of ``ir``, ``vfa``, ``mese``, ``megre``, ``b1``, ``mp2rage``.
    shape : (3,) tuple of int
        Matrix of the main grid.
    voxel_size : (3,) tuple of float
        Voxel size, mm.
    snr : float
        Reference signal / noise sd of each series (see the module docstring).
    b1_snr : float, optional
        The same for the low-resolution B1 inputs (default ``2 * snr``).
    coils : int
        Receive channels combined by root sum of squares (1 = Rician).
    seed : int
        Seed of :func:`numpy.random.default_rng`; equal seeds give equal files.
    b1_range : (float, float)
        Extremes of the smooth transmit field (fraction of nominal).
    temperature_c : float
        Vial phantom temperature, degrees C.
    settings : Protocols, optional
        Protocol settings (default :class:`Protocols`).
    subject : str, optional
        BIDS subject label (default the phantom name).
    overwrite : bool
        Replace a non-empty ``out_dir``.

    Returns
    -------
    dict
        The manifest written to ``simulation.json`` (paths relative to ``out_dir``).
    """
    settings = settings or Protocols()
    protocols = list(dict.fromkeys(protocols))
    bad = [p for p in protocols if p not in PROTOCOLS]
    if bad or not protocols:
        raise UsageError(f"protocols={tuple(protocols)}: expected some of {', '.join(PROTOCOLS)}")
    if not snr > 0:
        raise UsageError(f"snr={snr}: must be a positive number")
    if b1_snr is not None and not b1_snr > 0:
        raise UsageError(f"b1_snr={b1_snr}: must be a positive number")
    if int(coils) < 1:
        raise UsageError(f"coils={coils}: must be a positive integer")
    subject = subject or phantom
    if not subject.isalnum():
        raise UsageError(f"subject={subject!r}: a BIDS label holds letters and digits only")
    ph: Phantom = make_phantom(phantom, shape, temperature_c=temperature_c)
    shape = ph.labels.shape
    affine = grid_affine(shape, voxel_size)
    b1 = b1_field(shape, voxel_size, low=b1_range[0], high=b1_range[1])
    _, lr_affine, lr_f = lowres_grid(shape, affine, settings.b1_factor)
    rng = np.random.default_rng(seed)
    sub = f"sub-{subject}"
    manifest: dict[str, Any] = {
        "description": f"simulated {phantom} phantom (invented; synthetic data, not a scan)",
        "qmap_version": __version__, "command_line": command_line, "phantom": phantom, "subject": subject,
        "seed": int(seed), "snr": float(snr), "b1_snr": float(b1_snr or 2 * snr), "coils": int(coils),
        "shape": list(shape), "voxel_size_mm": [float(v) for v in voxel_size], "b1_range": list(map(float, b1_range)),
        "temperature_C": float(temperature_c) if phantom == "vials" else None, "signal_scale": SIGNAL_SCALE,
        "protocol_settings": asdict(settings), "series": {}, "truth": {}, "labels": None, "reference": None,
        "layout": None,
    }
    obj = ph.labels > 0
    with StagedFolder(out_dir, overwrite=overwrite) as stage:
        for name in protocols:
            s = synthesise(name, ph, b1, settings)
            data = s.data * SIGNAL_SCALE
            grid_aff, folder = affine, "anat"
            if s.lowres:
                data = _block_mean(data, lr_f)
                grid_aff, folder = lr_affine, "fmap"
            s.data = data
            sigma = _sigma(s, obj, b1_snr or 2 * snr) if s.lowres else _sigma(s, obj, snr)
            uni = None
            if name == "mp2rage":  # complex images (one channel): the magnitudes and the combined UNI image
                z = data + rng.normal(0.0, sigma, data.shape) + 1j * rng.normal(0.0, sigma, data.shape)
                noisy = np.abs(z)
                uni = np.real(np.conj(z[..., 0]) * z[..., 1]) / (noisy[..., 0] ** 2 + noisy[..., 1] ** 2)
            else:
                noisy = magnitude_noise(data, sigma, rng, coils=int(coils))
            files = []
            for k, lab in enumerate(volume_names(data.shape[3], s.labels)):
                rel = f"{sub}/{folder}/{sub}_{s.entity}-{lab}_{s.suffix}.nii.gz"
                save_nifti(stage.path(rel), noisy[..., k], grid_aff)
                side = dict(s.sidecar, **{s.key: float(s.values[k])}, MagneticFieldStrength=3.0,
                            Manufacturer="qmap simulate (synthetic)")
                side.update({key: vals[k] for key, vals in (s.per_volume or {}).items()})
                save_json(stage.path(rel.replace(".nii.gz", ".json")), side)
                files.append(rel)
            manifest["series"][name] = {"suffix": s.suffix, "files": files, "key": s.key,
                                        "values": [float(v) for v in s.values], "sidecar": s.sidecar,
                                        "noise_sigma": sigma, "grid": "low-resolution B1 grid" if s.lowres else "main"}
            if uni is not None:  # the 12-bit integer export of UNI (common practice), with the whole protocol
                rel = f"{sub}/anat/{sub}_UNIT1.nii.gz"
                save_nifti(stage.path(rel), np.round((uni + 0.5) * 4095), grid_aff, dtype=np.uint16)
                save_json(stage.path(rel.replace(".nii.gz", ".json")), dict(
                    s.sidecar, InversionTime=[float(v) for v in s.values], **(s.per_volume or {}),
                    MagneticFieldStrength=3.0, Manufacturer="qmap simulate (synthetic)",
                    Description="UNI = Re(S1* S2)/(|S1|^2 + |S2|^2) of the two inversion images, stored as "
                                "round((UNI + 0.5) x 4095)"))
                manifest["series"][name]["uni"] = rel
                manifest["series"][name]["per_volume"] = s.per_volume
        _write_truth(stage, manifest, ph, b1, affine, sub)
        if "b1" in protocols:
            rel = f"{sub}/fmap/{sub}_TB1map.nii.gz"
            save_nifti(stage.path(rel), _block_mean(b1, lr_f), lr_affine)
            save_json(stage.path(rel.replace(".nii.gz", ".json")),
                      {"Units": "fraction", "Description": "true relative B1 field on the low-resolution grid "
                       "(simulated; 1 = nominal)"})
            manifest["truth"]["TB1_lowres"] = rel
        save_json(stage.path("dataset_description.json"), {
            "Name": f"qmap simulated {phantom} phantom", "BIDSVersion": "1.9.0", "DatasetType": "raw",
            "GeneratedBy": [{"Name": "qmap simulate", "Version": __version__}],
        })
        save_json(stage.path("simulation.json"), manifest)
        stage.commit()
    return manifest


def _write_truth(stage, manifest, ph: Phantom, b1, affine, sub):
    truth = {"T1": ("t1", "s"), "T2": ("t2", "s"), "T2star": ("t2star", "s"), "PD": ("pd", "fraction")}
    for param, (attr, units) in truth.items():
        rel = f"{sub}/anat/{sub}_desc-truth_{param}map.nii.gz"
        save_nifti(stage.path(rel), ph.property_map(attr), affine)
        desc = {"PD": "proton density relative to water (signal at TE = 0, full recovery, is PD x "
                      f"{SIGNAL_SCALE:g})"}.get(param, f"true {param} (simulated)")
        save_json(stage.path(rel.replace(".nii.gz", ".json")), {"Units": units, "Description": desc})
        manifest["truth"][param] = rel
    rel = f"{sub}/anat/{sub}_desc-truth_TB1map.nii.gz"
    save_nifti(stage.path(rel), b1, affine)
    save_json(stage.path(rel.replace(".nii.gz", ".json")),
              {"Units": "fraction", "Description": "true relative B1 field (1 = nominal)"})
    manifest["truth"]["TB1"] = rel
    rel = f"{sub}/anat/{sub}_desc-{ph.name}_dseg.nii.gz"
    save_nifti(stage.path(rel), ph.roi, affine, dtype=np.int16, intent="label")
    names = ph.roi_names or {lab: t.name for lab, t in ph.tissues.items() if lab != FILL.label or ph.name != "vials"}
    for param, (arr, units, desc) in (ph.extra_truth or {}).items():
        rel_x = f"{sub}/anat/{sub}_desc-truth_{param}map.nii.gz"
        save_nifti(stage.path(rel_x), arr, affine)
        save_json(stage.path(rel_x.replace(".nii.gz", ".json")), {"Units": units, "Description": desc})
        manifest["truth"][param] = rel_x
    tsv = "index\tname\n" + "".join(f"{k}\t{v}\n" for k, v in sorted(names.items()) if np.any(ph.roi == k))
    stage.path(rel.replace(".nii.gz", ".tsv")).write_text(tsv)
    manifest["labels"] = rel
    if ph.name == "vials":
        import csv

        p = stage.path("phantom_reference.csv")
        rows = reference_rows()
        with open(p, "w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=list(rows[0]))
            w.writeheader()
            w.writerows(rows)
        manifest["reference"] = "phantom_reference.csv"
        p = stage.path("phantom_layout.csv")
        rows = vial_layout_rows(ph.labels.shape, np.sqrt((np.asarray(affine)[:3, :3] ** 2).sum(axis=0)))
        with open(p, "w", newline="", encoding="utf-8") as fh:
            fh.write("# vial centres of the simulated phantom (mm, x along the first voxel axis, y along the second,\n"
                     "# origin at the container's centre) and the ROI radius to draw: qmap phantom --layout\n")
            w = csv.DictWriter(fh, fieldnames=list(rows[0]))
            w.writeheader()
            w.writerows(rows)
        manifest["layout"] = "phantom_layout.csv"
    manifest["truth_values"] = {str(lab): {"name": t.name, "T1_s": t.t1, "T2_s": t.t2, "T2star_s": t.t2star,
                                           "PD": t.pd} for lab, t in sorted(ph.tissues.items()) if np.any(ph.roi == lab)}
