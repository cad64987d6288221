"""The import rules of the layout (DEVELOPERS.md, "Layers"), read from the source with ast.

Every import is resolved to an absolute module name first, relative ones included
(``from ..link.transport import ArmClient`` inside ``runtime/control/solver.py`` is
``runtime.link.transport``), so a rule cannot be dodged by the import's spelling.
``test_checker_sees_a_bad_relative_import`` proves that on a planted module.

The folders and what each may import from the rest of ``runtime``:

- ``arm``      → nothing above it (pure numpy)
- ``control``  → ``arm``
- ``link``     → ``arm`` (never ``control``)
- ``operator`` → ``control``, ``link``, ``arm``
- ``sessions`` → ``control``, ``link``, ``arm``, ``operator``
- ``commands`` → anything except other commands
- ``sim``      → ``runtime.arm`` and ``runtime.link`` only

``errors``, ``tomlsource`` and ``palette`` are shared by all. Pure modules (the arm, the
control cycle but its loop, the wire protocol, the relay's schedule, preflight's judgement,
the palette) import no device, socket, clock, thread, process or plotting library, directly
or through another runtime module.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

SHARED = {"runtime", "runtime.errors", "runtime.tomlsource", "runtime.palette"}
ALLOWED = {
    "arm": {"arm"},
    "control": {"arm", "control"},
    "link": {"arm", "link"},
    "operator": {"arm", "control", "link", "operator"},
    "sessions": {"arm", "control", "link", "operator", "sessions"},
}
PURE_FOLDERS = ["runtime/arm", "runtime/control"]
PURE_MODULES = ["runtime/errors.py", "runtime/tomlsource.py", "runtime/palette.py",
                "runtime/link/protocol.py", "runtime/link/relay.py",
                "runtime/sessions/preflight.py"]
NOT_PURE = {"runtime/control/loop.py"}
FORBIDDEN_IN_PURE = {"zmq", "pygame", "pybullet", "matplotlib", "time", "threading", "socket",
                     "subprocess", "sim", "multiprocessing", "asyncio"}


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports_of(path: Path, source: str | None = None) -> set[str]:
    """Every module `path` imports, as absolute dotted names (relative imports resolved)."""
    tree = ast.parse(source if source is not None else path.read_text(encoding="utf-8"))
    name = module_name(path)
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                stem = ".".join(base + ([node.module] if node.module else []))
            else:
                stem = node.module or ""
            found.add(stem)
            # `from . import x` or `from .pkg import mod` may name submodules
            found.update(f"{stem}.{alias.name}" for alias in node.names
                         if _is_module(f"{stem}.{alias.name}"))
    return found


def _is_module(dotted: str) -> bool:
    path = ROOT.joinpath(*dotted.split("."))
    return path.with_suffix(".py").exists() or (path / "__init__.py").exists()


def folder_of(module: str) -> str | None:
    parts = module.split(".")
    if len(parts) >= 2 and parts[0] == "runtime" and (ROOT / "runtime" / parts[1]).is_dir():
        return parts[1]
    return None


def runtime_files(under: str = "runtime") -> list[Path]:
    return sorted(p for p in (ROOT / under).rglob("*.py") if "__pycache__" not in p.parts)


def layer_violations(paths: list[Path], source: str | None = None) -> list[str]:
    bad = []
    for path in paths:
        folder = folder_of(module_name(path))
        if folder not in ALLOWED:
            continue
        for target in imports_of(path, source):
            if not target.startswith("runtime") or target in SHARED:
                continue
            if folder_of(target) not in ALLOWED[folder]:
                bad.append(f"{module_name(path)} imports {target}")
    return bad


def test_each_folder_imports_only_what_its_layer_allows() -> None:
    assert layer_violations(runtime_files()) == []


def test_checker_sees_a_bad_relative_import() -> None:
    """The hole this test once had: a relative import of the link inside the solver."""
    solver = ROOT / "runtime" / "control" / "solver.py"
    planted = solver.read_text(encoding="utf-8") + "\nfrom ..link.transport import ArmClient\n"
    assert layer_violations([solver], planted) == [
        "runtime.control.solver imports runtime.link.transport"]
    assert layer_violations([solver]) == []


def _pure_files() -> list[Path]:
    files = [p for folder in PURE_FOLDERS for p in runtime_files(folder)]
    files += [ROOT / m for m in PURE_MODULES]
    return [p for p in files if str(p.relative_to(ROOT)) not in NOT_PURE]


@pytest.mark.parametrize("path", _pure_files(), ids=lambda p: str(p.relative_to(ROOT)))
def test_pure_modules_reach_no_edges(path: Path) -> None:
    """Direct imports, and through every runtime module they import in turn."""
    seen: set[str] = set()
    todo = [path]
    while todo:
        current = todo.pop()
        for target in imports_of(current):
            root = target.split(".")[0]
            assert root not in FORBIDDEN_IN_PURE, \
                f"{module_name(path)} reaches {target} (through {module_name(current)})"
            if root == "runtime" and target not in seen:
                seen.add(target)
                dotted = ROOT.joinpath(*target.split("."))
                for candidate in (dotted.with_suffix(".py"), dotted / "__init__.py"):
                    if candidate.exists():
                        todo.append(candidate)


def test_runtime_never_imports_sim_or_pybullet() -> None:
    for path in runtime_files():
        bad = {t for t in imports_of(path) if t.split(".")[0] in {"sim", "pybullet"}}
        assert not bad, f"{module_name(path)} imports {sorted(bad)}"


def test_no_command_imports_another() -> None:
    bad = []
    for path in runtime_files("runtime/commands"):
        me = module_name(path)
        for target in imports_of(path):
            if target.startswith("runtime.commands.") and target != me:
                bad.append(f"{me} imports {target}")
    assert bad == []


def test_sim_imports_only_the_arm_and_the_link() -> None:
    for path in runtime_files("sim"):
        for target in imports_of(path):
            if target.startswith("runtime"):
                assert target in SHARED or folder_of(target) in {"arm", "link"}, \
                    f"{module_name(path)} imports {target}"
