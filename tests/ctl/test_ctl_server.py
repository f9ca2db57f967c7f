"""The control socket: owner-only permissions, peer credentials, the wire protocol's errors,
and every command reaching the controller's hook with the operating-system user."""

from __future__ import annotations

import json
import logging
import os
import shutil
import socket
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path

import pytest

from controller.errors import SquallError
from controller.runtime._ctl_server import ControlServer
from controller.runtime._ctl_wire import MAX_REQUEST_B, control_path, decode_line

from ._serve import ME, FakeLoop, as_user, exchange, request, served, unprivileged


@pytest.fixture
def open_base() -> Iterator[Path]:
    """A folder every user may traverse (pytest's own temp folders are private), so that
    only the control folder's own permissions stand between another user and the socket."""
    base = Path(tempfile.mkdtemp(prefix="squall-ctl-", dir="/tmp"))
    os.chmod(base, 0o755)
    try:
        yield base
    finally:
        shutil.rmtree(base, ignore_errors=True)


def _other_user() -> object:
    if os.geteuid() != 0:
        pytest.skip("connecting as another user needs root to switch users in a child")
    entry = unprivileged()
    if entry is None:
        pytest.skip("no unprivileged account (nobody, daemon) on this machine to connect as")
    return entry


# ------------------------------------------------------------------ permissions
def test_socket_and_its_folder_are_owner_only_whatever_the_umask(tmp_path: Path) -> None:
    path = control_path(tmp_path / "run.sqlite")
    old = os.umask(0)  # the most permissive caller: the modes must not depend on it
    try:
        with served(ControlServer(FakeLoop(), path)):
            folder_mode = stat.S_IMODE(os.stat(path.parent).st_mode)
            socket_mode = stat.S_IMODE(os.stat(path).st_mode)
            assert stat.S_ISSOCK(os.stat(path).st_mode)
    finally:
        os.umask(old)
    assert path == tmp_path / "run.sqlite.ctl" / "socket"
    assert folder_mode == 0o700
    assert socket_mode == 0o600
    assert not path.exists() and not path.parent.exists()  # removed when the server stops


def test_another_user_cannot_even_reach_the_socket(open_base: Path) -> None:
    entry = _other_user()
    target = FakeLoop()
    path = control_path(open_base / "run.sqlite")
    with served(ControlServer(target, path)):
        outcome = as_user(entry, path, request("hold"))  # type: ignore[arg-type]
    assert outcome == {"connect_error": "PermissionError"}
    assert target.calls == []


def test_peer_credentials_refuse_another_user_even_when_the_files_are_opened_up(
    open_base: Path,
) -> None:
    entry = _other_user()
    target = FakeLoop()
    audited: list[tuple[str, str, str, str]] = []
    path = control_path(open_base / "run.sqlite")
    with served(ControlServer(target, path, audit=lambda *a: audited.append(a))):
        os.chmod(path.parent, 0o755)  # a careless admin: only SO_PEERCRED is left
        os.chmod(path, 0o666)
        outcome = as_user(entry, path, request("hold"))  # type: ignore[arg-type]
    name, uid = entry.pw_name, entry.pw_uid  # type: ignore[attr-defined]
    assert outcome["reply"] == {
        "ok": False,
        "error": f"refused: user {name} (uid {uid}) may not command this controller",
    }
    assert outcome["closed"] is True
    assert target.calls == []
    assert audited == [(name, "connect", "", outcome["reply"]["error"])]


def test_an_allowed_uid_commands_and_is_recorded_by_its_own_name(open_base: Path) -> None:
    entry = _other_user()
    target = FakeLoop()
    path = control_path(open_base / "run.sqlite")
    uid = entry.pw_uid  # type: ignore[attr-defined]
    claimed = json.dumps({"v": 1, "cmd": "hold", "user": "root"}) + "\n"
    with served(ControlServer(target, path, allowed_uids=[uid])):
        os.chmod(path.parent, 0o755)
        os.chmod(path, 0o666)
        outcome = as_user(entry, path, claimed.encode())  # type: ignore[arg-type]
    assert outcome["reply"]["ok"] is True
    assert target.calls[0] == ("hold", entry.pw_name)  # type: ignore[attr-defined]


