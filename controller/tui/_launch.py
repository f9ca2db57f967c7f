"""What ``squall watch`` and ``squall replay`` do between parsing arguments and the first
paint: find the log, open the source (any problem is a one-line user error before the
terminal is touched), pick the command channel, run the app.

Rules of this module
--------------------
- Nothing here imports Textual at module level; :func:`run_view` imports the app when it is
  about to start it. A log that cannot be read raises :class:`SquallError` before that.
- ``squall watch`` without a log watches the newest ``*.sqlite`` under ``./runs/`` (the
  folder ``squall run`` writes to by default), newest by modification time.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError

from ._commands import CommandChannel, NoCommands

if TYPE_CHECKING:
    from ._replay import ReplaySource
    from ._sources import DataSource, LogSource

__all__ = [
    "RUNS_DIR",
    "command_channel",
    "newest_log",
    "open_broker",
    "open_live",
    "open_replay",
    "parse_replay_speed",
    "run_view",
]

RUNS_DIR = Path("runs")
"""Where ``squall run`` writes logs by default, relative to the working folder."""


def newest_log(folder: Path = RUNS_DIR) -> Path:
    """The most recently modified run log (``*.sqlite``) in ``folder``.

    Parameters
    ----------
    folder
        Folder to look in.

    Returns
    -------
    Path
        The newest log.

    Raises
    ------
    SquallError
        No such folder, or no log in it.
    """
    if not folder.is_dir():
        raise SquallError(
            f"no run log given and no {folder}/ folder here; name a log: squall watch LOG",
            field="LOG",
        )
    logs = [p for p in folder.glob("*.sqlite") if p.is_file()]
    if not logs:
        raise SquallError(
            f"no run log (*.sqlite) in {folder}/; name a log: squall watch LOG", field="LOG"
        )
    return max(logs, key=lambda p: (p.stat().st_mtime, p.name))


def parse_replay_speed(text: str) -> float:
    """``--speed`` of ``squall replay``: log seconds per real second, a number ≥ 1.

    Parameters
    ----------
    text
        As typed.

    Returns
    -------
    float
        Log seconds per real second.
    """
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value >= 1.0):
        raise SquallError(f"{text!r} is not a speed of 1 or more", field="--speed")
    if value > 604800.0:
        raise SquallError(f"{text!r} is faster than a week per second", field="--speed")
    return value


def command_channel(log: Path) -> CommandChannel:
    """The channel through which ``squall watch`` commands the run writing ``log``.

    Parameters
    ----------
    log
        The watched run log.

    Returns
    -------
    CommandChannel
        A client of the run's control socket (``<log>.ctl/socket``) when a controller answers
        there and lets this user command it; otherwise a read-only channel that says why, so
        hold, resume, abort, acknowledge and note are offered only when they can work.
    """
    from controller.cli.cmd_ctl import ControlClient
    from controller.runtime._ctl_wire import control_path

    client = ControlClient(control_path(log))
    if client.can_command:
        return client
    return NoCommands(f"{client.why_not}: this view is read only")


def open_live(log: Path) -> LogSource:
    """Open a log for watching.

    Parameters
    ----------
    log
        The run log.

    Raises
    ------
    SquallError
        Missing, not a run log, or unreadable (one line, naming the file).
    """
    from ._sources import LogSource

    return LogSource(log, protocol_dir=log.parent)


def open_broker(url: str) -> DataSource:
    """A source of every controller publishing to an MQTT broker.

    Parameters
    ----------
    url
        ``mqtt://[user[:password]@]host[:port]`` or ``mqtts://...``.

    Raises
    ------
    SquallError
        A malformed URL (the connection itself is made, and retried, by the view).
    """
    from ._broker import BrokerSource

    return BrokerSource(url)


def open_replay(log: Path, speed: float) -> ReplaySource:
    """Open a log for replay.

    Parameters
    ----------
    log
        The run log.
    speed
        Log seconds per real second.

    Raises
    ------
    SquallError
        Missing, not a run log, or unreadable (one line, naming the file).
    """
    from ._replay import ReplaySource

    return ReplaySource(log, speed=speed, protocol_dir=log.parent)


def run_view(source: DataSource, commands: CommandChannel | None) -> int:
    """Run the app in this terminal until the user quits; the run is never affected.

    Parameters
    ----------
    source
        An opened source.
    commands
        The command channel (None: read only).

    Returns
    -------
    int
        Exit code 0.
    """
    try:
        from ._app import SquallApp

        app = SquallApp(source, commands)
        app.run()
    finally:
        source.close()
    return 0
