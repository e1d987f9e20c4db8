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


def test_nothing_cites_documents_outside_the_repository():
    # the project is self-contained: its code, tests and docs cite published sources, never the planning notes
    # kept outside the repository (names split so that this file does not match itself)
    names = ["INTERFACE" + ".md", "REFERENCES" + ".md", "DESIGN" + ".md", "ARCH" + ".md", "../" + "shared"]
    hits = []
    for p in sorted(ROOT.rglob("*")):
        if p.suffix not in (".py", ".md", ".toml", ".txt", ".cfg", ".json") or ".git" in p.parts:
            continue
        text = p.read_text(encoding="utf-8", errors="replace")
        hits += [f"{p.relative_to(ROOT)}: {n}" for n in names if n in text]
    assert not hits, hits
