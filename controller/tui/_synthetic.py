"""Invented run logs for demos, benchmarks and tests of the views (not a simulation).

Rules of this module
--------------------
- The data is invented and only plausible: temperatures follow a three-phase protocol
  (acclimation, a +3 °C heatwave, recovery) with a little noise, PAR follows a 12 h day,
  oxygen rises in light and falls in the dark and is flushed back towards air saturation
  while the chamber is open; chambers close for 2 h of every 6 h, staggered. For physics and
  biology use the simulator (``SimulatedRun``); this exists to feed the views quickly and
  deterministically (a seeded generator, fixed start time).
- :class:`SyntheticRun` writes through :class:`RunLogWriter`, so its logs are real run logs:
  ``tick`` appends one tick of every chamber (a live log), ``finish`` marks the end.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    ChamberRecord,
    ClockKind,
    EventKind,
    EventRecord,
    IncubationState,
    RunEnd,
    RunEndReason,
    RunLogWriter,
    RunMeta,
    SampleRow,
)

__all__ = ["START_UTC_S", "SyntheticRun", "chamber_ids", "synthetic_protocol"]

START_UTC_S = 1_814_400_000.0
"""Default start of synthetic runs: 2027-07-01T00:00:00Z, POSIX s."""


def chamber_ids(count: int) -> tuple[str, ...]:
    """``C01``, ``C02``, … for ``count`` chambers.

    Parameters
    ----------
    count
        Number of chambers, dimensionless.
    """
    return tuple(f"C{i + 1:02d}" for i in range(count))


def synthetic_protocol(chambers: Sequence[str], duration_s: float) -> str:
    """A valid protocol text whose three phases last a quarter, half and quarter of
    ``duration_s`` (holds only, so it compiles anywhere).

    Parameters
    ----------
    chambers
        Chamber ids.
    duration_s
        Length of the protocol, s (whole minutes).
    """
    quarter = max(1, round(duration_s / 4 / 60))
    ids = ", ".join(f'"{c}"' for c in chambers)
    phases = (("acclimation", quarter, 20.0), ("heatwave", 2 * quarter, 23.0))
    phases += (("recovery", quarter, 20.0),)
    text = f"""format = "squall-protocol/1"
title = "Saltmarrow Lagoon heatwave trial (synthetic)"
begins = "on-launch"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = [{ids}]
"""
    for name, minutes, temp in phases:
        text += f"""
