"""TOML locator: the line of every key, array item and table, also in half-written files."""

from __future__ import annotations

import tomllib
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.files import TomlPath, context_at_line, index_toml

DOC = """\
# comment line
format = "squall-protocol/1"
notes = \"\"\"
line one with a fake key = 3
[not.a.table]
\"\"\"
site.name = "Saltmarrow"
site."odd key" = 'literal # not a comment'

[groups.warm]  # trailing comment
role = "treatment"
chambers = [
  "C1",  # first

  "C2",
]

[[phases]]
name = "a"
  [phases.programs]
  temperature = [ { kind = "hold", value = 1.0, inner = { deep = [1, 2] } },
                  { kind = "ramp", to = 2.0 } ]

[[phases]]
name = "b"
  [[phases.marks]]
  at = 1
  [[phases.marks]]
  at = 2

[[phases]]
name = "c"
when = 2027-06-01 08:00:00+02:00
"""

EXPECTED: list[tuple[TomlPath, int]] = [
    (("format",), 2),
    (("notes",), 3),
    (("site",), 7),
    (("site", "name"), 7),
    (("site", "odd key"), 8),
    (("groups",), 10),
    (("groups", "warm"), 10),
    (("groups", "warm", "role"), 11),
    (("groups", "warm", "chambers"), 12),
    (("groups", "warm", "chambers", 0), 13),
    (("groups", "warm", "chambers", 1), 15),
    (("phases",), 18),
    (("phases", 0), 18),
    (("phases", 0, "name"), 19),
    (("phases", 0, "programs"), 20),
    (("phases", 0, "programs", "temperature"), 21),
    (("phases", 0, "programs", "temperature", 0), 21),
    (("phases", 0, "programs", "temperature", 0, "inner", "deep", 1), 21),
    (("phases", 0, "programs", "temperature", 1), 22),
    (("phases", 0, "programs", "temperature", 1, "to"), 22),
    (("phases", 1), 24),
    (("phases", 1, "marks", 0), 26),
    (("phases", 1, "marks", 0, "at"), 27),
    (("phases", 1, "marks", 1, "at"), 29),
    (("phases", 2, "when"), 33),
]


@pytest.mark.parametrize(("path", "line"), EXPECTED, ids=[str(p) for p, _ in EXPECTED])
def test_known_document_lines(path: TomlPath, line: int) -> None:
    tomllib.loads(DOC)  # the fixture itself is valid TOML
    assert index_toml(DOC).lines[path] == line


def test_text_inside_strings_is_not_a_key() -> None:
    index = index_toml(DOC)
    assert ("not",) not in index.lines
    assert ("line one with a fake key",) not in index.lines
    assert not index.has(("phases", 3))


def test_line_of_falls_back_to_nearest_parent() -> None:
    index = index_toml(DOC)
    assert index.line_of(("phases", 1, "duration")) == 24
    assert index.line_of(("groups", "cold", "role")) == 10
    assert index.line_of(("title",)) == 1
    assert index.line_of(()) == 1


def test_explicit_header_wins_over_implicit_table() -> None:
    text = "[a.b]\nx = 1\n\n[a]\ny = 2\n"
    tomllib.loads(text)
    index = index_toml(text)
    assert index.lines[("a",)] == 4
    assert index.lines[("a", "b")] == 1


def test_multiline_string_with_escaped_and_extra_quotes() -> None:
    text = 'a = """x\\"""y"""""\nb = 1\nc = \'\'\'q\'\'\'\'\nd = 2\n'
    tomllib.loads(text)
    index = index_toml(text)
    assert index.lines[("b",)] == 2
    assert index.lines[("d",)] == 4


def test_unicode_escape_in_quoted_key() -> None:
    text = '"a\\u0020b" = 1\n'
    assert tomllib.loads(text) == {"a b": 1}
    assert index_toml(text).lines[("a b",)] == 1


@pytest.mark.parametrize(
    ("text", "line", "expected"),
    [
        ("[t]\nx = 1\ny = = 2\n", 3, ("t", "y")),
        ("[[p]]\n[[p]]\nname = \n", 3, ("p", 1, "name")),
        ("a = [\n 1,\n 2\n 3,\n]\n", 4, ("a",)),
        ("[t\nx = 1\n", 1, None),
        ("x = 1\n\n= 2\n", 3, None),
    ],
)
def test_context_of_a_broken_line(text: str, line: int, expected: TomlPath | None) -> None:
    with pytest.raises(tomllib.TOMLDecodeError):
        tomllib.loads(text)
    assert context_at_line(text, line) == expected


