"""The terminal views: CPU of a live view, time to the first screen, replay smoothness.

Three measurements, each beside a reference measured in the same run:

1. **Live view CPU.** A writer process appends one tick of 32 invented chambers every real
   second to a run log (after an hour of history); ``squall watch``'s app follows it headless
   (``App.run_test``, 100×40 so every chamber is on screen and every line repaints) for N
   seconds, first on the chamber board, then on a chamber's detail charts. The app process's
   CPU time over wall time is its share of one core. Reference: an idle Textual app of the
   same size over the same time. Goal (issue 6): ≤ 10 % of one core.
2. **Start-up.** ``squall watch LOG`` in a fresh process with Textual's headless driver and
   ``q`` pressed as soon as the app is ready (``TEXTUAL_DRIVER``, ``TEXTUAL_PRESS``): the
   wall time from spawning the process to the board's first refresh (interpreter start,
   imports, the parser, opening the log, mount and first paint), and to its exit.
   References: ``python -c "import textual.app"`` and ``python -c "import pandas"``; the
   same start with only the watch command's parser built (what building parsers lazily
   would give: today every ``cmd_*`` module is imported, with gsw, numpy and pydantic); with
   ``--baseline DIR`` the same start-up of another source tree (an older commit) alternates
   with this one; the in-process split of the time follows. Goal: ≤ 1.5 s to first paint.
3. **Replay.** A 7-day log of 32 chambers at 1-minute ticks (322 560 rows) replayed at 3600×
   (an hour a second) for N seconds with the app's frame timer (0.1 s): work per frame (poll
   + hand-over to the widgets), interval between frames (which includes Textual's paint),
   and process CPU per frame, as percentiles; on the board and on a chamber's charts with
   the log in memory, and on the board while it still loads ("cold": the app's worker
   thread reads it; the frames carry no read). Smooth means frames
   keep their 0.1 s rhythm: goal p95 interval ≤ 150 ms.

No timing is asserted in tests; this prints figures and ``RESULT:`` lines for bench/run.

Usage: ``python bench/bench_tui.py [--quick] [--seconds N] [--only live|start|replay]
[--baseline DIR]``
"""

from __future__ import annotations

import argparse
import asyncio
import itertools
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import cast

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
SIZE = (100, 40)
CHAMBERS = 32
GOAL_CPU_PCT = 10.0
GOAL_START_S = 1.5
GOAL_INTERVAL_MS = 150.0

_WRITER = """
import sys, time
from controller.tui import SyntheticRun
run = SyntheticRun(sys.argv[1], chambers=int(sys.argv[2]), period_s=1.0, duration_s=86400.0,
                   commit_interval_s=0.0)
for _ in range(int(sys.argv[3])):
    run.tick()
run.writer.flush()
print("ready", flush=True)
end = time.monotonic() + float(sys.argv[4])
next_t = time.monotonic()
while time.monotonic() < end:
    next_t += 1.0
    time.sleep(max(0.0, next_t - time.monotonic()))
    run.tick()
run.close()
"""


def _pct(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) if values else float("nan")


async def _cpu_share(app: object, seconds: float, setup: object = None) -> float:
    """Run ``app`` headless; return its process CPU share over ``seconds`` (% of one core)."""
    async with app.run_test(size=SIZE) as pilot:  # type: ignore[attr-defined]
        if setup is not None:
            await setup(pilot)  # type: ignore[operator]
        await asyncio.sleep(1.5)  # warm-up: first paint, workers
        cpu0, wall0 = time.process_time(), time.perf_counter()
        await asyncio.sleep(seconds)
        cpu1, wall1 = time.process_time(), time.perf_counter()
    return 100.0 * (cpu1 - cpu0) / (wall1 - wall0)


