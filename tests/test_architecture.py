"""The packages depend one way (docs/architecture.md): an import of a package of a higher
layer, anywhere in a module (at the top or inside a function), fails this test."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "archive"

# layer of each package of archive/ (a package may import its own layer's helpers and below)
LAYER = {
    "registry": 0, "times": 0, "errors": 0, "progress": 0,
    "store": 1,
    "ingest": 2, "survey": 2,
    "edits": 3,
    "solve": 4,
    "scale": 5, "review": 5, "deliver": 5, "qc": 5,
    "lineage": 6, "demo": 6,
    "cli": 7,
}
ALLOWED = {
    # the solver fans partitions out on Dask when asked; the scale package is its engine
    ("solve", "scale"),
}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    out = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
        elif isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
    return {m for m in out if m.startswith("archive.")}


def _package(module: str) -> str:
    return module.split(".")[1]


def _modules() -> list[Path]:
    return sorted(p for p in ROOT.rglob("*.py") if "migrations" not in p.parts)


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(ROOT)))
def test_imports_point_down(path: Path) -> None:
    rel = path.relative_to(ROOT)
    own = rel.parts[0].removesuffix(".py")
    if own in ("__init__", "__main__"):
        return
    assert own in LAYER, f"{rel}: package {own} has no layer in docs/architecture.md"
    for module in _imports(path):
        other = _package(module)
        if other == "seeds":
            assert own in ("demo", "cli"), f"{rel} imports the demo scenario ({module})"
            continue
        if other in ("migrations",) or other == own or (own, other) in ALLOWED:
            continue
        assert other in LAYER, f"{rel} imports {module}, a package with no layer"
        assert LAYER[other] < LAYER[own] or (LAYER[other] == LAYER[own] and other in
                                             ("registry", "times", "errors", "progress")), \
            f"{rel} ({own}, layer {LAYER[own]}) imports {module} ({other}, layer {LAYER[other]})"
