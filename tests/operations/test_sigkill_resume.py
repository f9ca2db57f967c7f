"""Must show (issue 5): a controller killed with SIGKILL mid-run resumes with ``--resume``.

``squall simulate`` serves a two-chamber rig on loopback (Modbus TCP on an ephemeral port,
optodes on pseudo-terminals) in real time; ``squall run`` drives it through the rig's
``[io]`` table with a 1 s tick, is killed with SIGKILL, and ``squall run --resume`` continues.
The checks: ``PRAGMA integrity_check`` is ok; at most one 1 s tick of samples is missing
before the kill; the protocol position after the resume matches the wall clock; the modules'
watchdogs held every output safe while no controller ran; nothing was logged twice.

This test works with other processes, so it waits in real time (polling their files and
sockets); every wait is bounded and the whole test takes some 20 s, most of it the two
processes' start-up.
"""

from __future__ import annotations

import asyncio
import json
import os
import signal
import sqlite3
import sys
import time
from collections.abc import AsyncIterator, Awaitable, Callable
from contextlib import asynccontextmanager
from pathlib import Path
from typing import TypeVar

import pandas as pd
import pytest
from pymodbus.client import AsyncModbusTcpClient

from controller.storage import RunEndReason, RunLogReader

from ._rigs import protocol_text, rig_text

pytestmark = pytest.mark.timeout(180)

PERIOD_S = 1.0
IO = """
[io]
from_announcement = "ports.json"
optode_period_s = 2.0
"""
CHAMBERS = ("K1", "K2")
WAIT_S = 60.0
"""Longest wait for any one step (a cold start imports numpy, gsw and pymodbus), s."""
POLL_S = 0.1
"""Polling interval while waiting for another process, s."""
KILL_AFTER_DUE_S = 0.002
"""When the kill comes after a tick fell due, s (its reads and writes take longer)."""

T = TypeVar("T")


async def until(what: str, probe: Callable[[], Awaitable[T | None]]) -> T:
    """Poll ``probe`` until it returns something other than None (bounded)."""
    async with asyncio.timeout(WAIT_S):
        while True:
            found = await probe()
            if found is not None:
                return found
            await asyncio.sleep(POLL_S)
    raise AssertionError(what)  # unreachable: the timeout raises first


async def squall(*args: str) -> asyncio.subprocess.Process:
    return await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "controller",
        *args,
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )


@asynccontextmanager
async def simulator(folder: Path) -> AsyncIterator[dict[str, object]]:
    """``squall simulate`` in real time; yields its ports file's content."""
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
        yield json.loads(ports.read_text(encoding="utf-8"))
    finally:
        if proc.returncode is None:
            proc.send_signal(signal.SIGINT)
            try:
                async with asyncio.timeout(10.0):
                    await proc.communicate()
            except TimeoutError:
                proc.kill()
                await proc.wait()


def samples(log: Path) -> pd.DataFrame | None:
    """The log's samples, or None while it cannot be read yet."""
    if not log.exists():
        return None
    try:
        with RunLogReader(log) as reader:
            return reader.samples(columns=["time", "elapsed_s", "chamber", "t_s"])
    except Exception:  # created but not yet a complete log
        return None


async def watchdogs_tripped(modbus: dict[str, object]) -> bool | None:
    """True once every chamber's module reports its watchdog tripped (outputs held safe)."""
    host, port = str(modbus["host"]), int(str(modbus["port"]))
    blocks = modbus["blocks"]
    assert isinstance(blocks, dict)
    client = AsyncModbusTcpClient(host, port=port, timeout=1.0, retries=0)
    try:
        if not await client.connect():
            return None
        for chamber in CHAMBERS:  # where the simulator announced each chamber's block
            block = blocks[chamber]
            reply = await client.read_discrete_inputs(
                int(block["base"]) + 2, count=1, device_id=int(block["unit_id"])
            )
            if reply.isError() or not reply.bits[0]:
                return None
        return True
    finally:
        client.close()


