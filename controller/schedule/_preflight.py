"""Preflight: may an unattended run start on these chambers now?

Rules of this module
--------------------
- Three checks, every finding named by chamber and check; the run may start only when
  there is none:

  1. **Sensors** — every chamber of the experiment is read once through the run's own
     chamber I/O (:class:`~controller.runtime.ChamberIO`, the very read a control tick makes:
     the simulated rack with ``--sim``, the rig's devices otherwise). Every expected value must
     arrive and be plausible: temperature inside the probe's range (the interlocks'
     ``sensor_min_c``..``sensor_max_c``), O2 within 0–500 % air saturation and not negative
     in µmol L⁻¹, PAR and flow not negative; the level switch must not report low water and
     no E-stop may be pressed. A quantity the chamber has no device for is not asked for.
  2. **Calibrations** — every calibration the rig limits (optode, lamp, probes) is fresh at
     the start by :func:`~controller.schedule._tasks.calibration_states` (whole local days,
     a limit set with no date on record is stale).
  3. **Latched alarms** — interlock latches live in a run's memory and end with it, so a new
     run would start with them forgotten. The run log keeps them: a latching condition whose
     last record in the rig's previous run log is ``raise`` (never acknowledged, never
     cleared) was still latched or active when that run ended. Such a trip on a chamber of
     the experiment refuses the start until an operator has dealt with it (how that is
     recorded is the caller's business: ``squall serve`` counts re-planning a refused
     experiment as the acknowledgment, see :mod:`controller.schedule._serve`).
- Reading is the only I/O here; nothing is written to any device. The I/O's background task
  runs only while the reads are made and is cancelled after them.
"""

from __future__ import annotations

import asyncio
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING

from controller.schedule._tasks import calibration_states

if TYPE_CHECKING:
    from controller.rig import Rig
    from controller.runtime import ChamberIO, ChamberReadings

__all__ = [
    "O2_SAT_RANGE_PCT",
    "PROBE_RANGE_C",
    "LatchedAlarm",
    "PreflightCheck",
    "PreflightFinding",
    "PreflightReport",
    "calibration_findings",
    "latched_alarms",
    "preflight",
    "reading_findings",
]

O2_SAT_RANGE_PCT = (0.0, 500.0)
"""Plausible optode readings, % air saturation (supersaturation under strong production
stays well below 500 %, common practice)."""

PROBE_RANGE_C = (-5.0, 60.0)
"""Default plausible range of a temperature probe, °C (the interlocks' default
``sensor_min_c``/``sensor_max_c``)."""


class PreflightCheck(StrEnum):
    """Which check a finding comes from."""

    DEVICES = "devices"
    SENSORS = "sensors"
    CALIBRATION = "calibration"
    LATCHED_ALARM = "latched-alarm"


@dataclass(frozen=True)
class PreflightFinding:
    """One reason not to start.

    Attributes
    ----------
    chamber
        Chamber concerned, or ``None`` for the whole rig (no unit).
    check
        Which check found it (no unit).
    message
        What is wrong, with the values (one line) (no unit).
    """

    chamber: str | None
    check: PreflightCheck
    message: str

    def line(self) -> str:
        """``C3 calibration: optode calibration of C3 is 41 d old (…)``."""
        where = self.chamber or "rig"
        return f"{where} {self.check.value}: {self.message}"


@dataclass(frozen=True)
class PreflightReport:
    """What preflight found.

    Attributes
    ----------
    checked_utc
        When the checks were made, aware UTC.
    chambers
        Chambers checked (no unit).
    findings
        Every reason not to start, in check order (no unit).
    readings
        The readings taken, by chamber (missing for chambers that could not be read) (no unit).
    """

    checked_utc: datetime
    chambers: tuple[str, ...]
    findings: tuple[PreflightFinding, ...]
    readings: Mapping[str, ChamberReadings] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """Whether the run may start (no finding)."""
        return not self.findings

    def summary(self) -> str:
        """One paragraph for the history and the alarm: passed, or every finding."""
        if self.passed:
            return (
                f"preflight passed: {len(self.chambers)} chambers answered with plausible "
                "values, calibrations fresh, no latched alarm"
            )
        lines = "; ".join(f.line() for f in self.findings)
        count = len(self.findings)
        return f"preflight failed ({count} finding{'s' if count != 1 else ''}): {lines}"