def test_context_never_raises_on_garbage() -> None:
    for text in ["\x00\x01", '"', "[[", "a = {", "a = [" * 3000, "= 1", "a.=1"]:
        context_at_line(text, 1)
        index_toml(text)


# --- property: a writer that records where it puts things, read back by the locator ----------

_KEYS = st.sampled_from(["a", "b", "temp_c", "x-y", "odd key", "dot.ted", "ünï", "K9"])
_SCALARS = st.one_of(
    st.integers(-(10**6), 10**6),
    st.floats(allow_nan=False, allow_infinity=False, width=32),
    st.booleans(),
    st.text(alphabet=st.characters(codec="utf-8", exclude_categories=["Cs", "Cc"]), max_size=8),
)


def _key(name: str) -> str:
    if (
        name.replace("_", "").replace("-", "").isascii()
        and name.replace("_", "").replace("-", "").isalnum()
    ):
        return name
    return '"' + name.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _scalar(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return repr(value)


class _Writer:
    def __init__(self) -> None:
        self.lines: list[str] = []
        self.where: dict[TomlPath, int] = {}

    def put(self, text: str, path: TomlPath | None = None) -> int:
        self.lines.append(text)
        if path is not None:
            self.where[path] = len(self.lines)
        return len(self.lines)

    def value(self, path: TomlPath, value: Any, prefix: str, multiline: bool) -> None:
        if isinstance(value, dict):
            inner = ", ".join(f"{_key(k)} = {_inline(v)}" for k, v in value.items())
            line = self.put(f"{prefix}{{ {inner} }}", path)
            self._inline_paths(path, value, line)
        elif isinstance(value, list) and multiline:
            self.put(f"{prefix}[", path)
            for k, item in enumerate(value):
                self.value((*path, k), item, "  ", multiline=False)
                self.lines[-1] += ","
            self.put("]")
        elif isinstance(value, list):
            line = self.put(f"{prefix}{_inline(value)}", path)
            self._inline_paths(path, value, line)
        else:
            self.put(f"{prefix}{_scalar(value)}", path)

    def _inline_paths(self, path: TomlPath, value: Any, line: int) -> None:
        self.where[path] = line
        if not isinstance(value, dict | list):
            return
        items = value.items() if isinstance(value, dict) else enumerate(value)
        for key, item in items:
            self._inline_paths((*path, key), item, line)


def _inline(value: Any) -> str:
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_inline(v)}" for k, v in value.items()) + " }"
    if isinstance(value, list):
        return "[" + ", ".join(_inline(v) for v in value) + "]"
    return _scalar(value)


_LEAF = st.one_of(
    _SCALARS,
    st.lists(_SCALARS, max_size=3),
    st.dictionaries(_KEYS, _SCALARS, max_size=3),
    st.lists(st.dictionaries(_KEYS, _SCALARS, max_size=2), max_size=3),
)


@st.composite
def _documents(draw: st.DrawFn) -> tuple[str, dict[TomlPath, int]]:
    writer = _Writer()
    writer.put("# generated")

    def table(path: TomlPath, depth: int) -> None:
        for name, value in draw(st.dictionaries(_KEYS, _LEAF, max_size=4)).items():
            multiline = isinstance(value, list) and draw(st.booleans())
            writer.value((*path, name), value, f"{_key(name)} = ", multiline)
        if depth >= 2:
            return
        used = {p[len(path)] for p in writer.where if p[: len(path)] == path and len(p) > len(path)}
        for name in draw(st.lists(_KEYS, max_size=2, unique=True)):
            if name in used:
                continue
            used.add(name)
            header = ".".join(_key(str(p)) for p in (*path, name) if not isinstance(p, int))
            if draw(st.booleans()):
                writer.put("")
                writer.put(f"[{header}]", (*path, name))
                table((*path, name), depth + 1)
            else:
                for k in range(draw(st.integers(1, 3))):
                    writer.put(f"[[{header}]]", (*path, name, k))
                    table((*path, name, k), depth + 1)

    table((), 0)
    return "\n".join(writer.lines) + "\n", writer.where


@settings(max_examples=150, deadline=None)
@given(_documents())
def test_locator_finds_every_written_path(doc: tuple[str, dict[TomlPath, int]]) -> None:
    text, where = doc
    tomllib.loads(text)  # the writer produces valid TOML
    found = index_toml(text).lines
    for path, line in where.items():
        assert found.get(path) == line, (path, text)
