"""``squall run PROTOCOL --rig RIG [--sim] [--speed N|max] [--log FILE] [--start ISO8601]``
and ``squall run --resume LOG [--sim] [--speed N|max]``.

Rules
-----
- ``--sim`` runs the rig's simulated chambers in this process on a simulated clock:
  ``--speed max`` (the default) as fast as the computer goes, ``--speed N`` at N times real
  time. Without ``--sim`` the run drives the devices of the rig's ``[io]`` table in real
  time (a real rack, or ``squall simulate`` on loopback endpoints).
- ``--resume LOG`` continues an interrupted run: protocol and rig are the text the log keeps
  (never the files as they are now), the tick period is the original one, protocol time
  continues where the wall clock has got to (a run interrupted while held resumes held), the
  gap is recorded, outputs stay safe until the first healthy tick, and rows are appended
  after the last logged one. ``--sim`` must match how the run was launched.
- One controller per log (``<log>.lock``) and, on devices, one per rig (``<rig file>.lock``
  next to the rig file): a second one is refused with one line, exit 2. Both locks are
  ``flock`` locks, dropped by the kernel when a controller dies, so a crashed run can be
  resumed at once.
- Bad protocol, rig, start time, speed or log path: one located line, exit 2, nothing
  written. An existing log is never overwritten.
- While it runs, the run takes operator commands (``squall ctl``) on its control socket
  ``<log>.ctl/socket`` (owner-only; see :mod:`controller.runtime._ctl_server`).
- Telemetry: when the rig file has a ``[telemetry]`` table (``enabled``, the default), the
  run publishes its samples, status, alarms and events to that MQTT broker while it runs
  (``hardware-notes/mqtt-topics.md``), and takes remote commands if the table enables them.
  The control loop never waits for the broker. A simulated run at ``--speed max`` does not
  publish and says so (its clock would jump over the broker's answers).
- While the run goes on, what start-up built (parsed files, compiled protocol, control plan,
  imported modules: about 130 000 objects that live as long as the run) is kept out of the
  cyclic garbage collector's scans (``gc.freeze``); each full collection of a long run would
  otherwise walk all of it again (about 0.1 s each, several in a simulated week at full
  speed). They are handed back to the collector when the run ends.
- On a terminal a progress bar shows phase, simulated time and alarms; otherwise the run is
  quiet. The log's path is printed at the end; exit 0 when the protocol ran to its end, 1 if
  the run failed (the outputs were made safe and the log closed first).
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import logging
import math
import sys
import time
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from rich.console import Console
from rich.progress import BarColumn, Progress, TaskID, TextColumn, TimeElapsedColumn

from controller.errors import RuntimeFailure, SquallError
from controller.protocol import format_duration

if TYPE_CHECKING:
    from collections.abc import Awaitable, Callable, Iterator

    from controller.runtime import (
        ControlLoop,
        HardwareRun,
        RunSettings,
        RunSummary,
        SimulatedRun,
        TickStatus,
    )
    from controller.runtime._telemetry_link import TelemetryLink

__all__ = ["DEFAULT_PERIOD_S", "parse_speed", "register"]

DEFAULT_PERIOD_S = 10.0
"""Control tick period when ``--period`` is not given, s (RunSettings' default)."""

_log = logging.getLogger(__name__)


def register(sub: Any) -> None:
    """Add the ``run`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "run",
        help="run a protocol on a rig (with --sim: on its simulated chambers)",
        description=(
            "Run a protocol on a rig: read sensors, check interlocks, follow the setpoints "
            "with PID loops, drive heaters, chillers, lamps and pumps, and log every tick "
            "to a run log (SQLite). With --sim the rig's chambers are simulated in this "
            "process on a simulated clock; without it the devices of the rig's [io] table "
            "are driven in real time. --resume LOG continues an interrupted run where the "
            "wall clock has got to, with the protocol and rig kept in the log. One "
            "controller per log and per rig: a second one is refused (locks LOG.lock and, "
            "on devices, RIG.lock next to the rig file)."
        ),
    )
    parser.add_argument(
        "protocol", metavar="PROTOCOL", type=Path, nargs="?", help="protocol file (TOML)"
    )
    parser.add_argument("--rig", metavar="RIG", type=Path, help="rig file (TOML)")
    parser.add_argument(
        "--resume",
        metavar="LOG",
        type=Path,
        default=None,
        help="continue the interrupted run of this log (protocol and rig from the log)",
    )
    parser.add_argument(
        "--sim", action="store_true", help="simulate the rig's chambers in this process"
    )
    parser.add_argument(
        "--speed",
        metavar="N|max",
        default=None,
        help="with --sim: 'max' (default) runs as fast as possible, N runs at N x real time",
    )
    parser.add_argument(
        "--log",
        metavar="FILE",
        type=Path,
        default=None,
        help="run log to create (default runs/<protocol>-<UTC time>.sqlite); never overwritten",
    )
    parser.add_argument(
        "--start",
        metavar="ISO8601",
        default=None,
        help="start of the run with a zone, e.g. 2027-07-10T08:00:00+02:00 (default: the "
        "protocol's 'begins', else now)",
    )
    parser.add_argument(
        "--period",
        metavar="SECONDS",
        type=float,
        default=None,
        help=f"control tick period in seconds (default {DEFAULT_PERIOD_S:g}; a resumed run "
        "keeps its own)",
    )
    parser.set_defaults(handler=_handle)


def parse_speed(text: str) -> float | None:
    """Parse ``--speed``: ``max`` (None: as fast as possible) or a number above 0.

    Parameters
    ----------
    text
        As typed.

    Returns
    -------
    float or None
        Simulated seconds per real second, or None for as fast as possible.
    """
    if text.strip().lower() == "max":
        return None
    try:
        value = float(text)
    except ValueError:
        value = math.nan
    if not (math.isfinite(value) and value > 0):
        raise SquallError(f"{text!r} is neither 'max' nor a number above 0", field="--speed")
    return value


def _parse_start(text: str | None) -> datetime | None:
    if text is None:
        return None
    try:
        value = datetime.fromisoformat(text.strip())
    except ValueError:
        raise SquallError(
            f"{text!r} is not an ISO 8601 date-time; write e.g. 2027-07-10T08:00:00+02:00",
            field="--start",
        ) from None
    if value.tzinfo is None or value.utcoffset() is None:
        raise SquallError(f"{text!r} has no zone; add one, e.g. +00:00", field="--start")
    return value


def _settings(period_s: float) -> RunSettings:
    from controller.runtime import RunSettings

    if not (math.isfinite(period_s) and period_s >= 1.0):
        raise SquallError(
            f"the tick period must be 1 s or more, got {period_s!r}", field="--period"
        )
    default = RunSettings()
    timeout_s = min(default.read_timeout_s, period_s / 4.0)
    return RunSettings(period_s=period_s, read_timeout_s=timeout_s, write_timeout_s=timeout_s)


class _Bar:
    """Rich progress bar fed by tick statuses (phase, simulated time, alarms).

    At full simulated speed ticks come thousands a second while the bar is redrawn ten
    times a second, so a tick within :attr:`every_s` of wall time after the last update is
    skipped unless its alarms or phase differ (the last tick is always shown).
    """

    every_s = 0.05
    """Wall time between bar updates, s."""

    def __init__(self, console: Console) -> None:
        self.progress = Progress(
            TextColumn("{task.fields[phase]}", style="bold"),
            BarColumn(),
            TextColumn("{task.fields[when]}"),
            TextColumn("{task.fields[alarms]}", style="red"),
            TimeElapsedColumn(),
            console=console,
            transient=False,
        )
        self.task: TaskID | None = None
        #: Real time source, s; an attribute so tests can pin it.
        self._monotonic: Callable[[], float] = time.monotonic
        self._shown: tuple[float, str, dict[str, str]] = (-math.inf, "", {})

    def __call__(self, status: TickStatus) -> None:
        now = self._monotonic()
        last_s, phase, held = self._shown
        final = status.tick + 1 >= status.ticks_total
        if now - last_s < self.every_s and not final:
            if status.phase == phase and status.alarms == held:
                return
        self._shown = (now, status.phase, dict(status.alarms))
        alarms = ", ".join(f"{c}: {code}" for c, code in sorted(status.alarms.items()))
        fields = {
            "phase": status.phase,
            "when": f"{status.utc:%Y-%m-%d %H:%M} UTC  +{format_duration(status.elapsed_s)}",
            "alarms": alarms,
        }
        if self.task is None:
            self.task = self.progress.add_task("run", total=status.duration_s, **fields)
        self.progress.update(self.task, completed=status.elapsed_s, **fields)


@contextlib.contextmanager
def _start_up_frozen() -> Iterator[None]:
    """Keep every object that exists now out of the cyclic garbage collector's scans until
    the block ends (``gc.freeze``; :func:`gc.unfreeze` after)."""
    gc.freeze()
    try:
        yield
    finally:
        gc.unfreeze()


def _report(console: Console, summary: RunSummary, wall_s: float, interactive: bool) -> None:
    ratio = summary.run_s / wall_s if wall_s > 0 else math.inf
    if interactive:
        console.print(
            f"{summary.end_reason.value}: {format_duration(summary.run_s)} run in "
            f"{wall_s:.1f} s ({ratio:,.0f}x), {summary.ticks.ticks} ticks, "
            f"{summary.rows_written} rows, {summary.windows} closed windows, "
            f"{len(summary.alarms)} alarms raised",
            highlight=False,
        )
    print(f"log: {summary.log_path}")


def _check_combination(args: argparse.Namespace) -> None:
    """Refuse options that do not go together, with one line naming the option."""
    if args.resume is not None:
        extra = [
            name
            for name, value in (
                ("PROTOCOL", args.protocol),
                ("--rig", args.rig),
                ("--log", args.log),
                ("--start", args.start),
                ("--period", args.period),
            )
            if value is not None
        ]
        if extra:
            raise SquallError(
                f"a resumed run takes its protocol, rig, log and tick period from the log; "
                f"drop {', '.join(extra)}",
                field="--resume",
            )
    elif args.protocol is None or args.rig is None:
        raise SquallError(
            "give a protocol and --rig RIG (or --resume LOG to continue a run)",
            field="--rig" if args.protocol is not None else "PROTOCOL",
        )
    if args.speed is not None and not args.sim:
        raise SquallError("--speed applies to simulated runs only (add --sim)", field="--speed")


def _prepare(args: argparse.Namespace) -> SimulatedRun | HardwareRun:
    """Assemble the run the arguments ask for (nothing is written before it is checked)."""
    from controller.runtime import HardwareRun, SimulatedRun

    speed = parse_speed(args.speed or "max")
    if args.resume is not None:
        if args.sim:
            return SimulatedRun.resume(args.resume, speed=speed, settings_for=_settings)
        return HardwareRun.resume(args.resume, settings_for=_settings)
    start = _parse_start(args.start)
    settings = _settings(DEFAULT_PERIOD_S if args.period is None else args.period)
    if args.sim:
        return SimulatedRun.prepare(
            args.protocol, args.rig, args.log, speed=speed, start_utc=start, settings=settings
        )
    return HardwareRun.prepare(
        args.protocol, args.rig, args.log, start_utc=start, settings=settings
    )


def _rig_folder(run: SimulatedRun | HardwareRun, resumed: Path | None) -> Path:
    """Folder of the run's rig file (a resumed run's: as launched, from its log)."""
    if resumed is None:
        return run.inputs.rig_path.parent
    from controller.runtime._launch import read_launch
    from controller.storage import RunLogReader

    with RunLogReader(resumed) as reader:
        return read_launch(reader, reader.meta()).rig_path.parent


def _telemetry(
    run: SimulatedRun | HardwareRun, *, paced: bool, console: Console, resumed: Path | None
) -> TelemetryLink | None:
    """The run's telemetry link when its rig has a ``[telemetry]`` table (else None)."""
    config = run.inputs.rig.telemetry
    if config is None:
        return None
    from controller.runtime._telemetry_link import telemetry_link

    def notice(text: str) -> None:
        console.print(f"note: {text}", highlight=False)

    link = telemetry_link(
        config,
        clock=run.clock,
        run_id=run.writer.meta.run_id,
        protocol=run.inputs.compiled.title or run.inputs.protocol_path.name,
        chambers=tuple(run.plan.chambers),
        duration_s=run.inputs.compiled.duration_s,
        period_s=run.plan.settings.period_s,
        base_dir=_rig_folder(run, resumed),  # a relative password_file is the rig's
        paced=paced,
        notice=notice,
    )
    if link is not None:
        from controller.runtime._telemetry_link import run_tasks

        link.publish_tasks(run_tasks(run.inputs))
        console.print(
            f"telemetry: publishing as {config.controller_id} to {config.address}",
            highlight=False,
        )
    return link


