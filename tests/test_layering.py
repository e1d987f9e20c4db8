"""The layers import downwards only (DEVELOPERS.md, "Architecture"): read from the sources with ast."""

from __future__ import annotations

import ast
from pathlib import Path

import qmap

ROOT = Path(qmap.__file__).parent


def _imports(path: Path) -> set[str]:
    """Absolute names of the qmap modules ``path`` imports (top level and inside functions)."""
    package = ".".join(path.relative_to(ROOT.parent).with_suffix("").parts[:-1])
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            base = package.split(".")
            if node.level:
                base = base[: len(base) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            out.add(name)
            out.update(f"{name}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
    return {n for n in out if n == "qmap" or n.startswith("qmap.")}


def test_the_optimiser_and_the_noise_floor_do_not_import_the_solver():
    # the noise-floor object runs the optimiser itself (qmap.fitting.optimizer): no solver <-> noise_floor cycle
    for name in ("noise_floor.py", "optimizer.py", "problem.py"):
        assert not {n for n in _imports(ROOT / "fitting" / name) if n.startswith("qmap.fitting.solver")}, name


def test_models_do_not_import_the_fitting_package():
    # models describe the physics; fitting imports models, never the other way (no package cycle)
    for path in sorted((ROOT / "models").glob("*.py")):
        assert not {n for n in _imports(path) if n.startswith("qmap.fitting")}, path.name


def test_the_numeric_kernels_import_no_higher_layer():
    # epg, linalg and nnls sit at the bottom: models and fitting use them
    for name in ("epg.py", "linalg.py", "nnls.py"):
        higher = {n for n in _imports(ROOT / name) if n.startswith(("qmap.fitting", "qmap.models", "qmap.maps"))}
        assert not higher, (name, higher)
