"""Benchmark: real-time control of 64 chambers at 1 Hz through the simulator's loopback endpoints.

A 64-chamber rig derived from ``rigs/saltmarrow-rack8.toml`` (C1..C64 copy C5..C8 in turn; no
bath, no fault) names its devices by ``[io] from_announcement``; ``squall simulate`` serves it
in its own process as I/O modules of eight chambers (a unit id each, blocks without gaps:
``hardware-notes/register-map.md``), so each module is read and written in one request a
tick. The controller runs in *this* process on the real clock at a 1 s tick through
HardwareIO (Modbus TCP, optode ptys) with interlocks, PID and the SQLite log, with the 0.25 s
timeouts of ``squall run --period 1``, and is stopped (an operator abort) once N ticks
followed the first. The rig names the simulator's ports file (``[io] from_announcement``),
which gives a TCP connection per module, as a rack with a Modbus TCP module per eight
chambers is wired; ``--links K`` spreads the chambers over K connections instead. Should
the announced links never get ready, 8 links with 0.45 s timeouts and 90 s to get ready are
tried.

Printed side by side from one run: the controller process's CPU share (its user + system CPU
time over wall time) in steady state and over the whole run; tick lateness p50/p99/max of
the steady-state ticks on the loop's clock, beside RunSummary's; the share of logged rows
with a temperature; Modbus requests per tick. References from the same process: an idle
asyncio loop ticking at 1 Hz as long, and one Modbus request's client CPU and round trip via
the controller's transport, bare pymodbus, and the same frame by hand. Goals (issue 4): CPU
<= 5 % of one core, p99 lateness <= 20 ms, >= 99 % of rows with a temperature; when one is
missed (or with ``--profile``) a 20 s run under cProfile (CPU time) follows. Run:
``bench/bench_realtime.py [--seconds 120] [--quick] [--links K] [--profile]`` (quick: 30 s).
"""

from __future__ import annotations

import argparse
import asyncio
import contextlib
import cProfile
import dataclasses
import io
import json
import logging
import math
import os
import pstats
import resource
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Awaitable, Callable, Iterator
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import Any

from _realtime_files import announced_io, linked_io, write_protocol, write_rig  # beside this
from pymodbus.client import AsyncModbusTcpClient

from controller.clock import Clock, RealClock, run_with_clock
from controller.drivers._transport_common import RetryPolicy
from controller.drivers._transport_modbus import ModbusTransport
from controller.errors import RuntimeFailure
from controller.runtime import (
    ControlLoop,
    RunSettings,
    RunSummary,
    TickStatus,
    create_run_log,
    load_run_inputs,
    plan_control,
)
from controller.runtime._hardware_io import HardwareIO
from controller.storage import ClockKind

ROOT = Path(__file__).resolve().parent.parent
PERIOD_S = 1.0
GOAL_CPU_PCT = 5.0
GOAL_P99_MS = 20.0
GOAL_ROWS_PCT = 99.0  # logged rows with a temperature: a healthy run reads nearly every tick
PORTS_WAIT_S = 60.0
MODBUS_BURST, MODBUS_BURSTS = 500, 4  # requests per burst, bursts per reference
MODBUS_CALLS = ("read_input_registers", "read_discrete_inputs", "write_registers", "write_coils")
FALLBACK_LINKS = 8  # TCP links tried when the announced links never get ready
FALLBACK_IO_TIMEOUT_S = 0.45  # their read and write timeouts, s (the tick is 1 s)
FALLBACK_READY_TIMEOUT_S = 90.0  # and how long their set-up may take, s
Share = tuple[float, float, float]  # user %, system %, total % of one core
Cost = dict[str, tuple[float, float]]  # client CPU and round trip of one request, s, by way


# ------------------------------------------------------------------------------- simulator


