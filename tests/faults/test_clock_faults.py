"""The system's wall clock jumps (an NTP step, a wrong real-time clock put right) while the
monotonic control clock does not.

The run is the matrix's in-process simulated run on the autojumping virtual clock, which
stands for the monotonic clock (``RealClock`` uses ``time.monotonic``, as asyncio does). The
wall clock is what ``time.time``, ``time.time_ns`` and ``datetime.now`` return: once the run
is assembled, the test replaces the first two process-wide and ``datetime`` in every
controller and simulator module that names it with a class whose ``now()`` reads the same
jumping wall clock. At 600 s it jumps forward an hour, at 1200 s back two hours. Ticks must
neither burst (catching up on an hour that never passed) nor stall (waiting out an hour
that is repeated), and every logged UTC time must be the start plus the control clock's
time.
"""

from __future__ import annotations

import datetime as dt
import sys
import time
from dataclasses import replace
from pathlib import Path

import pytest

from controller.runtime import SimulatedRun

from ._harness import PERIOD_S, RecordBook, run_virtual

pytestmark = pytest.mark.timeout(120)

FORWARD_AT_S = 600.0
"""When the wall clock jumps forward, s of run time."""
BACK_AT_S = 1200.0
"""When it jumps back, s of run time."""
FORWARD_S = 3600.0
"""Size of the forward jump, s."""
BACK_S = -7200.0
"""Size of the backward jump, s."""


class WallClock:
    """A wall clock that can be stepped: the real one plus an offset (s)."""

    def __init__(self) -> None:
        self._time = time.time
        self.offset_s = 0.0
        self.reads = 0

    def time(self) -> float:
        """Wall time, POSIX s."""
        self.reads += 1
        return self._time() + self.offset_s

    def time_ns(self) -> int:
        """Wall time, POSIX ns."""
        return round(self.time() * 1e9)

    def datetime_class(self) -> type[dt.datetime]:
        """A ``datetime`` whose ``now()`` and ``utcnow()`` read this wall clock."""
        wall = self

        class SteppedDatetime(dt.datetime):
            @classmethod
            def now(cls, tz: dt.tzinfo | None = None) -> SteppedDatetime:
                return cls.fromtimestamp(wall.time(), tz)

            @classmethod
            def utcnow(cls) -> SteppedDatetime:
                return cls.fromtimestamp(wall.time(), dt.UTC).replace(tzinfo=None)

        return SteppedDatetime


def install(monkeypatch: pytest.MonkeyPatch, wall: WallClock) -> int:
    """Make ``wall`` the process's wall clock; return how many modules' ``datetime`` it
    replaced."""
    monkeypatch.setattr(time, "time", wall.time)
    monkeypatch.setattr(time, "time_ns", wall.time_ns)
    stepped = wall.datetime_class()
    replaced = 0
    for name, module in list(sys.modules.items()):
        if name.split(".")[0] in ("controller", "simulator") and (
            getattr(module, "datetime", None) is dt.datetime
        ):
            monkeypatch.setattr(module, "datetime", stepped)
            replaced += 1
    return replaced


def test_wall_clock_jumps_neither_burst_nor_stall_the_ticks(
    tmp_path: Path, records: RecordBook, monkeypatch: pytest.MonkeyPatch
) -> None:
    wall = WallClock()
    seen: dict[str, float] = {}

    def go(_run: SimulatedRun) -> None:
        seen["modules"] = install(monkeypatch, wall)

    def step(by_s: float) -> object:
        def jump(_run: SimulatedRun) -> None:
            before = time.time()
            wall.offset_s += by_s
            seen[f"jump {by_s:g}"] = time.time() - before  # the jump is live
            seen[f"now {by_s:g}"] = (
                sys.modules["controller.runtime._inputs"].datetime.now(dt.UTC).timestamp()
                - wall._time()
            )

        return jump

    out = run_virtual(
        tmp_path,
        onset_s=FORWARD_AT_S,
        hours=0.5,
        actions=[(0.0, go), (FORWARD_AT_S, step(FORWARD_S)), (BACK_AT_S, step(BACK_S))],
    )
    s, ticks = out.samples, out.summary.ticks
    start_utc_s = out.run.clock.utc(0.0).timestamp()
    expected_ticks = round(0.5 * 3600.0 / PERIOD_S)
    measured = out.record(
        fault="clock-jump",
        injected="the system wall clock (time.time, datetime.now) jumps +1 h at 600 s and "
        "-2 h at 1200 s; the monotonic control clock does not",
        expected="every tick one period after the last (no burst, no stall); logged UTC "
        "is the start plus control-clock time, never the jumped wall time; no alarm",
        onset_s=FORWARD_AT_S,
        safe_bound_s=None,
    )
    note = f"{ticks.ticks} ticks, {ticks.missed} missed, {ticks.late} late"
    record = records.add(replace(measured, note=note))
    record.check(alarm=None)
    # the wall clock did jump, as the run's own modules see it
    assert seen["modules"] >= 3
    assert seen[f"jump {FORWARD_S:g}"] == pytest.approx(FORWARD_S, abs=1.0)
    assert seen[f"now {BACK_S:g}"] == pytest.approx(FORWARD_S + BACK_S, abs=1.0)
    assert ticks.ticks == expected_ticks == len(s)
    assert ticks.missed == 0 and ticks.late == 0
    assert (s.t_s.diff().dropna() == PERIOD_S).all()
    logged = s.time.map(lambda t: t.timestamp())
    assert ((logged - s.t_s - start_utc_s).abs() < 1e-3).all()
    assert (s.elapsed_s == s.t_s).all()  # protocol time did not jump either
