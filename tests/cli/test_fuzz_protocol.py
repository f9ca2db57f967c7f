"""Bad input never gives a traceback: random and mutated protocol files and CLI arguments.

Every case runs the real command line (``controller.cli.main``) and checks:

- it returns 0 or 2 (a ``SystemExit`` other than 0, or any other exception, fails the test);
- on 2, stderr is exactly one line ``squall: error: FILE:LINE: ...`` naming the protocol file
  and a line inside it (or another file the protocol names, such as a CSV series);
- on 0, the file really is a valid protocol (the summary was printed).

The number of examples comes from ``HYPOTHESIS_PROFILE``: a few hundred in all by default,
about ten times more with ``HYPOTHESIS_PROFILE=thorough``.
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import shutil
import string
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from controller.cli import main

REPO = Path(__file__).resolve().parents[2]
EXAMPLES = {
    p.name: p.read_text(encoding="utf-8") for p in sorted((REPO / "protocols").glob("*.toml"))
}
_THOROUGH = os.environ.get("HYPOTHESIS_PROFILE", "") == "thorough"


def _budget(examples: int) -> settings:
    """Settings for one fuzz test: ``examples`` by default, 10x with the thorough profile."""
    return settings(
        max_examples=examples * (10 if _THOROUGH else 1),
        deadline=None,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
        derandomize=not _THOROUGH,
    )


_ERROR = re.compile(r"^squall: error: (?P<file>.+?):(?P<line>\d+): (?P<rest>\S.*)$")


@pytest.fixture(scope="module")
def workdir() -> Iterator[Path]:
    """A scratch folder holding the examples' data/ folder, so CSV references resolve."""
    with tempfile.TemporaryDirectory(prefix="squall-fuzz-") as name:
        folder = Path(name)
        shutil.copytree(REPO / "protocols" / "data", folder / "data")
        yield folder


def _run(argv: list[str]) -> tuple[int, str, str]:
    """Run the CLI, capturing output; a SystemExit other than 0 or any exception propagates."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:  # --help and --version exit 0 through argparse
            if exc.code not in (0, None):
                raise
            code = 0
    return code, out.getvalue(), err.getvalue()


def _check_file(path: Path, content: bytes) -> None:
    """Write ``content`` to ``path``, run ``squall check`` on it and judge the outcome."""
    path.write_bytes(content)
    code, out, err = _run(["check", str(path)])
    assert code in (0, 2), (code, err)
    if code == 0:
        assert "OK: the protocol is valid and compiles." in out
        assert err == ""
        return
    assert err.endswith("\n") and err.count("\n") == 1, err
    match = _ERROR.match(err.rstrip("\n"))
    assert match is not None, f"not FILE:LINE: ...: {err!r}"
    named = Path(match["file"])
    if named == path:
        n_lines = content.count(b"\n") + 1
        assert 1 <= int(match["line"]) <= n_lines, (err, n_lines)
    else:
        # A problem inside another file the protocol names (a CSV series), at its line.
        assert named.is_file(), err


# -- mutations of the valid examples --------------------------------------------------------

_KEY_LINE = re.compile(r"^(\s*)([A-Za-z_][\w.-]*)(\s*=\s*)(.*)$")
_PAIR = re.compile(r"([A-Za-z_][\w-]*)(\s*=\s*)([^,{}\[\]\n]+)")
_VALUES = st.sampled_from(
    [
        '"text"',
        '""',
        "0",
        "-1",
        "-40.0",
        "1e308",
        "-1e308",
        "1e400",
        "nan",
        "inf",
        "-inf",
        "99999999999999999999999999",
        "true",
        "[]",
        "[1, 2]",
        '["C1", "C1"]',
        "{}",
        '{ kind = "hold" }',
        '"3d"',
        '"-5d"',
        '"0s"',
        '"P1D"',
        '"PT0S"',
        '"1e9d"',
        '"nan h"',
        '"25:99"',
        '"2027-13-45"',
        "2027-07-01T00:00:00Z",
        "2027-07-01",
        '"on-launch"',
        '"heatwave"',
        '"storm"',
        '"sun"',
        '"strong"',
        '"data/saltmarrow-sst.csv"',
        '"../nowhere.csv"',
        '"acclimation"',
        '"exposure+99d"',
    ]
)
_KEYS = st.sampled_from(
    [
        "kind",
        "value",
        "to",
        "duration",
        "rate_per_h",
        "rate_per_day",
        "times",
        "blocks",
        "mean_c",
        "amplitude_c",
        "peak",
        "dli_mol_m2_d",
        "sunrise",
        "source",
        "series",
        "offset",
        "starts",
        "groups",
        "chambers",
        "role",
        "category",
        "peak_anomaly_c",
        "threshold_c",
        "baseline_c",
        "seed",
        "gustiness",
        "format",
        "begins",
        "utc_offset",
        "latitude_deg",
        "depth_m",
        "reference_date",
    ]
)
_GARBAGE = st.one_of(
    st.text(max_size=40),
    st.sampled_from(
        [
            "[",
            "[[",
            "]]",
            "[phases]",
            "[[phases]]",
            "[[events]]",
            "[groups.extra]",
            "[site]",
            "= 3",
            "a = ",
            'x = """',
            "x = '",
            "key = value",
            "\x00",
            "\t\t\t",
            "#",
            "a.b.c = 1",
            "phases = 3",
            "[phases.programs]\ntemperature = 1",
        ]
    ),
)