# ------------------------------------------------------------------ malformed requests
BAD = [
    (b"hold\n", "malformed request: not JSON (Expecting value at column 1)"),
    (b"[1, 2]\n", 'malformed request: expected a JSON object {"v": 1, "cmd": ...}'),
    (b'{"cmd": "hold"}\n', "malformed request: missing 'v' (this controller speaks 1)"),
    (b'{"v": 2, "cmd": "hold"}\n', "unsupported protocol version 2; this controller speaks 1"),
    (b'{"v": 1}\n', "malformed request: missing 'cmd' (a command name)"),
    (
        b'{"v": 1, "cmd": "reboot"}\n',
        "unknown command 'reboot'; commands: status, hold, resume, abort, skip-to, ack, note",
    ),
    (
        b'{"v": 1, "cmd": "hold", "when": 3}\n',
        "malformed request: unknown field 'when' (fields: v, cmd, args, user)",
    ),
    (b'{"v": 1, "cmd": "skip-to"}\n', "skip-to: missing argument 'phase' (a name)"),
    (
        b'{"v": 1, "cmd": "skip-to", "args": {"phase": 3}}\n',
        "skip-to: argument 'phase' must be a name, got 3",
    ),
    (
        b'{"v": 1, "cmd": "hold", "args": {"force": true}}\n',
        "hold: unknown argument 'force' (takes no arguments)",
    ),
    (b'{"v": 1, "cmd": "note", "args": {"text": "  "}}\n', "note: argument 'text' is empty"),
    (b'{"v": 1, "cmd": "ack", "args": []}\n', "ack: 'args' must be a JSON object, got []"),
    (b"\xff\xfe\n", "malformed request: not UTF-8 text"),
]


@pytest.mark.parametrize(("line", "error"), BAD, ids=[e for _, e in BAD])
def test_a_malformed_request_gets_a_clear_error_and_the_connection_stays_usable(
    tmp_path: Path, line: bytes, error: str
) -> None:
    target = FakeLoop()
    path = control_path(tmp_path / "run.sqlite")
    with served(ControlServer(target, path)):
        bad, good = exchange(path, line, request("hold"))
    assert bad == {"ok": False, "error": error}
    assert good == {"ok": True, "result": "protocol clock held at 1 h 00 min"}
    assert target.calls == [("hold", ME)]


def test_an_oversized_request_is_skipped_to_its_end(tmp_path: Path) -> None:
    target = FakeLoop()
    path = control_path(tmp_path / "run.sqlite")
    huge = b'{"v": 1, "cmd": "note", "args": {"text": "' + b"x" * (3 * MAX_REQUEST_B) + b'"}}\n'
    with served(ControlServer(target, path)):
        bad, good = exchange(path, huge, request("note", text="sampled A1-A4 for nutrients"))
    assert bad == {"ok": False, "error": f"request longer than {MAX_REQUEST_B} bytes; skipped"}
    assert good["ok"] is True
    assert target.calls == [("note", "sampled A1-A4 for nutrients", ME)]


def test_decoding_accepts_blank_arguments_only_where_optional() -> None:
    assert decode_line(b'{"v": 1, "cmd": "ack", "args": {"alarm_code": "stale"}}').args == {
        "alarm_code": "stale",
        "chamber": None,
    }
    assert decode_line(b'{"v": 1, "cmd": "status", "args": null}').args == {}


