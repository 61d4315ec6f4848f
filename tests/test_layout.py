"""The package's layers import only downwards: numeric kernels know nothing of files or frames,
and no module imports one that comes after it in the chain."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "regional"

ORDER = (
    "errors",
    "models",
    "metrics",
    "flowstats",
    "search",
    "compiled_search",
    "transfer",
    "config",
    "io",
    "checks",
    "series",
    "attributes",
    "overlap",
    "region",
    "sites",
    "compute",
    "kept",
    "calibrate",
    "crossval",
    "result",
    "residuals",
    "bounds",
    "coverage",
    "repeatcoverage",
    "repeatfolds",
    "repeats",
    "heldout",
    "applicability",
    "fitted",
    "fittedfiles",
    "predicted",
    "predict",
    "statroutes",
    "screen",
    "reuse",
    "report",
    "outputs",
    "pipeline",
    "cli",
)
"""Each module may import only modules listed before it (the chain: inputs -> attributes ->
calibration -> transfer -> leave-one-out / prediction -> report)."""


def _layer(module: str) -> str:
    return module.split(".")[1] if module.count(".") else module


def _imports(path: Path) -> set[str]:
    """regional.* modules imported at run time (type-checking-only imports excluded)."""
    tree = ast.parse(path.read_text())
    found: set[str] = set()
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            skip |= {id(child) for child in ast.walk(node)}
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "regional":
                found |= {f"regional.{alias.name}" for alias in node.names}
            elif node.module.startswith("regional."):
                found.add(node.module)
        elif isinstance(node, ast.Import):
            found |= {a.name for a in node.names if a.name.startswith("regional.")}
    return found


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        relative = path.relative_to(PACKAGE.parent).with_suffix("")
        name = ".".join(relative.parts).removesuffix(".__init__")
        if name != "regional":
            yield name, path


@pytest.mark.parametrize(("module", "path"), list(_modules()), ids=lambda v: str(v))
def test_imports_only_run_down_the_chain(module, path):
    own = ORDER.index(_layer(module))
    for imported in _imports(path):
        layer = _layer(imported)
        if layer == "__version__":
            continue
        assert layer in ORDER, f"{module} imports {imported}, a layer missing from ORDER"
        assert ORDER.index(layer) <= own, f"{module} imports {imported}, which comes later"


FORBIDDEN_IN_KERNELS = {
    "pandas",
    "geopandas",
    "pyogrio",
    "rasterio",
    "shapely",
    "pyproj",
    "matplotlib",
    "sklearn",
    "os",
    "io",
    "pathlib",
    "json",
    "csv",
}


def test_numeric_kernels_know_nothing_of_files_or_frames():
    for path in (PACKAGE / "models").glob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0:
                names = [node.module]
            for name in names:
                assert name.split(".")[0] not in FORBIDDEN_IN_KERNELS, f"{path.name}: {name}"
                if name.startswith("regional"):
                    assert name.startswith("regional.models"), f"{path.name}: {name}"
