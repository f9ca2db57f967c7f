"""Read a TOML file into a pydantic model, turning every failure into a located SquallError.

Rule: nothing that a person could have typed wrong escapes this module as anything but
:class:`FileProblems` (a :class:`~controller.errors.SquallError`) carrying the file, the 1-based
line and the dotted field path. Failures covered: file missing or unreadable, not UTF-8, TOML
syntax, unknown keys (with a did-you-mean), missing keys (located at the table that should hold
them), wrong types and values, and :class:`SquallError` raised by model validators without a
location. When several problems exist the message names the first one by line and says
``(and N more)``; all of them are kept in :attr:`FileProblems.problems`.
"""

from __future__ import annotations

import difflib
import re
import tomllib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

from pydantic import BaseModel, ValidationError

from controller.errors import SquallError
from controller.files._locate import TomlIndex, TomlPath, context_at_line, index_toml
from controller.files._typewalk import allowed_keys

__all__ = [
    "FileProblems",
    "format_path",
    "load_model",
    "load_text",
    "load_toml",
    "locate",
    "parse_toml",
    "read_text",
    "validate_data",
]

M = TypeVar("M", bound=BaseModel)

_TOML_POSITION = re.compile(r"\s*\((?:at line (\d+), column (\d+)|at end of document)\)\s*$")
_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")
_QUOTED = re.compile(r"'((?:[^'\\]|\\.)*)'")
_SUGGESTED = re.compile(r"did you mean '([^']*)'\?")
_SCALARS = (str, int, float, bool)


class FileProblems(SquallError):
    """One or more located problems in one input file.

    The exception itself reads as the first problem (by line), with ``(and N more)`` added when
    there are others.

    Parameters
    ----------
    problems
        Every problem found, each a located :class:`SquallError`; at least one.
    """

    def __init__(self, problems: Sequence[SquallError]) -> None:
        if not problems:
            raise ValueError("FileProblems needs at least one problem")
        ordered = sorted(problems, key=lambda p: p.line if p.line is not None else 0)
        first = ordered[0]
        extra = len(ordered) - 1
        message = first.message + (f" (and {extra} more)" if extra else "")
        super().__init__(message, file=first.file, line=first.line, field=first.field)
        self.problems: tuple[SquallError, ...] = tuple(ordered)


def format_path(path: Iterable[str | int]) -> str:
    """Render a key path as ``phases.2.programs.temperature.0``.

    Keys that are not bare TOML keys (spaces, dots) are double-quoted, as TOML would write them.

    Parameters
    ----------
    path
        Keys and 0-based array indices, dimensionless.

    Returns
    -------
    str
        Dotted path; empty for the document root.
    """
    parts: list[str] = []
    for part in path:
        if isinstance(part, int):
            parts.append(str(part))
        elif _BARE_KEY.match(part):
            parts.append(part)
        else:
            parts.append('"' + part.replace("\\", "\\\\").replace('"', '\\"') + '"')
    return ".".join(parts)


def read_text(path: Path) -> str:
    """Read a UTF-8 text file for the user, failing with a located :class:`SquallError`.

    Parameters
    ----------
    path
        File to read.

    Returns
    -------
    str
        The text, without a leading byte-order mark.

    Raises
    ------
    SquallError
        File missing, a directory, unreadable, or not UTF-8 (then with the line of the first
        bad byte).
    """
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise SquallError("file not found", file=path) from None
    except IsADirectoryError:
        raise SquallError("is a directory, expected a file", file=path) from None
    except PermissionError:
        raise SquallError("permission denied: cannot read this file", file=path) from None
    except OSError as exc:
        reason = exc.strerror or exc.__class__.__name__
        raise SquallError(f"cannot read this file: {reason}", file=path) from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        column = exc.start - (data.rfind(b"\n", 0, exc.start) + 1) + 1
        raise SquallError(
            f"not UTF-8 text: byte 0x{data[exc.start]:02x} at column {column}; "
            "save the file as UTF-8",
            file=path,
            line=line,
        ) from None
    return text.removeprefix("\ufeff")


load_text = read_text
"""Alias of :func:`read_text`: read a user's UTF-8 text file with located errors."""


