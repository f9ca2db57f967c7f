"""``squall serve`` on devices: the rig's ``[io]`` table, not ``--sim``.

``squall simulate`` serves a two-chamber rig on loopback in real time (Modbus TCP modules,
optodes on pseudo-terminals), as a rack on the bench would be; ``squall serve`` (its own
process, the real clock, 1 s ticks) takes an experiment booked a few seconds ahead, checks
the devices in its preflight, runs it through the modules and optodes, and records it done.
Checked: the history planned → preflight → running → done with the run's log beside the
schedule, every tick of the run logged for both chambers with a temperature and an oxygen
reading, and the experiment started at its booked time (not before).

Other processes are involved, so the test waits in real time, every wait bounded; it takes
some 30 s, mostly the two processes' start-up and the 20 s protocol.
"""

from __future__ import annotations

import asyncio
import sys
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from controller.schedule import ExperimentState, ScheduleStore
from controller.storage import RunEndReason, RunLogReader

from ._rigs import protocol_text, rig_text
from .test_sigkill_resume import IO, simulator

pytestmark = pytest.mark.timeout(180)

CHAMBERS = ("D1", "D2")
RUN_S = 20
LEAD_S = 8.0
"""How far ahead of now the experiment is booked: serve must be up and waiting by then, s."""


async def test_serve_runs_a_booked_experiment_on_the_devices_and_records_it_done(
    tmp_path: Path,
) -> None:
    (tmp_path / "rig.toml").write_text(rig_text(CHAMBERS, extra=IO), encoding="utf-8")
    protocol = tmp_path / "protocol.toml"
    text = protocol_text(CHAMBERS, phases=(("hold", f"{RUN_S}s"),), incubation="")
    protocol.write_text(text, encoding="utf-8")
    schedule = tmp_path / "runs" / "schedule.sqlite"
    async with simulator(tmp_path):
        start = datetime.now(UTC).replace(microsecond=0) + timedelta(seconds=LEAD_S)
        with ScheduleStore(schedule) as store:
            exp = store.add(
                rig_path=tmp_path / "rig.toml", protocol_path=protocol, start_utc=start, owner="ana"
            )
        argv = ["serve", "--rig", str(tmp_path / "rig.toml"), "--schedule", str(schedule)]
        argv += ["--period", "1", "--until", (start + timedelta(seconds=1)).isoformat()]
        proc = await asyncio.create_subprocess_exec(
            sys.executable,
            "-m",
            "controller",
            *argv,
            stdout=asyncio.subprocess.PIPE,
            stderr=asyncio.subprocess.PIPE,
        )
        async with asyncio.timeout(120.0):
            out, err = await proc.communicate()
    assert proc.returncode == 0, err.decode()
    assert f"{exp.id} done" in out.decode()
    with ScheduleStore(schedule) as store:
        done = store.get(exp.id)
        history = store.history(exp.id)
    assert [h.to_state for h in history] == [
        ExperimentState.PLANNED,
        ExperimentState.PREFLIGHT,
        ExperimentState.RUNNING,
        ExperimentState.DONE,
    ]
    assert history[1].time_utc >= start  # nothing began before its booked time
    assert done.log_path is not None and done.log_path.parent == schedule.parent
    with RunLogReader(done.log_path) as reader:
        end = reader.info().end
        assert end is not None and end.end_reason is RunEndReason.COMPLETED
        rows = reader.samples(columns=["chamber", "temperature_c", "o2_umol_l"])
    for chamber in CHAMBERS:
        mine = rows[rows.chamber == chamber]
        assert RUN_S - 2 <= len(mine) <= RUN_S + 1  # a 1 s tick for 20 s
        assert mine.temperature_c.notna().all()  # every tick read its module
        assert mine.o2_umol_l.notna().iloc[5:].all()  # the optode's first reply takes a poll
