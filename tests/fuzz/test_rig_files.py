"""Bad rig files never give a traceback: the example rig mutated, corrupted and rebuilt.

Every case writes a rig file and runs ``squall check PROTOCOL --rig RIG`` in-process
(``controller.cli.main``) with the cold-spell example protocol (quick to compile), and checks:

- the exit code is 0 or 2, and nothing raises;
- on 2, standard error is exactly one line ``squall: error: FILE:LINE: field.path: message``
  naming the rig (at a line it has) or the protocol (when the rig no longer fits it);
- on 0, the rig really was accepted (the summary says so) and standard error is empty.

Mutations start from ``rigs/saltmarrow-rack8.toml``: keys deleted or renamed (unknown keys),
values replaced by wrong types and out-of-range numbers, whole tables dropped or doubled,
garbage and broken TOML inserted, lines doubled or swapped, bytes cut or overwritten.
"""

from __future__ import annotations

import re
import string
from pathlib import Path

import pytest
from hypothesis import event, given
from hypothesis import strategies as st

from ._harness import budget, judge_error, run_cli

REPO = Path(__file__).resolve().parents[2]
PROTOCOL = REPO / "protocols" / "cold-spell.toml"
RIG_TEXT = (REPO / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")

_KEY_LINE = re.compile(r"^(\s*)([A-Za-z_][\w-]*)(\s*=\s*)(.*)$")
_HEADER = re.compile(r"^\s*\[\[?[^\]]+\]\]?\s*$")
RIG_KEYS = sorted({m.group(2) for line in RIG_TEXT.splitlines() if (m := _KEY_LINE.match(line))})
"""Every key the example rig uses (the fuzz renames keys into these and builds documents)."""

_VALUES = st.sampled_from(
    [
        '"text"',
        '""',
        "0",
        "0.0",
        "-1",
        "-0.0",
        "-273.16",
        "1e308",
        "-1e308",
        "1e400",
        "nan",
        "-nan",
        "inf",
        "-inf",
        "99999999999999999999999999",
        "9223372036854775807",
        "true",
        "false",
        "[]",
        "[1, 2]",
        '["C1", "C1"]',
        "{}",
        "{ ua_w_k = 1.0 }",
        "2027-07-01T00:00:00Z",
        "2027-07-01",
        "12:00:00",
        '"C1"',
        '"C9"',
        '"lagoon-bath"',
        '"nowhere-bath"',
        '"dropout"',
        '"heater-stuck-on"',
        '"optode"',
        '"modbus"',
        '"temperature"',
        '"../../etc/passwd"',
        '"/dev/null"',
        "\"__import__('os').system('true')\"",
        "'single quoted'",
        '"""multi\nline"""',
    ]
)
_GARBAGE = st.one_of(
    st.text(max_size=30),
    st.sampled_from(
        [
            "[",
            "[[",
            "]]",
            "[[chambers]]",
            "[[baths]]",
            "[[sim.faults]]",
            "[sim]",
            "[io]",
            "[chambers.sim.warp]",
            "[chambers.limits]",
            "[baths.thermal]",
            "= 3",
            "a = ",
            'x = """',
            "x = '",
            "key = value",
            "\x00",
            "\ufeff",
            "#",
            "a.b.c = 1",
            "chambers = 3",
            "sim = 1",
            'id = "C1"',
            "name = 1",
            "[chambers.sim.biology]\ngpp_max_umol_m2_h = -5",
            '[[sim.faults]]\nkind = "leak"\nchamber = "C2"',
        ]
    ),
)


def _sections(lines: list[str]) -> list[tuple[int, int]]:
    """(first, end) line ranges of every table, header included."""
    heads = [k for k, line in enumerate(lines) if _HEADER.match(line)]
    return [(h, heads[n + 1] if n + 1 < len(heads) else len(lines)) for n, h in enumerate(heads)]


@st.composite
def _mutation(draw: st.DrawFn, text: str) -> str:
    """One random edit of a rig text."""
    lines = text.split("\n")
    kind = draw(
        st.sampled_from(
            [
                "delete-key",
                "rename-key",
                "value",
                "number",
                "drop-table",
                "double-table",
                "garbage",
                "duplicate-line",
                "swap-lines",
            ]
        )
    )
    keyed = [k for k, line in enumerate(lines) if _KEY_LINE.match(line)]
    index = draw(st.integers(0, len(lines) - 1))
    if kind in ("delete-key", "rename-key", "value", "number") and keyed:
        k = draw(st.sampled_from(keyed))
        match = _KEY_LINE.match(lines[k])
        assert match is not None
        indent, key, eq, value = match.groups()
        if kind == "delete-key":
            del lines[k]
            return "\n".join(lines)
        if kind == "rename-key":
            key = draw(
                st.one_of(
                    st.sampled_from(RIG_KEYS),
                    st.text(alphabet=string.ascii_lowercase + "_", min_size=1, max_size=14),
                    st.just(key + "_s"),
                )
            )
        elif kind == "value":
            value = draw(_VALUES)
        else:  # a number of the same kind, anywhere on the line
            value = repr(draw(st.floats(allow_nan=True, allow_infinity=False, width=64)))
            value = "nan" if value == "nan" else value
        lines[k] = f"{indent}{key}{eq}{value}"
    elif kind in ("drop-table", "double-table"):
        sections = _sections(lines)
        first, end = draw(st.sampled_from(sections))
        if kind == "drop-table":
            del lines[first:end]
        else:
            lines[end:end] = lines[first:end]
    elif kind == "garbage":
        lines.insert(index, draw(_GARBAGE))
    elif kind == "duplicate-line":
        lines.insert(index, lines[index])
    else:
        other = draw(st.integers(0, len(lines) - 1))
        lines[index], lines[other] = lines[other], lines[index]
    return "\n".join(lines)


@st.composite
def _mutated_rig(draw: st.DrawFn) -> str:
    text = RIG_TEXT
    for _ in range(draw(st.integers(1, 3))):
        text = draw(_mutation(text))
    return text


def check_rig(folder: Path, content: bytes) -> None:
    """Write ``content`` as a rig, check the example protocol against it, judge the result."""
    rig = folder / "fuzzed-rig.toml"
    rig.write_bytes(content)
    code, out, err = run_cli(["check", str(PROTOCOL), "--rig", str(rig)])
    assert code in (0, 2), (code, err)
    if code == 0:
        event("accepted")
        assert err == ""
        assert "OK" in out and "against rig" in out, out
        return
    match = judge_error(err, {rig: content, PROTOCOL: PROTOCOL.read_bytes()})
    event(f"refused, located in the {'rig' if Path(match['file']) == rig else 'protocol'}")


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return tmp_path_factory.mktemp("rig-fuzz")


def test_the_unmutated_rig_passes(folder: Path) -> None:
    """The base case: without this the other tests could pass on a broken set-up."""
    rig = folder / "rig.toml"
    rig.write_text(RIG_TEXT, encoding="utf-8")
    code, out, err = run_cli(["check", str(PROTOCOL), "--rig", str(rig)])
    assert (code, err) == (0, ""), err
    assert "against rig" in out


@budget(150, deadline_ms=None)
@given(text=_mutated_rig())
def test_mutated_rig_files(folder: Path, text: str) -> None:
    check_rig(folder, text.encode("utf-8"))


@budget(60, deadline_ms=None)
@given(cut=st.floats(0.0, 1.0), noise=st.binary(max_size=12))
def test_truncated_and_overwritten_rig_bytes(folder: Path, cut: float, noise: bytes) -> None:
    data = RIG_TEXT.encode("utf-8")
    position = int(cut * len(data))
    check_rig(folder, data[:position] + noise + data[position + len(noise) :])


_SCALAR = st.one_of(
    st.integers(-(10**20), 10**20),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.text(max_size=10),
    st.sampled_from(["C1", "lagoon-bath", "dropout", "optode", "Saltmarrow"]),
)


def _toml_value(value: object) -> str:
    """A value as inline TOML (always valid TOML)."""
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
    st.sampled_from([*RIG_KEYS, "chambers", "baths", "sim", "io", "limits", "control"]),
    st.recursive(
        _SCALAR,
        lambda inner: st.one_of(
            st.lists(inner, max_size=3),
            st.dictionaries(st.sampled_from(RIG_KEYS), inner, max_size=4),
        ),
        max_leaves=12,
    ),
    max_size=8,
)


@budget(60, deadline_ms=None)
@given(document=_DOCUMENT)
def test_random_documents_of_rig_keys(folder: Path, document: dict[str, object]) -> None:
    text = "".join(f'"{k}" = {_toml_value(v)}\n' for k, v in document.items())
    check_rig(folder, text.encode("utf-8"))
