"""Benchmark: a 7-day, 8-chamber protocol with ``squall run --sim --speed max``.

The protocol is the storm example (``protocols/storm.toml``) with its phases cut to 7 days
(acclimation 1 d, storm 5 d with the 3-day storm event, recovery 1 d): sun-driven daylight,
a daily temperature cycle, flow pulses and the storm's shading and cooling. It runs on the
example rig (``rigs/saltmarrow-rack8.toml``: 8 chambers, 4 in one bath) through the very
command a user types, control (interlocks, PID, lamps, pumps) and the SQLite run log
included, once per control tick period asked for (default 60 s and 10 s).

Printed per tick period: wall seconds, simulated seconds per wall second, wall time per
tick, and whether the goal (7 days in at most 30 s of wall time) is met. Each period runs
``--repeat`` times (default 3) and the median wall time is judged, every run's time printed
beside it: the machine is shared, and a neighbour can slow one run by a fifth or more. With
``--breakdown`` a second, instrumented run of the first period splits the wall time into the
simulated rack (physics; the sensor sweep with the devices' answers), the simulated I/O's
glue around it (``SimulatedIO`` read_now, write_now and sync less the rack's calls), the
loop's decisions (interlocks, PID, lamps, pumps), the run-log writes, and the rest (asyncio
scheduling, building log rows, setpoints, the loop's bookkeeping). The loop's part is the
rest plus the run-log writes; the simulator side is the rack plus the glue. Like ``squall
run``, the instrumented run keeps start-up objects out of the garbage collector's scans.

Scaling to 64 chambers: the example rig copied eight times (eight baths of four chambers and
32 chambers with their own water; the facility tables left out, they do not act on the
simulation) runs the same protocol, cut to 12 h (``--quick``: 5 h), at a 10 s tick through
the same command; beside it the 8-chamber rig runs the very same cut. The wall time per tick
of each, per chamber, is compared side by side (the goal: 64 chambers cost no more per
chamber than 8, i.e. the per-tick cost grows at most linearly), and the 64-chamber figure is
projected to 30 simulated days at a 10 s tick.

Each figure also gives a ``RESULT:`` line for ``bench/run``: the 7-day wall time against the
30 s goal for every period, with the simulated/wall ratio as a note; the 64-chamber cost per
chamber and tick against the 8-chamber one. With ``--quick`` the protocol is cut to
6 h + 1 d + 6 h (the storm shortened to 12 h) and the 7-day wall time is estimated from its
wall time per tick; the line says so.

Run: ``/work/venv/bin/python bench/bench_run.py [--periods 60,10] [--breakdown] [--quick]
[--no-scale] [--repeat N]``.
"""

from __future__ import annotations

import argparse
import contextlib
import gc
import io
import re
import statistics
import tempfile
import time
import tomllib
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Any

import tomlkit

from controller.cli import main as squall
from controller.runtime import Decider, RunSettings, SimulatedRun
from controller.storage import RunLogReader, RunLogWriter

ROOT = Path(__file__).resolve().parent.parent
RIG = ROOT / "rigs" / "saltmarrow-rack8.toml"
START = "2027-08-20T04:00:00+00:00"
DAYS = 7
GOAL_WALL_S = 30.0
COPIES = 8
"""The 64-chamber rig is the example rig this many times."""
SCALE_PERIOD_S = 10.0
LOAD_TEST_DAYS = 30
"""The 64-chamber projection: this many simulated days at a 10 s tick."""


QUICK_CUT = (("6h", "1d", "6h"), ("4h", "12h", "6h", "6h", "90min"))
"""--quick: phase durations; the storm event's offset, duration (sampled at its end), ramp,
pulse interval and pulse duration."""
SCALE_CUTS = {
    True: (("30min", "4h", "30min"), ("30min", "3h", "1h", "1h", "20min")),
    False: (("1h", "10h", "1h"), ("1h", "8h", "2h", "3h", "45min")),
}
"""The protocol cut of the 64-chamber comparison, by --quick: 5 h, else 12 h."""