@st.composite
def _mutation(draw: st.DrawFn, text: str) -> str:
    """Apply one random edit to a protocol text."""
    lines = text.split("\n")
    kind = draw(
        st.sampled_from(
            ["delete", "rename", "value", "pair-value", "pair-key", "garbage", "duplicate", "swap"]
        )
    )
    index = draw(st.integers(0, len(lines) - 1))
    keyed = [k for k, line in enumerate(lines) if _KEY_LINE.match(line)]
    if kind == "delete":
        del lines[index]
    elif kind in ("rename", "value") and keyed:
        k = draw(st.sampled_from(keyed))
        match = _KEY_LINE.match(lines[k])
        assert match is not None
        indent, key, eq, value = match.groups()
        if kind == "rename":
            key = draw(
                st.one_of(
                    _KEYS,
                    st.text(alphabet=string.ascii_letters + "_-", min_size=1, max_size=12),
                    st.just(key[:-1] or "k"),
                    st.just(key + "s"),
                )
            )
        else:
            value = draw(_VALUES)
        lines[k] = f"{indent}{key}{eq}{value}"
    elif kind in ("pair-value", "pair-key"):
        joined = "\n".join(lines)
        pairs = list(_PAIR.finditer(joined))
        if not pairs:
            return joined
        found = draw(st.sampled_from(pairs))
        if kind == "pair-value":
            replacement = f"{found.group(1)}{found.group(2)}{draw(_VALUES)}"
        else:
            replacement = f"{draw(_KEYS)}{found.group(2)}{found.group(3)}"
        return joined[: found.start()] + replacement + joined[found.end() :]
    elif kind == "garbage":
        lines.insert(index, draw(_GARBAGE))
    elif kind == "duplicate":
        lines.insert(index, lines[index])
    else:
        other = draw(st.integers(0, len(lines) - 1))
        lines[index], lines[other] = lines[other], lines[index]
    return "\n".join(lines)


@st.composite
def _mutated_example(draw: st.DrawFn) -> str:
    text = EXAMPLES[draw(st.sampled_from(sorted(EXAMPLES)))]
    for _ in range(draw(st.integers(1, 3))):
        text = draw(_mutation(text))
    return text


@_budget(150)
@given(text=_mutated_example())
def test_mutated_examples_never_crash(workdir: Path, text: str) -> None:
    _check_file(workdir / "mutated.toml", text.encode("utf-8"))


@_budget(60)
@given(
    name=st.sampled_from(sorted(EXAMPLES)),
    cut=st.floats(0.0, 1.0),
    noise=st.binary(max_size=12),
)
def test_truncated_and_corrupted_bytes(workdir: Path, name: str, cut: float, noise: bytes) -> None:
    data = EXAMPLES[name].encode("utf-8")
    position = int(cut * len(data))
    _check_file(workdir / "corrupt.toml", data[:position] + noise + data[position + len(noise) :])


@_budget(60)
@given(content=st.one_of(st.binary(max_size=200), st.text(max_size=200).map(str.encode)))
def test_random_bytes(workdir: Path, content: bytes) -> None:
    _check_file(workdir / "random.toml", content)


# -- random documents built from the format's own keys ------------------------------------

_SCALAR = st.one_of(
    st.integers(-(10**20), 10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(max_size=10),
    st.sampled_from(["3d", "squall-protocol/1", "hold", "treatment", "C1", "on-launch", "1h"]),
)


def _toml_value(value: object) -> str:
    """Write a value as inline TOML (always valid TOML)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        if value != value:
            return "nan"
        if value in (float("inf"), float("-inf")):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, int):
        return str(value)
    if isinstance(value, str):
        escaped = value.encode("unicode_escape").decode("ascii").replace('"', '\\"')
        return f'"{escaped}"'
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    assert isinstance(value, dict)
    return "{ " + ", ".join(f'"{k}" = {_toml_value(v)}' for k, v in value.items()) + " }"


_DOCUMENT = st.dictionaries(
    st.one_of(_KEYS, st.sampled_from(["title", "site", "phases", "events", "sampling", "notes"])),
    st.recursive(
        _SCALAR,
        lambda inner: st.one_of(
            st.lists(inner, max_size=3), st.dictionaries(_KEYS, inner, max_size=4)
        ),
        max_leaves=12,
    ),
    max_size=8,
)


@_budget(60)
@given(document=_DOCUMENT)
def test_random_documents_of_known_keys(workdir: Path, document: dict[str, object]) -> None:
    text = "".join(f'"{k}" = {_toml_value(v)}\n' for k, v in document.items())
    _check_file(workdir / "document.toml", text.encode("utf-8"))


# -- command-line arguments -----------------------------------------------------------------

_TOKENS = st.sampled_from(
    [
        "check",
        "preview",
        "--rig",
        "--start",
        "--step",
        "-o",
        "--output",
        "--csv",
        "--frobnicate",
        "-x",
        "-",
        "--",
        "",
        "-h",
        "PROTOCOL",
        "RIG",
        "absent.toml",
        "out.png",
        "out.csv",
        "out.gif",
        "2027-07-01T00:00:00+02:00",
        "2027-07-01",
        "1h",
        "0s",
        "-1h",
    ]
)


@_budget(40)
@given(argv=st.lists(_TOKENS, min_size=0, max_size=6))
def test_command_line_arguments(workdir: Path, argv: list[str]) -> None:
    assume(argv[:1] != ["-h"])  # top-level help is not what this test is about
    protocol = str(REPO / "protocols" / "storm.toml")
    rig = str(REPO / "rigs" / "saltmarrow-rack8.toml")
    concrete = [protocol if a == "PROTOCOL" else rig if a == "RIG" else a for a in argv]
    with contextlib.chdir(workdir):
        code, out, err = _run(concrete)
    assert code in (0, 2), (code, err)
    if code == 2:
        assert err.startswith("squall: error: ") and err.count("\n") == 1, err
    else:
        assert err == ""
        assert out  # a summary, a 'wrote ...' line or a help text