def parse_toml(text: str, *, file: str | Path) -> dict[str, Any]:
    """Parse TOML text, turning syntax errors into a :class:`SquallError` at their line.

    Parameters
    ----------
    text
        The document.
    file
        Name of the file the text came from (for the message only).

    Returns
    -------
    dict
        The parsed document.

    Raises
    ------
    SquallError
        On a syntax error, with the line, the field being written there (when recognisable)
        and tomllib's reason with its column.
    """
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        reason = str(exc)
        match = _TOML_POSITION.search(reason)
        reason = reason[: match.start()] if match else reason
        if match and match.group(1):
            line, column = int(match.group(1)), int(match.group(2))
            where = f" (column {column})"
        else:
            line = max(1, len(text.splitlines()))
            where = " (at the end of the file)"
        context = context_at_line(text, line)
        raise SquallError(
            f"TOML syntax: {reason}{where}",
            file=file,
            line=line,
            field=format_path(context) if context else None,
        ) from None
    except RecursionError:
        raise SquallError(
            "TOML syntax: arrays or tables nested too deeply", file=file, line=1
        ) from None


def load_toml(path: Path) -> tuple[str, dict[str, Any]]:
    """Read and parse a TOML file.

    Parameters
    ----------
    path
        File to read.

    Returns
    -------
    tuple of (str, dict)
        The text (for locating later problems) and the parsed document.
    """
    text = read_text(path)
    return text, parse_toml(text, file=path)


def load_model(path: Path, model: type[M]) -> M:
    """Read a TOML file and validate it as ``model``, with every failure located.

    Parameters
    ----------
    path
        TOML file to read.
    model
        The pydantic model class the file must satisfy.

    Returns
    -------
    M
        The validated model instance.

    Raises
    ------
    FileProblems
        For any problem in the file (a :class:`SquallError`, printed as
        ``FILE:LINE: field.path: message``).
    SquallError
        When the file cannot be read or parsed.
    """
    text, data = load_toml(path)
    return validate_data(data, model, text=text, file=path)


def validate_data(data: Mapping[str, Any], model: type[M], *, text: str, file: str | Path) -> M:
    """Validate parsed TOML ``data`` as ``model``, locating problems in ``text``.

    Parameters
    ----------
    data
        The parsed document.
    model
        The pydantic model class.
    text
        The document text ``data`` was parsed from (to find lines).
    file
        Name of the file (for messages).

    Returns
    -------
    M
        The validated model instance.

    Raises
    ------
    FileProblems
        One or more located problems.
    """
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        index = index_toml(text)
        problems = _problems_from_validation(exc, data, model, index, file)
        raise FileProblems(problems) from None
    except SquallError as exc:
        raise locate(exc, text=text, file=file) from None


def locate(error: SquallError, *, text: str, file: str | Path) -> SquallError:
    """Give a :class:`SquallError` that names a field but no file the file and line.

    Errors raised by pure code (the compiler, rig checks) know the dotted field path of the
    problem but not where it is written; this finds the line. Errors that already name a file
    are returned unchanged.

    Parameters
    ----------
    error
        The error to locate.
    text
        Text of the file the field path refers to.
    file
        Name of that file.

    Returns
    -------
    SquallError
        A new error with file and line (or ``error`` itself when it already had a file).
    """
    if error.file is not None:
        return error
    path = _parse_dotted(error.field) if error.field else ()
    line = index_toml(text).line_of(path)
    located = SquallError(error.message, file=file, line=line, field=error.field)
    located.__cause__ = error.__cause__
    return located


def _parse_dotted(field: str) -> TomlPath:
    """Split ``phases.2."odd key".value`` into ``("phases", 2, "odd key", "value")``."""
    parts: list[str | int] = []
    for token in re.findall(r'"(?:[^"\\]|\\.)*"|[^.]+', field):
        if token.startswith('"'):
            parts.append(token[1:-1].replace('\\"', '"').replace("\\\\", "\\"))
        elif token.isdigit():
            parts.append(int(token))
        else:
            parts.append(token)
    return tuple(parts)


@dataclass
class _Problem:
    path: TomlPath
    kind: str
    messages: list[str]
    shown_input: str | None
    merged_tags: bool
    fills: str | None = None  # for unknown keys: the field the suggested key fills

    def text(self) -> str:
        joined = "; or ".join(self.messages)
        return f"{joined} (got {self.shown_input})" if self.shown_input else joined


