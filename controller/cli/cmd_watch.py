"""``squall watch [LOG] [--broker URL]``: watch a run live in the terminal.

Rules
-----
- Without LOG, the newest ``*.sqlite`` under ``./runs/`` is watched (where ``squall run``
  writes by default), newest by modification time.
- The view reads the log while the run writes it (SQLite WAL; it never blocks the run), and
  quitting the view (``q``) never stops the run.
- A bad LOG (missing, not a run log, damaged, newer schema) is one line and exit 2, before
  the terminal is switched to the full-screen view.
- ``--broker URL`` watches every controller publishing telemetry to an MQTT broker instead
  of a log (chambers shown as ``<controller>/<chamber>``); the view connects, and reconnects,
  in the background. A malformed URL is one line and exit 2. Commands from this view are
  not offered yet (the controllers' remote commands are off by default anyway).
- The board paints from the log's newest rows; the protocol timeline and the operator tasks
  are worked out afterwards in the background, and no pandas is loaded for any of it.
- Textual is imported inside the handler only, so ``squall --help`` stays fast.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

from controller.errors import SquallError

__all__ = ["register"]


def register(sub: Any) -> None:
    """Add the ``watch`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "watch",
        help="watch a running (or finished) run in the terminal",
        description=(
            "Watch a run in the terminal: every chamber on one board (temperature against "
            "setpoint, PAR, flow, oxygen, incubation, phase, alarms), chamber charts of the "
            "last hours, the alarm list, the protocol timeline and the operator tasks still "
            "to come. Keyboard only; press ? for the keys. Quitting the view never stops the "
            "run."
        ),
        epilog="Without LOG the newest run log under ./runs/ is watched.",
    )
    parser.add_argument(
        "log",
        metavar="LOG",
        type=Path,
        nargs="?",
        default=None,
        help="run log (default: the newest *.sqlite under ./runs/)",
    )
    parser.add_argument(
        "--broker",
        metavar="URL",
        default=None,
        help="watch every controller publishing to this MQTT broker "
        "(mqtt://[user[:password]@]host[:port] or mqtts://...) instead of a log",
    )
    parser.set_defaults(handler=_handle)


def _handle(args: argparse.Namespace) -> int:
    """Open the log (or refuse with one line), then run the view."""
    from controller.tui._commands import NoCommands
    from controller.tui._launch import (
        command_channel,
        newest_log,
        open_broker,
        open_live,
        run_view,
    )

    if args.broker is not None:
        if args.log is not None:
            raise SquallError("give a run log or --broker, not both", field="--broker")
        source = open_broker(args.broker)
        return run_view(source, NoCommands("commands through the broker are not offered here"))

    log = args.log if args.log is not None else newest_log()
    source = open_live(log)
    return run_view(source, command_channel(log))
