"""The ``squall`` command line: one entry point, one subcommand per ``cmd_*.py`` module.

Rule: every subcommand lives in its own module named ``cmd_<name>.py`` in this package and
exposes ``register(subparsers)``, which adds its parser and sets ``handler`` to a function
``handler(args) -> int``. Modules are discovered, so adding a command touches no other file;
only the named command's module is imported (every one for ``--help`` or an unknown name), so
one command's imports never slow another's start-up.
User errors are raised as :class:`controller.errors.SquallError` and caught here, once.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import logging
import pkgutil
import sys
from collections.abc import Sequence
from typing import Any

from controller.errors import RuntimeFailure, SquallError

__all__ = ["ArgumentParser", "build_parser", "main"]

EXIT_OK = 0
EXIT_RUNTIME = 1
EXIT_BAD_INPUT = 2


class ArgumentParser(argparse.ArgumentParser):
    """argparse that raises :class:`SquallError` instead of printing usage and exiting."""

    def error(self, message: str) -> None:  # type: ignore[override]
        raise SquallError(f"{self.prog}: {message} (see '{self.prog} --help')")


class _VersionAction(argparse.Action):
    """``--version``: print the installed version (looked up only when asked)."""

    def __init__(self, option_strings: list[str], dest: str, **kwargs: Any) -> None:
        super().__init__(option_strings, dest, nargs=0, help="show the version and exit")

    def __call__(self, parser: argparse.ArgumentParser, *_: object) -> None:
        from controller import __version__

        parser.exit(message=f"squall {__version__}\n")


#: Errors of the operating system that mean the user named a file that cannot be used.
_USER_ERRNOS = frozenset(
    {errno.ENOENT, errno.ENOTDIR, errno.EISDIR, errno.ENAMETOOLONG, errno.EACCES, errno.ELOOP}
)


def _command_modules() -> list[str]:
    return sorted(
        info.name for info in pkgutil.iter_modules(__path__) if info.name.startswith("cmd_")
    )


def _named_command(args: Sequence[str]) -> str | None:
    """The subcommand named on the command line, if it has its own module."""
    for arg in args:
        if arg == "--":
            return None
        if arg.startswith("-"):
            continue  # the top-level options take no value
        return arg if f"cmd_{arg}" in _command_modules() else None
    return None


def build_parser(command: str | None = None) -> ArgumentParser:
    """Build the parser, discovering the ``cmd_*`` modules of this package.

    Parameters
    ----------
    command
        Import and register only this subcommand's module (no unit); default every one.

    Returns
    -------
    ArgumentParser
        The ``squall`` parser.
    """
    parser = ArgumentParser(
        prog="squall",
        description=(
            "Plan, check, simulate, run and analyse extreme-weather experiments "
            "in laboratory incubation chambers."
        ),
    )
    parser.add_argument("--version", action=_VersionAction)
    parser.add_argument(
        "-v", "--verbose", action="count", default=0, help="more log output (repeatable)"
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=ArgumentParser)
    sub.required = True
    names = _command_modules() if command is None else [f"cmd_{command}"]
    for name in names:
        importlib.import_module(f"{__name__}.{name}").register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``squall`` command line; return the process exit code."""
    args_list = list(sys.argv[1:] if argv is None else argv)
    try:
        parser = build_parser(_named_command(args_list))
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
    except OSError as exc:
        # A file the user named that cannot be used (too long a name, a folder, no access)
        # is bad input; anything else the system refuses is a runtime failure. One line
        # either way, never a traceback.
        where = f"{exc.filename}: " if exc.filename else ""
        text = exc.strerror or str(exc)
        if exc.errno in _USER_ERRNOS:
            print(f"squall: error: {where}{text}", file=sys.stderr)
            return EXIT_BAD_INPUT
        print(f"squall: failed: {where}{text}", file=sys.stderr)
        return EXIT_RUNTIME
    except KeyboardInterrupt:
        print("squall: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
