"""End-to-end: a short protocol on a simulated rack with a shared bath, on the virtual clock.

The test rig's chambers A1 and A2 share one bath (one temperature loop, the bath's heater
on A1's module); B has its own water. The protocol holds 20 °C with light and flow for 4 h,
then ramps to 23 °C at 1 °C/h and holds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pytest

from controller.clock import Clock
from controller.control import Outputs, simc
from controller.errors import SquallError
from controller.protocol import setpoints_at
from controller.rig import Fault, FaultKind
from controller.runtime import (
    ChamberReadings,
    RunSettings,
    SetpointTable,
    SimulatedIO,
    SimulatedRun,
    default_log_path,
    node_model,
    plan_control,
)
from controller.storage import RunEndReason, RunLogReader

from ._sim import Files, drive

PERIOD_S = 20.0
HOURS = 8.0


@dataclass
class Spy:
    """Chamber I/O that records every write it passes on."""

    inner: SimulatedIO
    clock: Clock

    def __post_init__(self) -> None:
        self.writes: list[tuple[float, str, Outputs]] = []

    @property
    def chambers(self) -> tuple[str, ...]:
        return self.inner.chambers

    async def __aenter__(self) -> Spy:
        await self.inner.__aenter__()
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.inner.__aexit__(None, None, None)

    async def run(self, ready: object) -> None:
        await self.inner.run(ready)  # type: ignore[arg-type]

    async def read(self, chamber: str) -> ChamberReadings:
        return await self.inner.read(chamber)

    async def write(self, chamber: str, outputs: Outputs) -> bool:
        self.writes.append((self.clock.now_s(), chamber, outputs))
        return await self.inner.write(chamber, outputs)


@pytest.fixture(scope="module")
def finished(tmp_path_factory: pytest.TempPathFactory) -> tuple[SimulatedRun, Spy, object]:
    """One 8-hour run shared by the tests of this module (it is the slow part)."""
    from ._sim import protocol_text, rig_text

    folder = tmp_path_factory.mktemp("e2e")
    chambers = ("A1", "A2", "B")
    (folder / "rig.toml").write_text(rig_text(chambers, initial_c=18.0))
    (folder / "protocol.toml").write_text(
        protocol_text(chambers, hours=HOURS, temperature_c=20.0, ramp_to_c=23.0, par=300.0)
    )
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=PERIOD_S),
    )
    spy = Spy(run.io, run.clock)
    summary = drive(run, io=spy)
    return run, spy, summary


def test_the_run_completes_with_one_row_per_chamber_per_tick_on_the_tick_grid(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, _, summary = finished
    ticks = round(HOURS * 3600 / PERIOD_S)
    assert summary.end_reason is RunEndReason.COMPLETED  # type: ignore[attr-defined]
    assert summary.ticks.ticks == ticks and summary.ticks.missed == 0  # type: ignore[attr-defined]
    assert summary.ticks.late == 0  # type: ignore[attr-defined]
    with RunLogReader(run.writer.path) as reader:
        info = reader.info()
        samples = reader.samples()
        events = reader.events()
    assert info.end is not None and info.end.end_reason is RunEndReason.COMPLETED
    assert info.samples == 3 * ticks == summary.rows_written  # type: ignore[attr-defined]
    for chamber in ("A1", "A2", "B"):
        t = samples[samples.chamber == chamber].t_s.to_numpy()
        # no drift: tick k is logged at exactly k periods (virtual clock)
        assert np.array_equal(t, np.arange(ticks) * PERIOD_S)
    kinds = list(events.kind)
    assert kinds[0] == "run_start" and kinds[-1] == "run_stop"
    assert list(events[events.kind == "phase_change"].phase) == ["hold", "ramp"]


def test_temperature_tracks_the_setpoint_after_settling(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, _, _ = finished
    with RunLogReader(run.writer.path) as reader:
        samples = reader.samples()
    # the water starts at 18 °C and may rise at the 3 °C/h ramp limit: settled after 1.5 h
    settled = samples[samples.elapsed_s >= 1.5 * 3600]
    error = settled.temperature_c - settled.temperature_setpoint_c
    assert error.abs().max() <= 0.15  # band stated for this rig: probe noise 0.01 °C
    assert math.sqrt((error**2).mean()) <= 0.05
    first = samples[samples.elapsed_s < 600]
    assert first.temperature_c.min() < 18.5  # it did start cold, so settling was tested


def test_chambers_sharing_a_bath_share_one_heater_and_chiller(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, spy, _ = finished
    with RunLogReader(run.writer.path) as reader:
        samples = reader.samples()
    a1 = samples[samples.chamber == "A1"].reset_index(drop=True)
    a2 = samples[samples.chamber == "A2"].reset_index(drop=True)
    b = samples[samples.chamber == "B"].reset_index(drop=True)
    assert (a1.heater_pct == a2.heater_pct).all() and (a1.chiller_pct == a2.chiller_pct).all()
    assert not (a1.heater_pct == b.heater_pct).all()
    # the bath's drives go to A1's module; A2's module is told 0 % for them
    a2_writes = [o for _, c, o in spy.writes if c == "A2"]
    assert all(o.heater_pct == 0.0 and o.chiller_pct == 0.0 for o in a2_writes)
    assert any(o.heater_pct > 0.0 for _, c, o in spy.writes if c == "A1")


def test_lamps_and_pumps_follow_par_and_flow_through_the_calibration_and_sensor_trim(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, _, _ = finished
    with RunLogReader(run.writer.path) as reader:
        samples = reader.samples()
    # light comes on at 1 h; give the trim and lamp warm-up 10 min
    lit = samples[(samples.elapsed_s >= 1 * 3600 + 600) & (samples.elapsed_s < 4 * 3600)]
    assert (lit.par_setpoint == 300.0).all()
    assert ((lit.par - 300.0).abs() <= 0.05 * 300.0).all()
    dark = samples[samples.elapsed_s >= 4 * 3600]
    assert (dark.lamp_pct == 0.0).all()
    flowing = samples[samples.elapsed_s >= 600]
    assert ((flowing.flow_cm_s - flowing.flow_setpoint_cm_s).abs() <= 0.5).all()
    assert (flowing.incubation == "open").all()
    assert flowing.o2_umol_l.notna().mean() > 0.99


def test_outputs_start_safe_and_end_safe(finished: tuple[SimulatedRun, Spy, object]) -> None:
    run, spy, _ = finished
    for chamber in ("A1", "A2", "B"):
        safe = run.plan.chambers[chamber].interlocks.safe_outputs()
        mine = [(t, o) for t, c, o in spy.writes if c == chamber]
        assert mine[0] == (0.0, safe)  # before the first tick
        assert mine[-1][1] == safe  # the shutdown path
        actual = run.rack.outputs(chamber)
        assert (actual.heater_pct, actual.chiller_pct, actual.lamp_pct, actual.pump_pct) == (
            0.0,
            0.0,
            0.0,
            safe.pump_pct,
        )


def test_setpoint_table_matches_setpoints_at_on_the_tick_grid(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, _, _ = finished
    compiled = run.inputs.compiled
    table = SetpointTable(compiled, compiled.chambers, PERIOD_S, chunk_ticks=7)
    for k in (0, 1, 6, 7, 500, 719, 1000, 1439):
        phase, targets = table.at(k)
        expected = setpoints_at(compiled, k * PERIOD_S)
        for chamber, target in targets.items():
            want = expected[chamber]
            assert phase == want.phase
            assert target.temperature_c == pytest.approx(want.temperature_c, abs=1e-9)
            assert target.par == pytest.approx(want.par, abs=1e-9)
            assert target.flow_cm_s == pytest.approx(want.flow_cm_s, abs=1e-9)


def test_plan_groups_a_bath_into_one_loop_tuned_by_simc_on_its_model(
    finished: tuple[SimulatedRun, Spy, object],
) -> None:
    run, _, _ = finished
    rig = run.inputs.rig
    plan = plan_control(rig, ["A2", "B", "A1"], RunSettings(period_s=PERIOD_S))
    assert [(n.name, n.chambers, n.driver) for n in plan.nodes] == [
        ("tank", ("A1", "A2"), "A1"),
        ("B", ("B",), "B"),
    ]
    bath = plan.nodes[0]
    model = node_model(rig, ["A1", "A2"], PERIOD_S)
    gains = simc(model, model.theta_s)
    assert (bath.pid.kc, bath.pid.ti_s) == (gains.kc, gains.ti_s)
    # the bath: 40 L + 2 x 8 L of water, 800 W heater, UA 15 W/K (the test rig's numbers)
    assert model.gain == pytest.approx(800.0 / 100.0 / 15.0)
    assert model.tau_s == pytest.approx(56.0 * 4.0e3 / 15.0, rel=0.05)  # rho*cp about 4 kJ/(L K)
    assert model.theta_s == pytest.approx(15.0 + 5.0 + PERIOD_S / 2)


def test_a_protocol_the_rig_cannot_run_is_refused_with_its_line(files: Files) -> None:
    proto, rig, log = files(temperature_c=40.0)
    with pytest.raises(SquallError) as caught:
        SimulatedRun.prepare(proto, rig, log)
    message = caught.value.one_line()
    assert message.startswith(f"{proto}:")
    assert "cannot run this protocol" in message
    assert not log.exists()


def test_an_existing_log_is_never_overwritten(files: Files) -> None:
    proto, rig, log = files()
    log.write_bytes(b"precious")
    with pytest.raises(SquallError, match="refusing to overwrite"):
        SimulatedRun.prepare(proto, rig, log)
    assert log.read_bytes() == b"precious"


def test_the_run_starts_at_the_protocols_begins_unless_told_otherwise(files: Files) -> None:
    proto, rig, log = files(hours=0.1)
    run = SimulatedRun.prepare(proto, rig, log)
    assert run.clock.utc(0.0).isoformat() == "2027-07-01T06:00:00+00:00"
    summary = drive(run)
    assert summary.start_utc == run.clock.utc(0.0)
    assert summary.run_s == pytest.approx(0.1 * 3600)
    assert Path(summary.log_path) == log


def test_an_on_off_heater_is_time_proportioned_and_still_holds_temperature(
    files: Files,
) -> None:
    proto, rig, log = files(hours=2.0)
    settings = RunSettings(period_s=10.0, on_off_heaters=frozenset({"B"}), on_off_cycle_s=120.0)
    run = SimulatedRun.prepare(proto, rig, log, settings=settings)
    drive(run)
    with RunLogReader(log) as reader:
        samples = reader.samples("B")
    assert set(samples.heater_pct) == {0.0, 100.0}
    # the relay switches at most twice per 120 s cycle
    switches = int((samples.heater_pct.diff().fillna(0.0) != 0.0).sum())
    assert switches <= 2 * (2 * 3600 / 120) + 1
    settled = samples[samples.elapsed_s >= 1800]
    error = settled.temperature_c - settled.temperature_setpoint_c
    # 400 W into 8 L: a 120 s cycle at the ~16 % duty needed here ripples by about 0.35 °C
    assert error.abs().max() <= 0.5 and abs(error.mean()) <= 0.05


def test_outputs_stay_safe_until_the_first_healthy_tick(files: Files) -> None:
    proto, rig, log = files(hours=0.5)
    run = SimulatedRun.prepare(proto, rig, log, settings=RunSettings(period_s=10.0))
    run.rack.inject(
        Fault(kind=FaultKind.DROPOUT, chamber="B", sensor="temperature", at_s=0.0, duration_s=300.0)
    )
    drive(run)
    safe = run.plan.chambers["B"].interlocks.safe_outputs()
    with RunLogReader(log) as reader:
        samples = reader.samples("B")
    blind = samples[samples.t_s < 300.0]
    assert blind.temperature_c.isna().all()
    assert (blind.heater_pct == safe.heater_pct).all() and (blind.lamp_pct == 0.0).all()
    assert (blind.pump_pct == safe.pump_pct).all()
    seeing = samples[samples.t_s >= 310.0]
    assert (seeing.lamp_pct > 0.0).all()  # control took over at the first healthy tick


def test_the_default_log_is_named_after_the_protocol_and_the_launch_time() -> None:
    when = datetime(2027, 7, 1, 6, 5, 9, tzinfo=UTC)
    assert default_log_path(Path("protocols/storm.toml"), when) == Path(
        "runs/storm-20270701T060509Z.sqlite"
    )
