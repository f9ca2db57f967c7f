"""The ``squall`` command line: one entry point, one subcommand per ``cmd_*.py`` module.

Rule: every subcommand lives in its own module named ``cmd_<name>.py`` in this package and
exposes ``register(subparsers)``, which adds its parser and sets ``handler`` to a function
``handler(args) -> int``. Modules are discovered, so adding a command touches no other file.
User errors are raised as :class:`controller.errors.SquallError` and caught here, once.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import pkgutil
import sys
from collections.abc import Sequence

from controller import __version__
from controller.errors import RuntimeFailure, SquallError

__all__ = ["ArgumentParser", "build_parser", "main"]

EXIT_OK = 0
EXIT_RUNTIME = 1
EXIT_BAD_INPUT = 2


class ArgumentParser(argparse.ArgumentParser):
    """argparse that raises :class:`SquallError` instead of printing usage and exiting."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise SquallError(f"{self.prog}: {message} (see '{self.prog} --help')")


def build_parser() -> ArgumentParser:
    """Build the full parser, discovering every ``cmd_*`` module of this package."""
    parser = ArgumentParser(
        prog="squall",
        description=(
            "Plan, check, simulate, run and analyse extreme-weather experiments "
            "in laboratory incubation chambers."
        ),
    )
    parser.add_argument("--version", action="version", version=f"squall {__version__}")
    parser.add_argument(
        "-v", "--verbose", action="count", default=0, help="more log output (repeatable)"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=ArgumentParser)
    sub.required = True
    for info in sorted(pkgutil.iter_modules(__path__), key=lambda m: m.name):
        if info.name.startswith("cmd_"):
            module = importlib.import_module(f"{__name__}.{info.name}")
            module.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``squall`` command line; return the process exit code."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    try:
        parser = build_parser()
        args = parser.parse_args(args_list)
        logging.basicConfig(
            level=logging.WARNING - 10 * min(args.verbose, 2),
            format="%(levelname)s %(name)s: %(message)s",
        )
        code = args.handler(args)
        return int(code or 0)
    except SquallError as exc:
        print(f"squall: error: {exc.one_line()}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except RuntimeFailure as exc:
        print(f"squall: failed: {' '.join(str(exc).split())}", file=sys.stderr)
        return EXIT_RUNTIME
    except KeyboardInterrupt:
        print("squall: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
