"""``squall watch`` and ``squall replay`` at the command line: bad input is one line and exit 2
before the terminal is touched; without a log, the newest under ./runs/ is watched; a real
process starts the view headless and quits cleanly."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import pytest

from controller.cli import main
from controller.errors import SquallError
from controller.tui._launch import newest_log, parse_replay_speed

from .conftest import MakeSynthetic


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["watch", "missing.sqlite"], "missing.sqlite: no such run log"),
        (["replay", "missing.sqlite"], "missing.sqlite: no such run log"),
        (["watch", "notes.sqlite"], "notes.sqlite: not a squall run log"),
        (["watch"], "LOG: no run log given and no runs/ folder here"),
        (["replay", "notes.sqlite", "--speed", "0"], "--speed: '0' is not a speed of 1 or more"),
        (["replay", "notes.sqlite", "--speed", "fast"], "--speed: 'fast' is not a speed"),
        (["watch", "--broker", "http://lab"], "--broker: broker URL 'http://lab' must start"),
        (["watch", "notes.sqlite", "--broker", "mqtt://lab"], "--broker: give a run log or"),
    ],
)
def test_bad_input_is_one_line_and_exit_2(
    argv: list[str],
    message: str,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
    capsys: pytest.CaptureFixture[str],
) -> None:
    monkeypatch.chdir(tmp_path)
    (tmp_path / "notes.sqlite").write_text("lab notes, not a run log")
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and message in err
    assert "Traceback" not in err and "\x1b[" not in err  # no terminal switched half-way


def test_without_a_log_the_newest_under_runs_is_watched(tmp_path: Path) -> None:
    runs = tmp_path / "runs"
    runs.mkdir()
    with pytest.raises(SquallError, match=r"no run log \(\*\.sqlite\) in \S*runs/"):
        newest_log(runs)
    older = runs / "a.sqlite"
    newer = runs / "b.sqlite"
    older.write_bytes(b"")
    newer.write_bytes(b"")
    now = time.time()
    os.utime(older, (now, now))
    os.utime(newer, (now - 3600, now - 3600))  # b is an hour older than a
    assert newest_log(runs) == older


def test_replay_speed_limits() -> None:
    assert parse_replay_speed("3600") == 3600.0
    with pytest.raises(SquallError, match="faster than a week per second"):
        parse_replay_speed("1e7")


def test_a_real_process_paints_the_view_headless_and_quits(synthetic: MakeSynthetic) -> None:
    run = synthetic(chambers=4)
    run.run_ticks(20)
    run.finish()
    env = dict(os.environ)
    env["TEXTUAL_DRIVER"] = "textual.drivers.headless_driver:HeadlessDriver"
    env["TEXTUAL_PRESS"] = "q"  # pressed once the app is ready: the first screen is painted
    for argv in (["watch", str(run.writer.path)], ["replay", str(run.writer.path)]):
        done = subprocess.run(
            [sys.executable, "-m", "controller", *argv],
            env=env,
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert done.returncode == 0, done.stderr
        assert "Traceback" not in done.stderr
