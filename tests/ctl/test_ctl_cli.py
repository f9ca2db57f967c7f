"""``squall ctl``: finding the run's socket, printing replies, exit codes, abort confirmation,
and the asynchronous client as the terminal UI's command channel."""

from __future__ import annotations

import asyncio
import json
import socket
import threading
from pathlib import Path

import pytest

from controller.cli import main
from controller.cli.cmd_ctl import ControlClient
from controller.runtime._ctl_server import ControlServer
from controller.runtime._ctl_wire import control_path
from controller.tui import CommandChannel, CommandResult

from ._serve import ME, FakeLoop, served


@pytest.fixture
def run(tmp_path: Path):  # type: ignore[no-untyped-def]
    """A stand-in controller serving the control socket of ``tmp_path/run.sqlite``."""
    target = FakeLoop()
    log = tmp_path / "run.sqlite"
    with served(ControlServer(target, control_path(log))):
        yield target, log


def ctl(*args: str) -> int:
    return main(["ctl", *args])


def test_status_prints_the_run_and_its_chambers_as_tables(run, capsys) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    assert ctl("--log", str(log), "status") == 0
    out = capsys.readouterr().out
    assert "heatwave-ramp" in out
    assert "elapsed_s  1h" in out  # durations in words
    lines = {line.split()[1]: line for line in out.splitlines() if line.startswith("│ C")}
    assert "21.6" in lines["C1"] and "stale" in lines["C5"]
    assert target.calls == [("status",)]


def test_json_prints_the_raw_result_and_options_may_follow_the_command(run, capsys) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    assert ctl("status", "--json", "--socket", str(control_path(log))) == 0
    printed = json.loads(capsys.readouterr().out)
    assert printed == target.status()


def test_commands_print_the_controllers_answer_and_refusals_exit_2(run, capsys) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    assert ctl("--log", str(log), "hold") == 0
    assert capsys.readouterr().out == "protocol clock held at 1 h 00 min\n"
    assert ctl("--log", str(log), "hold") == 2
    err = capsys.readouterr().err
    assert err == "squall: error: the controller refused: refused: already held\n"
    assert ctl("--log", str(log), "skip-to", "recovery") == 0
    assert ctl("--log", str(log), "ack", "stale", "--chamber", "C5") == 0
    assert ctl("--log", str(log), "note", "sampled", "A1–A4", "for", "nutrients") == 0
    assert target.calls == [
        ("hold", ME),
        ("hold", ME),
        ("skip_to", "recovery", ME),
        ("ack", "stale", "C5", ME),
        ("note", "sampled A1–A4 for nutrients", ME),
    ]


