"""``squall serve``: refusals by preflight (stale calibration, a latched trip from the previous
run) that do not stop the next experiment, the operator's acknowledgment, one serve per rig,
experiments a stopped serve left behind, and bad input."""

from __future__ import annotations

import asyncio
import os
import pwd
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from controller.cli import main
from controller.runtime import RigLock, RunSettings
from controller.schedule import ExperimentState, ScheduleStore
from controller.schedule._serve import ServeConfig, serve

REPO = Path(__file__).resolve().parents[2]
START = datetime(2026, 12, 1, 0, 0, tzinfo=UTC)  # rack 8's calibrations are fresh then
S = ExperimentState

HOLD = """
format = "squall-protocol/1"
title = "{title}"

[groups.only]
role = "control"
chambers = {chambers}

[[phases]]
name = "hold"
duration = "6h"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = 18.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]
"""

DROPOUT_FAULT = """[[sim.faults]]
kind = "dropout"
chamber = "C6"
sensor = "optode"
at_s = 172800.0
duration_s = 600.0
"""

LEAK_FAULT = """[[sim.faults]]
kind = "leak"
chamber = "C3"
at_s = 3600.0
duration_s = 3600.0
magnitude = 1.0
"""


def _rig(tmp_path: Path, old: str = "", new: str = "") -> Path:
    text = (REPO / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")
    if old:
        assert old in text
        text = text.replace(old, new, 1)
    path = tmp_path / "rack8.toml"
    path.write_text(text, encoding="utf-8")
    return path


def _protocol(tmp_path: Path, name: str, chambers: list[str]) -> Path:
    path = tmp_path / f"{name}.toml"
    quoted = "[" + ", ".join(f'"{c}"' for c in chambers) + "]"
    path.write_text(HOLD.format(title=name, chambers=quoted), encoding="utf-8")
    return path


def _add(schedule: Path, rig: Path, protocol: Path, start: datetime, owner: str = "ana") -> str:
    with ScheduleStore(schedule) as store:
        return store.add(rig_path=rig, protocol_path=protocol, start_utc=start, owner=owner).id


def _serve(rig: Path, schedule: Path, lines: list[str], **kwargs: object) -> object:
    config = ServeConfig(
        rig_path=rig,
        schedule_path=schedule,
        sim=True,
        start_utc=START,
        settings=RunSettings(period_s=300.0),
        **kwargs,  # type: ignore[arg-type]
    )
    return serve(config, notify=lines.append)


def test_stale_calibration_refuses_with_an_alarm_and_the_next_experiment_still_runs(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # C5's optode was last calibrated 2026-10-01: 61 d old on 2026-12-01, limit 30 d
    rig = _rig(tmp_path)
    text = rig.read_text(encoding="utf-8")
    c5 = text.index('id = "C5"')
    rig.write_text(
        text[:c5] + text[c5:].replace("optode_on = 2026-11-24", "optode_on = 2026-10-01", 1),
        encoding="utf-8",
    )
    schedule = tmp_path / "runs" / "schedule.sqlite"
    own = _add(
        schedule, rig, _protocol(tmp_path, "own-water", ["C5", "C6"]), START + timedelta(hours=6)
    )
    bath = _add(schedule, rig, _protocol(tmp_path, "bath", ["C1", "C2", "C3", "C4"]),
                START + timedelta(hours=12))  # fmt: skip
    code = main(
        [
            "serve", "--rig", str(rig), "--schedule", str(schedule), "--sim", "--write-schedule",
            "--sim-start", START.isoformat(), "--period", "300",
        ]
    )  # fmt: skip
    out = capsys.readouterr().out
    assert code == 0
    assert (
        f"ALARM: {own} 'own-water' refused: preflight failed (1 finding): C5 calibration: " in out
    )
    assert f"served {rig} from 2026-12-01 00:00 to 2026-12-01 18:00 UTC: {own} refused, " in out
    assert f"{bath} done" in out
    with ScheduleStore(schedule) as store:
        refused, done = store.get(own), store.get(bath)
        history = store.history(own)
    assert refused.state is S.REFUSED and refused.log_path is None
    assert [h.to_state for h in history] == [S.PLANNED, S.PREFLIGHT, S.REFUSED]
    assert history[-1].reason == (
        "preflight failed (1 finding): C5 calibration: optode calibration of C5 is 61 d old "
        "(done 2026-10-01, limit 30 d)"
    )
    assert history[-1].time_utc == START + timedelta(hours=6)
    assert done.state is S.DONE and done.log_path is not None and done.log_path.exists()
    assert not list(schedule.parent.glob(f"{own}-*"))  # a refused experiment writes no log


def test_a_latched_trip_left_by_the_previous_run_refuses_until_the_operator_replans(
    tmp_path: Path,
) -> None:
    # C3 leaks for an hour during the first run: the level switch trips (a latching trip)
    # and nobody acknowledges it before the run ends.
    rig = _rig(tmp_path, DROPOUT_FAULT, LEAK_FAULT)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    protocol = _protocol(tmp_path, "bath", ["C1", "C2", "C3", "C4"])
    first = _add(schedule, rig, protocol, START + timedelta(hours=1))
    second = _add(schedule, rig, protocol, START + timedelta(hours=7), owner="ben")
    lines: list[str] = []
    result = _serve(rig, schedule, lines)
    assert result.outcomes == ((first, S.DONE), (second, S.REFUSED))  # type: ignore[attr-defined]
    with ScheduleStore(schedule) as store:
        reason = store.history(second)[-1].reason
        first_log = store.get(first).log_path
    assert first_log is not None
    assert reason.startswith("preflight failed (1 finding): C3 latched-alarm: low-level (trip)")
    assert f"in {first_log.name} was never acknowledged: water level switch low" in reason
    assert any(line.endswith(reason) and "ALARM" in line for line in lines)

    # The operator tops up C3, finds the leak (the rig file loses its fault) and plans the
    # experiment again: that is the acknowledgment, and serve now starts it.
    rig.write_text(rig.read_text(encoding="utf-8").replace(LEAK_FAULT, ""), encoding="utf-8")
    with ScheduleStore(schedule, now=lambda: START + timedelta(hours=8)) as store:
        store.move(second, START + timedelta(hours=9), by="ana")
    result = _serve(rig, schedule, lines)
    assert result.outcomes == ((second, S.DONE),)  # type: ignore[attr-defined]
    with ScheduleStore(schedule) as store:
        steps = [h.to_state for h in store.history(second)]
    assert steps == [S.PLANNED, S.PREFLIGHT, S.REFUSED, S.PLANNED, S.PREFLIGHT, S.RUNNING, S.DONE]


def test_a_second_serve_on_the_same_rig_is_refused_and_changes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    exp = _add(schedule, rig, _protocol(tmp_path, "bath", ["C1", "C2"]), START)
    holder = RigLock(rig)  # the first serve holds the rig
    try:
        code = main(
            ["serve", "--rig", str(rig), "--schedule", str(schedule), "--sim", "--write-schedule"]
        )
    finally:
        holder.release()
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0
    assert "another controller (process" in err and "only one 'squall serve'" in err
    with ScheduleStore(schedule) as store:
        assert store.get(exp).state is S.PLANNED
        assert len(store.history(exp)) == 1


def test_experiments_left_by_a_stopped_serve_are_settled(tmp_path: Path) -> None:
    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    protocol = _protocol(tmp_path, "bath", ["C1", "C2"])
    stuck = _add(schedule, rig, protocol, START + timedelta(days=1))
    crashed = _add(schedule, rig, protocol, START + timedelta(days=2))
    with ScheduleStore(schedule) as store:
        store.transition(stuck, S.PREFLIGHT, reason="checking", by="serve")
        store.transition(crashed, S.PREFLIGHT, reason="checking", by="serve")
        store.transition(
            crashed, S.RUNNING, reason="started", by="serve", log_path=tmp_path / "gone.sqlite"
        )
    lines: list[str] = []
    result = _serve(rig, schedule, lines, until_utc=START)  # settle only, start nothing
    assert result.outcomes == ((crashed, S.ABORTED),)  # type: ignore[attr-defined]
    with ScheduleStore(schedule) as store:
        assert store.get(stuck).state is S.PLANNED
        assert store.history(stuck)[-1].reason == "serve stopped before the preflight decided"
        assert "its log" in store.history(crashed)[-1].reason
        assert "squall run --resume LOG" in store.history(crashed)[-1].reason


@pytest.mark.parametrize(
    ("extra", "expected"),
    [
        (["--sim", "--until", "2026-12-08T00:00"], "--until: '2026-12-08T00:00' has no zone"),
        (["--sim", "--for", "a week"], "--for: 'a week' is not a duration"),
        (["--sim", "--for", "0h"], "--for: '0h' is no time at all"),
        (["--speed", "10"], "--speed: --speed applies to a simulated serve only"),
        (["--sim", "--sim-start", "yesterday"], "--sim-start: 'yesterday' is not an ISO 8601"),
        (["--sim", "--period", "0.1"], "--period: the tick period must be 1 s or more"),
    ],
)
def test_bad_options_give_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str], expected: str
) -> None:
    rig = _rig(tmp_path)
    code = main(["serve", "--rig", str(rig), "--schedule", str(tmp_path / "s.sqlite"), *extra])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0 and expected in err
    assert not (tmp_path / "s.sqlite").exists() and not rig.with_name("rack8.toml.lock").exists()


