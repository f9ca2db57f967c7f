"""``squall schema protocol|rig``: print the JSON Schema of a file format, for editors."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import Any

from controller.errors import SquallError

__all__ = ["FORMATS", "register", "run", "schema_of"]

FORMATS = ("protocol", "rig")
"""File formats whose schema can be printed."""


def schema_of(name: str) -> dict[str, Any]:
    """JSON Schema (draft 2020-12, as pydantic writes it) of one file format.

    Parameters
    ----------
    name
        ``"protocol"`` or ``"rig"``.

    Returns
    -------
    dict
        The schema, with ``$schema`` and ``title`` set.
    """
    if name == "protocol":
        from controller.protocol import Protocol as model
    elif name == "rig":
        from controller.rig import Rig as model  # type: ignore[assignment]
    else:
        raise SquallError(f"no schema for {name!r}; choose one of {', '.join(FORMATS)}")
    schema = model.model_json_schema()
    return {"$schema": "https://json-schema.org/draft/2020-12/schema", **schema}


def run(args: argparse.Namespace) -> int:
    """Print (or write) the schema; return the exit code."""
    text = json.dumps(schema_of(args.format), indent=2, ensure_ascii=False) + "\n"
    if args.output is None:
        sys.stdout.write(text)
        return 0
    try:
        Path(args.output).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise SquallError(
            f"cannot write the schema: {exc.strerror or exc}", file=args.output
        ) from None
    print(f"wrote {args.output}")
    return 0


def register(sub: Any) -> None:
    """Add the ``schema`` subcommand to the ``squall`` parser."""
    parser = sub.add_parser(
        "schema",
        help="print the JSON Schema of protocol or rig files (for editors)",
        description="Print the JSON Schema of a squall file format, so editors can complete "
        "and validate protocol and rig files.",
    )
    parser.add_argument("format", choices=FORMATS, help="which file format")
    parser.add_argument(
        "-o", "--output", type=Path, default=None, help="write to this file instead of stdout"
    )
    parser.set_defaults(handler=run)
