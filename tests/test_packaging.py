"""Every qmap subpackage is listed in pyproject.toml (they are listed explicitly, see the comment there)."""

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_all_subpackages_are_packaged():
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())
    listed = set(conf["tool"]["setuptools"]["packages"])
    found = {".".join(p.relative_to(ROOT).parts) for p in (ROOT / "qmap").rglob("*") if p.is_dir()
             and p.name != "__pycache__" and any(p.glob("*.py"))}
    found.add("qmap")
    assert found <= listed, f"add to pyproject.toml [tool.setuptools] packages: {sorted(found - listed)}"


def test_sample_data_is_mapped_into_the_package():
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())
    assert conf["tool"]["setuptools"]["package-dir"]["qmap.sample_data"] == "sample_data"
    assert (ROOT / "sample_data" / "README.md").exists()
