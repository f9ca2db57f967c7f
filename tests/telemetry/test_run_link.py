"""``squall run`` with a ``[telemetry]`` table: the run publishes itself, takes remote
commands through its operator hooks (each one in the audit trail), and a simulated run as
fast as possible says why it does not publish."""

from __future__ import annotations

import asyncio
import json
import threading
from pathlib import Path

import aiomqtt
import pytest

from controller.cli import main
from controller.storage import EventKind, RunEndReason, RunLogReader
from controller.telemetry import (
    CommandResult,
    CommandResultUpdate,
    ControllerState,
    EventUpdate,
    SampleUpdate,
    StatusUpdate,
    TasksUpdate,
    TelemetryWatcher,
)

from ._brokers import AmqttBroker, MosquittoBroker
from ._helpers import connected, next_update
from ._runs import SimController, protocol_text, rig_text, telemetry_table

Broker = MosquittoBroker | AmqttBroker


def _status(state: ControllerState, *, online: bool = True):  # type: ignore[no-untyped-def]
    def match(update: object) -> object | None:
        if isinstance(update, StatusUpdate) and update.status.online is online:
            if update.status.state is state:
                return update.status
        return None

    return match


async def test_squall_run_publishes_every_row_and_event_and_ends_finished(
    tmp_path: Path, broker: Broker, capsys: pytest.CaptureFixture[str]
) -> None:
    chambers = ("A1", "B2")
    (tmp_path / "rig.toml").write_text(rig_text(chambers, telemetry_table(broker.url(), "rack-c")))
    (tmp_path / "protocol.toml").write_text(protocol_text(chambers, "20min"))
    log = tmp_path / "run.sqlite"
    argv = ["run", str(tmp_path / "protocol.toml"), "--rig", str(tmp_path / "rig.toml")]
    argv += ["--sim", "--speed", "300", "--log", str(log)]
    codes: list[int] = []
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)
    samples, kinds, task_lists = [], [], []
    async with watcher:
        await connected(watcher)
        thread = threading.Thread(target=lambda: codes.append(main(argv)))
        thread.start()
        try:
            while True:
                update = await next_update(watcher, lambda u: u)
                if isinstance(update, SampleUpdate):
                    samples.append(update.sample)
                elif isinstance(update, EventUpdate):
                    kinds.append(update.event.kind)
                elif isinstance(update, TasksUpdate):
                    task_lists.append(update.tasks)
                elif isinstance(update, StatusUpdate) and not update.status.online:
                    farewell = update.status
                    break
        finally:
            await asyncio.to_thread(thread.join, 30.0)
    assert codes == [0]
    assert "telemetry: publishing as rack-c to mqtt://127.0.0.1" in capsys.readouterr().out
    assert farewell.state is ControllerState.FINISHED and farewell.run_id is not None
    assert farewell.chambers == chambers and farewell.duration_s == 1200.0
    assert kinds[0] is EventKind.RUN_START and kinds[-1] is EventKind.RUN_STOP
    # the operator tasks were retained while the run went on, and emptied at its end
    first, last = task_lists[0], task_lists[-1]
    assert [t.kind for t in first.tasks] == ["run-start", "run-end"]
    assert first.tasks[0].start == "2027-07-01T06:00:00Z" and first.tasks[0].chambers == chambers
    assert first.run_id == farewell.run_id and last.tasks == ()
    with RunLogReader(log) as reader:
        logged = reader.tail(0)
        assert farewell.run_id == reader.meta().run_id
    # on loopback nothing is lost: every logged row arrived (a loaded machine may skip a
    # tick now and then at 300x; the log says which ran)
    assert len(samples) == len(logged) and 200 <= len(logged) <= 2 * 120
    last = logged.iloc[-1]
    got = next(s for s in reversed(samples) if s.chamber == last["chamber"])
    assert got.t_s == pytest.approx(float(last["t_s"]))
    assert got.temperature_c == pytest.approx(float(last["temperature_c"]))