@dataclass(frozen=True)
class LatchedAlarm:
    """A latching interlock condition a run ended with, unacknowledged.

    Attributes
    ----------
    chamber
        Chamber concerned (``None``: the whole rig) (no unit).
    code
        Condition code, e.g. ``over-temperature`` (no unit).
    level
        ``warning``, ``alarm`` or ``trip`` (no unit).
    reason
        The reason recorded when it was raised (no unit).
    raised_utc
        When it was raised, aware UTC.
    """

    chamber: str | None
    code: str
    level: str
    reason: str
    raised_utc: datetime


def _latching_codes() -> frozenset[str]:
    from controller.control import default_policies

    return frozenset(c.value for c, policy in default_policies().items() if policy.latch)


def latched_alarms(log_path: Path) -> list[LatchedAlarm]:
    """Latching conditions still raised (unacknowledged, uncleared) at the end of a run log.

    Parameters
    ----------
    log_path
        A run log (finished or not) (no unit).

    Returns
    -------
    list of LatchedAlarm
        One per chamber and latching condition whose last alarm record is ``raise``, in
        the order they were raised (no unit).
    """
    import pandas as pd

    from controller.storage import RunLogReader

    latching = _latching_codes()
    with RunLogReader(log_path) as reader:
        alarms = reader.alarms()
    last: dict[tuple[str | None, str], LatchedAlarm | None] = {}
    for row in alarms.itertuples(index=False):
        code = str(row.code)
        if code not in latching:
            continue
        chamber = None if pd.isna(row.chamber) else str(row.chamber)
        key = (chamber, code)
        if str(row.action) == "raise":
            raised = pd.Timestamp(row.time).to_pydatetime().astimezone(UTC)
            last[key] = LatchedAlarm(chamber, code, str(row.level), str(row.reason), raised)
        else:  # ack or clear: nothing latched any more for this condition
            last[key] = None
    found = [alarm for alarm in last.values() if alarm is not None]
    return sorted(found, key=lambda a: a.raised_utc)


def calibration_findings(
    rig: Rig, chambers: Sequence[str], now_utc: datetime
) -> list[PreflightFinding]:
    """Stale or missing calibrations of the chambers at an instant.

    Parameters
    ----------
    rig
        The rig (dates, limits, zone) (no unit).
    chambers
        Chamber ids (no unit).
    now_utc
        The start, aware.

    Returns
    -------
    list of PreflightFinding
        One per stale calibration (no unit).
    """
    return [
        PreflightFinding(state.chamber, PreflightCheck.CALIBRATION, state.describe())
        for state in calibration_states(rig, chambers, now_utc)
        if not state.fresh
    ]


def _bad_number(value: float, low: float | None, high: float | None) -> bool:
    if not math.isfinite(value):
        return True
    return (low is not None and value < low) or (high is not None and value > high)


def reading_findings(
    readings: ChamberReadings, probe_range_c: tuple[float, float] = PROBE_RANGE_C
) -> list[PreflightFinding]:
    """Implausible or missing values in one chamber's readings.

    Parameters
    ----------
    readings
        One read of the chamber's devices.
    probe_range_c
        Plausible temperature probe range (low, high), °C.

    Returns
    -------
    list of PreflightFinding
        One per quantity that did not answer or is implausible, and for low water or a
        pressed E-stop (no unit).
    """
    from controller.runtime import Quantity

    chamber = readings.chamber
    found: list[PreflightFinding] = []

    def note(message: str) -> None:
        found.append(PreflightFinding(chamber, PreflightCheck.SENSORS, message))

    if not readings.comm_ok:
        note("a device did not answer")
    for quantity in sorted(readings.failed, key=lambda q: q.value):
        if quantity not in (Quantity.LEVEL, Quantity.E_STOP):
            note(f"no fresh {quantity.value} reading")
    low_c, high_c = probe_range_c
    checks: tuple[tuple[str, float | None, float | None, float | None, str], ...] = (
        ("temperature", readings.temperature_c, low_c, high_c, "°C"),
        ("O2 saturation", readings.o2_sat_pct, *O2_SAT_RANGE_PCT, "% air saturation"),
        ("O2", readings.o2_umol_l, 0.0, None, "µmol L-1"),
        ("PAR", readings.par, 0.0, None, "µmol photons m-2 s-1"),
        ("flow", readings.flow_cm_s, 0.0, None, "cm s-1"),
    )
    for name, value, low, high, unit in checks:
        if value is not None and _bad_number(value, low, high):
            span = f"{low:g}..{high:g}" if high is not None else f"at least {low:g}"
            note(f"{name} reads {value:g} {unit}, outside the plausible {span}")
    if readings.level_ok is False:
        note("the level switch reports low water")
    if readings.e_stop:
        note("the emergency stop is pressed")
    return found


