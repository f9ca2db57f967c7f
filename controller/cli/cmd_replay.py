"""``squall replay LOG [--speed N]``: play a run log back in the terminal.

Rules
-----
- The same views as ``squall watch`` over a finished, interrupted or still running log,
  with play/pause (space), speed (+ and -), seek ([ ] by an hour, { } by a day, < > to the
  ends). Replays are read only: no commands reach any controller.
- ``--speed`` is log seconds per real second, from 1 to 604800 (a week per second); default
  60 (an hour a minute).
- The first frame paints from the log's first rows; the rest loads in the background (the
  run bar shows "loading N%") while the keys work, however long the log.
- A bad LOG or speed is one line and exit 2, before the terminal is switched to the
  full-screen view. Textual is imported inside the handler only.
"""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

__all__ = ["DEFAULT_SPEED", "register"]

DEFAULT_SPEED = "60"
"""Default ``--speed``: log seconds per real second (an hour of the run a minute)."""


def register(sub: Any) -> None:
    """Add the ``replay`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "replay",
        help="play a run log back in the terminal",
        description=(
            "Play a run log back with the views of 'squall watch': space plays or pauses, "
            "+ and - change the speed, [ ] seek an hour, { } a day, < > jump to the ends; "
            "press ? for every key."
        ),
    )
    parser.add_argument("log", metavar="LOG", type=Path, help="run log (SQLite)")
    parser.add_argument(
        "--speed",
        metavar="N",
        default=DEFAULT_SPEED,
        help=f"log seconds per real second, 1 to 604800 (default {DEFAULT_SPEED})",
    )
    parser.set_defaults(handler=_handle)


def _handle(args: argparse.Namespace) -> int:
    """Check the speed, open the log (or refuse with one line), then run the view."""
    from controller.tui._launch import open_replay, parse_replay_speed, run_view

    speed = parse_replay_speed(args.speed)
    source = open_replay(args.log, speed)
    return run_view(source, None)
