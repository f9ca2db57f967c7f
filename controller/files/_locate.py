"""Find the line where each key, array item or table of a TOML document is written.

Rule: this module is pure (text in, line numbers out) and never raises on odd input. It is a
scanner, not a validator: :mod:`tomllib` decides whether a document is valid; this module only
answers "on which line is ``phases[2].programs.temperature[0]`` written?". On text it cannot
follow (a half-written file, or a prefix cut inside a value) it stops and returns what it has
found so far, together with the path of the value it was inside when it stopped.

A *path* is a tuple of keys (``str``) and array indices (``int``), the same shape as a pydantic
error ``loc`` once union tags are removed: ``("phases", 2, "programs", "temperature", 0)``.
Array-of-tables headers (``[[phases]]``) count their occurrences per parent, so the third
``[[phases]]`` header is ``("phases", 2)`` and a ``[phases.programs]`` header after it is
``("phases", 2, "programs")``.
"""

from __future__ import annotations

import bisect
import re
from dataclasses import dataclass, field
from string import ascii_letters, digits

__all__ = ["TomlIndex", "TomlPath", "context_at_line", "index_toml"]

TomlPath = tuple[str | int, ...]
"""A key path into a TOML document: keys (``str``) and 0-based array indices (``int``)."""

_BARE_KEY_CHARS = frozenset(ascii_letters + digits + "_-")
_SCALAR_STOP = frozenset(",]}#\n\r")
_ESCAPES = {"b": "\b", "t": "\t", "n": "\n", "f": "\f", "r": "\r", '"': '"', "\\": "\\"}


class _Stop(Exception):
    """The scanner met text it cannot follow; scanning ends there."""


@dataclass(frozen=True)
class TomlIndex:
    """Where each path of one TOML document is written.

    Attributes
    ----------
    lines
        1-based line of every key, array item and table header found, by path. A table made
        implicitly by a dotted key or a deeper header points at the first line that made it;
        an explicit ``[table]`` header wins over that.
    stopped_in
        Path of the innermost value the scanner was inside when it stopped early (``None``
        when the document was scanned to its end or it stopped between statements).
    """

    lines: dict[TomlPath, int] = field(default_factory=dict)
    stopped_in: TomlPath | None = None

    def line_of(self, path: TomlPath) -> int:
        """Line of ``path`` or, if it is not written in the file, of its nearest written parent.

        Parameters
        ----------
        path
            Key path (keys and 0-based indices), dimensionless.

        Returns
        -------
        int
            1-based line number; 1 for paths whose only written ancestor is the document root.
        """
        for k in range(len(path), 0, -1):
            line = self.lines.get(tuple(path[:k]))
            if line is not None:
                return line
        return 1

    def has(self, path: TomlPath) -> bool:
        """Whether ``path`` itself is written in the document (not only a parent of it)."""
        return tuple(path) in self.lines