def live_cpu(folder: Path, seconds: float) -> None:
    """Measurement 1: a live view of 32 chambers at 1 Hz against an idle Textual app."""
    from textual.app import App, ComposeResult
    from textual.widgets import Footer, Static

    from controller.tui import LogSource, SquallApp

    class Idle(App[None]):
        def compose(self) -> ComposeResult:
            yield Static("idle reference app")
            yield Footer()

    log = folder / "live.sqlite"
    history = 3600
    total = 2 * seconds + 10.0
    writer = subprocess.Popen(
        [sys.executable, "-c", _WRITER, str(log), str(CHAMBERS), str(history), str(total)],
        stdout=subprocess.PIPE,
        text=True,
        cwd=ROOT,
    )
    try:
        assert writer.stdout is not None
        writer.stdout.readline()  # "ready": an hour of history is in the log

        async def to_detail(pilot: object) -> None:
            await pilot.press("down", "down", "enter")  # type: ignore[attr-defined]

        idle = asyncio.run(_cpu_share(Idle(), seconds))
        board = asyncio.run(_cpu_share(SquallApp(LogSource(log)), seconds))
        detail = asyncio.run(_cpu_share(SquallApp(LogSource(log)), seconds, to_detail))
    finally:
        writer.kill()
        writer.wait()
    print(f"\n1. live view, {CHAMBERS} chambers updating every second, {SIZE[0]}x{SIZE[1]}, ")
    print(f"   {seconds:g} s each, % of one core (process CPU time / wall time)")
    print(f"   idle Textual app (reference)   {idle:6.2f} %")
    print(f"   squall watch, chamber board    {board:6.2f} %   ({board - idle:+.2f} over idle)")
    print(f"   squall watch, chamber detail   {detail:6.2f} %   ({detail - idle:+.2f} over idle)")
    print(
        f"RESULT: live view CPU, 32 chambers at 1 Hz, board | {board:.2f} % | <= {GOAL_CPU_PCT:g} %"
    )
    print(
        f"RESULT: live view CPU, 32 chambers at 1 Hz, detail charts | {detail:.2f} % | "
        f"<= {GOAL_CPU_PCT:g} %"
    )


def _wall(argv: list[str], env: dict[str, str] | None = None) -> float:
    t0 = time.perf_counter()
    subprocess.run(argv, env=env, cwd=ROOT, check=True, capture_output=True, timeout=120)
    return time.perf_counter() - t0


# Runs ``squall watch LOG`` in this fresh process exactly as the console script does, and
# prints the wall time of the first paint (after the board's first refresh) on stderr.
_PAINTED = """
import sys, time
import controller.tui._app as app_module
mount = app_module.SquallApp.on_mount
async def on_mount(self):
    await mount(self)
    self.call_after_refresh(lambda: print(f"PAINTED {time.time():.6f}", file=sys.stderr,
                                          flush=True))
app_module.SquallApp.on_mount = on_mount
if len(sys.argv) > 2:  # only the watch command's parser, as if parsers were built lazily
    from controller.cli import ArgumentParser
    from controller.cli import cmd_watch
    parser = ArgumentParser(prog="squall")
    cmd_watch.register(parser.add_subparsers(dest="command"))
    args = parser.parse_args(["watch", sys.argv[1]])
    sys.exit(args.handler(args))
from controller.cli import main
sys.exit(main(["watch", sys.argv[1]]))
"""


def _watch_once(
    log: Path, env: dict[str, str], tree: Path, *, own_parser: bool = False
) -> tuple[float, float]:
    """(start to first paint, start to exit) of one ``squall watch`` process, s."""
    t0 = time.time()
    done = subprocess.run(
        [sys.executable, "-c", _PAINTED, str(log), *(["own-parser"] if own_parser else [])],
        env=env,
        cwd=tree,  # python -c imports from the working folder first
        check=True,
        capture_output=True,
        text=True,
        timeout=120,
    )
    t_exit = time.time()
    painted = next(
        float(line.split()[1]) for line in done.stderr.splitlines() if line.startswith("PAINTED")
    )
    return painted - t0, t_exit - t0


