"""Preflight before an unattended start: sensors read through the run's chamber I/O and judged
plausible, calibrations fresh, no latched trip left from the rig's previous run."""

from __future__ import annotations

import asyncio
import math
from collections.abc import Awaitable, Callable
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any, Self, TypeVar

import pytest

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.control import Outputs
from controller.files import load_model
from controller.rig import Fault, FaultKind, Rig
from controller.runtime import ChamberReadings, Quantity, SimulatedIO
from controller.schedule._preflight import (
    PreflightCheck,
    calibration_findings,
    latched_alarms,
    preflight,
    reading_findings,
)
from controller.storage import (
    AlarmAction,
    AlarmLevel,
    AlarmRecord,
    ClockKind,
    RunEnd,
    RunEndReason,
    RunLogWriter,
    RunMeta,
)
from simulator import Rack

REPO = Path(__file__).resolve().parents[2]
RIG = load_model(REPO / "rigs" / "saltmarrow-rack8.toml", Rig)
# rack 8: optodes calibrated 2026-11-24 (limit 30 d), lamps 2026-10-05 (180 d), probes
# 2026-11-02 (90 d); zone Etc/GMT-1
FRESH = datetime(2026, 12, 10, 10, 0, tzinfo=UTC)
T = TypeVar("T")


def _on_clock(start: datetime, main: Callable[[Clock], Awaitable[T]]) -> T:
    return run_with_clock(VirtualClock(start), main)


def _sim_preflight(rig: Rig, chambers: list[str], now: datetime, **kwargs: Any) -> Any:
    async def main(clock: Clock) -> Any:
        io = SimulatedIO(Rack(rig, start_utc=now), clock)
        hook = kwargs.pop("hook", None)
        if hook is not None:
            hook(io)
        return await preflight(rig, chambers, io, now_utc=now, **kwargs)

    return _on_clock(now, main)


def test_a_healthy_simulated_rack_with_fresh_calibrations_passes() -> None:
    chambers = [c.id for c in RIG.chambers]
    report = _sim_preflight(RIG, chambers, FRESH)
    assert report.passed, report.summary()
    assert set(report.readings) == set(chambers)
    for reading in report.readings.values():
        assert reading.temperature_c is not None and 5 < reading.temperature_c < 30
        assert reading.o2_sat_pct is not None and 50 < reading.o2_sat_pct < 150
    assert report.summary().startswith("preflight passed: 8 chambers")


def test_stale_calibrations_are_named_per_chamber() -> None:
    later = datetime(2027, 1, 10, 10, 0, tzinfo=UTC)  # optodes 47 d old, limit 30 d
    report = _sim_preflight(RIG, ["C1", "C5"], later)
    assert not report.passed
    assert [(f.chamber, f.check) for f in report.findings] == [
        ("C1", PreflightCheck.CALIBRATION),
        ("C5", PreflightCheck.CALIBRATION),
    ]
    assert "optode calibration of C1 is 47 d old (done 2026-11-24, limit 30 d)" in (
        report.findings[0].message
    )
    assert "C5 calibration: optode calibration of C5" in report.summary()


def test_a_limit_without_a_date_on_record_is_stale() -> None:
    chambers = [
        c.model_copy(update={"calibration": c.calibration.model_copy(update={"probes_on": None})})
        if c.id == "C2"
        else c
        for c in RIG.chambers
    ]
    rig = RIG.model_copy(update={"chambers": chambers})
    (finding,) = calibration_findings(rig, ["C1", "C2"], FRESH)
    assert finding.chamber == "C2"
    assert "no date on record" in finding.message and "probes" in finding.message


def test_a_sensor_dropout_and_a_pressed_e_stop_refuse() -> None:
    fault = Fault(kind=FaultKind.DROPOUT, chamber="C6", sensor="optode", at_s=0.0)
    rig = RIG.model_copy(update={"sim": RIG.sim.model_copy(update={"faults": [fault]})})
    report = _sim_preflight(rig, ["C5", "C6", "C7"], FRESH, hook=lambda io: io.press_e_stop("C7"))
    lines = [f.line() for f in report.findings]
    assert lines == [
        "C6 sensors: no fresh oxygen reading",
        "C7 sensors: the emergency stop is pressed",
    ]


@pytest.mark.parametrize(
    ("change", "expected"),
    [
        ({"temperature_c": 75.0}, "temperature reads 75 °C, outside the plausible -5..60"),
        ({"temperature_c": math.nan}, "temperature reads nan °C"),
        (
            {"o2_sat_pct": 612.0},
            "O2 saturation reads 612 % air saturation, outside the plausible 0..500",
        ),
        ({"o2_umol_l": -3.0}, "O2 reads -3 µmol L-1, outside the plausible at least 0"),
        ({"par": -20.0}, "PAR reads -20 µmol photons m-2 s-1"),
        ({"flow_cm_s": -0.5}, "flow reads -0.5 cm s-1"),
        ({"level_ok": False}, "the level switch reports low water"),
        ({"comm_ok": False}, "a device did not answer"),
        (
            {"par": None, "failed": frozenset({Quantity.PAR})},
            "no fresh par reading",
        ),
    ],
)
def test_implausible_readings_are_findings(change: dict[str, Any], expected: str) -> None:
    good = {
        "chamber": "C1",
        "t_s": 0.0,
        "temperature_c": 18.0,
        "o2_umol_l": 240.0,
        "o2_sat_pct": 98.0,
        "par": 0.0,
        "flow_cm_s": 0.0,
        "level_ok": True,
        "e_stop": False,
    }
    assert reading_findings(ChamberReadings(**good)) == []
    (finding,) = reading_findings(ChamberReadings(**{**good, **change}))
    assert finding.chamber == "C1" and finding.check is PreflightCheck.SENSORS
    assert expected in finding.message


