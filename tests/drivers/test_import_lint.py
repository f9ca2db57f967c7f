"""The driver codecs are pure: no transport, event loop, clock or socket, even indirectly."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
DRIVERS = ROOT / "controller" / "drivers"
CODEC_MODULES = (
    "controller.drivers._codec_modbus",
    "controller.drivers._codec_optode",
    "controller.drivers._modbus_scalar",
    "controller.drivers._optode_records",
    "controller.drivers._register_map",
)
FORBIDDEN = {
    "aiomqtt",
    "asyncio",
    "paho",
    "pymodbus",
    "selectors",
    "serial",
    "socket",
    "subprocess",
    "textual",
    "threading",
    "time",
}


def module_file(name: str) -> Path | None:
    """Source file of a module inside this checkout, or None for third-party/stdlib."""
    parts = name.split(".")
    if parts[0] not in ("controller", "simulator"):
        return None
    base = ROOT.joinpath(*parts)
    for candidate in (base.with_suffix(".py"), base / "__init__.py"):
        if candidate.exists():
            return candidate
    return None


def imports_of(path: Path, package: str) -> set[str]:
    """Absolute names of every module a file imports (top level or nested)."""
    names: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.rsplit(".", node.level - 1)[0] if node.level > 1 else package
                names.add(f"{base}.{node.module}" if node.module else base)
            elif node.module:
                names.add(node.module)
    return names


def transitive_imports(start: str) -> dict[str, str]:
    """Every module reachable from ``start`` through in-repo imports, with who imported it."""
    seen: dict[str, str] = {start: "<root>"}
    todo = [start]
    while todo:
        name = todo.pop()
        path = module_file(name)
        if path is None:
            continue
        package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
        for imported in imports_of(path, package):
            if imported not in seen:
                seen[imported] = name
                todo.append(imported)
    return seen


@pytest.mark.parametrize("module", CODEC_MODULES)
def test_codec_imports_nothing_impure(module: str) -> None:
    reached = transitive_imports(module)
    bad = {name: via for name, via in reached.items() if name.split(".")[0] in FORBIDDEN}
    assert not bad, f"{module} reaches forbidden modules (module: imported by): {bad}"


def test_every_codec_file_is_linted() -> None:
    # a new pure module in controller/drivers must be added to CODEC_MODULES (or be a
    # transport, which by convention is named _transport_*.py)
    on_disk = {
        f"controller.drivers.{p.stem}"
        for p in DRIVERS.glob("_*.py")
        if not p.stem.startswith("_transport") and p.stem != "__init__"
    }
    assert on_disk == set(CODEC_MODULES)


def test_the_lint_catches_a_forbidden_import(tmp_path: Path) -> None:
    bad = tmp_path / "bad.py"
    bad.write_text("import os\nfrom asyncio import sleep\nimport serial.tools\n", encoding="utf-8")
    assert {"asyncio", "serial.tools", "os"} <= imports_of(bad, "pkg")


def test_the_lint_follows_in_repo_imports() -> None:
    reached = transitive_imports("controller.drivers._register_map")
    assert {"controller._model", "controller.errors", "pydantic", "struct"} <= set(reached)