async def _read(
    io: ChamberIO, chambers: Sequence[str], ready_timeout_s: float, read_timeout_s: float
) -> tuple[dict[str, ChamberReadings], list[PreflightFinding]]:
    """One read of every chamber with the I/O's background task running meanwhile."""
    readings: dict[str, ChamberReadings] = {}
    findings: list[PreflightFinding] = []
    ready = asyncio.Event()

    async def one(chamber: str) -> None:
        try:
            async with asyncio.timeout(read_timeout_s):
                readings[chamber] = await io.read(chamber)
        except TimeoutError:
            findings.append(
                PreflightFinding(
                    chamber,
                    PreflightCheck.DEVICES,
                    f"no answer within {read_timeout_s:g} s",
                )
            )

    async def reads(runner: asyncio.Task[None]) -> None:
        try:
            async with asyncio.timeout(ready_timeout_s):
                await ready.wait()
        except TimeoutError:
            findings.append(
                PreflightFinding(
                    None,
                    PreflightCheck.DEVICES,
                    f"the chamber devices were not ready within {ready_timeout_s:g} s",
                )
            )
        else:
            async with asyncio.TaskGroup() as group:
                for chamber in chambers:
                    group.create_task(one(chamber))
        finally:
            runner.cancel()

    async with io:
        async with asyncio.TaskGroup() as group:
            runner = group.create_task(io.run(ready), name="preflight-io")
            group.create_task(reads(runner), name="preflight-reads")
    return readings, findings


async def preflight(
    rig: Rig,
    chambers: Sequence[str],
    io: ChamberIO,
    *,
    now_utc: datetime,
    probe_ranges_c: Mapping[str, tuple[float, float]] | None = None,
    last_log: Path | None = None,
    ready_timeout_s: float = 30.0,
    read_timeout_s: float = 10.0,
) -> PreflightReport:
    """Check sensors, calibrations and latched alarms before an unattended start.

    Parameters
    ----------
    rig
        The rig (calibration dates, limits, zone) (no unit).
    chambers
        The experiment's chambers.
    io
        The chamber I/O the run will use (or another over the same devices); opened, read
        once per chamber and closed; nothing is written (no unit).
    now_utc
        The start being checked, aware.
    probe_ranges_c
        Plausible temperature range per chamber (low, high), °C; default
        :data:`PROBE_RANGE_C`.
    last_log
        The rig's previous run log whose latched trips still count, or ``None``.
    ready_timeout_s
        How long the devices may take to get ready, s (on the I/O's clock).
    read_timeout_s
        How long one chamber's read may take, s.

    Returns
    -------
    PreflightReport
        Passed when there is no finding (no unit).
    """
    checked = now_utc.astimezone(UTC)
    findings: list[PreflightFinding] = []
    try:
        readings, device_findings = await _read(io, chambers, ready_timeout_s, read_timeout_s)
    except Exception as group_error:  # a transport that fails outright: refuse, never crash
        error: BaseException = group_error
        while isinstance(error, BaseExceptionGroup) and len(error.exceptions) == 1:
            error = error.exceptions[0]
        readings = {}
        device_findings = [
            PreflightFinding(
                None,
                PreflightCheck.DEVICES,
                f"reading the devices failed ({type(error).__name__}: {error})",
            )
        ]
    findings += device_findings
    for chamber in chambers:
        if chamber in readings:
            span = (probe_ranges_c or {}).get(chamber, PROBE_RANGE_C)
            findings += reading_findings(readings[chamber], span)
    findings += calibration_findings(rig, chambers, checked)
    if last_log is not None and last_log.exists():
        mine = set(chambers)
        for alarm in latched_alarms(last_log):
            if alarm.chamber is None or alarm.chamber in mine:
                findings.append(
                    PreflightFinding(
                        alarm.chamber,
                        PreflightCheck.LATCHED_ALARM,
                        f"{alarm.code} ({alarm.level}) raised "
                        f"{alarm.raised_utc:%Y-%m-%d %H:%M} UTC in {last_log.name} was never "
                        f"acknowledged: {alarm.reason}",
                    )
                )
    return PreflightReport(
        checked_utc=checked,
        chambers=tuple(chambers),
        findings=tuple(findings),
        readings=dict(readings),
    )
