"""A simulated run with its control socket: commands reach the real control loop's hooks,
land in the run log's audit trail with the operating-system user, and abort ends the run."""

from __future__ import annotations

import asyncio
import json
from pathlib import Path
from typing import Any

import pytest

from controller.cli.cmd_ctl import ControlClient
from controller.runtime import ControlLoop, RunSettings, RunSummary, SimulatedRun
from controller.runtime._ctl_server import run_with_control
from controller.runtime._ctl_wire import control_path
from controller.storage import EventKind, RunEndReason, RunLogReader

from ._serve import ME

RIG = """
name = "ctl test rack"

[sim]
room_temperature_c = 18.0
seed = 1

[[chambers]]
id = "B"
water_volume_l = 8.0
sediment_area_m2 = 0.03

[chambers.sim]
initial_temperature_c = 20.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""

PROTOCOL = """
format = "squall-protocol/1"
title = "Control socket test"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = ["B"]

[[phases]]
name = "acclimation"
duration = "1h"
  [phases.programs]
  temperature = [ { kind = "hold", value = 20.0 } ]
  light = [ { kind = "hold", value = 200.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]

[[phases]]
name = "warm"
duration = "1h"
  [phases.programs]
  temperature = [ { kind = "ramp", to = 21.0, rate_per_h = 1.0 } ]
  light = [ { kind = "hold", value = 200.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]
"""


def test_commands_reach_the_control_loop_and_its_audit_trail(tmp_path: Path) -> None:
    (tmp_path / "rig.toml").write_text(RIG)
    (tmp_path / "protocol.toml").write_text(PROTOCOL)
    log = tmp_path / "runs" / "ctl.sqlite"
    run = SimulatedRun.prepare(
        tmp_path / "protocol.toml", tmp_path / "rig.toml", log, settings=RunSettings()
    )
    ctl = control_path(log)
    seen: dict[str, Any] = {}

    async def operator(loop: ControlLoop) -> None:
        client = ControlClient(ctl)
        await run.clock.sleep(300.0)  # virtual time: a few ticks into the run
        seen["status"] = await client.request("status")
        seen["hold"] = await client.request("hold")
        seen["hold again"] = await client.request("hold")
        await run.clock.sleep(1200.0)
        seen["held status"] = await client.request("status")
        seen["resume"] = await client.request("resume")
        seen["note"] = await client.request("note", {"text": "sampled A1–A4 for nutrients"})
        seen["skip"] = await client.request("skip-to", {"phase": "warm"})
        seen["nowhere"] = await client.request("skip-to", {"phase": "nowhere"})
        reader, writer = await asyncio.open_unix_connection(str(ctl))
        writer.write(b"skip to warm please\n")
        seen["garbled"] = json.loads(await reader.readline())
        writer.close()
        await run.clock.sleep(120.0)
        seen["abort"] = await client.request("abort")

    async def runner(loop: ControlLoop) -> RunSummary:
        async with asyncio.TaskGroup() as group:
            group.create_task(operator(loop))
            summary = await run_with_control(loop, ctl)
        return summary

    summary = run.run(runner=runner)

    assert summary.end_reason is RunEndReason.ABORTED
    assert not ctl.exists() and not ctl.parent.exists()  # the socket goes with the run
    status = seen["status"].result
    assert status["state"] == "running" and status["phase"] == "acclimation"
    assert set(status["chambers"]) == {"B"}
    assert seen["hold"].ok and not seen["hold again"].ok
    assert seen["hold again"].error == "refused: the run is held already"
    held = seen["held status"].result
    assert held["held"] is True
    # protocol time froze at the hold (20 min of clock time passed since)
    assert held["elapsed_s"] == pytest.approx(status["elapsed_s"], abs=1.0)
    assert seen["resume"].ok and seen["note"].ok and seen["skip"].ok and seen["abort"].ok
    assert not seen["nowhere"].ok and "nowhere" in seen["nowhere"].error

    with RunLogReader(log) as reader:
        audit = reader.audit()
        events = reader.events()
    rows = list(zip(audit["user"], audit["command"], audit["text"], audit["result"], strict=True))
    operator_rows = [r for r in rows if r[1] != "run"]  # "run" is the launch record
    assert operator_rows[0] == (ME, "hold", "", "ok")
    assert operator_rows[1][:2] == (ME, "hold") and operator_rows[1][3].startswith("refused")
    assert (ME, "note", "sampled A1–A4 for nutrients", "ok") in operator_rows
    # a garbled line never reaches a hook: the server audits it in the loop's trail
    garbled = "malformed request: not JSON (Expecting value at column 1)"
    assert seen["garbled"] == {"ok": False, "error": garbled}
    assert [r[1] for r in operator_rows] == [
        "hold",
        "hold",
        "resume",
        "note",
        "skip-to",
        "skip-to",
        "?",
        "abort",
    ]
    assert operator_rows[6] == (ME, "?", "", garbled)
    kinds = list(events["kind"])
    for kind in (EventKind.HOLD, EventKind.HOLD_END, EventKind.SKIP, EventKind.ABORT):
        assert kind.value in kinds
