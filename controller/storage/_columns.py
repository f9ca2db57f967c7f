"""Derive SQL columns and frame columns from the record dataclasses of :mod:`._records`.

Rule: this is the only place that turns a Python field type into a storage type. Supported
field types are ``float``, ``int``, ``bool``, ``str`` and ``StrEnum`` subclasses, each
optionally ``| None``; fields whose metadata names a ``table`` live in a table of their own
and are skipped. Anything else is a programming error (``TypeError``) found at import time.
"""

from __future__ import annotations

import dataclasses
import functools
import operator
import types
import typing
from collections.abc import Callable
from dataclasses import dataclass
from enum import Enum, StrEnum
from typing import Any

__all__ = ["Column", "ValueKind", "columns_of", "insert_sql", "row_getter"]


class ValueKind(Enum):
    """Storage kind of a column."""

    FLOAT = "float"
    INT = "int"
    BOOL = "bool"
    TEXT = "text"
    ENUM = "enum"
    UTC = "utc"
    """UTC wall time stored as POSIX seconds (REAL), shown as tz-aware datetime in frames."""


_SQL_TYPES = {
    ValueKind.FLOAT: "REAL",
    ValueKind.UTC: "REAL",
    ValueKind.INT: "INTEGER",
    ValueKind.BOOL: "INTEGER",
    ValueKind.TEXT: "TEXT",
    ValueKind.ENUM: "TEXT",
}


@dataclass(frozen=True, slots=True)
class Column:
    """One column of a log table, as derived from a record field.

    Attributes
    ----------
    name
        Field and SQL column name (unit in the name).
    kind
        Storage kind.
    nullable
        Whether the column accepts NULL (the field type includes ``None``).
    doc
        Description with unit.
    category
        Whether frames hold a text column as a pandas category.
    enum
        The StrEnum of an ENUM column, else None.
    """

    name: str
    kind: ValueKind
    nullable: bool
    doc: str
    category: bool = False
    enum: type[StrEnum] | None = None

    @property
    def frame_name(self) -> str:
        """Column name in frames: ``…utc_s`` becomes ``…time``, others keep their name."""
        if self.kind is ValueKind.UTC:
            return self.name[: -len("utc_s")] + "time"
        return self.name

    def sql_declaration(self, *, force_nullable: bool = False) -> str:
        """SQL column definition, e.g. ``temperature_c REAL`` or ``t_s REAL NOT NULL``.

        Parameters
        ----------
        force_nullable
            Declare the column nullable even when the field is required (columns filled in
            later, such as the end of a run).
        """
        null = "" if (self.nullable or force_nullable) else " NOT NULL"
        return f"{self.name} {_SQL_TYPES[self.kind]}{null}"


def _kind_of(name: str, hint: Any) -> tuple[ValueKind, bool, type[StrEnum] | None]:
    """Map a resolved type hint to (kind, nullable, enum)."""
    nullable = False
    origin = typing.get_origin(hint)
    if origin in (types.UnionType, typing.Union):
        args = [a for a in typing.get_args(hint) if a is not type(None)]
        if len(args) != 1 or len(typing.get_args(hint)) != 2:
            raise TypeError(f"field {name!r}: only 'T | None' unions are storable, got {hint}")
        hint, nullable = args[0], True
    if hint is float:
        kind = ValueKind.UTC if name.endswith("utc_s") else ValueKind.FLOAT
        return kind, nullable, None
    if hint is bool:
        return ValueKind.BOOL, nullable, None
    if hint is int:
        return ValueKind.INT, nullable, None
    if isinstance(hint, type) and issubclass(hint, StrEnum):
        return ValueKind.ENUM, nullable, hint
    if hint is str:
        return ValueKind.TEXT, nullable, None
    raise TypeError(f"field {name!r}: type {hint} is not storable in the run log")


@functools.cache
def columns_of(record: type) -> tuple[Column, ...]:
    """Columns of a record dataclass, in field order.

    Parameters
    ----------
    record
        A dataclass from :mod:`._records`.

    Returns
    -------
    tuple of Column
        One column per stored field (fields kept in another table are skipped).
    """
    hints = typing.get_type_hints(record)
    cols: list[Column] = []
    for f in dataclasses.fields(record):
        if "table" in f.metadata:
            continue
        kind, nullable, enum = _kind_of(f.name, hints[f.name])
        if kind is ValueKind.UTC and not f.name.endswith("utc_s"):
            raise TypeError(f"field {f.name!r}: UTC columns must end in 'utc_s'")
        cols.append(
            Column(
                name=f.name,
                kind=kind,
                nullable=nullable,
                doc=str(f.metadata.get("doc", "")),
                category=bool(f.metadata.get("category", False)),
                enum=enum,
            )
        )
    return tuple(cols)


def insert_sql(table: str, columns: tuple[Column, ...]) -> str:
    """``INSERT INTO table (a, b, …) VALUES (?, ?, …)`` for the given columns.

    Parameters
    ----------
    table
        SQL table name.
    columns
        Columns to fill, in the order the parameters are given.
    """
    names = ", ".join(c.name for c in columns)
    marks = ", ".join("?" for _ in columns)
    return f"INSERT INTO {table} ({names}) VALUES ({marks})"


def row_getter(columns: tuple[Column, ...]) -> Callable[[Any], tuple[Any, ...]]:
    """A fast function turning a record into the tuple of its column values.

    Parameters
    ----------
    columns
        Columns to extract, at least two (``operator.attrgetter`` returns a bare value for
        one name).
    """
    if len(columns) < 2:
        raise ValueError("row_getter needs at least two columns")
    return operator.attrgetter(*(c.name for c in columns))