# ------------------------------------------------------------------ commands reach the hooks
def test_every_command_reaches_its_hook_with_the_peer_user(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    target = FakeLoop()
    path = control_path(tmp_path / "run.sqlite")
    caplog.set_level(logging.DEBUG, logger="controller.runtime._ctl_server")
    with served(ControlServer(target, path)):
        replies = exchange(
            path,
            request("status"),
            request("hold"),
            request("resume"),
            request("skip-to", phase="recovery"),
            request("ack", alarm_code="stale", chamber="C5"),
            request("ack", alarm_code="e-stop"),
            request("note", text="sampled A1–A4 for nutrients"),
            request("abort"),
        )
    assert all(r["ok"] for r in replies), replies
    assert replies[0]["result"]["chambers"]["C5"]["alarm"] == "stale"
    assert replies[2]["result"] == "protocol clock running again"  # hook returned None
    assert target.calls == [
        ("status",),
        ("hold", ME),
        ("resume", ME),
        ("skip_to", "recovery", ME),
        ("ack", "stale", "C5", ME),
        ("ack", "e-stop", None, ME),
        ("note", "sampled A1–A4 for nutrients", ME),
        ("abort", ME),
    ]
    assert target.aborted
    logged = [r.getMessage() for r in caplog.records if r.levelno == logging.INFO]
    assert f"control socket: note by {ME}: sampled A1–A4 for nutrients" in logged
    assert f"control socket: abort by {ME}" in logged


def test_a_refusal_by_the_hook_is_a_clear_error_and_logged(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    target = FakeLoop()
    audited: list[tuple[str, str, str, str]] = []
    path = control_path(tmp_path / "run.sqlite")
    with served(ControlServer(target, path, audit=lambda *a: audited.append(a))):
        replies = exchange(
            path,
            request("resume"),
            request("skip-to", phase="nowhere"),
            request("note", text="after the end"),
            b"nonsense\n",
        )
    assert replies == [
        {"ok": False, "error": "refused: not held"},
        {"ok": False, "error": "refused: no phase 'nowhere'"},
        {"ok": False, "error": "refused: the run has ended"},
        {"ok": False, "error": "malformed request: not JSON (Expecting value at column 1)"},
    ]
    # the hooks audit what they refuse themselves; the server audits what never reached one
    assert audited == [
        (ME, "?", "", "malformed request: not JSON (Expecting value at column 1)"),
    ]
    warnings = [r.getMessage() for r in caplog.records if r.levelno == logging.WARNING]
    assert f"control socket: resume from {ME} refused: refused: not held" in warnings


def test_a_bug_in_a_hook_is_reported_as_a_failure_not_a_refusal(
    tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    target = FakeLoop(explode=True)
    audited: list[tuple[str, str, str, str]] = []
    path = control_path(tmp_path / "run.sqlite")
    with served(ControlServer(target, path, audit=lambda *a: audited.append(a))):
        (reply, after) = exchange(path, request("hold"), request("status"))
    error = "hold failed in the controller: TypeError: a bug in the hook"
    assert reply == {"ok": False, "error": error}
    assert audited == [(ME, "hold", "", error)]
    assert after["ok"] is True
    assert any(r.exc_info for r in caplog.records if r.levelno == logging.ERROR)


# ------------------------------------------------------------------ start-up
def test_a_stale_socket_of_a_crashed_run_is_replaced(tmp_path: Path) -> None:
    path = control_path(tmp_path / "run.sqlite")
    path.parent.mkdir(mode=0o755)
    leftover = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    leftover.bind(str(path))  # bound, never listening: what a killed controller leaves
    leftover.close()
    with served(ControlServer(FakeLoop(), path)):
        (reply,) = exchange(path, request("status"))
        assert stat.S_IMODE(os.stat(path.parent).st_mode) == 0o700  # tightened again
    assert reply["ok"] is True


def test_a_second_server_on_a_live_socket_is_refused(tmp_path: Path) -> None:
    path = control_path(tmp_path / "run.sqlite")
    with served(ControlServer(FakeLoop(), path)):
        with pytest.raises(SquallError, match="another controller is serving commands"):
            with served(ControlServer(FakeLoop(), path)):
                pass
        (reply,) = exchange(path, request("status"))  # the first one is untouched
    assert reply["ok"] is True


def test_something_else_in_the_way_is_refused(tmp_path: Path) -> None:
    path = control_path(tmp_path / "run.sqlite")
    path.parent.mkdir(mode=0o700)
    path.write_text("not a socket")
    with pytest.raises(SquallError, match="in the way of the control socket"):
        with served(ControlServer(FakeLoop(), path)):
            pass
    assert path.read_text() == "not a socket"


def test_a_path_longer_than_sun_path_still_works(tmp_path: Path) -> None:
    deep = tmp_path / ("d" * 60) / ("e" * 60)
    deep.mkdir(parents=True)
    path = control_path(deep / "run.sqlite")
    assert len(str(path)) > 108
    from controller.cli.cmd_ctl import ControlClient

    with served(ControlServer(FakeLoop(), path)):
        client = ControlClient(path)
        assert client.can_command, client.why_not
