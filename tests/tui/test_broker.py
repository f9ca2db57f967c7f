"""The broker source: telemetry updates of several controllers become one board. Updates are
fed directly (what the bridge task does with the watcher's updates), so no broker is needed;
the watcher is built but never connected."""

from __future__ import annotations

from controller.storage import AlarmAction, AlarmLevel, AlarmRecord, IncubationState, SampleRow
from controller.telemetry import (
    AlarmUpdate,
    ConnectionUpdate,
    ControllerState,
    ControllerStatus,
    SampleUpdate,
    StatusUpdate,
)
from controller.tui import ChamberBoard, DetailScreen, RunStatus, SquallApp
from controller.tui._broker import BrokerSource

UTC0 = 1_814_400_000.0


class Clock:
    """A hand-moved clock (s)."""

    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


class FedSource(BrokerSource):
    """A broker source fed by the test instead of a bridge task."""

    bridge = None  # type: ignore[assignment]


def status(controller: str, chambers: tuple[str, ...], **kw: object) -> StatusUpdate:
    fields: dict[str, object] = {"state": ControllerState.RUNNING, "chambers": chambers}
    fields.update(kw)
    return StatusUpdate(
        controller=controller,
        status=ControllerStatus(controller=controller, **fields),  # type: ignore[arg-type]
    )


def sample(controller: str, chamber: str, k: int, temp: float = 20.0) -> SampleUpdate:
    return SampleUpdate(
        controller=controller,
        sample=SampleRow(
            t_s=60.0 * k,
            utc_s=UTC0 + 60.0 * k,
            elapsed_s=60.0 * k,
            chamber=chamber,
            phase="warm",
            temperature_c=temp,
            temperature_setpoint_c=20.0,
            par=300.0,
            par_setpoint=300.0,
            flow_cm_s=4.0,
            flow_setpoint_cm_s=4.0,
            o2_umol_l=250.0 + k,
            o2_sat_pct=99.0,
            heater_pct=10.0,
            chiller_pct=0.0,
            lamp_pct=40.0,
            pump_pct=0.0 if k % 2 else 30.0,
            incubation=IncubationState.CLOSED if k % 2 else IncubationState.OPEN,
        ),
    )


def two_controllers(clock: Clock) -> BrokerSource:
    source = FedSource("mqtt://127.0.0.1:1883", real_clock=clock)
    source.feed(ConnectionUpdate(connected=True, detail="127.0.0.1:1883"))
    source.feed(status("lab-a", ("C1", "C2")))
    source.feed(status("lab-b", ("C1",)))
    for k in range(5):
        for controller, chamber in (("lab-a", "C1"), ("lab-a", "C2"), ("lab-b", "C1")):
            source.feed(sample(controller, chamber, k))
    return source


def test_two_controllers_become_one_board_with_prefixed_chambers() -> None:
    clock = Clock()
    source = two_controllers(clock)
    snap = source.open()
    assert [c.chamber for c in snap.chambers] == ["lab-a/C1", "lab-a/C2", "lab-b/C1"]
    assert snap.run.status is RunStatus.RUNNING
    assert "2 controllers, 2 online" in snap.run.title
    c1 = snap.chamber("lab-b/C1")
    assert c1 is not None and c1.o2_umol_l == 254.0 and c1.incubation is IncubationState.OPEN
    assert source.poll() is None
    source.feed(
        AlarmUpdate(
            controller="lab-b",
            alarm=AlarmRecord(
                t_s=300.0,
                utc_s=UTC0 + 300.0,
                action=AlarmAction.RAISE,
                level=AlarmLevel.TRIP,
                code="over-temperature",
                reason="26.1 °C",
                chamber="C1",
            ),
        )
    )
    tripped = source.poll()
    assert tripped is not None
    state = tripped.chamber("lab-b/C1")
    assert state is not None and state.alarm_level is AlarmLevel.TRIP
    other = tripped.chamber("lab-a/C1")
    assert other is not None and other.alarm_level is None  # same chamber id, other controller
    trace = source.history("lab-a/C2", 3600.0)
    assert len(trace) == 5 and list(trace.closed) == [False, True, False, True, False]


def test_a_last_will_or_a_lost_broker_makes_the_view_silent() -> None:
    clock = Clock()
    source = two_controllers(clock)
    source.open()
    source.feed(status("lab-b", ("C1",), online=False, state=ControllerState.OFFLINE))
    offline = source.poll()
    assert offline is not None and offline.run.status is RunStatus.SILENT
    assert "1 online" in offline.run.title
    source.feed(status("lab-b", ("C1",)))
    back = source.poll()
    assert back is not None and back.run.status is RunStatus.RUNNING
    source.feed(ConnectionUpdate(connected=False, detail="connection refused"))
    lost = source.poll()
    assert lost is not None and lost.run.status is RunStatus.SILENT
    assert "not connected (connection refused)" in lost.run.title
    source.feed(ConnectionUpdate(connected=True, detail="127.0.0.1:1883"))
    clock.t += 120.0  # connected, but no sample for two minutes
    quiet = source.poll()
    assert quiet is not None and quiet.run.status is RunStatus.SILENT


async def test_the_board_and_detail_show_chambers_of_both_controllers() -> None:
    clock = Clock()
    source = two_controllers(clock)
    app = SquallApp(source, poll_s=3600.0, refine_timeline=False)
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.pause()
        board = app.screen.query_one(ChamberBoard)
        assert [s.chamber for s in board.states] == ["lab-a/C1", "lab-a/C2", "lab-b/C1"]
        await pilot.press("end", "enter")
        await app.workers.wait_for_complete()
        await pilot.pause()
        screen = app.screen
        assert isinstance(screen, DetailScreen) and screen.chamber == "lab-b/C1"
        assert screen.loaded and len(screen.trace) == 5
        source.feed(sample("lab-b", "C1", 5, temp=21.0))
        app.poll_now()
        await pilot.pause()
        assert len(screen.trace) == 6  # live samples extend the charts