@dataclass
class Simulator:
    """The ``squall simulate`` process started by this bench."""

    proc: subprocess.Popen[bytes]
    ports_file: Path

    @classmethod
    def start(cls, rig: Path, ports_file: Path) -> Simulator:
        """Start it on an ephemeral loopback port; wait until its ports file is written."""
        command = [sys.executable, "-m", "controller", "simulate", "--rig", str(rig)]
        command += ["--port", "0", "--ports-file", str(ports_file)]
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(filter(None, [str(ROOT), env.get("PYTHONPATH")]))
        output = ports_file.with_suffix(".out")
        with output.open("wb") as out:
            proc = subprocess.Popen(command, stdin=subprocess.DEVNULL, stdout=out, stderr=out,
                                    env=env)  # fmt: skip
        sim = cls(proc, ports_file)
        deadline = time.monotonic() + PORTS_WAIT_S
        while not ports_file.exists():
            if proc.poll() is not None or time.monotonic() > deadline:
                sim.stop()
                tail = output.read_text(errors="replace")[-2000:]
                raise SystemExit(f"squall simulate did not announce its ports:\n{tail}")
            time.sleep(0.05)
        return sim

    def announcement(self) -> dict[str, Any]:
        """The ports file's content."""
        return json.loads(self.ports_file.read_text(encoding="utf-8"))

    def cpu_s(self) -> float | None:
        """CPU time (user + system) the process has used so far, s (Linux only)."""
        try:
            fields = Path(f"/proc/{self.proc.pid}/stat").read_text().rsplit(")", 1)[1].split()
            return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
        except OSError:
            return None

    def stop(self) -> None:
        """Ctrl-C the process (it removes its ports file); kill it if it does not stop."""
        self.proc.send_signal(signal.SIGINT)
        try:
            self.proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()


# ------------------------------------------------------------------------------ measuring


class TimedClock:
    """The real clock, noting how late the control task wakes from each ``sleep_until``."""

    def __init__(self) -> None:
        self.inner = RealClock()
        self.wakes_s: list[float] = []  # lateness of each wake of the task "control", s

    def now_s(self) -> float:
        return self.inner.now_s()

    def utc(self, t_s: float | None = None) -> datetime:
        return self.inner.utc(t_s)

    async def sleep_until(self, t_s: float) -> None:
        await self.inner.sleep_until(t_s)
        if (task := asyncio.current_task()) is not None and task.get_name() == "control":
            self.wakes_s.append(max(0.0, self.inner.now_s() - t_s))

    async def sleep(self, dt_s: float) -> None:
        await self.inner.sleep(dt_s)


@dataclass
class Usage:
    """Wall time and this process's CPU time at one moment, s."""

    wall_s: float
    user_s: float
    system_s: float

    @classmethod
    def now(cls) -> Usage:
        usage = resource.getrusage(resource.RUSAGE_SELF)
        return cls(time.perf_counter(), usage.ru_utime, usage.ru_stime)

    def share_since(self, start: Usage) -> Share:
        """CPU share of one core between ``start`` and this moment, %."""
        wall = self.wall_s - start.wall_s
        user = 100.0 * (self.user_s - start.user_s) / wall
        system = 100.0 * (self.system_s - start.system_s) / wall
        return user, system, user + system


@dataclass
class ControllerRun:
    """What one controller run measured (shares in % of one core, times in s)."""

    summary: RunSummary
    steady: Share  # end of the first tick to the end of the last
    whole: Share  # with the device set-up
    ticks_steady: int
    setup_s: float  # start to the end of the first tick
    lateness_s: list[float]  # every tick's start lateness; the first waited for the set-up
    stale_pct: float  # logged rows without a temperature
    requests: dict[str, int]  # Modbus requests in the steady state, by kind
    sim_cpu_pct: float | None  # the simulator process in the steady state


