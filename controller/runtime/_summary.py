"""What a run reports: tick punctuality, per-tick progress and the run's summary.

Rule: plain frozen records (and one fixed-size counter), no I/O; the control loop fills
them. Lateness is kept in a fixed histogram, so memory does not grow with the run.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

from controller.storage import RunEndReason

__all__ = ["RunSummary", "TickCounter", "TickStats", "TickStatus"]

#: Width of a lateness histogram bin, s.
_BIN_S = 0.001
#: Bins of the lateness histogram (the last one collects everything beyond), dimensionless.
_BINS = 5000


@dataclass(frozen=True, kw_only=True)
class TickStats:
    """How punctual the ticks were.

    Attributes
    ----------
    ticks
        Ticks run, dimensionless.
    late
        Ticks that started more than the settings' lateness limit after they were due,
        dimensionless.
    missed
        Due ticks skipped because the loop was more than a period behind, dimensionless.
    max_lateness_s
        Largest start lateness, s.
    p99_lateness_s
        99th percentile of start lateness, s (to 1 ms, from a histogram).
    """

    ticks: int
    late: int
    missed: int
    max_lateness_s: float
    p99_lateness_s: float


class TickCounter:
    """Accumulates tick lateness in a fixed histogram (memory does not grow with the run)."""

    def __init__(self, late_after_s: float) -> None:
        self.late_after_s = late_after_s
        self.ticks = 0
        self.late = 0
        self.missed = 0
        self.max_s = 0.0
        self.bins = [0] * _BINS

    def add(self, lateness_s: float) -> None:
        lateness_s = max(0.0, lateness_s)
        self.ticks += 1
        if lateness_s > self.late_after_s:
            self.late += 1
        self.max_s = max(self.max_s, lateness_s)
        self.bins[min(_BINS - 1, int(lateness_s / _BIN_S))] += 1

    def stats(self) -> TickStats:
        p99 = 0.0
        if self.ticks:
            need = math.ceil(0.99 * self.ticks)
            seen = 0
            for i, count in enumerate(self.bins):
                seen += count
                if seen >= need:
                    p99 = min(self.max_s, (i + 1) * _BIN_S) if count else 0.0
                    break
        return TickStats(
            ticks=self.ticks,
            late=self.late,
            missed=self.missed,
            max_lateness_s=self.max_s,
            p99_lateness_s=p99,
        )


@dataclass(frozen=True, kw_only=True)
class TickStatus:
    """What a progress display learns after each tick.

    Attributes
    ----------
    tick
        Tick number, dimensionless.
    ticks_total
        Ticks the protocol needs, dimensionless.
    elapsed_s
        Protocol time, s.
    duration_s
        Protocol length, s.
    phase
        Phase in force.
    utc
        Wall time of the tick, aware UTC.
    alarms
        Holding interlock condition code by chamber (chambers without one are absent).
    """

    tick: int
    ticks_total: int
    elapsed_s: float
    duration_s: float
    phase: str
    utc: datetime
    alarms: Mapping[str, str]


@dataclass(frozen=True, kw_only=True)
class RunSummary:
    """How a run went.

    Attributes
    ----------
    log_path
        The run log.
    end_reason
        completed, aborted or stopped.
    start_utc, end_utc
        Wall times of the run's start and end, aware UTC.
    run_s
        Clock time from start to end, s (simulated seconds on a virtual clock).
    ticks
        Tick punctuality.
    rows_written
        Sample rows written to the log, dimensionless.
    rows_lost
        Sample rows a failed log write dropped, dimensionless.
    alarms
        Every alarm raised, as (chamber, condition code), in order.
    detail
        Why the run ended when it did not complete (the error), else empty.
    windows
        Closed incubation windows recorded in this session, dimensionless.
    """

    log_path: Path
    end_reason: RunEndReason
    start_utc: datetime
    end_utc: datetime
    run_s: float
    ticks: TickStats
    rows_written: int
    rows_lost: int
    alarms: tuple[tuple[str, str], ...] = field(default=())
    detail: str = ""
    windows: int = 0
