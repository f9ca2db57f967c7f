"""Operator commands on a running control loop (what the control socket calls).

Hold freezes protocol time with the setpoints kept, resume continues, skip_to jumps forward,
abort ends safe with a finished log, ack clears a latched alarm; every command is audited and
an illegal one raises OperatorError and changes nothing.
"""

from __future__ import annotations

import json
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from controller.errors import SquallError
from controller.runtime import ControlLoop, OperatorError, RunSettings, SimulatedRun
from controller.storage import RunEndReason, RunLogReader

from ._rigs import TruthSpy, drive, rig_text, write_files

pytestmark = pytest.mark.timeout(120)

PERIOD_S = 10.0
START = pd.Timestamp("2027-07-01T00:00:00Z")

PROTOCOL = """format = "squall-protocol/1"
title = "Operator commands"
begins = "2027-07-01T00:00:00+00:00"

[groups.all]
role = "treatment"
chambers = ["L1"]

[[phases]]
name = "warming"
duration = "1h"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0, duration = "5min" },
                  { kind = "ramp", to = 22.0, rate_per_h = 2.5 } ]
  light = [ { kind = "hold", value = 300.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]

[[phases]]
name = "exposure"
duration = "1h"
  [phases.programs]
  temperature = [ { kind = "hold", value = 22.0 } ]

[[phases]]
name = "recovery"
duration = "30min"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]

[incubation]
flush = "5min"
settle = "0s"
min_closed = "5min"
max_closed = "2h"
"""


def prepare(tmp_path: Path) -> SimulatedRun:
    protocol, rig, log = write_files(tmp_path, rig=rig_text(productive=False), protocol=PROTOCOL)
    return SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))


def logged(run: SimulatedRun) -> dict[str, pd.DataFrame]:
    with RunLogReader(run.writer.path) as reader:
        return {
            "samples": reader.samples(),
            "events": reader.events(),
            "audit": reader.audit(),
            "windows": reader.windows(),
            "alarms": reader.alarms(),
        }


def commands(audit: pd.DataFrame) -> list[tuple[str, str, str, str]]:
    """(user, command, text, result) of the operator commands (not the launch record)."""
    rows = audit[audit.command != "run"]
    return list(zip(rows.user, rows.command, rows.text, rows.result, strict=True))