def run_controller(
    rig: Path, ids: list[str], name: str, sim: Simulator, settings: RunSettings, seconds: int
) -> ControllerRun:
    """Run a protocol on the simulator through HardwareIO on the real clock until ``seconds``
    ticks have followed the first, then stop it as an operator would (abort). Raises
    RuntimeFailure when the devices never get ready."""
    # the loop's clock starts before the device set-up: the protocol leaves time for it
    duration = seconds + 1 + math.ceil(settings.ready_timeout_s) + 10
    protocol = write_protocol(rig.parent, ids, duration, f"{name}-protocol")
    log = rig.parent / f"{name}.sqlite"
    inputs = load_run_inputs(protocol, rig)
    compiled, commit_s = inputs.compiled, settings.commit_interval_for(1.0)
    plan = plan_control(inputs.rig, compiled.chambers, settings)
    writer = create_run_log(
        inputs, plan, log, clock_kind=ClockKind.REAL, commit_interval_s=commit_s
    )
    clock, loops, counts = TimedClock(), list[ControlLoop](), dict.fromkeys(MODBUS_CALLS, 0)
    marks: dict[str, tuple[Usage, float | None, dict[str, int]]] = {}
    ticks = [0]

    def progress(status: TickStatus) -> None:
        marks["last"] = (Usage.now(), sim.cpu_s(), dict(counts))
        marks.setdefault("first", marks["last"])
        ticks[0] += 1
        if ticks[0] == seconds + 1:
            loops[0].abort("bench")  # ends the run right after this tick

    def counting(call: str, fn: Callable[..., Awaitable[Any]]) -> Any:
        async def counted(*args: Any, **kwargs: Any) -> Any:
            counts[call] += 1
            return await fn(*args, **kwargs)

        return counted

    async def main(c: Clock) -> RunSummary:
        hw = HardwareIO.from_rig(inputs.rig, c, base_dir=rig.parent, plan=plan)
        for link in hw.links.values():
            for call in MODBUS_CALLS:
                setattr(link, call, counting(call, getattr(link, call)))
        loop = ControlLoop(io=hw, clock=c, compiled=compiled, plan=plan, writer=writer)
        loop.progress = progress
        loops.append(loop)
        return await loop.run()

    start = Usage.now()
    try:
        summary = run_with_clock(clock, main)
    finally:
        if not writer.closed:
            writer.close()
    end = Usage.now()
    if ticks[0] < 2:
        raise RuntimeFailure(f"only {ticks[0]} tick(s) ran; nothing to measure")
    (first, sim0, counts0), (last, sim1, counts1) = marks["first"], marks["last"]
    sim_pct = None
    if sim0 is not None and sim1 is not None:
        sim_pct = 100.0 * (sim1 - sim0) / (last.wall_s - first.wall_s)
    with contextlib.closing(sqlite3.connect(log)) as conn:
        query = "SELECT count(*), sum(temperature_c IS NULL) FROM samples"
        rows, stale = conn.execute(query).fetchone()
    return ControllerRun(
        summary=summary,
        steady=last.share_since(first),
        whole=end.share_since(start),
        ticks_steady=ticks[0] - 1,
        setup_s=first.wall_s - start.wall_s,
        lateness_s=clock.wakes_s[: summary.ticks.ticks],
        stale_pct=100.0 * (stale or 0) / max(1, rows),
        requests={k: counts1[k] - counts0[k] for k in MODBUS_CALLS},
        sim_cpu_pct=sim_pct,
    )


def idle_reference(seconds: int) -> Share:
    """CPU share of an asyncio loop that only wakes once a second on the real clock."""

    async def idle(clock: Clock) -> None:
        t0 = clock.now_s()
        for k in range(1, seconds + 1):
            await clock.sleep_until(t0 + k * PERIOD_S)

    start = Usage.now()
    run_with_clock(RealClock(), idle)
    return Usage.now().share_since(start)


