"""Validation errors that point at the field the person has to change.

Rules
-----
- Cross-field checks raise a pydantic ``ValidationError`` built here, with the ``loc`` of the
  offending field, so the error path is ``events.2.groups.0`` and not the whole model.
  pydantic keeps such locations and prefixes them with the parent's path.
- :func:`tidy_validation_error` rewrites an error raised while validating a whole protocol so
  that its paths follow the file: the tags pydantic inserts for discriminated unions
  (``...temperature.0.ramp.rate_per_h``) are removed by walking the input data, messages lose
  pydantic's ``Value error,`` prefix, and unknown keys get a did-you-mean.
"""

from __future__ import annotations

import difflib
from collections.abc import Iterable, Mapping, Sequence
from typing import Any, NoReturn

from pydantic import ValidationError
from pydantic_core import InitErrorDetails, PydanticCustomError

__all__ = ["Loc", "raise_at", "raise_errors", "tidy_validation_error"]

Loc = tuple[str | int, ...]
"""Path of a field: keys and 0-based list indices."""

_PREFIXES = ("Value error, ", "Assertion failed, ")


def _details(loc: Loc, message: str, value: Any, kind: str) -> InitErrorDetails:
    return InitErrorDetails(
        type=PydanticCustomError(kind, message.replace("{", "(").replace("}", ")")),
        loc=loc,
        input=value,
    )


def raise_errors(
    title: str, errors: Iterable[tuple[Loc, str]], value: Any = None, kind: str = "protocol"
) -> None:
    """Raise one ``ValidationError`` listing every ``(loc, message)``; return if there are none.

    Parameters
    ----------
    title
        Name of the model being validated.
    errors
        Problems, each a location (keys and indices, relative to the model) and a message.
    value
        The input shown with each error.
    kind
        Error type name reported by pydantic.
    """
    details = [_details(loc, message, value, kind) for loc, message in errors]
    if details:
        raise ValidationError.from_exception_data(title, details)


def raise_at(title: str, loc: Loc, message: str, value: Any = None) -> NoReturn:
    """Raise a ``ValidationError`` for one field.

    Parameters
    ----------
    title
        Name of the model being validated.
    loc
        Path of the field relative to the model.
    message
        What is wrong, for the person who wrote the file.
    value
        The offending input.
    """
    raise ValidationError.from_exception_data(title, [_details(loc, message, value, "protocol")])


def _strip_tags(loc: Sequence[str | int], data: Any) -> Loc:
    cleaned: list[str | int] = []
    node = data
    for part in loc:
        if isinstance(node, Mapping):
            if part in node:
                cleaned.append(part)
                node = node[part]
                continue
            if isinstance(part, str) and node.get("kind") == part:
                continue  # tag of a discriminated union: not in the file
            cleaned.append(part)
            node = None
        elif isinstance(node, Sequence) and not isinstance(node, str) and isinstance(part, int):
            cleaned.append(part)
            node = node[part] if 0 <= part < len(node) else None
        else:
            cleaned.append(part)
            node = None
    return tuple(cleaned)


def _parent(loc: Loc, data: Any) -> Any:
    node = data
    for part in loc[:-1]:
        try:
            node = node[part]
        except (KeyError, IndexError, TypeError):
            return None
    return node


def tidy_validation_error(
    exc: ValidationError, data: Any, known_keys: Iterable[str]
) -> ValidationError:
    """Rewrite a protocol ``ValidationError`` so paths and messages follow the file.

    Parameters
    ----------
    exc
        The error pydantic raised.
    data
        The input that was validated (the TOML document as a mapping).
    known_keys
        Every key the format knows, used for did-you-mean hints.

    Returns
    -------
    pydantic.ValidationError
        The same errors with union tags removed from ``loc`` and friendlier messages.
    """
    keys = sorted(set(known_keys))
    details: list[InitErrorDetails] = []
    seen: set[tuple[Loc, str]] = set()
    for error in exc.errors(include_url=False):
        loc = _strip_tags(error["loc"], data)
        message = error["msg"]
        for prefix in _PREFIXES:
            if message.startswith(prefix):
                message = message[len(prefix) :]
        if error["type"] == "extra_forbidden" and loc and isinstance(loc[-1], str):
            message = f"unknown key {loc[-1]!r}"
            close = difflib.get_close_matches(loc[-1], keys, n=1, cutoff=0.75)
            parent = _parent(loc, data)
            if close and not (isinstance(parent, Mapping) and close[0] in parent):
                message += f"; did you mean {close[0]!r}?"
        elif error["type"] == "union_tag_invalid":
            ctx = error.get("ctx") or {}
            loc = (*loc, "kind")
            message = f"unknown kind {ctx.get('tag')!r}; expected one of {ctx.get('expected_tags')}"
        elif error["type"] == "union_tag_not_found":
            loc = (*loc, "kind")
            message = "'kind' is required here"
        elif error["type"] == "missing" and loc:
            message = f"{loc[-1]!r} is required here" if isinstance(loc[-1], str) else message
        if (loc, message) in seen:
            continue
        seen.add((loc, message))
        details.append(_details(loc, message, error.get("input"), error["type"]))
    return ValidationError.from_exception_data(exc.title, details)
