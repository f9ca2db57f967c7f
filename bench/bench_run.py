"""Benchmark: a 7-day, 8-chamber protocol with ``squall run --sim --speed max``.

The protocol is the storm example (``protocols/storm.toml``) with its phases cut to 7 days
(acclimation 1 d, storm 5 d with the 3-day storm event, recovery 1 d): sun-driven daylight,
a daily temperature cycle, flow pulses and the storm's shading and cooling. It runs on the
example rig (``rigs/saltmarrow-rack8.toml``: 8 chambers, 4 in one bath) through the very
command a user types, control (interlocks, PID, lamps, pumps) and the SQLite run log
included, once per control tick period asked for.

Printed per tick period: wall seconds, simulated seconds per wall second, wall time per
tick, and whether the goal (7 days in at most 30 s of wall time) is met. With
``--breakdown`` a second, instrumented run of the first period splits the wall time into the
simulated rack (physics and sensor reads), the loop's decisions (interlocks, PID, lamps,
pumps), the run-log writes, and the rest (asyncio scheduling, building log rows).

Each period also gives a ``RESULT:`` line for ``bench/run`` (wall time against the 30 s
goal, with the simulated/wall ratio as a note). With ``--quick`` the protocol is cut to
6 h + 1 d + 6 h (the storm shortened to 12 h) and the 7-day wall time is estimated from its
wall time per tick; the line says so.

Run: ``/work/venv/bin/python bench/bench_run.py [--periods 60,10] [--breakdown] [--quick]``.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import re
import tempfile
import time
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Any

from controller.cli import main as squall
from controller.runtime import Decider, LogSink, RunSettings, SimulatedRun
from controller.storage import RunLogReader

ROOT = Path(__file__).resolve().parent.parent
RIG = ROOT / "rigs" / "saltmarrow-rack8.toml"
START = "2027-08-20T04:00:00+00:00"
DAYS = 7
GOAL_WALL_S = 30.0


def seven_day_protocol(folder: Path, quick: bool = False) -> Path:
    """Write the storm example cut to 1 d + 5 d + 1 d (quick: 6 h + 1 d + 6 h with a 12 h
    storm); return its path."""
    text = (ROOT / "protocols" / "storm.toml").read_text(encoding="utf-8")
    durations = iter(['"6h"', '"1d"', '"6h"'] if quick else ['"1d"', '"5d"', '"1d"'])
    if quick:
        head, sep, events = text.partition("[[events]]")
        changes = (
            (r'^offset = "[^"]+"$', 'offset = "4h"'),
            (r'^duration = "[^"]+"$', 'duration = "12h"'),
            (r'^at = "storm\+[^"]+"$', 'at = "storm+12h"'),  # the sampling date
        )
        for pattern, replacement in changes:
            events, n = re.subn(pattern, replacement, events, count=1, flags=re.M)
            if not sep or n != 1:
                raise SystemExit("protocols/storm.toml has changed shape; adapt --quick")
        text = head + sep + events

    def phase(match: re.Match[str]) -> str:
        return f"{match.group(1)}duration = {next(durations)}"

    text, n = re.subn(r'(\[\[phases\]\]\nname = "[^"]+"\n)duration = "[^"]+"', phase, text)
    if n != 3:
        raise SystemExit("protocols/storm.toml no longer has three phases; adapt the bench")
    path = folder / ("storm-quick.toml" if quick else "storm-7d.toml")
    path.write_text(text, encoding="utf-8")
    return path


def run_cli(protocol: Path, log: Path, period_s: float) -> float:
    """Run ``squall run ... --sim --speed max`` once; return its wall time, s."""
    args = ["run", str(protocol), "--rig", str(RIG), "--sim", "--speed", "max"]
    args += ["--log", str(log), "--start", START, "--period", f"{period_s:g}"]
    start = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):  # it prints the log path
        code = squall(args)
    wall_s = time.perf_counter() - start
    if code != 0:
        raise SystemExit(f"squall run exited with {code}")
    return wall_s


class _Timer:
    """Accumulates the wall time spent inside wrapped callables, s."""

    def __init__(self) -> None:
        self.spent: dict[str, float] = {}

    def wrap(self, name: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def timed(*args: Any, **kwargs: Any) -> Any:
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.spent[name] = self.spent.get(name, 0.0) + time.perf_counter() - t0

        return timed


def breakdown(protocol: Path, log: Path, period_s: float) -> None:
    """One instrumented run: where the wall time goes."""
    timer = _Timer()
    run = SimulatedRun.prepare(
        protocol,
        RIG,
        log,
        start_utc=datetime.fromisoformat(START),
        settings=RunSettings(period_s=period_s),
    )
    rack = run.rack
    for name in ("advance", "read_temperature", "read_optode", "read_par", "read_flow"):
        label = "rack: physics" if name == "advance" else "rack: sensor reads"
        setattr(rack, name, timer.wrap(label, getattr(rack, name)))
    rack.set_outputs = timer.wrap("rack: physics", rack.set_outputs)  # type: ignore[method-assign]
    original_decide, original_drain = Decider.decide, LogSink.drain
    Decider.decide = timer.wrap("decide: interlocks, PID, lamps, pumps", original_decide)  # type: ignore[method-assign]
    LogSink.drain = timer.wrap("run log writes", original_drain)  # type: ignore[method-assign]
    try:
        start = time.perf_counter()
        summary = run.run()
        wall_s = time.perf_counter() - start
    finally:
        Decider.decide, LogSink.drain = original_decide, original_drain  # type: ignore[method-assign]
    ticks = summary.ticks.ticks
    print(f"\nbreakdown at a {period_s:g} s tick ({ticks} ticks, instrumented: {wall_s:.1f} s)")
    rest = wall_s - sum(timer.spent.values())
    for name, spent in [*sorted(timer.spent.items()), ("rest: asyncio, log rows, setpoints", rest)]:
        print(f"  {name:<40} {spent:7.2f} s  {1000 * spent / ticks:6.3f} ms/tick")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--periods", default="60", help="tick periods in s, comma-separated")
    parser.add_argument("--breakdown", action="store_true", help="also split the wall time")
    parser.add_argument(
        "--quick", action="store_true", help="run 1.5 days and estimate the 7-day wall time"
    )
    args = parser.parse_args()
    periods = [float(p) for p in args.periods.split(",")]
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        protocol = seven_day_protocol(folder, args.quick)
        cut = "6 h + 1 d + 6 h, storm 12 h" if args.quick else "1 d + 5 d + 1 d"
        span = "1.5-day" if args.quick else f"{DAYS}-day"
        print(f"{span} protocol (storm example, {cut}), 8 chambers, --sim --speed max")
        results: list[str] = []
        header = ("tick", "ticks", "rows", "wall s", "sim/wall", "ms/tick")
        widths = (6, 7, 8, 8, 9, 8)
        print(" ".join(f"{h:>{w}}" for h, w in zip(header, widths, strict=True)) + "  goal")
        for period_s in periods:
            log = folder / f"run-{period_s:g}.sqlite"
            wall_s = run_cli(protocol, log, period_s)
            with RunLogReader(log) as reader:
                info = reader.info()
            assert info.end is not None, "the run did not finish"
            sim_s = info.end.end_t_s
            ticks = info.samples // 8
            week_s = wall_s * DAYS * 86400.0 / sim_s if args.quick else wall_s
            verdict = "met" if week_s <= GOAL_WALL_S else f"missed (> {GOAL_WALL_S:g} s)"
            if args.quick:
                verdict += f"; {DAYS} d estimated at {week_s:.1f} s"
            print(
                f"{period_s:>5g}s {ticks:>7} {info.samples:>8} {wall_s:>8.1f} "
                f"{sim_s / wall_s:>9.0f} {1000 * wall_s / ticks:>8.2f}  {verdict}"
            )
            results.append(
                f"RESULT: {DAYS}-day 8-chamber run wall time, {period_s:g} s tick"
                + (f" (estimated from {sim_s / 86400.0:g} d)" if args.quick else "")
                + f" | {week_s:.1f} s | <= {GOAL_WALL_S:g} s | {sim_s / wall_s:.0f}x "
                "simulated/wall, control and logging included"
            )
        if args.breakdown:
            breakdown(protocol, folder / "breakdown.sqlite", periods[0])
    for line in results:
        print(line)


if __name__ == "__main__":
    main()