def test_hold_freezes_protocol_time_and_setpoints_and_resume_continues(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    seen: dict[str, Any] = {}

    def look(loop: ControlLoop) -> None:
        seen["status"] = loop.status()

    summary, _ = drive(
        run,
        at=[
            (900.0, lambda loop: loop.hold("ana")),
            (1500.0, look),
            (2700.0, lambda loop: loop.resume("ana")),
        ],
    )
    assert summary.end_reason is RunEndReason.COMPLETED
    # the protocol (2.5 h) took 30 min longer on the clock: the hold lasted 30 min
    assert summary.run_s == pytest.approx(2.5 * 3600.0 + 1800.0, abs=PERIOD_S)
    log = logged(run)
    rows = log["samples"]
    held = rows[(rows.t_s > 900.0) & (rows.t_s <= 2700.0)]
    assert len(held) == 180
    assert np.allclose(held.elapsed_s, 900.0)
    # the ramp (20 → 22 °C at 2.5 °C/h) stopped where it was: setpoint kept
    assert held.temperature_setpoint_c.nunique() == 1
    assert held.temperature_setpoint_c.iloc[0] == pytest.approx(20.0 + 2.5 * 600.0 / 3600.0)
    assert held.phase.astype(str).eq("warming").all()
    after = rows[rows.t_s > 2700.0]
    assert after.elapsed_s.iloc[0] == pytest.approx(900.0 + after.t_s.iloc[0] - 2700.0)
    assert str(after.phase.iloc[-1]) == "recovery"  # the protocol went on to its end
    status = seen["status"]
    assert json.loads(json.dumps(status)) == status
    assert status["state"] == "held" and status["held"] is True
    assert status["elapsed_s"] == pytest.approx(900.0) and status["phase"] == "warming"
    chamber = status["chambers"]["L1"]
    assert chamber["temperature_setpoint_c"] == pytest.approx(20.0 + 2.5 * 600.0 / 3600.0)
    assert chamber["incubation"] in ("open", "closed") and chamber["alarm"] is None
    assert 15.0 < chamber["temperature_c"] < 25.0 and 50.0 < chamber["o2_sat_pct"] < 150.0
    events = log["events"]
    kinds = events.kind.astype(str).tolist()
    hold = events.iloc[kinds.index("hold")]
    assert (hold.t_s, hold.elapsed_s) == pytest.approx((900.0, 900.0))
    assert "held by ana" in hold.detail
    end = events.iloc[kinds.index("hold_end")]
    assert (end.t_s, end.elapsed_s) == pytest.approx((2700.0, 900.0))
    assert commands(log["audit"]) == [("ana", "hold", "", "ok"), ("ana", "resume", "", "ok")]


def test_skip_to_jumps_forward_and_ends_the_open_window(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    summary, loop = drive(run, at=[(1200.0, lambda loop: loop.skip_to("exposure", "ben"))])
    assert summary.end_reason is RunEndReason.COMPLETED
    # 20 min of warming, then the last 1.5 h of the protocol
    assert summary.run_s == pytest.approx(1200.0 + 5400.0, abs=PERIOD_S)
    log = logged(run)
    rows = log["samples"]
    after = rows[rows.t_s > 1200.0]
    assert after.elapsed_s.iloc[0] == pytest.approx(3600.0 + after.t_s.iloc[0] - 1200.0)
    assert str(after.phase.iloc[0]) == "exposure"
    assert after.temperature_setpoint_c.iloc[0] == pytest.approx(22.0)
    assert rows.elapsed_s.is_monotonic_increasing
    events = log["events"]
    skip = events[events.kind.astype(str) == "skip"].iloc[0]
    assert skip.phase == "exposure" and skip.elapsed_s == pytest.approx(3600.0)
    windows = log["windows"]
    cut = windows[windows.end_time == START + pd.Timedelta(seconds=1200.0)]
    assert len(cut) == 1 and str(cut.end_reason.iloc[0]) == "operator"
    assert "ben skipped to 'exposure'" in cut.detail.iloc[0]
    assert commands(log["audit"]) == [("ben", "skip-to", "exposure", "ok")]
    assert loop.status()["state"] == "finished"


def test_abort_ends_safe_at_once_with_a_finished_log(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    spy = TruthSpy(run)
    summary, loop = drive(run, io=spy, at=[(1205.0, lambda loop: loop.abort("cai"))])
    assert summary.end_reason is RunEndReason.ABORTED
    assert summary.detail == "aborted by cai"
    assert summary.run_s == pytest.approx(1205.0)  # between ticks: no wait for the next one
    safe = run.plan.chambers["L1"].interlocks.safe_outputs()
    assert spy.writes[-1] == (1205.0, "L1", safe)
    with RunLogReader(run.writer.path) as reader:
        info = reader.info()
        events = reader.events()
        windows = reader.windows()
        audit = reader.audit()
    assert info.end is not None and info.end.end_reason is RunEndReason.ABORTED
    last = events.iloc[-1]
    assert str(last.kind) == "abort" and "safe outputs written" in last.detail
    assert str(windows.end_reason.iloc[-1]) == "operator"
    assert commands(audit) == [("cai", "abort", "", "ok")]
    assert loop.done.is_set()
    with pytest.raises(OperatorError, match="the run has ended"):
        loop.hold("cai")


Check = Callable[[ControlLoop], object]


@pytest.mark.parametrize(
    ("call", "command", "why"),
    [
        (lambda loop: loop.resume("dee"), "resume", "the run is not held"),
        (lambda loop: loop.skip_to("storm", "dee"), "skip-to", "no phase 'storm'; the phases"),
        (lambda loop: loop.skip_to("warming", "dee"), "skip-to", "only moves forward"),
        (lambda loop: loop.ack("e-stop", "L1", "dee"), "ack", "nothing to acknowledge"),
        (lambda loop: loop.ack("smoke", None, "dee"), "ack", "no alarm code 'smoke'"),
        (lambda loop: loop.ack("e-stop", "Z9", "dee"), "ack", "no chamber 'Z9'"),
        (lambda loop: loop.note("  ", "dee"), "note", "the note is empty"),
    ],
)
def test_an_illegal_request_raises_is_audited_and_changes_nothing(
    tmp_path: Path, call: Check, command: str, why: str
) -> None:
    run = prepare(tmp_path)
    seen: dict[str, Any] = {}

    def attempt(loop: ControlLoop) -> None:
        before = loop.status()
        with pytest.raises(OperatorError) as info:
            call(loop)
        seen["error"] = info.value
        after = loop.status()
        seen["same"] = {k: v for k, v in before.items() if k != "utc"} == {
            k: v for k, v in after.items() if k != "utc"
        }

    summary, _ = drive(run, at=[(605.0, attempt), (900.0, lambda loop: loop.abort("dee"))])
    assert summary.end_reason is RunEndReason.ABORTED  # (only to keep the run short)
    error = seen["error"]
    assert isinstance(error, SquallError) and error.command == command
    assert why in error.message and str(error).startswith(f"{command}: ")
    assert "\n" not in str(error)
    assert seen["same"]
    log = logged(run)
    rows = log["samples"]
    assert np.allclose(rows.elapsed_s, rows.t_s)  # the protocol clock was untouched
    audited = commands(log["audit"])
    assert len(audited) == 2 and audited[0][1] == command and audited[1][1] == "abort"
    assert audited[0][0] == "dee" and audited[0][3].startswith("refused: ") and why in audited[0][3]
    assert set(log["events"].kind.astype(str)) <= {"run_start", "phase_change", "abort"}


def test_hold_twice_is_refused_and_the_first_hold_stands(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    errors: list[OperatorError] = []

    def hold_again(loop: ControlLoop) -> None:
        try:
            loop.hold("eve")
        except OperatorError as error:
            errors.append(error)

    summary, _ = drive(
        run,
        at=[
            (600.0, lambda loop: loop.hold("eve")),
            (700.0, hold_again),
            (800.0, lambda loop: loop.resume("eve")),
            (900.0, lambda loop: loop.abort("eve")),  # (only to keep the run short)
        ],
    )
    assert [e.message for e in errors] == ["the run is held already"]
    assert summary.end_reason is RunEndReason.ABORTED
    rows = logged(run)["samples"]
    held = rows[(rows.t_s > 600.0) & (rows.t_s <= 800.0)]
    assert len(held) == 20 and np.allclose(held.elapsed_s, 600.0)  # held from the first hold
    assert rows.elapsed_s.iloc[-1] == pytest.approx(rows.t_s.iloc[-1] - 200.0)


def test_ack_clears_a_latched_e_stop_and_notes_go_to_the_audit_trail(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    summary, _ = drive(
        run,
        at=[
            (605.0, lambda loop: run.io.press_e_stop("L1")),
            (900.0, lambda loop: run.io.release_e_stop("L1")),
            (1000.0, lambda loop: loop.ack("e-stop", "L1", "fay")),
            (1100.0, lambda loop: loop.note("sampled L1 for nutrients", "fay")),
        ],
    )
    assert summary.end_reason is RunEndReason.COMPLETED
    log = logged(run)
    alarms = log["alarms"]
    acks = alarms[alarms.action.astype(str) == "ack"]
    assert len(acks) == 1 and acks.user.iloc[0] == "fay" and acks.code.iloc[0] == "e-stop"
    rows = log["samples"]
    assert rows[(rows.t_s > 900.0) & (rows.t_s <= 1000.0)].alarm.eq("e-stop").all()
    assert rows[rows.t_s > 1010.0].alarm.isna().all()  # cleared once acknowledged
    assert rows[rows.t_s > 1200.0].lamp_pct.gt(0.0).all()  # control is back
    # the E-stop forced the outputs: the window in progress ended with reason alarm
    assert "alarm" in set(log["windows"].end_reason.astype(str))
    assert commands(log["audit"]) == [
        ("fay", "ack", "e-stop L1", "ok"),
        ("fay", "note", "sampled L1 for nutrients", "ok"),
    ]


def test_commands_before_the_start_are_refused(tmp_path: Path) -> None:
    run = prepare(tmp_path)
    loop = run.loop()
    with pytest.raises(OperatorError, match="has not started"):
        loop.hold("gil")
    assert loop.status()["state"] == "starting"
    run.writer.close()
