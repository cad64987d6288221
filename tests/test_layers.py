"""The import rules of the layout (docs: DEVELOPERS.md, "Layers"), read from the source with ast.

Pure modules do no I/O and read no clock; `runtime` never imports `sim`; heavy libraries stay
at the edges.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

PURE = ["model", "kinematics", "solver", "limits", "mapping", "protocol", "safety", "transforms",
        "tomlsource", "urdf_loader",
        "errors", "preflight", "relay"]
FORBIDDEN_IN_PURE = {"zmq", "pygame", "pybullet", "matplotlib", "time", "threading", "socket",
                     "subprocess", "sim"}


def imported_roots(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    roots = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            roots.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            roots.add(node.module.split(".")[0])
    return roots


@pytest.mark.parametrize("name", PURE)
def test_pure_modules_import_no_edges(name: str) -> None:
    path = ROOT / "runtime" / f"{name}.py"
    if not path.exists():
        pytest.fail(f"runtime/{name}.py is part of the layout and is missing")
    bad = imported_roots(path) & FORBIDDEN_IN_PURE
    assert not bad, f"runtime/{name}.py imports {sorted(bad)}"


def test_runtime_never_imports_sim_or_pybullet() -> None:
    for path in (ROOT / "runtime").rglob("*.py"):
        bad = imported_roots(path) & {"sim", "pybullet"}
        assert not bad, f"{path.relative_to(ROOT)} imports {sorted(bad)}"


def test_sim_imports_only_the_allowed_runtime_modules() -> None:
    allowed = {"runtime.protocol", "runtime.model", "runtime.kinematics", "runtime.errors",
               "runtime.transforms", "runtime.transport", "runtime.pipe_link"}
    for path in (ROOT / "sim").rglob("*.py"):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and node.module and \
                    node.module.startswith("runtime"):
                assert node.module in allowed, f"{path.name} imports {node.module}"