def seven_day_protocol(
    folder: Path,
    quick: bool = False,
    *,
    cut: tuple[tuple[str, str, str], tuple[str, str, str, str, str]] | None = None,
) -> Path:
    """Write the storm example cut to 1 d + 5 d + 1 d (quick: 6 h + 1 d + 6 h with a 12 h
    storm; ``cut``: these phase durations and storm offset and duration); return its path."""
    text = (ROOT / "protocols" / "storm.toml").read_text(encoding="utf-8")
    if cut is None and quick:
        cut = QUICK_CUT
    phases = cut[0] if cut is not None else ("1d", "5d", "1d")
    durations = iter(f'"{d}"' for d in phases)
    if cut is not None:
        offset, length, ramp, every, pulse = cut[1]
        head, sep, events = text.partition("[[events]]")
        changes = (
            (r'^offset = "[^"]+"$', f'offset = "{offset}"'),
            (r'^duration = "[^"]+"$', f'duration = "{length}"'),
            (r'^ramp = "[^"]+"$', f'ramp = "{ramp}"'),
            (r'^pulse_every = "[^"]+"$', f'pulse_every = "{every}"'),
            (r'^pulse_duration = "[^"]+"$', f'pulse_duration = "{pulse}"'),
            (r'^at = "storm\+[^"]+"$', f'at = "storm+{length}"'),  # the sampling date
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
    path = folder / f"storm-{'-'.join(phases)}.toml"
    path.write_text(text, encoding="utf-8")
    return path


def copied_rig_and_protocol(folder: Path, protocol: Path, copies: int) -> tuple[Path, Path]:
    """The example rig ``copies`` times (chamber ``C1`` becomes ``C1``, ``C1-2`` …) and the
    protocol with every group spanning the copies of its chambers; return (rig, protocol)."""
    rig = tomllib.loads(RIG.read_text(encoding="utf-8"))
    for table in ("power", "maintenance", "plants"):  # facility checks, not simulation
        rig.pop(table, None)

    def name(cid: str, copy: int) -> str:
        return cid if copy == 1 else f"{cid}-{copy}"

    chambers, baths = [], []
    for copy in range(1, copies + 1):
        for bath in rig.get("baths", []):
            baths.append({**bath, "id": name(bath["id"], copy)})
        for chamber in rig["chambers"]:
            twin = {**chamber, "id": name(chamber["id"], copy)}
            if "bath" in chamber:
                twin["bath"] = name(chamber["bath"], copy)
            chambers.append(twin)
    rig["baths"], rig["chambers"] = baths, chambers
    rig["name"] = f"{rig['name']} x{copies}"
    rig_path = folder / f"rack-x{copies}.toml"
    rig_path.write_text(tomlkit.dumps(rig), encoding="utf-8")

    text = protocol.read_text(encoding="utf-8")

    def group(match: re.Match[str]) -> str:
        ids = re.findall(r'"([^"]+)"', match.group(1))
        every = [name(cid, copy) for copy in range(1, copies + 1) for cid in ids]
        return "chambers = [" + ", ".join(f'"{cid}"' for cid in every) + "]"

    text, n = re.subn(r"^chambers = \[([^\]]*)\]", group, text, flags=re.M)
    if n == 0:
        raise SystemExit("protocols/storm.toml names no chambers; adapt the bench")
    protocol_path = folder / f"{protocol.stem}-x{copies}.toml"
    protocol_path.write_text(text, encoding="utf-8")
    return rig_path, protocol_path


def run_cli(protocol: Path, log: Path, period_s: float, rig: Path = RIG) -> float:
    """Run ``squall run ... --sim --speed max`` once; return its wall time, s."""
    args = ["run", str(protocol), "--rig", str(rig), "--sim", "--speed", "max"]
    args += ["--log", str(log), "--start", START, "--period", f"{period_s:g}"]
    start = time.perf_counter()
    with contextlib.redirect_stdout(io.StringIO()):  # it prints the log path
        code = squall(args)
    wall_s = time.perf_counter() - start
    if code != 0:
        raise SystemExit(f"squall run exited with {code}")
    return wall_s


class _Timer:
    """Accumulates the wall time spent inside wrapped callables, s (a call made from inside
    another wrapped call of the same name counts once, with its caller)."""

    def __init__(self) -> None:
        self.spent: dict[str, float] = {}
        self._depth: dict[str, int] = {}

    def wrap(self, name: str, fn: Callable[..., Any]) -> Callable[..., Any]:
        def timed(*args: Any, **kwargs: Any) -> Any:
            depth = self._depth.get(name, 0)
            self._depth[name] = depth + 1
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                if depth == 0:
                    self.spent[name] = self.spent.get(name, 0.0) + time.perf_counter() - t0
                self._depth[name] = depth

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
    # the loop reads every chamber at once through Rack.sweep (SimulatedIO.read_now) and
    # asks who answers through Rack.comm_ok_all; the per-sensor reads serve the
    # chamber-by-chamber path (a silent device)
    parts = {
        "rack: physics": ("advance", "set_outputs"),
        "rack: sensor sweep": (
            "sweep",
            "comm_ok_all",
            "read_temperature",
            "read_optode",
            "read_par",
            "read_flow",
            "read_level_ok",
        ),
    }
    for label, names in parts.items():
        for name in names:
            setattr(rack, name, timer.wrap(label, getattr(rack, name)))
    # the simulated I/O's own calls, around the rack's (nested calls of another name count
    # in both, so the glue is this less the rack's parts)
    for name in ("read_now", "write_now", "sync"):
        setattr(run.io, name, timer.wrap("simulated I/O", getattr(run.io, name)))
    original_decide = Decider.decide
    Decider.decide = timer.wrap("decide: interlocks, PID, lamps, pumps", original_decide)  # type: ignore[method-assign]
    # the loop hands each tick's rows to the writer itself (LogSink.put_samples) and the
    # logger task only commits: time the writer's calls, wherever they come from
    writes = (
        "append_samples",
        "append_sample_values",
        "record_alarm",
        "record_event",
        "record_window",
        "record_audit",
        "flush",
        "finish",
    )
    originals = {name: getattr(RunLogWriter, name) for name in writes}
    for name, method in originals.items():
        setattr(RunLogWriter, name, timer.wrap("run log writes", method))
    gc.freeze()  # as squall run does
    try:
        start = time.perf_counter()
        summary = run.run()
        wall_s = time.perf_counter() - start
    finally:
        gc.unfreeze()
        Decider.decide = original_decide  # type: ignore[method-assign]
        for name, method in originals.items():
            setattr(RunLogWriter, name, method)
    ticks = summary.ticks.ticks
    print(f"\nbreakdown at a {period_s:g} s tick ({ticks} ticks, instrumented: {wall_s:.1f} s)")
    spent = dict(timer.spent)
    rack_s = sum(spent.get(label, 0.0) for label in parts)
    spent["simulated I/O glue"] = spent.pop("simulated I/O", 0.0) - rack_s
    rest = wall_s - sum(spent.values())
    loop_s = rest + spent.get("run log writes", 0.0)
    for name, seconds in [
        *sorted(spent.items()),
        ("rest: asyncio, log rows, setpoints", rest),
        ("loop's part: rest + run log writes", loop_s),
        ("simulator side: rack + simulated I/O glue", rack_s + spent["simulated I/O glue"]),
    ]:
        print(f"  {name:<42} {seconds:7.2f} s  {1000 * seconds / ticks:6.3f} ms/tick")


def finished(log: Path) -> tuple[float, int]:
    """Simulated seconds and sample rows of a finished run log."""
    with RunLogReader(log) as reader:
        info = reader.info()
    assert info.end is not None, "the run did not finish"
    return info.end.end_t_s, info.samples


def scaling(folder: Path, quick: bool) -> list[str]:
    """64 chambers against 8 at a 10 s tick, the same protocol cut; return RESULT lines."""
    cut = SCALE_CUTS[quick]
    protocol = seven_day_protocol(folder, cut=cut)
    rig64, protocol64 = copied_rig_and_protocol(folder, protocol, COPIES)
    n64 = 8 * COPIES
    print(
        f"\nscaling at a {SCALE_PERIOD_S:g} s tick, protocol cut {' + '.join(cut[0])} "
        f"(storm {cut[1][1]}):"
    )
    per_tick: dict[int, float] = {}
    for chambers, rig, proto in ((8, RIG, protocol), (n64, rig64, protocol64)):
        log = folder / f"scale-{chambers}.sqlite"
        wall_s = run_cli(proto, log, SCALE_PERIOD_S, rig)
        sim_s, rows = finished(log)
        ticks = rows // chambers
        per_tick[chambers] = 1000.0 * wall_s / ticks
        print(
            f"  {chambers:>3} chambers: {ticks} ticks in {wall_s:.1f} s, "
            f"{per_tick[chambers]:.2f} ms/tick, {per_tick[chambers] / chambers:.3f} ms per "
            f"chamber and tick, {sim_s / wall_s:.0f}x simulated/wall"
        )
    projected_min = per_tick[n64] * LOAD_TEST_DAYS * 86400.0 / SCALE_PERIOD_S / 60000.0
    print(
        f"  {LOAD_TEST_DAYS} days of {n64} chambers at a {SCALE_PERIOD_S:g} s tick: "
        f"{projected_min:.0f} min projected"
    )
    return [
        f"RESULT: {n64}-chamber run wall time per chamber and {SCALE_PERIOD_S:g} s tick"
        f" | {per_tick[n64] / n64:.3f} ms | <= {per_tick[8] / 8:.3f} ms | against 8 chambers"
        f" in the same run of the bench (linear scaling); {per_tick[n64]:.1f} ms per {n64}-"
        f"chamber tick, {LOAD_TEST_DAYS} d projected at {projected_min:.0f} min"
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--periods", default="60,10", help="tick periods in s, comma-separated")
    parser.add_argument("--breakdown", action="store_true", help="also split the wall time")
    parser.add_argument(
        "--quick", action="store_true", help="run 1.5 days and estimate the 7-day wall time"
    )
    parser.add_argument("--no-scale", action="store_true", help="skip the 64-chamber comparison")
    parser.add_argument(
        "--repeat", type=int, default=3, help="runs per tick period; the median is judged"
    )
    args = parser.parse_args()
    if args.repeat < 1:
        parser.error("--repeat must be at least 1")
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
            walls: list[float] = []
            for attempt in range(args.repeat):
                log = folder / f"run-{period_s:g}-{attempt}.sqlite"
                walls.append(run_cli(protocol, log, period_s))
                sim_s, rows = finished(log)
            # the median of the repeats: the machine is shared, and one run can be slowed by
            # a neighbour by 20 % or more; the median is neither the luckiest nor the unluckiest
            wall_s = statistics.median(walls)
            ticks = rows // 8
            week_s = wall_s * DAYS * 86400.0 / sim_s if args.quick else wall_s
            verdict = "met" if week_s <= GOAL_WALL_S else f"missed (> {GOAL_WALL_S:g} s)"
            if args.quick:
                verdict += f"; {DAYS} d estimated at {week_s:.1f} s"
            print(
                f"{period_s:>5g}s {ticks:>7} {rows:>8} {wall_s:>8.1f} "
                f"{sim_s / wall_s:>9.0f} {1000 * wall_s / ticks:>8.2f}  {verdict}"
            )
            spread = ", ".join(f"{w:.1f}" for w in walls)
            if len(walls) > 1:
                print(f"        wall s of the {len(walls)} runs: {spread} (median above)")
            results.append(
                f"RESULT: {DAYS}-day 8-chamber run wall time, {period_s:g} s tick"
                + (f" (estimated from {sim_s / 86400.0:g} d)" if args.quick else "")
                + f" | {week_s:.1f} s | <= {GOAL_WALL_S:g} s | median of {len(walls)} runs"
                f" ({spread} s{' for 1.5 d' if args.quick else ''}); {sim_s / wall_s:.0f}x "
                "simulated/wall, control and logging included"
            )
        if not args.no_scale:
            results += scaling(folder, args.quick)
        if args.breakdown:
            breakdown(protocol, folder / "breakdown.sqlite", periods[0])
    for line in results:
        print(line)


if __name__ == "__main__":
    main()