async def test_remote_commands_reach_the_hooks_and_every_one_is_audited(
    tmp_path: Path, broker: Broker
) -> None:
    commands = '[telemetry.commands]\nenabled = true\nallowed_users = ["mira"]\n'
    table = telemetry_table(broker.url(), "rack-d", extra='username = "rack-d"\n' + commands)
    controller = SimController(tmp_path, "rack-d", table, speed=20.0, chambers=("A1",))
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)

    async def answer(request_id: str) -> CommandResult:
        return await next_update(
            watcher,
            lambda u: (
                u.result
                if isinstance(u, CommandResultUpdate) and u.result.id == request_id
                else None
            ),
        )

    async with watcher:
        await connected(watcher)
        controller.start()
        try:
            await next_update(watcher, _status(ControllerState.RUNNING), timeout_s=30.0)
            held = await answer(await watcher.send_command("rack-d", "hold", user="mira"))
            assert held.accepted and held.reason == ""
            await next_update(watcher, _status(ControllerState.HELD))
            again = await answer(await watcher.send_command("rack-d", "hold", user="mira"))
            assert not again.accepted and again.reason == "the run is held already"
            stranger = await answer(await watcher.send_command("rack-d", "resume", user="eve"))
            assert not stranger.accepted and "may not command" in stranger.reason
            resumed = await answer(await watcher.send_command("rack-d", "resume", user="mira"))
            assert resumed.accepted
            note = "sampled A1 for nutrients"
            noted = await answer(
                await watcher.send_command("rack-d", "note", user="mira", text=note)
            )
            assert noted.accepted
            aborted = await answer(await watcher.send_command("rack-d", "abort", user="mira"))
            assert aborted.accepted
            await next_update(watcher, _status(ControllerState.ABORTED, online=False))
        finally:
            controller.abort()
            summary = await asyncio.to_thread(controller.join)
    assert summary is not None and summary.end_reason is RunEndReason.ABORTED
    with RunLogReader(controller.log_path) as reader:
        audit = reader.audit()
        events = reader.events()
    remote = audit[audit.user.astype(str).str.startswith("mqtt:")]
    rows = [(str(r.user), str(r.command), str(r.text), str(r.result)) for r in remote.itertuples()]
    assert rows == [
        ("mqtt:mira", "hold", "", "ok"),
        ("mqtt:mira", "hold", "", "refused: the run is held already"),
        ("mqtt:eve", "resume", "", "refused: user 'eve' may not command this controller"),
        ("mqtt:mira", "resume", "", "ok"),
        ("mqtt:mira", "note", note, "ok"),
        ("mqtt:mira", "abort", "", "ok"),
    ]
    operator = [str(k) for k in events.kind if str(k) in ("hold", "hold_end", "abort")]
    assert operator == ["hold", "hold_end", "abort"]


async def test_a_malformed_command_is_refused_and_audited(tmp_path: Path, broker: Broker) -> None:
    table = telemetry_table(broker.url(), "rack-e")  # remote commands off (the default)
    controller = SimController(tmp_path, "rack-e", table, speed=20.0, chambers=("A1",))
    watcher = TelemetryWatcher(broker.url(), reconnect_min_s=0.05)
    async with watcher:
        await connected(watcher)
        controller.start()
        try:
            await next_update(watcher, _status(ControllerState.RUNNING), timeout_s=30.0)
            off = await watcher.send_command("rack-e", "hold", user="mira")
            result = await next_update(
                watcher, lambda u: u.result if isinstance(u, CommandResultUpdate) else None
            )
            assert result.id == off and not result.accepted
            assert result.reason == "remote commands are disabled on this controller"
            junk = json.dumps({"v": 1, "id": "x1", "user": "mira", "command": "launch"})
            address = watcher.address
            async with aiomqtt.Client(address.host, address.port) as client:
                await client.publish("squall/rack-e/cmd", junk, qos=1)
            bad = await next_update(
                watcher, lambda u: u.result if isinstance(u, CommandResultUpdate) else None
            )
            assert bad.id == "x1" and bad.reason.startswith("unknown command 'launch'")
        finally:
            controller.abort()
            await asyncio.to_thread(controller.join)
    with RunLogReader(controller.log_path) as reader:
        audit = reader.audit()
    remote = audit[audit.user.astype(str).str.startswith("mqtt:")]
    assert [(str(r.command), str(r.result).split(":")[0]) for r in remote.itertuples()] == [
        ("hold", "refused"),
        ("launch", "refused"),
    ]
    assert controller.summary is not None and controller.summary.end_reason is RunEndReason.ABORTED


def test_a_simulated_run_at_full_speed_says_it_does_not_publish(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    table = telemetry_table("mqtt://127.0.0.1:1", "rack-f")  # nothing listens there
    (tmp_path / "rig.toml").write_text(rig_text(("A1",), table))
    (tmp_path / "protocol.toml").write_text(protocol_text(("A1",), "10min"))
    argv = ["run", str(tmp_path / "protocol.toml"), "--rig", str(tmp_path / "rig.toml")]
    assert main([*argv, "--sim", "--log", str(tmp_path / "run.sqlite")]) == 0
    out = capsys.readouterr().out
    assert "note: telemetry is not published by a simulated run at --speed max" in out
    assert "publishing as" not in out


def test_a_resumed_run_reads_its_password_file_beside_the_rig_as_launched(
    tmp_path: Path, broker: Broker, monkeypatch: pytest.MonkeyPatch
) -> None:
    from controller.runtime import SimulatedRun

    rigs = tmp_path / "rigs"
    rigs.mkdir()
    (rigs / "pw.txt").write_text("secret\n")
    table = telemetry_table(broker.url(), "rack-g", extra='username = "rack-g"\n')
    (rigs / "rig.toml").write_text(rig_text(("A1",), table + 'password_file = "pw.txt"\n'))
    (tmp_path / "protocol.toml").write_text(protocol_text(("A1",), "10min"))
    log = tmp_path / "run.sqlite"
    run = SimulatedRun.prepare(tmp_path / "protocol.toml", rigs / "rig.toml", log)
    run.writer.close()  # interrupted before its first tick
    monkeypatch.chdir(tmp_path)  # neither the rig's folder nor the log's matters here
    assert main(["run", "--resume", str(log), "--sim", "--speed", "300"]) == 0
    with RunLogReader(log) as reader:
        assert reader.info().end is not None
