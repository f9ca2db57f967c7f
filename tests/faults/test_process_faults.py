"""The controller's own process dies: SIGKILL, and a power cut of the controller's host.

``squall simulate`` serves the matrix's rig on loopback (Modbus TCP, optode on a pty) in
real time; a controller process drives it with a 1 s tick through the rig's ``[io]`` table:
``HardwareRun``, what ``squall run`` runs, reporting every tick on stdout
(:mod:`._controller`), so the test knows which ticks the controller had produced when it
died, whatever the machine's load made of their timing. The one scenario, shared by both
rows (:func:`scenario`), goes:

1. run, then SIGKILL right after a tick reported (its rows queued for the log, maybe not yet
   written: the worst moment for the log); measure how long the module's watchdog takes to
   hold the outputs safe, and which of the ticks produced the log kept;
2. resume, a few ticks, then a **power cut**: SIGKILL again, and the
   write-ahead file torn in the middle of its last transaction, as if power dropped while
   that commit was being written (what a commit that was fsynced cannot lose, a torn one
   can); the stale shared-memory index is removed too, as a reboot leaves none;
3. resume again (in the test's own process), three ticks, then an operator's abort.

The log must pass ``PRAGMA integrity_check`` after each death, keep everything committed
before it, in tick order, never log a time twice, and record each gap. Real time is
unavoidable here (other processes, the real clock); every wait is bounded and polls.
"""

from __future__ import annotations

import asyncio
import json
import math
import os
import signal
import struct
import sys
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from contextlib import asynccontextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TypeVar

import pytest
from pymodbus.client import AsyncModbusTcpClient

from controller.runtime import ControlLoop, HardwareRun, TickStatus
from controller.storage import RunEndReason, RunLogReader

from ._controller import settings_for
from ._harness import FaultRecord, LogCheck, RecordBook, check_log, protocol_text, rig_text

pytestmark = pytest.mark.timeout(240)

PERIOD_S = 1.0
"""Control tick of the real-time runs, s."""
COMMIT_S = 0.5
"""The run log's commit interval on a real-time clock (RunSettings' default), s."""
WATCHDOG_S = 3 * PERIOD_S
"""The modules' watchdog: three control ticks (the [io] default), s."""
WAIT_S = 60.0
"""Longest wait for any one step (a cold start imports numpy, gsw and pymodbus), s."""
POLL_S = 0.05
"""Polling interval while waiting for another process, s."""
IO_TABLE = '\n[io]\nfrom_announcement = "ports.json"\noptode_period_s = 2.0\n'

T = TypeVar("T")


async def until(what: str, probe: Callable[[], Awaitable[T | None]]) -> T:
    """Poll ``probe`` until it returns something other than None (bounded by WAIT_S)."""
    try:
        async with asyncio.timeout(WAIT_S):
            while (found := await probe()) is None:
                await asyncio.sleep(POLL_S)
            return found
    except TimeoutError:
        raise AssertionError(f"timed out waiting until {what}") from None


async def squall(*args: str) -> asyncio.subprocess.Process:
    """Start ``python -m controller ARGS`` with its output piped."""
    return await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "controller",
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )


@asynccontextmanager
async def simulator(folder: Path) -> AsyncIterator[tuple[str, int]]:
    """``squall simulate`` on loopback in real time; yields its Modbus host and port."""
    ports = folder / "ports.json"
    proc = await squall(
        "simulate", "--rig", str(folder / "rig.toml"), "--port", "0", "--ports-file", str(ports)
    )
    assert proc.stdout is not None
    try:
        async with asyncio.timeout(WAIT_S):
            line = b""
            while not line.startswith(b"serving"):
                line = await proc.stdout.readline()
                assert line, f"simulate exited: {(await proc.communicate())[1]!r}"
        modbus = json.loads(ports.read_text(encoding="utf-8"))["modbus"]
        yield str(modbus["host"]), int(modbus["port"])
    finally:
        if proc.returncode is None:
            proc.send_signal(signal.SIGINT)
            try:
                async with asyncio.timeout(10.0):
                    await proc.communicate()
            except TimeoutError:
                proc.kill()
                await proc.wait()


def logged_utc(log: Path) -> list[float] | None:
    """UTC of every logged tick (POSIX s), or None while the log cannot be read yet."""
    if not log.exists():
        return None
    try:
        with RunLogReader(log) as reader:
            frame = reader.samples(columns=["time"])
    except Exception:  # created but not yet a complete log
        return None
    return [t.timestamp() for t in frame.time]


async def watchdog_tripped(host: str, port: int) -> bool | None:
    """True once chamber B's module (block 0, unit 1) reports its watchdog tripped."""
    client = AsyncModbusTcpClient(host, port=port, timeout=1.0, retries=0)
    try:
        if not await client.connect():
            return None
        reply = await client.read_discrete_inputs(2, count=1, device_id=1)
        return True if not reply.isError() and reply.bits[0] else None
    finally:
        client.close()