def _problems_from_validation(
    exc: ValidationError,
    data: Mapping[str, Any],
    model: type[BaseModel],
    index: TomlIndex,
    file: str | Path,
) -> list[SquallError]:
    """Turn each pydantic error into a located problem; merge the alternatives of one union.

    A missing key that an unknown sibling key is a likely misspelling of is not reported
    separately: the unknown key's did-you-mean says it all.
    """
    by_path: dict[TomlPath, _Problem] = {}
    for err in exc.errors(include_url=False):
        loc = tuple(err["loc"])
        path, dropped = _data_path(loc, data, err["type"])
        if err["type"] == "union_tag_invalid":
            key = str((err.get("ctx") or {}).get("discriminator", "")).strip("'\"")
            node = err.get("input")
            if key and path[-1:] != (key,) and isinstance(node, Mapping) and key in node:
                path = (*path, key)
        message, shown = _message(err, loc, model, data)
        fills = _fills(err["type"], loc, model, message, data)
        known = by_path.get(path)
        if known is None:
            by_path[path] = _Problem(path, err["type"], [message], shown, dropped, fills)
        elif (dropped or known.merged_tags) and message not in known.messages:
            known.messages.append(message)
    suggested = {
        (p.path[:-1], p.fills) for p in by_path.values() if p.kind == "extra_forbidden" and p.fills
    }
    return [
        SquallError(
            p.text(),
            file=file,
            line=index.line_of(p.path),
            field=format_path(p.path) or None,
        )
        for p in by_path.values()
        if not (p.kind == "missing" and (p.path[:-1], p.fills) in suggested)
    ]


def _fills(
    kind: str, loc: tuple[str | int, ...], model: type[BaseModel], message: str, data: Any
) -> str | None:
    """Which model field a missing key, or the suggestion for an unknown key, stands for."""
    if kind not in {"missing", "extra_forbidden"} or not loc:
        return None
    keys = allowed_keys(model, loc[:-1], data) or {}
    if kind == "missing":
        return keys.get(str(loc[-1]))
    found = _SUGGESTED.search(message)
    return keys.get(found.group(1)) if found else None


def _data_path(loc: tuple[str | int, ...], data: Any, kind: str) -> tuple[TomlPath, bool]:
    """Map a pydantic ``loc`` onto the document, dropping union tags.

    Returns the path and whether any element of ``loc`` was dropped as a union tag.
    """
    path: list[str | int] = []
    node: Any = data
    dropped = False
    for k, part in enumerate(loc):
        last = k == len(loc) - 1
        if isinstance(node, Mapping) and isinstance(part, str) and part in node:
            path.append(part)
            node = node[part]
        elif (
            isinstance(node, list)
            and isinstance(part, int)
            and not isinstance(part, bool)
            and 0 <= part < len(node)
        ):
            path.append(part)
            node = node[part]
        elif last and kind in {"missing", "extra_forbidden"} and isinstance(part, str):
            path.append(part)
            node = None
        else:
            dropped = True
    return tuple(path), dropped


def _message(
    err: Mapping[str, Any], loc: tuple[str | int, ...], model: type[BaseModel], data: Any
) -> tuple[str, str | None]:
    """A user-facing message for one pydantic error, and the offending input shown short."""
    kind: str = err["type"]
    msg: str = err["msg"]
    ctx: Mapping[str, Any] = err.get("ctx") or {}
    value = err.get("input")
    shown: str | None = None
    if isinstance(value, _SCALARS):
        shown = repr(value)
        if len(shown) > 40:
            shown = shown[:37] + "..."
    if kind == "missing":
        return "required key is missing here", None
    if kind == "extra_forbidden":
        allowed = allowed_keys(model, loc[:-1], data) if loc else None
        if allowed is None and not msg.startswith("Extra inputs"):
            return msg, None  # the model already wrote its own message
        return _unknown_key_message(str(loc[-1] if loc else ""), allowed), None
    if kind in {"value_error", "assertion_error"}:
        return re.sub(r"^(Value|Assertion) error, ", "", msg), None
    if kind == "union_tag_invalid" and "tag" in ctx:
        tag = str(ctx["tag"])
        expected = _QUOTED.findall(str(ctx.get("expected_tags", "")))
        text = f"unknown kind {tag!r}; expected one of {', '.join(expected)}"
        return _with_suggestion(text, tag, expected), None
    if kind in {"literal_error", "enum"} and isinstance(value, str):
        # pydantic lists the choices in ctx; a model that re-raised the error may keep only msg
        expected = _QUOTED.findall(str(ctx.get("expected", ""))) or _QUOTED.findall(msg)
        return _with_suggestion(f"{msg} (got {shown})", value, expected), None
    return msg, shown


def _with_suggestion(message: str, value: str, choices: Sequence[str]) -> str:
    close = difflib.get_close_matches(value, list(choices), n=1, cutoff=0.6)
    return f"{message}; did you mean {close[0]!r}?" if close else message


def _unknown_key_message(key: str, allowed: Mapping[str, str] | None) -> str:
    message = f"unknown key {key!r}"
    if not allowed:
        return message
    close = difflib.get_close_matches(key, list(allowed), n=1, cutoff=0.6)
    if close:
        return f"{message}; did you mean {close[0]!r}?"
    if len(allowed) <= 12:
        return f"{message}; allowed here: {', '.join(sorted(allowed))}"
    return message
