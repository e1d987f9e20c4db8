"""``qmap inspect`` rebuilds every kind of fit through the model registry (qmap.models.KINDS)."""

from __future__ import annotations

import json

import nibabel as nib
import numpy as np
from matplotlib import image as mpimg

from qmap.cli import main
from qmap.models import KINDS, model_class, model_kind
from qmap.models.mp2rage import MP2RAGEProtocol, mp2rage_uni
from qmap.plots import VOXEL_PLOT_SIZE_PX
from qmap.workflows.demo import sample_data_dir

ANAT = "sub-phantom/anat"


def test_every_registered_name_has_a_class_and_a_kind():
    for kind, table in KINDS.items():
        for name in table:
            assert model_kind(name) == kind
            assert hasattr(model_class(name), "__name__")


def test_mp2rage_voxel_is_redrawn_from_its_provenance(tmp_path, capsys):
    data = sample_data_dir() / ANAT
    out = tmp_path / "mp"
    assert main(["t1-mp2rage", str(data / "sub-phantom_UNIT1.nii.gz"), "-o", str(out), "-q", "-j", "1"]) == 0
    prov = json.loads(next(out.glob("*_provenance.json")).read_text())
    assert prov["model"]["name"] == "mp2rage" and model_kind("mp2rage") == "lookup"
    # the protocol round-trips through the provenance
    protocol = MP2RAGEProtocol.from_provenance(prov["model"], prov["acquisition"])
    assert protocol.as_acquisition() == prov["acquisition"]
    t1_map = np.asarray(nib.load(str(next(out.glob("*_T1map.nii.gz")))).dataobj)
    ijk = tuple(int(v) for v in np.argwhere(np.isfinite(t1_map))[len(np.argwhere(np.isfinite(t1_map))) // 2])
    png = tmp_path / "v.png"
    capsys.readouterr()
    assert main(["inspect", str(out), "--voxel", ",".join(map(str, ijk)), "-o", str(png)]) == 0
    text = capsys.readouterr().out
    assert "T1 = " in text and png.is_file()
    assert mpimg.imread(str(png)).shape[:2] == VOXEL_PLOT_SIZE_PX[::-1]
    # the voxel's UNI (12-bit export: value/4095 - 0.5, common practice) lies on the model's UNI(T1) curve at
    # its T1: the lookup inverted it (Marques et al. 2010, the UNI of the two steady-state signals)
    raw = float(np.asarray(nib.load(str(data / "sub-phantom_UNIT1.nii.gz")).dataobj)[ijk])
    uni = raw / 4095.0 - 0.5
    assert abs(float(mp2rage_uni(np.array([t1_map[ijk]]), protocol)[0]) - uni) < 2e-4