def test_abort_needs_yes_without_a_terminal(run, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    monkeypatch.setattr("sys.stdin.isatty", lambda: False)
    assert ctl("--log", str(log), "abort") == 2
    assert "abort needs confirmation: add --yes" in capsys.readouterr().err
    assert not target.aborted
    assert ctl("--log", str(log), "abort", "--yes") == 0
    assert target.aborted and target.calls == [("abort", ME)]


@pytest.mark.parametrize(("answer", "aborted"), [("n", False), ("", False), ("y", True)])
def test_abort_asks_on_a_terminal(run, capsys, monkeypatch, answer: str, aborted: bool) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    monkeypatch.setattr("sys.stdin.isatty", lambda: True)
    asked: list[str] = []
    monkeypatch.setattr("builtins.input", lambda prompt: asked.append(prompt) or answer)
    assert ctl("--log", str(log), "abort") == 0
    assert asked == [
        "Abort the run run.sqlite? Every output is driven safe and the run ends. [y/N] "
    ]
    assert target.aborted is aborted


def test_no_controller_is_one_line_and_exit_2(tmp_path: Path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    assert ctl("status") == 2
    assert capsys.readouterr().err == (
        "squall: error: no controller running: no live control socket under runs/; "
        "name the run with --log LOG or --socket PATH\n"
    )
    assert ctl("--log", "runs/gone.sqlite", "hold") == 2
    assert capsys.readouterr().err == (
        "squall: error: runs/gone.sqlite.ctl/socket: no controller running: "
        "no control socket here\n"
    )


def test_the_one_live_run_under_runs_is_found(tmp_path: Path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    monkeypatch.chdir(tmp_path)
    (tmp_path / "runs").mkdir()
    stale = control_path(tmp_path / "runs" / "old.sqlite")
    stale.parent.mkdir(mode=0o700)
    leftover = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    leftover.bind(str(stale))  # a crashed run's socket: nothing answers
    leftover.close()
    first, second = FakeLoop(), FakeLoop()
    with served(ControlServer(first, control_path(tmp_path / "runs" / "a.sqlite"))):
        assert ctl("hold") == 0
        with served(ControlServer(second, control_path(tmp_path / "runs" / "b.sqlite"))):
            assert ctl("hold") == 2
            assert "several runs are going (a.sqlite, b.sqlite)" in capsys.readouterr().err
    assert first.calls == [("hold", ME)] and second.calls == []


def test_a_controller_that_hangs_up_without_answering_is_a_runtime_failure(
    tmp_path: Path,
    capsys,  # type: ignore[no-untyped-def]
) -> None:
    path = tmp_path / "mute.sock"
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    listener.bind(str(path))
    listener.listen()

    def hang_up() -> None:
        conn, _ = listener.accept()
        conn.close()

    thread = threading.Thread(target=hang_up)
    thread.start()
    try:
        assert ctl("--socket", str(path), "status") == 1
    finally:
        thread.join(10)
        listener.close()
    assert "closed the connection without an answer" in capsys.readouterr().err


def test_the_client_is_a_command_channel_for_the_terminal_ui(run) -> None:  # type: ignore[no-untyped-def]
    target, log = run
    client = ControlClient(control_path(log))
    assert isinstance(client, CommandChannel)
    assert client.can_command, client.why_not

    async def commands() -> list[CommandResult]:
        return [
            await client.hold(),
            await client.hold(),
            await client.ack("stale", None),
            await client.note("flushed by hand"),
            await client.resume(),
            await client.abort(),
        ]

    results = asyncio.run(commands())
    assert [r.ok for r in results] == [True, False, True, True, True, True]
    assert results[1].message == "refused: already held"
    assert results[4].message == "protocol clock running again"
    assert target.calls == [
        ("status",),  # isinstance() on a runtime-checkable protocol reads can_command
        ("status",),  # can_command asked
        ("hold", ME),
        ("hold", ME),
        ("ack", "stale", None, ME),
        ("note", "flushed by hand", ME),
        ("resume", ME),
        ("abort", ME),
    ]


def test_the_client_without_a_controller_cannot_command_and_says_why(tmp_path: Path) -> None:
    client = ControlClient(control_path(tmp_path / "run.sqlite"))
    assert not client.can_command
    assert "no controller at" in client.why_not and "run.sqlite.ctl" in client.why_not
    result = asyncio.run(client.hold())
    assert result == CommandResult(
        ok=False,
        message=f"{client.path}: no controller running: no control socket here",
    )


def test_watch_offers_commands_only_when_a_controller_answers(tmp_path: Path) -> None:
    """The terminal view's channel: read-only without a controller, the socket client with one."""
    import asyncio

    from controller.cli.cmd_ctl import ControlClient
    from controller.tui._launch import command_channel

    log = tmp_path / "runs" / "x.sqlite"
    log.parent.mkdir()
    idle = command_channel(log)
    assert not idle.can_command and "read only" in idle.why_not

    target = FakeLoop()
    with served(ControlServer(target, control_path(log))):
        live = command_channel(log)
        assert isinstance(live, ControlClient) and live.can_command
        result = asyncio.run(live.hold())
        assert result.ok
    assert ("hold", ME) in target.calls