def test_the_probe_range_comes_from_the_caller() -> None:
    reading = ChamberReadings(chamber="C1", t_s=0.0, temperature_c=45.0)
    assert reading_findings(reading, (-5.0, 60.0)) == []
    assert "outside the plausible -5..40" in reading_findings(reading, (-5.0, 40.0))[0].message


def test_a_chamber_without_a_flow_sensor_is_not_asked_for_flow() -> None:
    reading = ChamberReadings(chamber="C1", t_s=0.0, temperature_c=18.0, flow_cm_s=None)
    assert reading_findings(reading) == []


def _log(path: Path, alarms: list[tuple[str | None, str, AlarmAction]]) -> Path:
    meta = RunMeta(
        run_id=path.stem,
        protocol_text="",
        rig_text="",
        start_utc_s=FRESH.timestamp(),
        clock_kind=ClockKind.VIRTUAL,
    )
    with RunLogWriter(path, meta=meta) as writer:
        for i, (chamber, code, action) in enumerate(alarms):
            writer.record_alarm(
                AlarmRecord(
                    t_s=60.0 * i,
                    utc_s=FRESH.timestamp() + 60.0 * i,
                    action=action,
                    level=AlarmLevel.TRIP,
                    code=code,
                    reason=f"{code} on {chamber}",
                    chamber=chamber,
                )
            )
        writer.finish(
            RunEnd(
                end_t_s=3600.0,
                end_utc_s=FRESH.timestamp() + 3600.0,
                end_reason=RunEndReason.COMPLETED,
            )
        )
    return path


RAISE, CLEAR, ACK = AlarmAction.RAISE, AlarmAction.CLEAR, AlarmAction.ACK


def test_latched_alarms_are_latching_conditions_last_raised(tmp_path: Path) -> None:
    log = _log(
        tmp_path / "previous.sqlite",
        [
            ("C3", "over-temperature", RAISE),  # latching, never acknowledged: counts
            ("C2", "sensor-stale", RAISE),  # not latching: the sensor check sees it now
            ("C4", "e-stop", RAISE),
            ("C4", "e-stop", ACK),  # acknowledged
            ("C1", "low-level", RAISE),
            ("C1", "low-level", CLEAR),
            ("C1", "low-level", RAISE),  # raised again after clearing: counts
        ],
    )
    found = [(a.chamber, a.code) for a in latched_alarms(log)]
    assert found == [("C3", "over-temperature"), ("C1", "low-level")]
    assert latched_alarms(log)[0].raised_utc == FRESH


def test_a_latched_trip_on_one_of_the_chambers_refuses(tmp_path: Path) -> None:
    log = _log(
        tmp_path / "previous.sqlite",
        [("C3", "over-temperature", RAISE), ("C7", "low-level", RAISE)],
    )
    report = _sim_preflight(RIG, ["C1", "C2", "C3", "C4"], FRESH, last_log=log)
    (finding,) = report.findings
    assert finding.chamber == "C3" and finding.check is PreflightCheck.LATCHED_ALARM
    assert "over-temperature (trip) raised 2026-12-10 10:00 UTC in previous.sqlite" in (
        finding.message
    )
    assert "never acknowledged" in finding.message
    # C7's trip does not concern an experiment on C5 and C6
    assert _sim_preflight(RIG, ["C5", "C6"], FRESH, last_log=log).passed


class _Silent:
    """A chamber I/O whose devices never get ready (or whose background task fails)."""

    def __init__(self, fail: bool = False) -> None:
        self.fail = fail
        self.closed = False

    @property
    def chambers(self) -> tuple[str, ...]:
        return ("C1",)

    async def __aenter__(self) -> Self:
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        self.closed = True

    async def run(self, ready: asyncio.Event) -> None:
        if self.fail:
            raise ConnectionRefusedError("no route to the I/O module")
        await asyncio.Event().wait()

    async def read(self, chamber: str) -> ChamberReadings:
        raise AssertionError("never read before ready")

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        raise AssertionError("preflight writes nothing")


@pytest.mark.parametrize(
    ("fail", "expected"),
    [
        (False, "the chamber devices were not ready within 30 s"),
        (True, "reading the devices failed (ConnectionRefusedError: no route"),
    ],
)
def test_devices_that_never_get_ready_refuse_without_hanging(fail: bool, expected: str) -> None:
    io = _Silent(fail)

    async def main(clock: Clock) -> Any:
        report = await preflight(RIG, ["C1"], io, now_utc=FRESH)
        return report, clock.now_s()

    report, waited_s = _on_clock(FRESH, main)
    (finding,) = report.findings
    assert finding.check is PreflightCheck.DEVICES and finding.chamber is None
    assert expected in finding.message
    assert io.closed
    assert waited_s == pytest.approx(0.0 if fail else 30.0)
