"""Import lint: the pure core never imports event loops, device, storage, UI or MQTT libraries.

The pure core is controller/protocol, controller/control, controller/science and the driver
codecs controller/drivers/_codec*.py. Imports are read with ``ast`` (nothing is executed)
and followed into other ``controller`` modules, so a pure module cannot reach asyncio
through a helper either.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
PURE_PATTERNS = (
    "controller/protocol/**/*.py",
    "controller/control/**/*.py",
    "controller/science/**/*.py",
    "controller/drivers/_codec*.py",
)
FORBIDDEN = frozenset({"asyncio", "pymodbus", "serial", "textual", "aiomqtt", "paho", "sqlite3"})


def module_name(path: Path, root: Path) -> str:
    parts = list(path.relative_to(root).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def module_path(name: str, root: Path) -> Path | None:
    """Source file of a module under ``root``, or None if it is not one of ours."""
    base = root.joinpath(*name.split("."))
    for candidate in (base.with_suffix(".py"), base / "__init__.py"):
        if candidate.is_file():
            return candidate
    return None


def imports_of(path: Path, root: Path) -> Iterator[tuple[str, int]]:
    """Absolute names of every module ``path`` imports, with the line of the import."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    package = module_name(path, root)
    if path.name != "__init__.py":
        package = package.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base_parts = package.split(".")
                base_parts = base_parts[: len(base_parts) - (node.level - 1)]
                base = ".".join(base_parts + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            yield base, node.lineno
            for alias in node.names:  # "from pkg import sub" may name a submodule
                yield f"{base}.{alias.name}", node.lineno


def violations(path: Path, root: Path, seen: set[Path] | None = None) -> list[str]:
    """Forbidden imports reachable from ``path``, as ``file:line: chain`` strings."""
    seen = set() if seen is None else seen
    if path in seen:
        return []
    seen.add(path)
    found: list[str] = []
    for name, line in imports_of(path, root):
        where = f"{path.relative_to(root)}:{line}"
        if name.split(".")[0] in FORBIDDEN:
            found.append(f"{where}: imports {name}")
        elif name.split(".")[0] == root_package(root, path):
            target = module_path(name, root)
            if target is not None and target != path:
                found += [f"{where} -> {v}" for v in violations(target, root, seen)]
    return found


def root_package(root: Path, path: Path) -> str:
    return path.relative_to(root).parts[0]


def pure_files() -> list[Path]:
    files: set[Path] = set()
    for pattern in PURE_PATTERNS:
        files.update(REPO.glob(pattern))
    return sorted(files)


def test_the_pure_core_is_not_empty() -> None:
    names = {p.relative_to(REPO).as_posix() for p in pure_files()}
    assert "controller/control/_pid.py" in names
    assert "controller/control/_interlocks.py" in names


@pytest.mark.parametrize("path", pure_files(), ids=lambda p: p.relative_to(REPO).as_posix())
def test_pure_module_imports_nothing_impure(path: Path) -> None:
    assert violations(path, REPO) == []


def test_the_lint_catches_direct_relative_and_indirect_imports(tmp_path: Path) -> None:
    pkg = tmp_path / "controller"
    (pkg / "control").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "control" / "__init__.py").write_text("from . import _a\n")
    (pkg / "control" / "_a.py").write_text("import math\nfrom ._b import helper\n")
    (pkg / "control" / "_b.py").write_text("from controller.shell import x\nhelper = 1\n")
    (pkg / "shell.py").write_text("import numpy\n\nimport asyncio.tasks\nx = 1\n")
    (pkg / "control" / "_c.py").write_text("from serial.tools import list_ports\n")
    (pkg / "control" / "_d.py").write_text("import pymodbus.client as modbus\n")

    chain = violations(pkg / "control" / "__init__.py", tmp_path)
    assert chain == [
        "controller/control/__init__.py:1 -> controller/control/_a.py:2 -> "
        "controller/control/_b.py:1 -> controller/shell.py:3: imports asyncio.tasks"
    ]
    assert violations(pkg / "control" / "_c.py", tmp_path) == [
        "controller/control/_c.py:1: imports serial.tools",
        "controller/control/_c.py:1: imports serial.tools.list_ports",
    ]
    assert violations(pkg / "control" / "_d.py", tmp_path) == [
        "controller/control/_d.py:1: imports pymodbus.client"
    ]
