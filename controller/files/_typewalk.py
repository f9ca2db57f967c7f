"""Which keys a pydantic model accepts at a given place, for did-you-mean suggestions.

Rule: walk the model's type annotations along a pydantic error ``loc`` (keys, list indices,
and the union tags pydantic inserts for discriminated unions) and collect the keys the models
found there accept. Never raises: an unknown shape yields ``None`` (no suggestion).
"""

from __future__ import annotations

import types
import typing
from collections.abc import Mapping, Sequence
from typing import Any, Literal

from pydantic import AliasChoices, AliasPath, BaseModel

__all__ = ["allowed_keys", "model_keys"]

_SEQUENCE_ORIGINS = {list, tuple, set, frozenset, Sequence}
_MAPPING_ORIGINS = {dict, Mapping}


def model_keys(model: type[BaseModel]) -> dict[str, str]:
    """Keys a model accepts in a file, mapped to the Python field name they fill.

    Parameters
    ----------
    model
        A pydantic model class.

    Returns
    -------
    dict of str to str
        File key (alias where one is set) to field name.
    """
    by_name = bool(
        model.model_config.get("populate_by_name") or model.model_config.get("validate_by_name")
    )
    keys: dict[str, str] = {}
    for name, info in model.model_fields.items():
        aliases: list[str] = []
        alias = info.validation_alias if info.validation_alias is not None else info.alias
        if isinstance(alias, str):
            aliases.append(alias)
        elif isinstance(alias, AliasChoices):
            for choice in alias.choices:
                if isinstance(choice, str):
                    aliases.append(choice)
                elif isinstance(choice, AliasPath) and isinstance(choice.path[0], str):
                    aliases.append(choice.path[0])
        elif isinstance(alias, AliasPath) and isinstance(alias.path[0], str):
            aliases.append(alias.path[0])
        if not aliases or by_name:
            aliases.append(name)
        for key in aliases:
            keys.setdefault(key, name)
    return keys


def _expand(tp: Any, depth: int = 0) -> list[Any]:
    """Flatten Annotated, unions and type aliases into concrete member types."""
    if depth > 20:
        return []
    value = getattr(tp, "__value__", None)  # `type X = ...` aliases
    if value is not None and type(tp).__name__ == "TypeAliasType":
        return _expand(value, depth + 1)
    origin = typing.get_origin(tp)
    if origin is typing.Annotated:
        return _expand(typing.get_args(tp)[0], depth + 1)
    if origin is typing.Union or origin is types.UnionType:
        out: list[Any] = []
        for member in typing.get_args(tp):
            out.extend(_expand(member, depth + 1))
        return out
    return [tp]


def _is_model(tp: Any) -> bool:
    return isinstance(tp, type) and issubclass(tp, BaseModel)


def _literal_values(tp: Any) -> set[Any]:
    values: set[Any] = set()
    for member in _expand(tp):
        if typing.get_origin(member) is Literal:
            values.update(typing.get_args(member))
        elif hasattr(member, "__members__"):  # an Enum used as a tag
            values.update(m.value for m in member.__members__.values())
    return values


def _is_tag_of(model: type[BaseModel], tag: str) -> bool:
    if model.__name__ == tag:
        return True
    return any(tag in _literal_values(info.annotation) for info in model.model_fields.values())


def _step(tp: Any, part: str | int) -> list[Any]:
    """Types reached from ``tp`` by one ``loc`` element (a tag keeps the member itself)."""
    if _is_model(tp):
        if isinstance(part, str):
            field = model_keys(tp).get(part)
            if field is not None:
                return [tp.model_fields[field].annotation]
            if _is_tag_of(tp, part):
                return [tp]
        return []
    origin = typing.get_origin(tp)
    args = typing.get_args(tp)
    if isinstance(part, int) and (origin in _SEQUENCE_ORIGINS or tp in _SEQUENCE_ORIGINS):
        if origin is tuple and args and args[-1] is not Ellipsis:
            return [args[part]] if 0 <= part < len(args) else []
        return [args[0]] if args else []
    if isinstance(part, str) and (origin in _MAPPING_ORIGINS or tp in _MAPPING_ORIGINS):
        return [args[1]] if len(args) == 2 else []
    return []


def _matches_data(model: type[BaseModel], node: Any) -> bool | None:
    """Whether the table ``node`` carries a tag (a Literal-typed key) naming ``model``.

    ``None`` when ``node`` has none of the model's tag keys, so nothing can be said.
    """
    if not isinstance(node, Mapping):
        return None
    verdict: bool | None = None
    for key, name in model_keys(model).items():
        values = _literal_values(model.model_fields[name].annotation)
        if values and key in node:
            tag = node[key]
            if not isinstance(tag, str | int | float | bool) or tag not in values:
                return False
            verdict = True
    return verdict


def _members(tp: Any, node: Any) -> list[Any]:
    """Members of ``tp``; among models, those whose tag matches ``node`` when any does."""
    members = _expand(tp)
    tagged = [m for m in members if _is_model(m) and _matches_data(m, node)]
    return tagged or members


def allowed_keys(
    model: type[BaseModel], loc: Sequence[str | int], data: Any = None
) -> dict[str, str] | None:
    """Keys accepted by the table at ``loc`` inside ``model``.

    Parameters
    ----------
    model
        The root model class of the file.
    loc
        A pydantic error location up to (not including) the offending key; may contain the
        union tags pydantic inserts.
    data
        The parsed document, optional: when given, union members are narrowed by the tag
        written in the table (``kind = "ramp"`` selects the ramp block's keys).

    Returns
    -------
    dict of str to str, or None
        Accepted file keys mapped to the field each fills (keys that are alternatives of one
        another map to the same field), or ``None`` when the place cannot be resolved to a
        model.
    """
    current: list[Any] = [model]
    node: Any = data
    for part in loc:
        nxt: list[Any] = []
        for tp in current:
            for member in _members(tp, node):
                nxt.extend(_step(member, part))
        if not nxt:
            # An unrecognised element (e.g. a plain-union member name): stay where we are.
            continue
        current = nxt
        node = _child(node, part)
    keys: dict[str, str] = {}
    for tp in current:
        for member in _members(tp, node):
            if _is_model(member):
                for key, name in model_keys(member).items():
                    keys.setdefault(key, f"{member.__qualname__}.{name}")
    return keys or None


def _child(node: Any, part: str | int) -> Any:
    """The data under ``part``; a union tag (absent from the table) leaves ``node`` as it is."""
    if isinstance(node, Mapping):
        return node[part] if part in node else node
    if isinstance(node, list) and isinstance(part, int) and 0 <= part < len(node):
        return node[part]
    return None