def modbus_reference(sim: Simulator) -> Cost:
    """Client CPU and round trip of one request (six input registers) to the simulator, s,
    best burst of each way, bursts interleaved: ModbusTransport, bare pymodbus, by hand."""
    announced = sim.announcement()["modbus"]
    host, port = announced["host"], announced["port"]
    block = next(iter(announced["blocks"].values()))
    unit, base = block["unit_id"], block["base"]

    async def measure(_clock: Clock) -> Cost:
        link = ModbusTransport.tcp(host, port, policy=RetryPolicy(timeout_s=1.0, attempts=1))
        bare = AsyncModbusTcpClient(host, port=port, timeout=1.0, retries=0)
        await bare.connect()
        reader, writer = await asyncio.open_connection(host, port)
        tid = [0]

        async def frame() -> None:
            # by hand: MBAP header and function 04, six registers; the reply is 7 + 2 + 12
            # bytes (Modbus Messaging on TCP/IP Implementation Guide v1.0b, 3.1.3; Modbus
            # Application Protocol v1.1b3, 6.4)
            tid[0] = tid[0] % 0xFFFF + 1
            head = tid[0].to_bytes(2) + b"\0\0\0\x06" + bytes([unit])
            writer.write(head + b"\x04" + base.to_bytes(2) + (6).to_bytes(2))
            reply = await asyncio.wait_for(reader.readexactly(21), 1.0)
            if reply[:2] != head[:2] or reply[7] != 4:
                raise RuntimeError(f"unexpected reply to the reference frame: {reply.hex()}")

        async def theirs() -> None:
            if (await bare.read_input_registers(base, count=6, device_id=unit)).isError():
                raise RuntimeError("the simulator refused the reference read")

        calls: dict[str, Callable[[], Awaitable[Any]]] = {
            "ModbusTransport": lambda: link.read_input_registers(unit, base, 6),
            "bare pymodbus client": theirs,
            "same frame by hand, asyncio streams": frame,
        }
        best = dict.fromkeys(calls, (math.inf, math.inf))
        try:
            for _ in range(20):  # connect and warm up
                for call in calls.values():
                    await call()
            for _ in range(MODBUS_BURSTS):
                for label, call in calls.items():
                    cpu0, wall0 = time.process_time(), time.perf_counter()
                    for _ in range(MODBUS_BURST):
                        await call()
                    cpu = (time.process_time() - cpu0) / MODBUS_BURST
                    wall = (time.perf_counter() - wall0) / MODBUS_BURST
                    best[label] = (min(best[label][0], cpu), min(best[label][1], wall))
        finally:
            await link.close()
            bare.close()
            writer.close()
        return best

    return run_with_clock(RealClock(), measure)


def percentile(values: list[float], q: float) -> float:
    """The q-th percentile by nearest rank (as the loop's own histogram), same unit."""
    rank = max(0, math.ceil(q / 100.0 * len(values)) - 1)
    return sorted(values)[rank] if values else math.nan


def settings_for(io_timeout_s: float | None = None, ready_timeout_s: float = 30.0) -> RunSettings:
    """Settings of a 1 s tick; read and write timeouts by default as ``squall run --period 1``."""
    timeout_s = io_timeout_s or min(RunSettings().read_timeout_s, PERIOD_S / 4.0)
    return RunSettings(period_s=PERIOD_S, read_timeout_s=timeout_s, write_timeout_s=timeout_s,
                       ready_timeout_s=ready_timeout_s)  # fmt: skip


def profile_run(rig: Path, ids: list[str], sim: Simulator, settings: RunSettings, s: int) -> None:
    """A further run under cProfile, timed in CPU time; print the top functions."""
    profiler = cProfile.Profile(time.process_time)  # CPU time: waiting costs nothing
    profiler.enable()
    try:
        with _quiet_devices():
            run = run_controller(rig, ids, "profiled", sim, settings, s)
    except RuntimeFailure as exc:
        print(f"\nprofile: the profiled run failed: {exc}")
        return
    finally:
        profiler.disable()
    print(f"\nprofile: a {s} s run under cProfile in CPU time (its CPU share, with the "
          f"profiler's overhead: {run.steady[2]:.1f} %)")  # fmt: skip
    for order, count in (("tottime", 20), ("cumulative", 25)):
        text = io.StringIO()
        pstats.Stats(profiler, stream=text).sort_stats(order).print_stats(count)
        lines = text.getvalue().splitlines()
        first = next((i for i, line in enumerate(lines) if "ncalls" in line), 0)
        print(f"  top {count} by {order}")
        for line in filter(str.strip, lines[first:]):
            print("  " + line.replace(str(ROOT) + "/", "").replace(sys.prefix + "/", ""))


