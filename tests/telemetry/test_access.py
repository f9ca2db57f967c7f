"""Connection life and access through a real broker: last will, logins, TLS, remote commands."""

from __future__ import annotations

import aiomqtt
import pytest

from controller.clock import RealClock
from controller.telemetry import (
    CommandName,
    CommandOutcome,
    CommandResult,
    CommandResultUpdate,
    ConnectionUpdate,
    ControllerState,
    ControllerStatus,
    RemoteCommand,
    StatusUpdate,
    TelemetryPublisher,
    TelemetryUpdate,
    TelemetryWatcher,
    TlsConfig,
    Topics,
)

from ._brokers import AmqttBroker, BrokerFactory, CutProxy, MosquittoBroker, TlsFiles
from ._helpers import (
    START,
    SignallingClock,
    connected,
    doc_acl,
    next_update,
    quick_config,
    running,
)

Broker = MosquittoBroker | AmqttBroker
USERS = {"rack-a": "pw-rack", "mira": "pw-mira", "ole": "pw-ole"}


def status_of(cid: str, *, online: bool) -> object:
    """Matcher of a status update of controller ``cid`` with the given ``online``."""

    def match(update: TelemetryUpdate) -> ControllerStatus | None:
        if (
            isinstance(update, StatusUpdate)
            and update.controller == cid
            and update.status.online is online
        ):
            return update.status
        return None

    return match


def result_for(request_id: str) -> object:
    """Matcher of the command result answering ``request_id``."""

    def match(update: TelemetryUpdate) -> CommandResult | None:
        if isinstance(update, CommandResultUpdate) and update.result.id == request_id:
            return update.result
        return None

    return match


async def test_last_will_marks_the_controller_offline_when_its_connection_dies(
    broker: Broker,
) -> None:
    proxy = CutProxy(broker.host, broker.port)
    await proxy.start()
    config = quick_config(f"mqtt://127.0.0.1:{proxy.port}", keepalive_s=5)
    publisher = TelemetryPublisher(config, clock=RealClock(START))
    async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with running(publisher.run()):
            up = await next_update(watcher, status_of("rack-a", online=True))
            assert up.state is ControllerState.IDLE
            await proxy.close()  # the controller's link dies without a goodbye
            will = await next_update(watcher, status_of("rack-a", online=False))
    assert will.state is ControllerState.OFFLINE
    assert will.run_id is None  # the will was fixed when connecting: no run facts in it
    assert watcher.statuses["rack-a"].online is False


