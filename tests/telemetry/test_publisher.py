"""The publisher without a broker: status from what is offered, commands checked and logged,
and a publisher that cannot reach its broker stays harmless."""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import pytest

from controller.clock import RealClock
from controller.errors import SquallError
from controller.storage import EventKind
from controller.telemetry import (
    CommandName,
    CommandOutcome,
    ControllerState,
    RemoteCommand,
    TelemetryPublisher,
)

from ._brokers import free_port
from ._helpers import START, SignallingClock, event, quick_config, running, sample


def publisher(**changes: object) -> TelemetryPublisher:
    return TelemetryPublisher(quick_config("mqtt://127.0.0.1:1", **changes), clock=RealClock(START))


@dataclass(frozen=True)
class Tick:
    """A tick report shaped like the runtime's ``TickStatus``."""

    elapsed_s: float
    duration_s: float
    phase: str
    utc: datetime


def test_the_status_follows_the_run_events_and_rows_offered() -> None:
    pub = publisher()
    assert pub.status().state is ControllerState.IDLE
    pub.describe_run(run_id="r7", protocol="Cold spell", chambers=["B"], duration_s=7200.0,
                     period_s=10.0)  # fmt: skip
    pub.offer(event(EventKind.RUN_START, 0.0))
    pub.offer([sample("B", 1, phase="baseline"), sample("A1", 1, phase="baseline")])
    status = pub.status()
    assert (status.state, status.phase, status.elapsed_s) == (
        ControllerState.RUNNING,
        "baseline",
        1.0,
    )
    assert status.chambers == ("B", "A1") and status.run_id == "r7"
    pub.offer(event(EventKind.PHASE_CHANGE, 60.0, phase="cold spell"))
    pub.offer(event(EventKind.HOLD, 61.0))
    assert (pub.status().state, pub.status().phase) == (ControllerState.HELD, "cold spell")
    pub.offer(event(EventKind.HOLD_END, 61.0))
    assert pub.status().state is ControllerState.RUNNING
    pub.on_tick(Tick(elapsed_s=70.0, duration_s=7200.0, phase="recovery", utc=START))
    assert (pub.status().elapsed_s, pub.status().phase) == (70.0, "recovery")
    # a stop before the run ended says offline; after an abort it says how the run ended
    assert pub.status(online=False).state is ControllerState.OFFLINE
    pub.offer(event(EventKind.ABORT, 80.0))
    farewell = pub.status(online=False)
    assert (farewell.online, farewell.state) == (False, ControllerState.ABORTED)


def test_samples_alone_mark_a_resumed_run_running_and_offline_is_not_settable() -> None:
    pub = publisher()
    pub.offer(sample("A1", 5))
    assert pub.status().state is ControllerState.RUNNING
    pub.set_state(ControllerState.HELD)
    assert pub.status().state is ControllerState.HELD
    with pytest.raises(ValueError, match="offline"):
        pub.set_state(ControllerState.OFFLINE)


def command(**changes: object) -> bytes:
    return json.dumps({"v": 1, "id": "r1", "user": "mira", "command": "hold", **changes}).encode()


def test_commands_are_carried_out_only_when_enabled_and_allowed_and_always_logged() -> None:
    done: list[RemoteCommand] = []
    logged: list[CommandOutcome] = []

    def execute(cmd: RemoteCommand) -> str | None:
        done.append(cmd)
        return "not held" if cmd.command is CommandName.RESUME else None

    disabled = TelemetryPublisher(
        quick_config("mqtt://u@127.0.0.1:1"),
        clock=RealClock(START),
        execute=execute,
        log_command=logged.append,
    )
    assert disabled.handle_command(command()).reason == (
        "remote commands are disabled on this controller"
    )
    enabled = TelemetryPublisher(
        quick_config("mqtt://u@127.0.0.1:1", commands={"enabled": True, "allowed_users": ["mira"]}),
        clock=RealClock(START),
        execute=execute,
        log_command=logged.append,
    )
    held = enabled.handle_command(command())
    refused = enabled.handle_command(command(command="resume", id="r2"))
    stranger = enabled.handle_command(command(user="ole", id="r3"))
    garbage = enabled.handle_command(b"\x00\x01")
    assert held.accepted and held.command is not None and held.command.command is CommandName.HOLD
    assert (refused.accepted, refused.reason) == (False, "not held")
    assert not stranger.accepted and "'ole' may not command" in stranger.reason
    assert not garbage.accepted and garbage.request_id is None
    assert [c.id for c in done] == ["r1", "r2"]  # the stranger's never reached the handler
    assert [(o.accepted, o.request_id) for o in logged] == [
        (False, "r1"),
        (True, "r1"),
        (False, "r2"),
        (False, "r3"),
        (False, None),
    ]
    stats = enabled.stats()
    assert (stats.commands_accepted, stats.commands_refused) == (1, 3)


def test_a_failing_handler_or_log_refuses_the_command_without_raising() -> None:
    def explode(_cmd: RemoteCommand) -> str | None:
        raise RuntimeError("lamp driver gone")

    def bad_log(_outcome: CommandOutcome) -> None:
        raise OSError("audit disk full")

    pub = TelemetryPublisher(
        quick_config("mqtt://u@127.0.0.1:1", commands={"enabled": True, "allowed_users": ["mira"]}),
        clock=RealClock(START),
        execute=explode,
        log_command=bad_log,
    )
    outcome = pub.handle_command(command())
    assert not outcome.accepted
    assert outcome.reason == "failed: RuntimeError: lamp driver gone"
    no_handler = publisher(commands={"enabled": True, "allowed_users": ["mira"]}, username="u")
    assert "no handler" in no_handler.handle_command(command()).reason


def test_an_unreadable_password_file_stops_the_start_not_the_run(tmp_path: Path) -> None:
    config = quick_config("mqtt://127.0.0.1:1", username="u", password_file="missing.pw")
    with pytest.raises(SquallError, match="cannot read the password file"):
        TelemetryPublisher(config, clock=RealClock(START), base_dir=tmp_path)


async def test_without_a_broker_offers_still_return_and_a_stop_is_prompt() -> None:
    clock = SignallingClock()
    pub = TelemetryPublisher(quick_config(f"mqtt://127.0.0.1:{free_port()}"), clock=clock)
    async with running(pub.run()) as task:
        first = await clock.next_sleep()
        second = await clock.next_sleep()
        # doubling back-off with ±20 % jitter, from reconnect_min_s = 0.05 s
        assert 0.04 <= first <= 0.06 and 0.08 <= second <= 0.12
        for k in range(5000):
            pub.offer([sample("A1", k)])
        assert pub.stats().samples_queued == 2000  # the configured bound
        assert "refused" in pub.stats().last_error.lower()
    assert task.cancelled()


def test_bad_run_facts_are_refused_when_given_not_later_while_publishing() -> None:
    pub = publisher()
    with pytest.raises(ValueError, match="duration_s"):
        pub.describe_run(run_id="r", protocol="p", chambers=["B"], duration_s=-1.0, period_s=1.0)
    with pytest.raises(ValueError, match="chambers"):
        pub.describe_run(run_id="r", protocol="p", chambers=["A/1"], duration_s=1.0, period_s=1.0)
    assert pub.status().run_id is None