[[phases]]
name = "{name}"
duration = "{minutes}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {temp} }} ]
  light = [ {{ kind = "hold", value = 300.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]
"""
    return text


class SyntheticRun:
    """Write an invented run log tick by tick.

    Parameters
    ----------
    path
        Log file to create (never overwritten).
    chambers
        Number of chambers, dimensionless.
    period_s
        Tick period, s.
    duration_s
        Protocol length, s; phase lengths follow from it.
    start_utc_s
        UTC time of the first tick, POSIX s.
    seed
        Noise seed, dimensionless.
    commit_interval_s
        Writer commit interval in run time, s.
    """

    def __init__(
        self,
        path: str | Path,
        *,
        chambers: int = 6,
        period_s: float = 60.0,
        duration_s: float = 86400.0,
        start_utc_s: float = START_UTC_S,
        seed: int = 7,
        commit_interval_s: float = 0.0,
    ) -> None:
        self.chambers = chamber_ids(chambers)
        self.period_s = float(period_s)
        self.duration_s = float(duration_s)
        self.start_utc_s = float(start_utc_s)
        self._rng = np.random.default_rng(seed)
        self._o2 = np.full(len(self.chambers), 250.0)
        self._temp = np.full(len(self.chambers), 19.0)
        self.k = 0
        self._phase = ""
        meta = RunMeta(
            run_id=Path(path).stem,
            protocol_text=synthetic_protocol(self.chambers, self.duration_s),
            rig_text='name = "synthetic rack"\n',
            start_utc_s=self.start_utc_s,
            clock_kind=ClockKind.VIRTUAL,
            chambers=tuple(
                ChamberRecord(chamber=c, water_volume_l=8.0, sediment_area_m2=0.03)
                for c in self.chambers
            ),
        )
        self.writer = RunLogWriter(path, meta=meta, commit_interval_s=commit_interval_s)
        self.writer.record_event(
            EventRecord(t_s=0.0, utc_s=self.start_utc_s, kind=EventKind.RUN_START, elapsed_s=0.0)
        )

    @property
    def t_s(self) -> float:
        """Clock time of the next tick, s."""
        return self.k * self.period_s

    @property
    def times(self) -> tuple[float, float]:
        """(clock time, UTC POSIX time) of the last tick written, s."""
        t = max(0, self.k - 1) * self.period_s
        return t, self.start_utc_s + t

    def phase_at(self, elapsed_s: float) -> tuple[str, float]:
        """Phase name and temperature setpoint (°C) at protocol time ``elapsed_s`` (s)."""
        q = self.duration_s / 4
        if elapsed_s < q:
            return "acclimation", 20.0
        if elapsed_s < 3 * q:
            return "heatwave", 23.0
        return "recovery", 20.0

    def tick(self) -> list[SampleRow]:
        """Append one tick of every chamber and return its rows."""
        t = self.t_s
        utc = self.start_utc_s + t
        phase, setpoint = self.phase_at(t)
        if phase != self._phase:
            self.writer.record_event(
                EventRecord(t_s=t, utc_s=utc, kind=EventKind.PHASE_CHANGE, elapsed_s=t, phase=phase)
            )
            self._phase = phase
        hour = (utc % 86400.0) / 3600.0
        par = max(0.0, 300.0 * math.sin(math.pi * (hour - 6.0) / 12.0)) if 6 <= hour < 18 else 0.0
        noise = self._rng.normal(0.0, 1.0, size=(len(self.chambers), 3))
        rows: list[SampleRow] = []
        for i, chamber in enumerate(self.chambers):
            self._temp[i] += (setpoint - self._temp[i]) * min(1.0, self.period_s / 1800.0)
            temp = float(self._temp[i] + 0.03 * noise[i, 0])
            closed = ((t + i * 3600.0) % 21600.0) < 7200.0
            flux = (par / 300.0 * 60.0 - 25.0) * self.period_s / 3600.0
            self._o2[i] += flux
            if not closed:
                self._o2[i] += (252.0 - self._o2[i]) * min(1.0, self.period_s / 600.0)
            o2 = float(self._o2[i] + 0.5 * noise[i, 1])
            rows.append(
                SampleRow(
                    t_s=t,
                    utc_s=utc,
                    elapsed_s=t,
                    chamber=chamber,
                    phase=phase,
                    temperature_c=temp,
                    temperature_setpoint_c=setpoint,
                    par=par + 2.0 * noise[i, 2] if par else 0.0,
                    par_setpoint=par,
                    flow_cm_s=4.0 + 0.05 * noise[i, 2],
                    flow_setpoint_cm_s=4.0,
                    o2_umol_l=o2,
                    o2_sat_pct=o2 / 2.52,
                    heater_pct=max(0.0, min(100.0, (setpoint - temp) * 50.0)),
                    chiller_pct=max(0.0, min(100.0, (temp - setpoint) * 50.0)),
                    lamp_pct=par / 7.0,
                    pump_pct=0.0 if closed else 30.0,
                    incubation=IncubationState.CLOSED if closed else IncubationState.OPEN,
                )
            )
        self.writer.append_samples(rows)
        self.k += 1
        return rows

    def run_ticks(self, count: int) -> None:
        """Append ``count`` ticks.

        Parameters
        ----------
        count
            Ticks, dimensionless.
        """
        for _ in range(count):
            self.tick()
        self.writer.flush()

    def raise_alarm(
        self, chamber: str | None, code: str, level: AlarmLevel = AlarmLevel.ALARM, reason: str = ""
    ) -> None:
        """Record an alarm raise at the last tick written.

        Parameters
        ----------
        chamber
            Chamber concerned; None for the rig.
        code
            Alarm code.
        level
            Severity.
        reason
            Why, in words.
        """
        t, utc = self.times
        self.writer.record_alarm(
            AlarmRecord(
                t_s=t,
                utc_s=utc,
                action=AlarmAction.RAISE,
                level=level,
                code=code,
                reason=reason or f"{code} (synthetic)",
                chamber=chamber,
            )
        )

    def clear_alarm(self, chamber: str | None, code: str) -> None:
        """Record that an alarm cleared at the last tick written.

        Parameters
        ----------
        chamber
            Chamber concerned; None for the rig.
        code
            Alarm code.
        """
        t, utc = self.times
        self.writer.record_alarm(
            AlarmRecord(
                t_s=t,
                utc_s=utc,
                action=AlarmAction.CLEAR,
                level=AlarmLevel.ALARM,
                code=code,
                reason="back within limits (synthetic)",
                chamber=chamber,
            )
        )

    def finish(self) -> None:
        """Mark the run completed at the last tick and close the log."""
        t, utc = self.times
        self.writer.record_event(
            EventRecord(t_s=t, utc_s=utc, kind=EventKind.RUN_STOP, elapsed_s=t, detail="done")
        )
        self.writer.finish(RunEnd(end_t_s=t, end_utc_s=utc, end_reason=RunEndReason.COMPLETED))

    def close(self) -> None:
        """Close the writer without finishing (the log stays resumable)."""
        self.writer.close()