def start_up(folder: Path, repeat: int, baseline: Path | None = None) -> None:
    """Measurement 2: process start to first paint of ``squall watch``, against imports."""
    from controller.tui import SyntheticRun

    log = folder / "start.sqlite"
    run = SyntheticRun(log, chambers=CHAMBERS, period_s=10.0)
    run.run_ticks(8640)  # a day at 10 s ticks: 276 480 rows, so start-up is not trivially small
    run.close()
    env = dict(os.environ)
    env["TEXTUAL_DRIVER"] = "textual.drivers.headless_driver:HeadlessDriver"
    env["TEXTUAL_PRESS"] = "q"
    trees = {"this tree": (ROOT, False), "this tree, only the watch parser": (ROOT, True)}
    if baseline is not None:  # another checkout, imported from its folder first
        trees[f"baseline {baseline.name}"] = (baseline.resolve(), False)
    refs = {
        'python -c "pass"': [sys.executable, "-c", "pass"],
        'python -c "import textual.app"': [sys.executable, "-c", "import textual.app"],
        'python -c "import pandas"': [sys.executable, "-c", "import pandas"],
    }
    times: dict[str, list[float]] = {name: [] for name in refs}
    paint: dict[str, list[float]] = {name: [] for name in trees}
    total: dict[str, list[float]] = {name: [] for name in trees}
    for _ in range(repeat):  # alternate, so load changes hit every case alike
        for name, argv in refs.items():
            times[name].append(_wall(argv))
        for name, (tree, own) in trees.items():
            first, whole = _watch_once(log, env, tree, own_parser=own)
            paint[name].append(first)
            total[name].append(whole)
    print(f"\n2. start-up, wall time of a fresh process, best and median of {repeat}")
    for name, values in times.items():
        print(f"   {name:40s} best {min(values):5.2f} s  median {statistics.median(values):5.2f} s")
    print("   squall watch LOG (headless, q at once), start to first paint | to exit:")
    for name in trees:
        p, w = paint[name], total[name]
        print(
            f"     {name:38s} best {min(p):5.2f} s  median {statistics.median(p):5.2f} s"
            f"  | best {min(w):5.2f} s  median {statistics.median(w):5.2f} s"
        )
    watch = paint["this tree"]
    textual_s = min(times['python -c "import textual.app"'])
    print(f"   first paint / import textual.app: {min(watch) / textual_s:.1f}x")
    if baseline is not None:
        base = paint[f"baseline {baseline.name}"]
        print(f"   first paint, baseline / this tree: {min(base) / min(watch):.2f}x (best)")
    split = subprocess.run(
        [sys.executable, "-c", _SPLIT, str(log)],
        cwd=ROOT,
        capture_output=True,
        text=True,
        check=True,
        timeout=120,
    )
    print("   in-process split (one run):")
    print(split.stdout.rstrip())
    print(
        f"RESULT: squall watch start to first paint (headless) | {min(watch):.2f} s "
        f"| <= {GOAL_START_S:g} s | median {statistics.median(watch):.2f} s"
    )


_SPLIT = """
import asyncio, sys, time
t0 = time.perf_counter()
import controller.cli as cli
cli.build_parser()
t1 = time.perf_counter()
from controller.tui._launch import open_live
t2 = time.perf_counter()
source = open_live(__import__("pathlib").Path(sys.argv[1]))
t3 = time.perf_counter()
from controller.tui._app import SquallApp
t4 = time.perf_counter()
async def main():
    app = SquallApp(source)
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.pause()
        return time.perf_counter()
t5 = asyncio.run(main())
heavy = [m for m in ("pandas", "numpy", "pydantic", "aiomqtt", "pymodbus") if m in sys.modules]
for name, a, b in (("parser (all commands)", t0, t1), ("launch + log reading", t1, t2),
                   ("open the log", t2, t3), ("import textual + views", t3, t4),
                   ("mount + first paint", t4, t5)):
    print(f"     {name:28s} {b - a:6.3f} s")
print(f"     loaded by then: {', '.join(heavy) or 'none of pandas, numpy, pydantic, aiomqtt'}")
"""