@contextlib.contextmanager
def _quiet_devices() -> Iterator[io.StringIO]:
    """Collect the runtime's log lines (device failures, one per chamber) instead of
    printing them."""
    buffer, root = io.StringIO(), logging.getLogger()
    handler, previous = logging.StreamHandler(buffer), root.level
    handler.setFormatter(logging.Formatter("%(name)s: %(message)s"))
    root.addHandler(handler)
    root.setLevel(logging.INFO)
    try:
        yield buffer
    finally:
        root.removeHandler(handler)
        root.setLevel(previous)


def attempt(
    rig: Path, ids: list[str], name: str, sim: Simulator, settings: RunSettings, seconds: int
) -> ControllerRun | None:
    """One measured run; None (and its first log lines) when it failed."""
    print(f"{name}: read and write timeouts {settings.read_timeout_s:g} s, devices ready "
          f"within {settings.ready_timeout_s:g} s")  # fmt: skip
    try:
        with _quiet_devices() as lines:
            return run_controller(rig, ids, name, sim, settings, seconds)
    except RuntimeFailure as exc:
        print(f"  the run failed: {exc}; its first log lines:")
        for line in lines.getvalue().splitlines()[:4]:
            print(f"    {line}")
        return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=int, default=120, help="steady-state ticks (s)")
    parser.add_argument("--quick", action="store_true", help="30 s instead of 120 s")
    parser.add_argument("--chambers", type=int, default=64, help="chambers in the rig")
    parser.add_argument("--links", type=int, default=0, help="TCP links the chambers are "
                        "spread over (default 0: as the ports file announces, one per module "
                        "of 8 chambers)")  # fmt: skip
    parser.add_argument("--profile", action="store_true", help="always run the profiled run")
    parser.add_argument("--profile-seconds", type=int, default=20, help="profiled run, s")
    args = parser.parse_args()
    seconds, n = (30 if args.quick else args.seconds), args.chambers
    print(f"real time: {n} chambers at a {PERIOD_S:g} s tick, {seconds} s of steady state; "
          "controller in this process (HardwareIO: Modbus TCP, optode ptys), simulator in its "
          "own process (squall simulate on 127.0.0.1)")  # fmt: skip
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rig, ids = write_rig(folder, n, announced_io("sim-ports.json"), "announced")
        sim = Simulator.start(rig, folder / "sim-ports.json")
        try:
            run, settings, links = None, settings_for(), max(0, args.links)
            modules = math.ceil(n / 8)  # the simulator serves modules of up to 8 chambers
            how = f"from_announcement: {modules} TCP links to {modules} modules"
            if links == 0:
                run = attempt(rig, ids, "announced", sim, settings, seconds)
                if run is None:  # the announced links never got ready: give them time
                    links = FALLBACK_LINKS
                    settings = settings_for(FALLBACK_IO_TIMEOUT_S, FALLBACK_READY_TIMEOUT_S)
            if run is None:
                how = f"{links} TCP links to {modules} modules"
                io_lines = linked_io(sim.announcement(), ids, links)
                rig, _ = write_rig(folder, n, io_lines, f"links{links}")
                run = attempt(rig, ids, f"links{links}", sim, settings, seconds)
            if run is None:
                for figure, goal in (
                    (f"controller CPU share, {n} chambers at 1 Hz", f"<= {GOAL_CPU_PCT:g} %"),
                    ("p99 tick lateness", f"<= {GOAL_P99_MS:g} ms"),
                    ("logged rows with a temperature", f">= {GOAL_ROWS_PCT:g} %"),
                ):
                    print(f"RESULT: {figure} | not measured | {goal} | never got ready")
                raise SystemExit(1)
            idle = idle_reference(seconds)
            cost = modbus_reference(sim)
            report(run, idle, cost, how, n, seconds)
            p99_ms = percentile(run.lateness_s[1:], 99) * 1000.0
            missed = run.steady[2] > GOAL_CPU_PCT or p99_ms > GOAL_P99_MS
            if args.profile or missed or 100.0 - run.stale_pct < GOAL_ROWS_PCT:
                slow = dataclasses.replace(settings, ready_timeout_s=FALLBACK_READY_TIMEOUT_S)
                profile_run(rig, ids, sim, slow, args.profile_seconds)  # more time to get ready
        finally:
            sim.stop()


