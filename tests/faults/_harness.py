"""The fault matrix's harness: run one fault scenario, measure it, return a record.

Every scenario ends in a :class:`FaultRecord`: which fault, how it was injected, the
behaviour the controller must show, the alarm code it raised, the measured time from the
fault's onset to safe outputs (seconds of run time), and what the run log looks like
afterwards (``PRAGMA integrity_check``, rows contiguous in tick order, run time missing
from the log against the commit interval that bounds it). The tests assert each of those;
``python -m tests.faults.table`` collects the records of a whole matrix run and renders
the table in ``tests/faults/README.md``.

Most scenarios run in-process on the autojumping virtual clock (:func:`run_virtual`): the
simulator's fault is injected into the rack and a monitor task checks every
:data:`PROBE_S` of run time whether the chamber's outputs are safe yet, so a time to safe
state is measured to that resolution, not read off the tick grid. The others (real
endpoints, child processes, a broker) build on the pieces here.

The rig is one invented Saltmarrow Lagoon benthic chamber ``B`` (8 L, 400 W heater, 300 W
chiller, own water), a 10 s tick, a hold at 20 °C with light and flow on.
"""

from __future__ import annotations

import asyncio
import json
import math
import sqlite3
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path

import pandas as pd

from controller.clock import Clock, run_with_clock
from controller.control import Outputs
from controller.rig import Fault
from controller.runtime import RunSettings, RunSummary, SimulatedRun
from controller.storage import EventKind, RunLogReader

__all__ = [
    "CHAMBER",
    "PERIOD_S",
    "PROBE_S",
    "FaultRecord",
    "LogCheck",
    "Outcome",
    "RecordBook",
    "check_log",
    "commanded_safe",
    "outputs_of",
    "protocol_text",
    "raised_between",
    "rig_text",
    "run_virtual",
]

CHAMBER = "B"
"""The one chamber of the matrix's rig."""
PERIOD_S = 10.0
"""Control tick of the in-process scenarios, s."""
PROBE_S = 1.0
"""How often the monitor looks at the outputs after a fault's onset, s of run time."""

RIG = """name = "Saltmarrow fault-matrix rack"

[sim]
room_temperature_c = {room_c}
physics_step_s = 1.0
seed = 7
level_alarm_loss_pct = 5.0

[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.limits]
min_temperature_c = {t_min}
max_temperature_c = {t_max}
max_ramp_c_per_h = 3.0
max_par = 800.0
max_flow_cm_s = 15.0

[chambers.sim]
initial_temperature_c = {initial_c}

[chambers.sim.sensors]
temperature_noise_c = 0.01
temperature_tau_s = 5.0

[chambers.sim.lamp]
par_at_full_drive = 700.0
warmup_tau_s = 60.0

[chambers.sim.pump]
dead_band_pct = 6.0
flow_at_full_drive_cm_s = 14.0
flush_at_full_drive_l_h = 20.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""

PROTOCOL = """format = "squall-protocol/1"
title = "Fault matrix"
begins = "{begins}"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = ["B"]

