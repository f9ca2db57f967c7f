"""Random command lines over every subcommand: exit 0, 1 or 2 and never a traceback.

The commands and their options are read from the real parser (``build_parser``), so a new
command or option is fuzzed without touching this file. Each case picks a command path (e.g.
``o2 convert`` or ``ctl status``), some of its options with values, and positionals, all drawn
from a pool of awkward values: missing files, empty and garbage files, a folder, numbers out of
range, malformed dates and durations, unknown options, empty strings. Commands run in-process
(``controller.cli.main``) in a scratch folder with an empty standard input, and:

- the exit code is 0, 1 or 2 (``SystemExit`` counts by its code; any exception fails);
- on 2, standard error is one line ``squall: error: ...``; on 1 one line ``squall: failed:``;
- nothing ever prints a traceback.

Nothing is stubbed, but the pool is chosen so no command can start long-running work: it holds
no valid rig, no run log and no broker URL (so ``run``, ``serve``, ``simulate``, ``tune``,
``watch``, ``replay`` and ``ctl`` can only refuse), and ``demo`` always gets ``--no-run`` (its
simulated run takes about a minute) and is drawn less often (it then succeeds, in about 2 s).
A valid protocol, a site series and plain numbers are in the pool, so ``check``, ``preview``,
``heatwave``, ``o2`` and ``schema`` sometimes succeed.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import shutil
from collections.abc import Iterator
from pathlib import Path
from unittest import mock

import pytest
from hypothesis import event, given
from hypothesis import strategies as st

from controller.cli import build_parser

from ._harness import budget, run_cli

REPO = Path(__file__).resolve().parents[2]


def command_table() -> dict[tuple[str, ...], argparse.ArgumentParser]:
    """Every runnable command path (``("o2", "convert")`` …) and its parser."""
    table: dict[tuple[str, ...], argparse.ArgumentParser] = {}

    def walk(path: tuple[str, ...], parser: argparse.ArgumentParser) -> None:
        subs = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
        if not subs:
            table[path] = parser
            return
        for name, child in subs[0].choices.items():
            walk((*path, name), child)

    walk((), build_parser())
    return table


COMMANDS = command_table()
NO_LONG_WORK: dict[tuple[str, ...], list[str]] = {("demo",): ["--no-run"]}
"""Arguments always added to a command so it cannot start long work (see the module doc)."""
_NEVER = {"-h", "--help", "--version"}
_RARE = {"demo"}
"""Commands drawn a fifth as often as the others: with any arguments they succeed, and
writing and drawing the example takes about 2 s."""
_TOP_DRAW = sorted(
    name for name in {p[0] for p in COMMANDS} for _ in range(1 if name in _RARE else 5)
)
"""Top-level commands, each as often as the others (a command's actions share its turn)."""

POOL = [
    "absent.toml",
    "absent.sqlite",
    "no/such/folder/file.csv",
    "empty.toml",
    "garbage.sqlite",
    "garbage.toml",
    "adir",
    "protocol.toml",
    "sst.csv",
    "out.png",
    "out.csv",
    "out.parquet",
    "out.json",
    "out.html",
    "out.gif",
    "",
    " ",
    "-",
    "--",
    "--frobnicate",
    "-x",
    "0",
    "-1",
    "3",
    "0.5",
    "1e400",
    "-1e308",
    "nan",
    "inf",
    "max",
    "99999999999999999999",
    "1h",
    "-1h",
    "0s",
    "P1D",
    "3d 6h",
    "2027-07-01T00:00:00+02:00",
    "2027-07-01",
    "2027-13-45T99:00",
    "yesterday",
    "C1",
    "C99",
    "umol/L",
    "%sat",
    "furlongs",
    "protocol",
    "rig",
    "heatwave",
    "ü" * 3,
    "a" * 300,
    "x=1",
]
"""Values for options and positionals (names of files created in the scratch folder)."""


@pytest.fixture(scope="module")
def workdir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """The scratch folder with the files the pool names."""
    folder = tmp_path_factory.mktemp("cli-fuzz")
    (folder / "empty.toml").write_bytes(b"")
    (folder / "garbage.sqlite").write_bytes(bytes(range(256)) * 8)
    (folder / "garbage.toml").write_text("[[[ not toml\n= =\n", encoding="utf-8")
    (folder / "adir").mkdir()
    shutil.copy(REPO / "protocols" / "cold-spell.toml", folder / "protocol.toml")
    shutil.copy(REPO / "protocols" / "data" / "saltmarrow-sst.csv", folder / "sst.csv")
    with contextlib.chdir(folder):
        yield folder


@st.composite
def command_lines(draw: st.DrawFn) -> tuple[tuple[str, ...], list[str]]:
    """A command path and a random argument list for it."""
    top = draw(st.sampled_from(_TOP_DRAW))
    path = draw(st.sampled_from(sorted(p for p in COMMANDS if p[0] == top)))
    parser = COMMANDS[path]
    args: list[str] = []
    for action in parser._actions:
        if set(action.option_strings) & _NEVER:
            continue
        if action.option_strings:
            if not action.required and not draw(st.booleans()):
                continue
            args.append(draw(st.sampled_from(action.option_strings)))
            if action.nargs != 0:
                args.append(draw(_values(action)))
        elif draw(st.integers(0, 9)) > 0:  # positionals: usually given
            args.append(draw(_values(action)))
    args = draw(st.permutations(args)) if draw(st.booleans()) else args
    for _ in range(draw(st.sampled_from([0, 0, 0, 1, 2]))):  # now and then a stray token
        args.insert(draw(st.integers(0, len(args))), draw(st.sampled_from(POOL)))
    return path, [*args, *NO_LONG_WORK.get(path, [])]


NUMBERS = ["0", "-1", "1", "3", "0.5", "35", "1e400", "-1e308", "nan", "inf", "1e-320", "7"]
"""Values for options parsed as numbers (so more cases get past argument parsing)."""


_PLAIN = [v for v in POOL if not v.startswith("-")]
_DASHED = [v for v in POOL if v.startswith("-")]


def _values(action: argparse.Action) -> st.SearchStrategy[str]:
    """A value for an option or positional: mostly a choice or number if it takes one, else
    from the pool; a value that looks like an option (``-x``) one time in forty."""
    if action.choices:
        usual = st.sampled_from(sorted(map(str, action.choices)))
    elif action.type in (int, float):
        usual = st.sampled_from(NUMBERS)
    else:
        usual = st.sampled_from(_PLAIN)
    odd = st.sampled_from(_DASHED if action.choices or action.type in (int, float) else POOL)
    return st.integers(0, 39).flatmap(lambda n: odd if n == 0 else usual)


def test_every_command_is_reached() -> None:
    """The table the fuzz draws from holds every top-level command and nested actions."""
    top = {path[0] for path in COMMANDS}
    assert {"check", "run", "analyze", "o2", "heatwave", "ctl", "demo", "schema"} <= top
    assert ("o2", "convert") in COMMANDS and ("ctl", "status") in COMMANDS


@budget(200, deadline_ms=None)
@given(case=command_lines())
def test_random_command_lines(workdir: Path, case: tuple[tuple[str, ...], list[str]]) -> None:
    path, args = case
    with mock.patch("sys.stdin", io.StringIO("")):
        code, out, err = run_cli([*path, *args])
    assert "Traceback" not in err and "Traceback" not in out, err
    assert code in (0, 1, 2), (code, err)
    stage = "arguments" if "--help')" in err else "command"
    event(f"exit {code} ({stage})" if code == 2 else f"exit {code}")
    event(f"command {path[0]}")
    if code == 2:
        assert err.startswith("squall: error: ") and err.count("\n") == 1, err
    elif code == 1:
        assert err.startswith("squall: failed: ") and err.count("\n") == 1, err


LONG = "a" * 300
"""A file name longer than file systems allow (255 bytes): ``stat`` fails with ENAMETOOLONG,
which ``Path.exists`` does not swallow. The thorough run (``FUZZ_EXAMPLES=1000``) found six
commands tracing back on it; the CLI now turns it into a located error, and this keeps it so."""


@pytest.mark.parametrize(
    "argv",
    [
        ["check", LONG],
        ["check", "protocol.toml", "--rig", LONG],
        ["preview", "protocol.toml", "-o", "x.png", "--csv", LONG],
        ["run", "protocol.toml", "--rig", LONG, "--sim"],
        ["simulate", "--rig", LONG],
        ["tune", "--rig", LONG, "C1"],
        ["ctl", "--log", LONG, "status"],
        ["demo", "--no-run", "--out", LONG],
        ["heatwave", "detect", LONG, "--json", "x.json"],
        ["schema", "rig", "-o", f"{LONG}/x.json"],
        ["replay", LONG],
        ["watch", LONG],
        ["analyze", LONG],
        ["run", "--resume", LONG],
        ["analyze", "absent.sqlite", "--json", LONG],
        ["export", "-o", f"{LONG}.csv", "absent.sqlite"],
        ["schedule", "list", "--schedule", LONG],
    ],
    ids=lambda argv: " ".join(a.replace(LONG, "LONG") for a in argv)[:40],
)
def test_a_file_name_too_long_is_a_clear_error(workdir: Path, argv: list[str]) -> None:
    with mock.patch("sys.stdin", io.StringIO("")):
        code, _out, err = run_cli(argv)
    assert code == 2, (code, err)
    assert err.startswith("squall: error: ") and err.count("\n") == 1, err