async def controller(*args: str) -> asyncio.subprocess.Process:
    """Start the reporting controller (:mod:`._controller`) with its output piped."""
    return await asyncio.create_subprocess_exec(
        sys.executable,
        str(Path(__file__).with_name("_controller.py")),
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )


async def run_then_kill(args: tuple[str, ...], ticks: int) -> tuple[list[float], float]:
    """Run the controller until it has reported ``ticks`` ticks, then SIGKILL it at once;
    return the UTC of every tick it reported (POSIX s) and the kill's monotonic time (s)."""
    proc = await controller(*args)
    assert proc.stdout is not None
    reported: list[float] = []

    async def next_tick() -> None:
        async with asyncio.timeout(WAIT_S):
            line = await proc.stdout.readline()  # type: ignore[union-attr]
        if not line:
            raise AssertionError((await proc.communicate())[1].decode())
        if line.startswith(b"tick "):
            reported.append(float(line.split()[1]))

    while len(reported) < ticks:
        await next_tick()
    os.kill(proc.pid, signal.SIGKILL)
    kill_mono = time.monotonic()
    rest, _ = await proc.communicate()  # ticks reported after the line we acted on
    reported += [float(x.split()[1]) for x in rest.splitlines() if x.startswith(b"tick ")]
    assert proc.returncode == -signal.SIGKILL
    return reported, kill_mono


def tear_wal(log: Path) -> int:
    """Cut the log's write-ahead file in the middle of its last transaction and drop the
    shared-memory index; return the bytes cut.

    The WAL format (SQLite documentation, "Database File Format", section "WAL File
    Format"): a 32-byte header (page size at byte 8, salts at 16 and 20, big-endian), then
    frames of a 24-byte header (database size after commit at byte 4, non-zero on a
    transaction's last frame; the header's salts at 8 and 12) and one page.
    """
    wal = Path(f"{log}-wal")
    data = wal.read_bytes()
    page_size = struct.unpack(">I", data[8:12])[0]
    salts = data[16:24]
    frame = 24 + page_size
    commits: list[int] = []  # index of every transaction's last frame
    k = 0
    while 32 + (k + 1) * frame <= len(data):
        head = data[32 + k * frame : 32 + k * frame + 24]
        if head[8:16] != salts:  # left over from before the last checkpoint
            break
        if struct.unpack(">I", head[4:8])[0]:
            commits.append(k)
        k += 1
    assert commits, "the write-ahead file holds no transaction"
    first = commits[-2] + 1 if len(commits) > 1 else 0
    frames = commits[-1] - first + 1
    cut = 32 + first * frame + (frames * frame) // 2  # mid-transaction, mid-frame
    with wal.open("r+b") as handle:
        handle.truncate(cut)
    Path(f"{log}-shm").unlink(missing_ok=True)
    return len(data) - cut


def unlogged_s(reported: list[float], log: LogCheck) -> float:
    """Run time of the ticks the controller reported that the log lacks (whole ticks of
    ``PERIOD_S``; a real clock's ticks are a little late or early, so they are counted), s."""
    last = log.last_utc_s if log.last_utc_s is not None else -math.inf
    return sum(1 for utc in reported if utc > last + PERIOD_S / 2) * PERIOD_S


@dataclass(frozen=True, kw_only=True)
class Deaths:
    """What the scenario measured (times in s)."""

    killed: LogCheck
    reported: int
    kill_lost_s: float
    watchdog_after_s: float
    cut: LogCheck
    cut_lost_s: float
    torn_bytes: int
    final: LogCheck
    sessions: int
    end_reason: RunEndReason | None
    prefix_kept: bool
    wall_s: float


def resume_for_three_ticks(log: Path) -> None:
    """Resume the interrupted run on the rig's devices, then abort it after three ticks."""
    run = HardwareRun.resume(log, settings_for=settings_for)
    loop: ControlLoop | None = None

    def after(status: TickStatus) -> None:
        if status.tick >= 2 and loop is not None:
            loop.abort("fault-matrix")

    loop = run.loop(progress=after)
    summary = run.run(loop=loop)
    assert summary.end_reason is RunEndReason.ABORTED and summary.ticks.ticks == 3, summary