def replay(folder: Path, seconds: float, days: float) -> None:
    """Measurement 3: frame times of a 7-day, 32-chamber replay at 3600x."""
    from controller.tui import ReplaySource, SquallApp, SyntheticRun

    log = folder / "week.sqlite"
    ticks = int(days * 1440)
    t0 = time.perf_counter()
    run = SyntheticRun(log, chambers=CHAMBERS, period_s=60.0, duration_s=days * 86400.0)
    run.run_ticks(ticks)
    run.finish()
    made_s = time.perf_counter() - t0

    class Timed(SquallApp):
        work: list[float]
        stamps: list[float]
        cpu: list[float]

        def poll_now(self) -> None:
            start = time.perf_counter()
            snapshot = self.source.poll()
            if snapshot is not None:
                self._deliver(snapshot)  # hand over now, so the time covers the widgets too
            end = time.perf_counter()
            self.work.append(end - start)
            self.stamps.append(end)
            self.cpu.append(time.process_time())

    async def play(screen: str, preload: bool) -> dict[str, object]:
        source = ReplaySource(log, speed=3600.0)
        load_s = 0.0
        if preload:  # steady playback: the whole log in memory first, then from the start
            t = time.perf_counter()
            source.open()
            while source.loaded_rows < ticks * CHAMBERS:
                source.poll()
            load_s = time.perf_counter() - t
            source.seek_fraction(0.0)
        app = Timed(source)
        app.work, app.stamps, app.cpu = [], [], []
        async with app.run_test(size=SIZE) as pilot:
            if screen == "detail":
                await pilot.press("down", "enter")
            await asyncio.sleep(1.0)
            app.work.clear()
            app.stamps.clear()
            app.cpu.clear()
            await asyncio.sleep(seconds)
            elapsed = app.snapshot.run.elapsed_s if app.snapshot else 0.0
        return {
            "work": app.work,
            "stamps": app.stamps,
            "cpu": app.cpu,
            "elapsed": elapsed,
            "loaded": source.loaded_rows,
            "load_s": load_s,
        }

    print(f"\n3. replay of {days:g} days x {CHAMBERS} chambers at 1-min ticks ")
    print(f"   ({ticks * CHAMBERS} rows, written in {made_s:.1f} s) at 3600x, {seconds:g} s, ")
    print(f"   frame timer {0.1 * 1000:.0f} ms, {SIZE[0]}x{SIZE[1]}")
    print("   'loaded': the log read into memory before playing (steady playback);")
    print("   'cold': playing at once while the rest of the log loads in the app's worker thread")
    head = "   case            frames  work p50/p95/p99/max ms    interval p50/p95/max ms"
    print(head + "  CPU/frame ms")
    interval_p95: dict[str, float] = {}
    for screen, preload in (("board", True), ("detail", True), ("board", False)):
        got = asyncio.run(play(screen, preload))
        work = cast(list[float], got["work"])
        stamps = cast(list[float], got["stamps"])
        cpu = cast(list[float], got["cpu"])
        w = [1000 * x for x in work]
        gaps = [1000 * (b - a) for a, b in itertools.pairwise(stamps)]
        per_frame = 1000 * (cpu[-1] - cpu[0]) / max(1, len(cpu) - 1) if len(cpu) > 1 else 0.0
        case = f"{screen}, {'loaded' if preload else 'cold'}"
        if preload:
            interval_p95[screen] = _pct(gaps, 95)
        print(
            f"   {case:15s} {len(work):6d}  {_pct(w, 50):5.1f} {_pct(w, 95):5.1f} "
            f"{_pct(w, 99):5.1f} {max(w, default=0):6.1f}     {_pct(gaps, 50):5.0f} "
            f"{_pct(gaps, 95):5.0f} {max(gaps, default=0):5.0f}      {per_frame:6.1f}"
        )
        note = f"load before play {got['load_s']:.1f} s; " if preload else ""
        print(
            f"                   {note}replayed {cast(float, got['elapsed']) / 3600:.1f} h of "
            f"the run; {got['loaded']} rows in memory at the end"
        )
    for screen, p95 in interval_p95.items():
        print(
            f"RESULT: replay {days:g} d x 32 chambers at 3600x, {screen}, frame interval p95 | "
            f"{p95:.0f} ms | <= {GOAL_INTERVAL_MS:g} ms"
        )


def main() -> None:
    """Run the three measurements."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="shorter runs (CI smoke)")
    parser.add_argument("--seconds", type=float, default=None, help="seconds per measurement")
    parser.add_argument(
        "--baseline",
        type=Path,
        default=None,
        help="another source tree (e.g. an older commit unpacked with git archive) whose "
        "squall watch start-up is measured beside this one",
    )
    parser.add_argument(
        "--only",
        choices=("live", "start", "replay"),
        action="append",
        help="run only these measurements (repeatable); default all",
    )
    args = parser.parse_args()
    seconds = args.seconds or (6.0 if args.quick else 20.0)
    days = 2.0 if args.quick else 7.0
    print(f"bench_tui: {CHAMBERS} chambers; load average {os.getloadavg()[0]:.2f}")
    with tempfile.TemporaryDirectory(prefix="squall-bench-tui-") as tmp:
        folder = Path(tmp)
        only = set(args.only or ("live", "start", "replay"))
        if "live" in only:
            live_cpu(folder, seconds)
        if "start" in only:
            start_up(folder, repeat=3 if args.quick else 5, baseline=args.baseline)
        if "replay" in only:
            replay(folder, seconds, days)


if __name__ == "__main__":
    main()