def report(run: ControllerRun, idle: Share, cost: Cost, how: str, n: int, seconds: int) -> None:
    """Print the figures and the RESULT lines."""
    s, ticks = run.summary, run.summary.ticks
    ended = "stopped by the bench" if s.detail == "aborted by bench" else s.end_reason.value
    steady = run.lateness_s[1:]  # the first tick waited for the device set-up
    per_tick = sum(run.requests.values()) / max(1, run.ticks_steady)
    cpu_ms = run.steady[2] / 100.0 * PERIOD_S * 1000.0
    p50, p99 = percentile(steady, 50) * 1e3, percentile(steady, 99) * 1e3
    print(f"run ({how}): {ended}, {ticks.ticks} ticks ({ticks.missed} missed, {ticks.late} "
          f"late > {settings_for().lateness_limit_s * 1e3:g} ms), {s.rows_written} rows "
          f"logged, {run.stale_pct:.1f} % without a temperature, {len(s.alarms)} alarms "
          f"raised; device set-up and first tick {run.setup_s:.1f} s")  # fmt: skip
    print(f"{'CPU share of one core':<46} {'user %':>7} {'system %':>9} {'total %':>8}")
    for label, (user, system, total) in (
        (f"controller, steady state ({run.ticks_steady} periods)", run.steady),
        ("controller, whole run (with device set-up)", run.whole),
        (f"reference: idle asyncio loop at 1 Hz, {seconds} s", idle),
    ):
        print(f"  {label:<44} {user:>7.2f} {system:>9.2f} {total:>8.2f}")
    if run.sim_cpu_pct is not None:
        print(f"  {'simulator process, steady state (context)':<44} {'':>17} "
              f"{run.sim_cpu_pct:>8.2f}")  # fmt: skip
    kinds = ", ".join(f"{k} {v / max(1, run.ticks_steady):.1f}" for k, v in run.requests.items())
    print(f"Modbus requests per steady-state tick: {per_tick:.1f} ({kinds})")
    print("  one reference request (read 6 input registers), client CPU and round trip:")
    for label, (cpu, wall) in cost.items():
        print(f"    {label:<44} {cpu * 1e6:>6.0f} µs {wall * 1e3:>7.2f} ms")
    modbus_ms = per_tick * cost["ModbusTransport"][0] * 1e3
    print(f"  controller CPU per tick {cpu_ms:.1f} ms; its requests at the reference's CPU "
          f"cost: {modbus_ms:.1f} ms ({100 * modbus_ms / cpu_ms:.0f} %)")  # fmt: skip
    print(f"{'tick lateness, ms':<46} {'p50':>7} {'p99':>9} {'max':>8}")
    print(f"  {f'steady state ({len(steady)} ticks), on the clock':<44} {p50:>7.2f} {p99:>9.2f} "
          f"{max(steady, default=math.nan) * 1e3:>8.2f}")  # fmt: skip
    print(f"  {'RunSummary (every tick, 1 ms bins)':<44} {'':>7} "
          f"{ticks.p99_lateness_s * 1e3:>9.2f} {ticks.max_lateness_s * 1e3:>8.2f}")  # fmt: skip
    print(f"RESULT: controller CPU share, {n} chambers at 1 Hz | {run.steady[2]:.2f} % | "
          f"<= {GOAL_CPU_PCT:g} % | process CPU time / wall time, steady state, {how}; "
          f"{per_tick:.0f} Modbus requests a tick; idle loop {idle[2]:.2f} %")  # fmt: skip
    print(f"RESULT: p99 tick lateness | {p99:.2f} ms | <= {GOAL_P99_MS:g} ms | steady state, "
          f"{how}; RunSummary p99 over every tick {ticks.p99_lateness_s * 1e3:.0f} ms")  # fmt: skip
    print(f"RESULT: logged rows with a temperature | {100.0 - run.stale_pct:.2f} % | "
          f">= {GOAL_ROWS_PCT:g} % | {s.rows_written} rows of {n} chambers, {how}")  # fmt: skip


if __name__ == "__main__":
    main()