class _Scanner:
    """Single-pass scanner over TOML text recording the line of every path it meets."""

    def __init__(self, text: str) -> None:
        self.s = text
        self.n = len(text)
        self.i = 0
        self.line_starts = [0] + [m.end() for m in re.finditer("\n", text)]
        self.explicit: dict[TomlPath, int] = {}
        self.implicit: dict[TomlPath, int] = {}
        self.aot_len: dict[TomlPath, int] = {}
        self.table: TomlPath = ()
        self.open: list[TomlPath] = []
        self.written: list[tuple[TomlPath, int]] = []

    # -- positions -------------------------------------------------------------------------
    def line(self, pos: int) -> int:
        return bisect.bisect_right(self.line_starts, pos)

    def record(self, path: TomlPath, pos: int, *, explicit: bool) -> None:
        line = self.line(pos)
        target = self.explicit if explicit else self.implicit
        target.setdefault(path, line)
        if explicit:
            self.written.append((path, line))

    def peek(self, k: int = 0) -> str:
        j = self.i + k
        return self.s[j] if j < self.n else ""

    def expect(self, token: str) -> None:
        if not self.s.startswith(token, self.i):
            raise _Stop
        self.i += len(token)

    # -- trivia ----------------------------------------------------------------------------
    def skip_ws(self) -> None:
        while self.i < self.n and self.s[self.i] in " \t":
            self.i += 1

    def skip_comment(self) -> None:
        if self.peek() == "#":
            end = self.s.find("\n", self.i)
            self.i = self.n if end < 0 else end

    def skip_trivia(self) -> None:
        """Skip spaces, tabs, newlines and comments."""
        while self.i < self.n:
            c = self.s[self.i]
            if c in " \t\r\n":
                self.i += 1
            elif c == "#":
                self.skip_comment()
            else:
                return

    # -- document --------------------------------------------------------------------------
    def run(self) -> None:
        while True:
            self.skip_trivia()
            if self.i >= self.n:
                return
            if self.s.startswith("[[", self.i):
                self.header(array=True)
            elif self.peek() == "[":
                self.header(array=False)
            else:
                self.keyval(self.table)
            self.skip_ws()
            self.skip_comment()
            if self.i < self.n and self.peek() not in "\r\n":
                raise _Stop

    def header(self, *, array: bool) -> None:
        start = self.i
        self.i += 2 if array else 1
        self.skip_ws()
        parts = self.key()
        self.skip_ws()
        self.expect("]]" if array else "]")
        concrete: TomlPath = ()
        for k, part in enumerate(parts):
            concrete = (*concrete, part)
            last = k == len(parts) - 1
            if last and array:
                index = self.aot_len.get(concrete, 0)
                self.aot_len[concrete] = index + 1
                self.record(concrete, start, explicit=False)
                concrete = (*concrete, index)
                self.record(concrete, start, explicit=True)
            elif concrete in self.aot_len:
                concrete = (*concrete, self.aot_len[concrete] - 1)
            else:
                self.record(concrete, start, explicit=last)
        self.table = concrete

    def keyval(self, base: TomlPath) -> None:
        start = self.i
        parts = self.key()
        path = base
        for part in parts[:-1]:
            path = (*path, part)
            self.record(path, start, explicit=False)
        path = (*path, parts[-1])
        self.record(path, start, explicit=True)
        self.skip_ws()
        self.expect("=")
        self.skip_ws()
        self.value(path)

    def key(self) -> list[str]:
        parts: list[str] = []
        while True:
            self.skip_ws()
            c = self.peek()
            if c == '"':
                parts.append(self.basic_string())
            elif c == "'":
                parts.append(self.literal_string())
            else:
                start = self.i
                while self.i < self.n and self.s[self.i] in _BARE_KEY_CHARS:
                    self.i += 1
                if self.i == start:
                    raise _Stop
                parts.append(self.s[start : self.i])
            self.skip_ws()
            if self.peek() != ".":
                return parts
            self.i += 1

    # -- values ----------------------------------------------------------------------------
    def value(self, path: TomlPath) -> None:
        c = self.peek()
        if self.s.startswith('"""', self.i):
            self.multiline_string('"""')
        elif self.s.startswith("'''", self.i):
            self.multiline_string("'''")
        elif c == '"':
            self.basic_string()
        elif c == "'":
            self.literal_string()
        elif c == "[":
            self.array(path)
        elif c == "{":
            self.inline_table(path)
        else:
            start = self.i
            while self.i < self.n and self.s[self.i] not in _SCALAR_STOP:
                self.i += 1
            if not self.s[start : self.i].strip():
                raise _Stop

    def array(self, path: TomlPath) -> None:
        self.open.append(path)
        self.i += 1
        index = 0
        while True:
            self.skip_trivia()
            if self.peek() == "]":
                self.i += 1
                break
            if self.i >= self.n:
                raise _Stop
            item = (*path, index)
            self.record(item, self.i, explicit=True)
            self.value(item)
            index += 1
            self.skip_trivia()
            if self.peek() == ",":
                self.i += 1
            elif self.peek() == "]":
                self.i += 1
                break
            else:
                raise _Stop
        self.open.pop()

    def inline_table(self, path: TomlPath) -> None:
        self.open.append(path)
        self.i += 1
        while True:
            self.skip_trivia()
            if self.peek() == "}":
                self.i += 1
                break
            if self.i >= self.n:
                raise _Stop
            self.keyval(path)
            self.skip_trivia()
            if self.peek() == ",":
                self.i += 1
            elif self.peek() == "}":
                self.i += 1
                break
            else:
                raise _Stop
        self.open.pop()

    def basic_string(self) -> str:
        self.i += 1
        out: list[str] = []
        while self.i < self.n:
            c = self.s[self.i]
            if c == '"':
                self.i += 1
                return "".join(out)
            if c == "\n":
                raise _Stop
            if c == "\\":
                out.append(self.escape())
                continue
            out.append(c)
            self.i += 1
        raise _Stop

    def escape(self) -> str:
        code = self.peek(1)
        if code in _ESCAPES:
            self.i += 2
            return _ESCAPES[code]
        width = {"u": 4, "U": 8}.get(code)
        if width is None:
            raise _Stop
        digits_ = self.s[self.i + 2 : self.i + 2 + width]
        self.i += 2 + width
        try:
            return chr(int(digits_, 16))
        except (ValueError, OverflowError) as exc:
            raise _Stop from exc

    def literal_string(self) -> str:
        end = self.s.find("'", self.i + 1)
        newline = self.s.find("\n", self.i + 1)
        if end < 0 or 0 <= newline < end:
            raise _Stop
        text = self.s[self.i + 1 : end]
        self.i = end + 1
        return text

    def multiline_string(self, quote: str) -> None:
        self.i += 3
        while self.i < self.n:
            if quote == '"""' and self.s[self.i] == "\\":
                self.i += 2
                continue
            if self.s.startswith(quote, self.i):
                self.i += 3
                # Up to two quote characters right before the delimiter belong to the string.
                for _ in range(2):
                    if self.peek() == quote[0]:
                        self.i += 1
                return
            self.i += 1
        raise _Stop