async def test_a_wrong_password_is_refused_and_the_right_one_gets_in(
    broker_factory: BrokerFactory,
) -> None:
    broker = broker_factory(users=USERS)
    clock = SignallingClock()
    wrong = TelemetryPublisher(
        quick_config(broker.url(), username="rack-a", password="guess"), clock=clock
    )
    async with running(wrong.run()):
        await clock.next_sleep()  # backing off after the first refused attempt
        assert not wrong.connected
        assert "authori" in wrong.stats().last_error.lower()
    async with TelemetryWatcher(broker.url("mira", "guess"), reconnect_min_s=0.05) as stranger:
        refused = await next_update(
            stranger, lambda u: u if isinstance(u, ConnectionUpdate) else None
        )
        assert not refused.connected and "authori" in refused.detail.lower()
    async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as anonymous:
        refused = await next_update(
            anonymous, lambda u: u if isinstance(u, ConnectionUpdate) else None
        )
        assert not refused.connected
    right = TelemetryPublisher(
        quick_config(broker.url(), username="rack-a", password="pw-rack"),
        clock=RealClock(START),
    )
    async with TelemetryWatcher(broker.url("mira", "pw-mira"), reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with running(right.run()):
            status = await next_update(watcher, status_of("rack-a", online=True))
    assert status.controller == "rack-a"


async def test_telemetry_over_tls_verifies_the_broker_certificate(
    broker_factory: BrokerFactory, tls_files: TlsFiles
) -> None:
    broker = broker_factory(tls=tls_files)
    tls = TlsConfig(ca_file=tls_files.ca_file)
    publisher = TelemetryPublisher(
        quick_config(broker.url(), tls={"ca_file": str(tls_files.ca_file)}),
        clock=RealClock(START),
    )
    async with TelemetryWatcher(broker.url(), tls=tls, reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with running(publisher.run()):
            status = await next_update(watcher, status_of("rack-a", online=True))
    assert status.state is ControllerState.IDLE
    # without the lab's authority the broker's certificate is not trusted
    async with TelemetryWatcher(broker.url(), reconnect_min_s=0.05) as untrusting:
        refused = await next_update(
            untrusting, lambda u: u if isinstance(u, ConnectionUpdate) else None
        )
    assert not refused.connected and "certificate" in refused.detail.lower()


async def test_remote_commands_are_refused_when_disabled(broker_factory: BrokerFactory) -> None:
    broker = broker_factory(users=USERS)
    executed: list[RemoteCommand] = []
    logged: list[CommandOutcome] = []
    publisher = TelemetryPublisher(
        quick_config(broker.url("rack-a", "pw-rack")),
        clock=RealClock(START),
        execute=lambda c: executed.append(c),  # type: ignore[func-returns-value]
        log_command=logged.append,
    )
    async with TelemetryWatcher(broker.url("mira", "pw-mira"), reconnect_min_s=0.05) as watcher:
        await connected(watcher)
        async with running(publisher.run()):
            status = await next_update(watcher, status_of("rack-a", online=True))
            assert status.remote_commands is False
            request = await watcher.send_command("rack-a", CommandName.HOLD)
            result = await next_update(watcher, result_for(request))
    assert not result.accepted and "disabled" in result.reason
    assert result.user == "mira" and result.command == "hold"
    assert executed == []
    assert [(o.accepted, o.request_id) for o in logged] == [(False, request)]


async def test_enabled_commands_run_for_allowed_users_only_and_are_all_logged(
    broker_factory: BrokerFactory,
) -> None:
    broker = broker_factory(users=USERS)
    executed: list[RemoteCommand] = []
    logged: list[CommandOutcome] = []

    def execute(command: RemoteCommand) -> str | None:
        executed.append(command)
        return None

    config = quick_config(
        broker.url("rack-a", "pw-rack"),
        commands={"enabled": True, "allowed_users": ["mira"]},
    )
    publisher = TelemetryPublisher(
        config, clock=RealClock(START), execute=execute, log_command=logged.append
    )
    topic = Topics().command("rack-a")
    async with (
        TelemetryWatcher(broker.url("mira", "pw-mira"), reconnect_min_s=0.05) as mira,
        TelemetryWatcher(broker.url("ole", "pw-ole"), reconnect_min_s=0.05) as ole,
    ):
        await connected(mira)
        await connected(ole)
        async with running(publisher.run()):
            status = await next_update(mira, status_of("rack-a", online=True))
            assert status.remote_commands is True
            hold = await mira.send_command("rack-a", "hold", text="checking the lamp")
            held = await next_update(mira, result_for(hold))
            note = await ole.send_command("rack-a", CommandName.NOTE, text="hello")
            refused = await next_update(mira, result_for(note))
            # raw payloads: not JSON, and a command squall does not know
            async with aiomqtt.Client(
                broker.host, broker.port, username="mira", password="pw-mira"
            ) as raw:
                await raw.publish(topic, b"{not json", qos=1)
                await raw.publish(
                    topic, b'{"v":1,"id":"r9","user":"mira","command":"reboot"}', qos=1
                )
            malformed = await next_update(
                mira,
                lambda u: (
                    u.result if isinstance(u, CommandResultUpdate) and u.result.id is None else None
                ),
            )
            unknown = await next_update(mira, result_for("r9"))
    assert held.accepted and held.reason == ""
    assert [(c.command, c.user, c.text) for c in executed] == [
        (CommandName.HOLD, "mira", "checking the lamp")
    ]
    assert not refused.accepted and "'ole' may not command" in refused.reason
    assert not malformed.accepted and malformed.reason.startswith("malformed command")
    assert not unknown.accepted and "reboot" in unknown.reason
    assert [(o.accepted, o.name) for o in logged] == [
        (True, "hold"),
        (False, "note"),
        (False, None),
        (False, "reboot"),
    ]


async def test_the_recommended_acl_keeps_other_users_off_the_command_topic(
    broker_factory: BrokerFactory,
) -> None:
    acl = doc_acl()  # the ACL hardware-notes/mqtt-topics.md recommends
    try:
        broker = broker_factory(users=USERS, acl=acl)
    except RuntimeError as exc:
        pytest.skip(f"needs Mosquitto: {exc}")
    logged: list[CommandOutcome] = []
    config = quick_config(
        broker.url("rack-a", "pw-rack"),
        commands={"enabled": True, "allowed_users": ["mira", "ole"]},
    )
    publisher = TelemetryPublisher(
        config, clock=RealClock(START), execute=lambda c: None, log_command=logged.append
    )
    async with (
        TelemetryWatcher(broker.url("mira", "pw-mira"), reconnect_min_s=0.05) as mira,
        TelemetryWatcher(broker.url("ole", "pw-ole"), reconnect_min_s=0.05) as ole,
    ):
        await connected(mira)
        await connected(ole)
        async with running(publisher.run()):
            await next_update(mira, status_of("rack-a", online=True))
            # ole is allow-listed by the controller but the broker's ACL does not let him
            # write commands: his QoS 1 command is acknowledged by the broker and dropped, and it
            # is handled before mira's, which the broker receives after that acknowledgement
            await ole.send_command("rack-a", "abort")
            request = await mira.send_command("rack-a", "resume")
            result = await next_update(mira, result_for(request))
    assert result.accepted
    assert [(o.user, o.name) for o in logged] == [("mira", "resume")]