[[phases]]
name = "hold"
duration = "{minutes:g}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {temperature_c} }} ]
  light = [ {{ kind = "hold", value = 300.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]
"""


def rig_text(
    *,
    room_c: float = 18.0,
    t_min: float = 10.0,
    t_max: float = 26.0,
    initial_c: float = 20.0,
    extra: str = "",
) -> str:
    """TOML of the one-chamber rig (room and limits in °C) with ``extra`` tables appended."""
    return RIG.format(room_c=room_c, t_min=t_min, t_max=t_max, initial_c=initial_c) + extra


def protocol_text(
    *,
    hours: float = 1.0,
    temperature_c: float = 20.0,
    begins: str = "2027-07-01T06:00:00+00:00",
) -> str:
    """TOML of a protocol holding ``temperature_c`` (°C), 300 µmol m⁻² s⁻¹ and 4 cm s⁻¹ for
    ``hours`` (h), starting at ``begins`` (ISO 8601, or ``on-launch``)."""
    return PROTOCOL.format(begins=begins, minutes=hours * 60.0, temperature_c=temperature_c)


# ---------------------------------------------------------------------------- records


@dataclass(frozen=True, kw_only=True)
class FaultRecord:
    """What one fault scenario showed; one row of the table.

    Attributes
    ----------
    fault
        Row name: a simulator fault kind's value, or the name of a fault outside the
        simulator (``modbus-timeout``, ``sigkill`` ...).
    injected
        How the fault was made to happen.
    expected
        The behaviour the controller must show.
    alarm
        Codes of the alarms the run log shows raised from onset until the outputs were safe
        (to the end where nothing had to be made safe), in order, joined by ", "; or None.
    safe_after_s
        Measured time from onset to safe outputs, s of run time; None where the fault
        leaves nothing unsafe to correct (control carries on).
    safe_bound_s
        The bound the test holds ``safe_after_s`` to, s; None with ``safe_after_s``.
    integrity
        ``PRAGMA integrity_check`` of the log afterwards.
    contiguous
        Every chamber's rows are in tick order, less than two periods apart except across a
        recorded gap, and every tick has a row for every chamber.
    lost_s
        Run time missing from the log that the controller had run, s.
    lost_bound_s
        The stated bound on ``lost_s`` (the commit interval, plus the tick in flight where a
        process dies), s.
    wall_s
        Real time the scenario took, s.
    note
        Other measured facts worth a line in the table.
    """

    fault: str
    injected: str
    expected: str
    alarm: str | None
    safe_after_s: float | None
    safe_bound_s: float | None
    integrity: str
    contiguous: bool
    lost_s: float
    lost_bound_s: float
    wall_s: float
    note: str = ""

    def check(self, *, alarm: str | None) -> None:
        """Assert the record: the alarm, the time to safe state, the log.

        Parameters
        ----------
        alarm
            The alarm codes the scenario must raise, as in :attr:`alarm` (None: none).
        """
        assert self.alarm == alarm, f"{self.fault}: alarm {self.alarm!r}, expected {alarm!r}"
        if self.safe_bound_s is not None:
            assert self.safe_after_s is not None, f"{self.fault}: outputs never became safe"
            assert 0.0 <= self.safe_after_s <= self.safe_bound_s, (
                f"{self.fault}: safe after {self.safe_after_s} s, bound {self.safe_bound_s} s"
            )
        assert self.integrity == "ok", f"{self.fault}: integrity_check says {self.integrity}"
        assert self.contiguous, f"{self.fault}: log rows not contiguous"
        assert 0.0 <= self.lost_s <= self.lost_bound_s, (
            f"{self.fault}: {self.lost_s} s of data lost, bound {self.lost_bound_s} s"
        )


@dataclass
class RecordBook:
    """The records of one matrix run, written as JSON when the run ends.

    Attributes
    ----------
    records
        Records in the order the tests made them.
    """

    records: list[FaultRecord] = field(default_factory=list)

    def add(self, record: FaultRecord) -> FaultRecord:
        """Keep ``record`` (one per fault: a later one replaces an earlier one); return it."""
        self.records = [r for r in self.records if r.fault != record.fault]
        self.records.append(record)
        return record

    def write(self, path: Path) -> None:
        """Write the records as a JSON list to ``path``."""
        path.write_text(
            json.dumps([asdict(r) for r in self.records], indent=1) + "\n", encoding="utf-8"
        )

    @staticmethod
    def read(path: Path) -> list[FaultRecord]:
        """Records from a JSON file written by :meth:`write`."""
        return [FaultRecord(**item) for item in json.loads(path.read_text(encoding="utf-8"))]


# ---------------------------------------------------------------------------- the log


@dataclass(frozen=True, kw_only=True)
class LogCheck:
    """The state of a run log after a fault.

    Attributes
    ----------
    integrity
        ``PRAGMA integrity_check`` result (``ok`` when whole).
    contiguous
        See :attr:`FaultRecord.contiguous`.
    ticks
        Ticks logged (rows per chamber), dimensionless.
    last_t_s
        Clock time of the last logged tick, s; None without samples.
    last_utc_s
        UTC of the last logged tick, POSIX s; None without samples.
    finished
        Whether the run was marked finished.
    gaps
        Recorded ``gap`` events (resumed sessions), dimensionless.
    """

    integrity: str
    contiguous: bool
    ticks: int
    last_t_s: float | None
    last_utc_s: float | None
    finished: bool
    gaps: int


def check_log(path: Path, period_s: float) -> LogCheck:
    """Check a run log's integrity and the order of its rows.

    Parameters
    ----------
    path
        The run log (not being written now).
    period_s
        The run's tick period, s.

    Returns
    -------
    LogCheck
        Integrity, contiguity and the last logged tick.
    """
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        integrity = "; ".join(str(r[0]) for r in conn.execute("PRAGMA integrity_check"))
        # in the order written (seq), straight from the table: what a crash left behind
        rows = pd.read_sql_query("SELECT seq, t_s, utc_s, chamber FROM samples ORDER BY seq", conn)
    finally:
        conn.close()
    with RunLogReader(path) as reader:
        info = reader.info()
        events = reader.events()
    gaps = int((events.kind.astype(str) == EventKind.GAP.value).sum())
    chambers = [c.chamber for c in info.meta.chambers]
    contiguous = True
    ticks = 0
    if len(rows):
        first = rows[rows.chamber == chambers[0]]
        ticks = len(first)
        for chamber in chambers[1:]:
            # every tick has a row for every chamber, at the same instants
            mine = rows[rows.chamber == chamber].utc_s.to_numpy()
            contiguous &= len(mine) == ticks and bool((mine == first.utc_s.to_numpy()).all())
        # wall time never goes back along the table; clock time restarts with each session
        contiguous &= bool(rows.utc_s.is_monotonic_increasing)
        for _, session in rows.groupby(
            pd.cut(rows.seq, _session_edges(path), duplicates="drop"), observed=True
        ):
            contiguous &= bool(session.t_s.is_monotonic_increasing)
        # one tick apart: on a real clock ticks run a little late, so a step is anything
        # under two periods (whether every tick is there is counted separately, against
        # the ticks the controller ran); a step of two periods or more is a hole, allowed
        # only as a resumed session's gap
        steps = first.utc_s.diff().dropna() / period_s
        holes = steps[(steps <= 0) | (steps >= 2.0 - 1e-9)]
        contiguous &= bool((holes > 0).all()) and len(holes) <= gaps
    last = rows.iloc[-1] if len(rows) else None
    return LogCheck(
        integrity=integrity,
        contiguous=contiguous,
        ticks=ticks,
        last_t_s=None if last is None else float(last.t_s),
        last_utc_s=None if last is None else float(last.utc_s),
        finished=info.end is not None,
        gaps=gaps,
    )


def _session_edges(path: Path) -> list[float]:
    """Bin edges of the sample ``seq`` numbers of each writer session."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        firsts = [r[0] for r in conn.execute("SELECT first_sample_seq FROM sessions ORDER BY 1")]
    finally:
        conn.close()
    return [f - 0.5 for f in firsts] + [math.inf]


def raised_between(alarms: pd.DataFrame, start_s: float, end_s: float) -> str | None:
    """Codes of the alarms raised in [start_s, end_s] (clock time, s), in order, each once,
    joined by ", "; None when there are none."""
    window = alarms[(alarms.action == "raise") & (alarms.t_s >= start_s) & (alarms.t_s <= end_s)]
    codes = list(dict.fromkeys(str(c) for c in window.code))
    return ", ".join(codes) if codes else None


def outputs_of(actual: object) -> Outputs:
    """The controller's :class:`Outputs` of anything with the four drive fields (%)."""
    return Outputs(
        heater_pct=float(actual.heater_pct),  # type: ignore[attr-defined]
        chiller_pct=float(actual.chiller_pct),  # type: ignore[attr-defined]
        lamp_pct=float(actual.lamp_pct),  # type: ignore[attr-defined]
        pump_pct=float(actual.pump_pct),  # type: ignore[attr-defined]
    )


# ---------------------------------------------------------------------------- in-process


@dataclass(frozen=True, kw_only=True)
class Outcome:
    """A finished in-process scenario.

    Attributes
    ----------
    run
        The simulated run (rack, I/O, plan).
    summary
        The control loop's summary.
    samples
        Chamber B's logged rows.
    alarms
        The log's alarm records.
    safe_at_s
        Clock time the safe-state predicate first held at or after onset, s; None if never.
    log
        The log check.
    wall_s
        Real time the run took, s.
    """

    run: SimulatedRun
    summary: RunSummary
    samples: pd.DataFrame
    alarms: pd.DataFrame
    safe_at_s: float | None
    log: LogCheck
    wall_s: float

    def record(
        self,
        *,
        fault: str,
        injected: str,
        expected: str,
        onset_s: float,
        safe_bound_s: float | None,
        alarm_after_safe_s: float = 0.0,
    ) -> FaultRecord:
        """The scenario's record.

        Parameters
        ----------
        fault, injected, expected
            See :class:`FaultRecord`.
        onset_s
            When the fault began, s of run time.
        safe_bound_s
            Bound on the time to safe state, s; None for a fault with nothing to make safe.
        alarm_after_safe_s
            The alarms recorded are those raised from onset until this long after the
            outputs became safe (until the end where they never had to), s.
        """
        commit_s = self.run.plan.settings.commit_interval_for(None)
        ran = self.summary.ticks.ticks
        until_s = math.inf if self.safe_at_s is None else self.safe_at_s + alarm_after_safe_s
        return FaultRecord(
            fault=fault,
            injected=injected,
            expected=expected,
            alarm=raised_between(self.alarms, onset_s, until_s),
            safe_after_s=(
                None
                if safe_bound_s is None or self.safe_at_s is None
                else round(self.safe_at_s - onset_s, 3)
            ),
            safe_bound_s=safe_bound_s,
            integrity=self.log.integrity,
            contiguous=self.log.contiguous and self.log.finished,
            lost_s=max(0, ran - self.log.ticks) * self.run.plan.settings.period_s,
            lost_bound_s=commit_s,
            wall_s=round(self.wall_s, 2),
        )


SafePredicate = Callable[[SimulatedRun], bool]
Action = tuple[float, Callable[[SimulatedRun], object]]


def commanded_safe(run: SimulatedRun, safe: Outputs | None = None) -> bool:
    """True when the controller's latest command to B is its safe state (default the
    interlocks' safe outputs)."""
    target = safe if safe is not None else run.plan.chambers[CHAMBER].interlocks.safe_outputs()
    return run.io.last_written.get(CHAMBER) == target


def run_virtual(
    folder: Path,
    *,
    faults: Sequence[Fault] = (),
    onset_s: float,
    safe: SafePredicate | None = None,
    hours: float = 1.0,
    rig: str | None = None,
    protocol: str | None = None,
    settings: RunSettings | None = None,
    actions: Iterable[Action] = (),
) -> Outcome:
    """Run the matrix's protocol in-process with ``faults`` injected; watch the outputs.

    Parameters
    ----------
    folder
        Where the rig, protocol and log are written.
    faults
        Simulator faults to inject before the run starts (each at its ``at_s``).
    onset_s
        When the fault begins, s of run time.
    safe
        Predicate "the chamber is in its safe state now", checked every :data:`PROBE_S`
        from ``onset_s``; default: the controller commands the interlocks' safe outputs.
    hours
        Protocol length, h (when ``protocol`` is not given).
    rig, protocol
        TOML texts; default :func:`rig_text` and :func:`protocol_text`.
    settings
        Run settings; default a :data:`PERIOD_S` tick.
    actions
        ``(t_s, action(run))`` pairs called at clock time ``t_s`` (s).

    Returns
    -------
    Outcome
        The run, its log and the time the outputs became safe.
    """
    (folder / "rig.toml").write_text(rig if rig is not None else rig_text(), encoding="utf-8")
    (folder / "protocol.toml").write_text(
        protocol if protocol is not None else protocol_text(hours=hours), encoding="utf-8"
    )
    log = folder / "run.sqlite"
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        log,
        settings=settings or RunSettings(period_s=PERIOD_S),
    )
    for fault in faults:
        run.rack.inject(fault)
    is_safe = safe or commanded_safe
    safe_at: list[float] = []
    loop = run.loop()

    async def monitor() -> None:
        t_s = onset_s
        while not loop.done.is_set():
            await run.clock.sleep_until(t_s)
            if is_safe(run):
                safe_at.append(run.clock.now_s())
                return
            t_s += PROBE_S

    async def act(t_s: float, action: Callable[[SimulatedRun], object]) -> None:
        await run.clock.sleep_until(t_s)
        action(run)

    async def main(_clock: Clock) -> RunSummary:
        watcher = asyncio.ensure_future(monitor())
        doers = [asyncio.ensure_future(act(t, a)) for t, a in actions]
        try:
            return await loop.run()
        finally:
            for task in (watcher, *doers):
                task.cancel()
            await asyncio.gather(watcher, *doers, return_exceptions=True)

    started = time.perf_counter()
    try:
        summary = run_with_clock(run.clock, main)
    finally:
        if not run.writer.closed:
            run.writer.close()
    wall_s = time.perf_counter() - started
    with RunLogReader(log) as reader:
        samples = reader.samples(CHAMBER)
        alarms = reader.alarms()
    return Outcome(
        run=run,
        summary=summary,
        samples=samples,
        alarms=alarms,
        safe_at_s=safe_at[0] if safe_at else None,
        log=check_log(log, run.plan.settings.period_s),
        wall_s=wall_s,
    )