def _scan(text: str) -> tuple[_Scanner, bool]:
    scanner = _Scanner(text)
    try:
        scanner.run()
    except (_Stop, RecursionError):
        return scanner, False
    return scanner, True


def index_toml(text: str) -> TomlIndex:
    """Index every key, array item and table of a TOML document by the line it is written on.

    Parameters
    ----------
    text
        The TOML document, ideally one that :func:`tomllib.loads` accepts; on other text the
        index covers what comes before the first statement the scanner cannot follow.

    Returns
    -------
    TomlIndex
        Lines (1-based) by path, plus the path the scanner stopped inside, if any.
    """
    scanner, finished = _scan(text)
    lines = {**scanner.implicit, **scanner.explicit}
    stopped = None if finished or not scanner.open else scanner.open[-1]
    return TomlIndex(lines=lines, stopped_in=stopped)


def context_at_line(text: str, line: int) -> TomlPath | None:
    """Path of what is being written at ``line`` of a (possibly broken) TOML document.

    Used to name the field of a TOML syntax error: the text up to and including the broken
    line is scanned, and the deepest path written on that line is returned; failing that, the
    value the scanner was inside when it stopped (a multi-line array opened earlier).

    Parameters
    ----------
    text
        TOML document text, possibly invalid.
    line
        1-based line number of the problem.

    Returns
    -------
    TomlPath or None
        The path, or ``None`` when the line holds nothing recognisable.
    """
    kept = text.splitlines(keepends=True)[: max(line, 0)]
    scanner, finished = _scan("".join(kept))
    on_line = [path for path, at in scanner.written if at == line]
    if on_line:
        return max(on_line, key=len)
    if not finished and scanner.open:
        return scanner.open[-1]
    return None