def test_unknown_rig_and_missing_schedule_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["serve", "--rig", str(tmp_path / "none.toml"), "--sim"]) == 2
    assert "none.toml: file not found" in capsys.readouterr().err
    rig = _rig(tmp_path)
    missing = tmp_path / "runs" / "schedule.sqlite"
    assert main(["serve", "--rig", str(rig), "--schedule", str(missing), "--sim"]) == 2
    assert "no schedule here; add experiments with 'squall schedule add'" in (
        capsys.readouterr().err
    )
    assert not missing.exists()


async def _command(socket_path: Path, cmd: str) -> tuple[bool, object]:
    """Send one operator command over a run's control socket, as 'squall ctl' does."""
    from controller.runtime._ctl_wire import connect_path, decode_reply, encode_request

    with connect_path(socket_path) as path:
        reader, writer = await asyncio.open_unix_connection(path)
        writer.write(encode_request(cmd, user="ana"))
        await writer.drain()
        reply = decode_reply(await reader.readline())
        writer.close()
        await writer.wait_closed()
    return reply.ok, reply.result if reply.ok else reply.error


def test_operator_hold_resume_and_abort_show_in_the_store(tmp_path: Path) -> None:
    from controller.runtime._ctl_wire import control_path

    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    exp = _add(schedule, rig, _protocol(tmp_path, "bath", ["C1", "C2"]), START + timedelta(hours=1))
    log = schedule.parent / f"{exp}-bath.sqlite"
    replies: list[tuple[str, bool]] = []
    operator: list[asyncio.Task[None]] = []

    async def ana() -> None:  # an operator at the control socket, on the simulated clock
        try:
            for wait_s, cmd in ((3600.0, "hold"), (7200.0, "resume"), (3600.0, "abort")):
                await asyncio.sleep(wait_s)
                ok, _ = await _command(control_path(log), cmd)
                replies.append((cmd, ok))
        except BaseException:
            asyncio.get_running_loop().stop()  # fail the test at once instead of holding
            raise

    def notify(line: str) -> None:
        if f"{exp} running" in line:
            operator.append(asyncio.get_running_loop().create_task(ana()))

    result = serve(
        ServeConfig(
            rig_path=rig,
            schedule_path=schedule,
            sim=True,
            start_utc=START,
            settings=RunSettings(period_s=300.0),
        ),
        notify=notify,
    )
    assert operator and operator[0].done()
    assert replies == [("hold", True), ("resume", True), ("abort", True)]
    assert result.outcomes == ((exp, S.ABORTED),)
    with ScheduleStore(schedule) as store:
        history = store.history(exp)
    assert [h.to_state for h in history] == [
        S.PLANNED, S.PREFLIGHT, S.RUNNING, S.HELD, S.RUNNING, S.ABORTED,
    ]  # fmt: skip
    started = START + timedelta(hours=1)
    # seen at the first tick after each command (ticks every 300 s)
    assert history[3].time_utc == started + timedelta(hours=1, minutes=5)
    assert history[3].reason == "held by an operator (squall ctl)"
    assert history[4].time_utc == started + timedelta(hours=3, minutes=5)
    assert history[5].time_utc == started + timedelta(hours=4)
    # the control socket names the peer's own user, whatever name the client claims
    assert history[5].reason == f"aborted by {pwd.getpwuid(os.getuid()).pw_name}"


def test_an_experiment_cancelled_during_its_preflight_is_left_alone(tmp_path: Path) -> None:
    rig = _rig(tmp_path)
    schedule = tmp_path / "runs" / "schedule.sqlite"
    exp = _add(schedule, rig, _protocol(tmp_path, "bath", ["C1", "C2"]), START + timedelta(hours=1))
    lines: list[str] = []

    def notify(line: str) -> None:
        lines.append(line)
        if f"{exp} preflight" in line:  # an operator cancels it from another process
            with ScheduleStore(schedule) as other:
                other.cancel(exp, reason="sediment cores not ready", by="ana")

    result = serve(
        ServeConfig(rig_path=rig, schedule_path=schedule, sim=True, start_utc=START),
        notify=notify,
    )
    assert result.outcomes == ()
    assert any(f"{exp} was changed meanwhile (now cancelled); not taken up" in x for x in lines)
    with ScheduleStore(schedule) as store:
        assert store.get(exp).state is S.CANCELLED
        assert store.get(exp).log_path is None
    assert not list(schedule.parent.glob(f"{exp}-*"))