def _handle(args: argparse.Namespace) -> int:
    """Run (or resume) the protocol; print where the log is."""
    _check_combination(args)
    from controller.runtime._ctl_server import run_with_control
    from controller.runtime._ctl_wire import control_path

    run = _prepare(args)
    console = Console(stderr=False)
    interactive = sys.stdout.isatty()
    bar = _Bar(console) if interactive else None
    ctl = control_path(run.writer.path)
    paced = not args.sim or parse_speed(args.speed or "max") is not None
    try:
        link = _telemetry(run, paced=paced, console=console, resumed=args.resume)
    except BaseException:
        run.writer.close()
        raise

    def with_control(loop: ControlLoop) -> Awaitable[RunSummary]:
        return run_with_control(loop, ctl)  # operator commands for the whole run

    runner = with_control if link is None else link.runner(with_control)

    if interactive:
        console.print(f"operator commands: squall ctl --log {run.writer.path} status|hold|...")
    wall0 = time.perf_counter()
    try:
        with _start_up_frozen():
            if bar is not None:
                with bar.progress:
                    summary = run.run(progress=bar, runner=runner)
            else:
                summary = run.run(runner=runner)
    except (SquallError, RuntimeFailure, KeyboardInterrupt):
        print(f"log: {run.writer.path}", file=sys.stderr)
        raise
    except Exception as exc:
        print(f"log: {run.writer.path}", file=sys.stderr)
        _log.debug("the run failed", exc_info=True)
        raise RuntimeFailure(
            f"the run failed ({type(exc).__name__}: {exc}); outputs were made safe"
        ) from exc
    _report(console, summary, time.perf_counter() - wall0, interactive)
    return 0
