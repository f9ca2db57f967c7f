"""Fixtures of the view tests: a real simulated run (made once, on the virtual clock) and
invented logs written tick by tick. Nothing here waits on real time: sources get fixed clocks
and apps poll only when a test says so."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from controller.rig import Fault, FaultKind
from controller.runtime import RunSettings, SimulatedRun
from controller.storage import AlarmLevel
from controller.tui import SyntheticRun

from ._rig import protocol_text, rig_text

SIM_CHAMBERS = ("P1", "P2", "P3")
"""Chambers of the simulated run; P2's heater sticks on and trips over-temperature."""


@pytest.fixture(scope="package")
def sim_log(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A finished 2-hour simulated run of three chambers (20 s ticks) with a real trip, made
    once for the whole test package (it is the slow part)."""
    folder = tmp_path_factory.mktemp("simlog")
    (folder / "rig.toml").write_text(rig_text(SIM_CHAMBERS))
    (folder / "protocol.toml").write_text(protocol_text(SIM_CHAMBERS))
    run = SimulatedRun.prepare(
        folder / "protocol.toml",
        folder / "rig.toml",
        folder / "run.sqlite",
        settings=RunSettings(period_s=20.0),
    )
    run.rack.inject(Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="P2", at_s=1800.0))
    run.run()
    return folder / "run.sqlite"


MakeSynthetic = Callable[..., SyntheticRun]


@pytest.fixture
def synthetic(tmp_path: Path) -> Iterator[MakeSynthetic]:
    """Factory of invented live logs in the test's folder; writers are closed afterwards."""
    made: list[SyntheticRun] = []

    def make(name: str = "live", **kw: object) -> SyntheticRun:
        run = SyntheticRun(tmp_path / f"{name}.sqlite", **kw)  # type: ignore[arg-type]
        made.append(run)
        return run

    yield make
    for run in made:
        if not run.writer.closed:
            run.writer.close()


def with_trip(run: SyntheticRun, ticks: int = 120) -> SyntheticRun:
    """Write ``ticks`` ticks, a trip on C03, and a few ticks more (the log stays live)."""
    run.run_ticks(ticks)
    run.raise_alarm("C03", "over-temperature", AlarmLevel.TRIP, "27.1 °C at or above 26.0 °C")
    run.run_ticks(3)
    return run