@pytest.fixture(scope="module")
def scenario(tmp_path_factory: pytest.TempPathFactory) -> Deaths:
    """Run the kill, cut and resume sequence once for both rows."""
    folder = tmp_path_factory.mktemp("deaths")
    (folder / "rig.toml").write_text(rig_text(extra=IO_TABLE), encoding="utf-8")
    protocol = folder / "protocol.toml"
    protocol.write_text(protocol_text(hours=1.0, begins="on-launch"), encoding="utf-8")
    log = folder / "run.sqlite"
    launch = ("start", str(protocol), str(folder / "rig.toml"), str(log), str(PERIOD_S))

    async def body() -> Deaths:
        started = time.perf_counter()
        async with simulator(folder) as (host, port):
            made, kill_mono = await run_then_kill(launch, ticks=4)
            await until("the watchdog trips", lambda: watchdog_tripped(host, port))
            watchdog_after_s = time.monotonic() - kill_mono
            killed = check_log(log, PERIOD_S)
            before = logged_utc(log) or []
            # past a session's first commit, which holds two ticks (see the known gaps)
            made_again, _ = await run_then_kill(("resume", str(log)), ticks=4)
            torn = tear_wal(log)
            cut = check_log(log, PERIOD_S)
            after_cut = logged_utc(log) or []
            # the torn log resumed in this process (its imports are loaded: a process start
            # saved), aborted by an operator after three ticks
            await asyncio.to_thread(resume_for_three_ticks, log)
        everything = logged_utc(log) or []
        with RunLogReader(log) as reader:
            info = reader.info()
        return Deaths(
            killed=killed,
            reported=len(made),
            kill_lost_s=unlogged_s(made, killed),
            watchdog_after_s=watchdog_after_s,
            cut=cut,
            cut_lost_s=unlogged_s(made_again, cut),
            torn_bytes=torn,
            final=check_log(log, PERIOD_S),
            sessions=info.sessions,
            end_reason=None if info.end is None else info.end.end_reason,
            prefix_kept=everything[: len(before)] == before
            and everything[: len(after_cut)] == after_cut,
            wall_s=time.perf_counter() - started,
        )

    return asyncio.run(body())


def test_sigkill_leaves_the_outputs_to_the_watchdog_and_the_log_whole(
    scenario: Deaths, records: RecordBook
) -> None:
    s = scenario
    record = records.add(
        FaultRecord(
            fault="sigkill",
            injected="the controller (real clock, 1 s tick, loopback endpoints) killed with "
            "SIGKILL right after a tick reported, then resumed",
            expected="the modules' watchdogs hold the outputs safe within their timeout; the "
            "log keeps every committed row, passes integrity_check and resumes with a gap "
            "event, nothing logged twice",
            alarm=None,
            safe_after_s=round(s.watchdog_after_s, 2),
            # the watchdog's timeout, plus one tick for seeing it from another process (the
            # simulator steps its modules every 0.1 s; each look is a new Modbus connection,
            # slow on a loaded machine)
            safe_bound_s=WATCHDOG_S + PERIOD_S,
            integrity=s.killed.integrity,
            contiguous=s.killed.contiguous and s.final.contiguous and s.prefix_kept,
            # lost: from the last tick the controller produced back to the last one logged
            lost_s=round(s.kill_lost_s, 3),
            # the tick queued but not yet written when the kill came (every tick is
            # committed as it is written: the commit interval is shorter than a tick)
            lost_bound_s=max(PERIOD_S, COMMIT_S),
            note=f"{s.killed.ticks} of the {s.reported} ticks reported were in the log",
            wall_s=round(s.wall_s, 1),
        )
    )
    record.check(alarm=None)
    assert not s.killed.finished and s.killed.ticks >= 3  # of the 4 reported


def test_a_power_cut_tearing_the_last_commit_loses_only_that_commit(
    scenario: Deaths, records: RecordBook
) -> None:
    s = scenario
    record = records.add(
        FaultRecord(
            fault="power-cut",
            injected="the controller's host loses power: SIGKILL after a resume, the "
            "write-ahead file torn mid-transaction and its index gone, then resumed",
            expected="the torn transaction is ignored on recovery; integrity_check ok; the "
            "log keeps everything before it (commits are fsynced on a real clock) and the "
            "run resumes with a gap event; the actuators lose power with the host",
            alarm=None,
            safe_after_s=None,
            safe_bound_s=None,
            integrity=s.cut.integrity,
            contiguous=s.cut.contiguous and s.final.contiguous and s.prefix_kept,
            lost_s=round(s.cut_lost_s, 3),
            # the tick queued when the power went, and the torn commit's tick
            lost_bound_s=2 * max(PERIOD_S, COMMIT_S),
            note=f"{s.torn_bytes} bytes torn off the write-ahead file; {s.sessions} sessions",
            wall_s=0.0,
        )
    )
    record.check(alarm=None)
    assert s.torn_bytes > 0
    assert s.final.integrity == "ok" and s.final.gaps == 2 and s.sessions == 3
    assert s.end_reason is RunEndReason.ABORTED