async def test_sigkill_then_resume_keeps_the_log_whole_and_the_protocol_on_time(
    tmp_path: Path,
) -> None:
    (tmp_path / "rig.toml").write_text(rig_text(CHAMBERS, extra=IO), encoding="utf-8")
    protocol = tmp_path / "protocol.toml"
    protocol.write_text(
        protocol_text(CHAMBERS, phases=(("day", "1h"),), incubation="", begins="on-launch"),
        encoding="utf-8",
    )
    log = tmp_path / "run.sqlite"
    async with simulator(tmp_path) as ports:
        modbus = ports["modbus"]
        assert isinstance(modbus, dict)
        run = await squall(
            "run", str(protocol), "--rig", str(tmp_path / "rig.toml"), "--log", str(log),
            "--period", str(PERIOD_S),
        )  # fmt: skip

        async def running() -> pd.DataFrame | None:
            assert run.returncode is None, (await run.communicate())[1]
            rows = samples(log)
            return rows if rows is not None and len(rows) >= 6 * len(CHAMBERS) else None

        seen = await until("the run logs 6 ticks", running)
        # kill just after a tick fell due, while its rows are being made and written: the
        # worst moment for what the log may lose
        due_utc = seen.time.iloc[-1].timestamp() + 2 * PERIOD_S + KILL_AFTER_DUE_S
        await asyncio.sleep(max(0.0, due_utc - time.time()))
        kill_utc = time.time()
        os.kill(run.pid, signal.SIGKILL)
        assert await run.wait() == -signal.SIGKILL
        # no controller: each module's watchdog (three ticks) drives its outputs safe
        assert await until("watchdogs trip", lambda: watchdogs_tripped(modbus))
        with sqlite3.connect(log) as conn:
            assert conn.execute("PRAGMA integrity_check").fetchone() == ("ok",)
        before = samples(log)
        assert before is not None
        last_utc = before.time.iloc[-1].timestamp()
        # at most one 1 s tick's rows are missing: the last logged tick is less than two
        # periods before the kill (the one after it may have been in flight)
        assert 0.0 < kill_utc - last_utc < 2 * PERIOD_S, kill_utc - last_utc
        assert len(before) % len(CHAMBERS) == 0  # every logged tick has all its rows
        resumed = await squall("run", "--resume", str(log))

        async def more() -> pd.DataFrame | None:
            assert resumed.returncode is None, (await resumed.communicate())[1]
            rows = samples(log)
            return rows if rows is not None and len(rows) >= len(before) + 3 * 2 else None

        await until("the resumed run logs 3 ticks", more)
        resumed.send_signal(signal.SIGINT)
        _, err = await resumed.communicate()
        assert resumed.returncode == 130, err
    with sqlite3.connect(log) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone() == ("ok",)
    with RunLogReader(log) as reader:
        info = reader.info()
        rows = reader.samples(columns=["time", "elapsed_s", "chamber", "t_s"])
        events = reader.events()
    assert info.sessions == 2
    assert info.end is not None and info.end.end_reason is RunEndReason.STOPPED
    # nothing written before the kill was lost or written again
    assert list(rows.index[: len(before)]) == list(before.index)
    for chamber in CHAMBERS:
        mine = rows[rows.chamber == chamber]
        assert mine.time.is_monotonic_increasing and not mine.time.duplicated().any()
    # protocol position after the resume = position before + wall time in between
    first = rows.iloc[len(before)]
    last = before.iloc[-1]
    wall_s = (first.time - last.time).total_seconds()
    assert wall_s > 3 * PERIOD_S  # the watchdogs tripped meanwhile
    assert first.elapsed_s - last.elapsed_s == pytest.approx(wall_s, abs=0.05)
    gap = events[events.kind.astype(str) == "gap"]
    assert len(gap) == 1 and gap.duration_s.iloc[0] == pytest.approx(wall_s, abs=PERIOD_S)
