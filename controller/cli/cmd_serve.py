"""``squall serve --rig RIG [--schedule FILE] [--sim [--write-schedule]] [--speed N|max]
[--until ISO | --for DURATION] [--period SECONDS] [--sim-start ISO]``: run a rig's schedule
unattended, or rehearse it.

Rules
-----
- Serve takes the rig's lock for as long as it runs: one serve per rig, and no ``squall run``
  on the rig's devices meanwhile; a second one is refused with one line, exit 2.
- At each planned start: preflight (sensors answer plausibly, calibrations fresh, no latched
  trip from the rig's previous run), then the run — or a refusal with its findings in the
  experiment's history and an ``ALARM`` line. Each run logs to
  ``<id>-<protocol stem>.sqlite`` beside the schedule file and takes ``squall ctl``
  commands on its control socket.
- ``--sim`` simulates the rig on one virtual clock for the whole serve, starting now (or at
  ``--sim-start``): ``--speed max`` (default) jumps from deadline to deadline, so a week of
  schedule passes in seconds; without ``--until``/``--for`` it ends when nothing is planned.
  Without ``--sim`` serve drives the devices in real time until ``--until``/``--for`` or
  Ctrl-C.
- ``--sim`` rehearses on a copy of the schedule (``rehearsals/<stem>-<time>/`` beside it,
  with the rehearsal's run logs) and leaves the schedule itself as it was; it takes no rig
  lock, so it can run beside the rig's real serve. ``--write-schedule`` records the
  simulated runs into the schedule given instead (a training or demonstration schedule),
  holding the rig's lock like a real serve.
- Bad input (unknown rig file, missing schedule, a time without a zone, a malformed
  duration): one line, exit 2, nothing changed. A line per state change goes to stdout.
"""

from __future__ import annotations

import argparse
import math
from datetime import datetime
from pathlib import Path
from typing import Any

from controller.errors import SquallError

__all__ = ["register"]

_DEFAULT_SCHEDULE = Path("runs") / "schedule.sqlite"
_DEFAULT_PERIOD_S = 10.0


def register(sub: Any) -> None:
    """Add the ``serve`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser (no unit).
    """
    parser = sub.add_parser(
        "serve",
        help="run a rig's schedule unattended: preflight and start each experiment when due",
        description=(
            "Run the schedule of a rig: at each planned start, check that every sensor of the "
            "experiment's chambers answers with a plausible value, that calibrations are "
            "fresh and that no latched trip is left from the rig's previous run; then start "
            "the run, or refuse it with an alarm and the findings in its history. One serve "
            "per rig (it holds RIG.lock). With --sim the rig is simulated on one virtual "
            "clock, so days of schedule pass in seconds."
        ),
    )
    parser.add_argument("--rig", metavar="RIG", type=Path, required=True, help="rig file (TOML)")
    parser.add_argument(
        "--schedule",
        metavar="FILE",
        type=Path,
        default=_DEFAULT_SCHEDULE,
        help=f"schedule store (default {_DEFAULT_SCHEDULE}); run logs go beside it",
    )
    parser.add_argument(
        "--sim", action="store_true", help="simulate the rig's chambers on a virtual clock"
    )
    parser.add_argument(
        "--write-schedule",
        action="store_true",
        help="with --sim: record the simulated runs into the schedule given (default: "
        "rehearse on a copy beside it and leave the schedule as it was)",
    )
    parser.add_argument(
        "--speed",
        metavar="N|max",
        default=None,
        help="with --sim: 'max' (default) as fast as possible, N for N x real time",
    )
    limit = parser.add_mutually_exclusive_group()
    limit.add_argument(
        "--until",
        metavar="ISO8601",
        default=None,
        help="start nothing at or after this time (with a zone, e.g. 2027-07-17T08:00+02:00)",
    )
    limit.add_argument(
        "--for",
        dest="for_",
        metavar="DURATION",
        default=None,
        help="serve this long from the start, e.g. 7d or P7D",
    )
    parser.add_argument(
        "--period",
        metavar="SECONDS",
        type=float,
        default=None,
        help=f"control tick period of every run, s (default {_DEFAULT_PERIOD_S:g})",
    )
    parser.add_argument(
        "--sim-start",
        metavar="ISO8601",
        default=None,
        help="with --sim: when the virtual clock starts (default now)",
    )
    parser.set_defaults(handler=_handle)


def _time(text: str | None, option: str) -> datetime | None:
    from controller.cli.cmd_check import parse_start
    from controller.schedule import check_start

    try:
        value = parse_start(text)
    except SquallError as exc:
        raise SquallError(exc.message, field=option) from None
    return None if value is None else check_start(value, option)


def _duration(text: str | None) -> float | None:
    from controller.protocol import parse_duration

    if text is None:
        return None
    try:
        value = parse_duration(text)
    except ValueError as exc:
        raise SquallError(str(exc), field="--for") from None
    if not value > 0:
        raise SquallError(f"{text!r} is no time at all; give a duration above 0", field="--for")
    return value


def _speed(text: str | None) -> float | None:
    from controller.cli.cmd_run import parse_speed

    return None if text is None else parse_speed(text)


def _handle(args: argparse.Namespace) -> int:
    """Serve the rig's schedule; print a line per state change and a summary."""
    from controller.runtime import RunSettings
    from controller.schedule._serve import ServeConfig, serve

    if not args.sim:
        for value, option in (
            (args.speed, "--speed"),
            (args.sim_start, "--sim-start"),
            (args.write_schedule or None, "--write-schedule"),
        ):
            if value is not None:
                raise SquallError(f"{option} applies to a simulated serve only (add --sim)",
                                  field=option)  # fmt: skip
    period = _DEFAULT_PERIOD_S if args.period is None else args.period
    if not (math.isfinite(period) and period >= 1.0):
        raise SquallError(f"the tick period must be 1 s or more, got {period!r}", field="--period")
    default = RunSettings()
    timeout_s = min(default.read_timeout_s, period / 4.0)
    settings = RunSettings(period_s=period, read_timeout_s=timeout_s, write_timeout_s=timeout_s)
    until_utc, for_s = _time(args.until, "--until"), _duration(args.for_)
    start_utc, speed = _time(args.sim_start, "--sim-start"), _speed(args.speed)
    schedule = args.schedule
    rehearsal = args.sim and not args.write_schedule
    if rehearsal:
        from controller.files import load_model
        from controller.rig import Rig
        from controller.schedule._rehearsal import rehearsal_copy

        load_model(args.rig, Rig)  # a bad rig file is refused before anything is copied
        schedule = rehearsal_copy(args.schedule)
        print(
            f"rehearsal on a copy: {schedule} ({args.schedule} is left as it was; "
            "--write-schedule records into it)",
            flush=True,
        )
    config = ServeConfig(
        rig_path=args.rig,
        schedule_path=schedule,
        hold_rig=not rehearsal,
        sim=args.sim,
        speed=speed,
        until_utc=until_utc,
        for_s=for_s,
        start_utc=start_utc,
        settings=settings,
    )
    result = serve(config, notify=lambda line: print(line, flush=True))
    taken = ", ".join(f"{exp_id} {state.value}" for exp_id, state in result.outcomes)
    print(
        f"served {args.rig} from {result.started_utc:%Y-%m-%d %H:%M} to "
        f"{result.stopped_utc:%Y-%m-%d %H:%M} UTC: {taken or 'nothing was due'}"
    )
    return 0
