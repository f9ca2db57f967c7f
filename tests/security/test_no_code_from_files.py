"""Protocol and rig files are data: nothing in squall can turn their text into code.

Two checks. A source scan (import-lint style) of every module of ``controller`` and
``simulator`` for the ways Python runs text or loads objects: ``eval``, ``exec``, ``compile``,
``__import__``, pickle-like loaders, unsafe YAML loading, shell commands, and pydantic's
``ImportString`` (which imports whatever a file names). The only dynamic imports allowed are
the command discovery (module names come from the package folder) and the lazy re-exports
(names from tables in the source), each pinned here. Then files carrying shell and Python
payloads in every string are checked and run through ``squall check`` and nothing runs.
"""

from __future__ import annotations

import ast
import contextlib
import io
from pathlib import Path

import pytest

from controller.cli import main

REPO = Path(__file__).resolve().parents[2]
SOURCES = sorted(
    path
    for package in ("controller", "simulator")
    for path in (REPO / package).rglob("*.py")
    if "__pycache__" not in path.parts
)

BANNED_CALLS = {"eval", "exec", "compile", "__import__", "breakpoint"}
BANNED_MODULES = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "cloudpickle"}
BANNED_ATTRIBUTES = {
    ("os", "system"),
    ("os", "popen"),
    ("os", "execv"),
    ("os", "execvp"),
    ("os", "spawnv"),
    ("asyncio", "create_subprocess_shell"),
    ("yaml", "load"),
    ("yaml", "unsafe_load"),
    ("yaml", "full_load"),
    ("pd", "read_pickle"),
    ("pandas", "read_pickle"),
    ("np", "load"),  # allow_pickle hides behind it
    ("numpy", "load"),
}
DYNAMIC_IMPORTS = {
    "controller/cli/__init__.py": 1,  # cmd_<name> modules found in the package folder
    "controller/_lazy.py": 2,  # names from each package's own export table
}
"""Modules allowed to call ``importlib.import_module`` with a computed name, and how often."""


def _findings(text: str, where: str) -> list[str]:
    """Every banned construct in one module's source, as ``where:line: what``."""
    tree = ast.parse(text, filename=where)
    found: list[str] = []
    dynamic = 0
    for node in ast.walk(tree):
        if isinstance(node, ast.Import | ast.ImportFrom):
            names = [a.name for a in node.names]
            modules = [node.module] if isinstance(node, ast.ImportFrom) and node.module else names
            for module in modules:
                if module.split(".")[0] in BANNED_MODULES:
                    found.append(f"{where}:{node.lineno}: imports {module}")
            if isinstance(node, ast.ImportFrom) and "ImportString" in names:
                found.append(f"{where}:{node.lineno}: imports pydantic's ImportString")
        elif isinstance(node, ast.Name) and node.id in ("ImportString", "PyObject"):
            found.append(f"{where}:{node.lineno}: uses {node.id}")
        elif isinstance(node, ast.Call):
            func = node.func
            if isinstance(func, ast.Name) and func.id in BANNED_CALLS:
                found.append(f"{where}:{node.lineno}: calls {func.id}()")
            if isinstance(func, ast.Attribute) and isinstance(func.value, ast.Name):
                pair = (func.value.id, func.attr)
                if pair in BANNED_ATTRIBUTES:
                    found.append(f"{where}:{node.lineno}: calls {'.'.join(pair)}()")
                if pair == ("importlib", "import_module") and not isinstance(
                    node.args[0] if node.args else None, ast.Constant
                ):
                    dynamic += 1
            for keyword in node.keywords:
                if keyword.arg == "shell" and not (
                    isinstance(keyword.value, ast.Constant) and keyword.value.value is False
                ):
                    found.append(f"{where}:{node.lineno}: runs a shell (shell=...)")
    if dynamic != DYNAMIC_IMPORTS.get(where, 0):
        found.append(
            f"{where}: {dynamic} computed import_module call(s), allowed "
            f"{DYNAMIC_IMPORTS.get(where, 0)}"
        )
    return found


def test_the_scan_sees_the_whole_code_base() -> None:
    assert len(SOURCES) > 100
    assert REPO / "controller" / "files" / "_load.py" in SOURCES


def test_the_scan_catches_what_it_looks_for() -> None:
    """The scanner itself: a module doing each banned thing is reported for each."""
    text = (
        "import pickle\nimport os, yaml, importlib\nfrom pydantic import ImportString\n"
        "eval('1')\nexec('x = 1')\nos.system('true')\nyaml.load('a')\n"
        "subprocess.run('ls', shell=True)\nimportlib.import_module(name)\n"
    )
    found = " | ".join(_findings(text, "controller/probe.py"))
    for what in (
        "imports pickle",
        "ImportString",
        "calls eval()",
        "calls exec()",
        "calls os.system()",
        "calls yaml.load()",
        "runs a shell",
        "1 computed import_module call(s), allowed 0",
    ):
        assert what in found, (what, found)
    assert _findings("import json\njson.loads('{}')\n", "controller/probe.py") == []


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: p.relative_to(REPO).as_posix())
def test_no_module_turns_text_into_code(path: Path) -> None:
    text = path.read_text(encoding="utf-8")
    assert _findings(text, path.relative_to(REPO).as_posix()) == []


PAYLOADS = (
    "__import__('os').system('touch {marker}')",
    "$(touch {marker})",
    "`touch {marker}`",
    "{{{{ __import__('os').system('touch {marker}') }}}}",
    "!!python/object/apply:os.system ['touch {marker}']",
)


@pytest.mark.parametrize("payload", PAYLOADS)
def test_payloads_in_protocol_and_rig_strings_stay_text(tmp_path: Path, payload: str) -> None:
    marker = tmp_path / "PWNED"
    text = payload.format(marker=marker).replace("\\", "\\\\").replace('"', '\\"')
    protocol = (REPO / "protocols" / "cold-spell.toml").read_text(encoding="utf-8")
    protocol = protocol.replace(
        'title = "Marine cold spell on Saltmarrow Lagoon seaweed assemblages"', f'title = "{text}"'
    )
    assert text in protocol
    rig = (REPO / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")
    rig = rig.replace('name = "Saltmarrow Lagoon rack 8"', f'name = "{text}"')
    rig = rig.replace('id = "C1"', f'id = "{text}"', 1)  # an id it refuses, named in the error
    (tmp_path / "p.toml").write_text(protocol, encoding="utf-8")
    (tmp_path / "r.toml").write_text(rig, encoding="utf-8")
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(["check", str(tmp_path / "p.toml"), "--rig", str(tmp_path / "r.toml")])
        title_only = main(["check", str(tmp_path / "p.toml")])
    assert title_only == 0  # a title is free text: accepted, and shown as text
    assert code == 2 and "r.toml:" in err.getvalue()  # the odd chamber id is refused
    assert not marker.exists()
