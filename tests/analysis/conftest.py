"""Run logs shared by the analysis tests, each built once per test session."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from controller.analysis import Analysis, analyze_log

from ._synth import (
    BLANK_BIO,
    CONTROL_BIO,
    TREATED_BIO,
    PhasePlan,
    Step,
    WindowTruth,
    chamber_table,
    light_curve_phase,
    make_rig,
    temperature_phases,
    write_log,
)


@dataclass(frozen=True)
class TruthLog:
    """A known-truth log, the simulator's truth per window, and its default analysis."""

    path: Path
    truths: list[WindowTruth]
    analysis: Analysis


@pytest.fixture(scope="session")
def truth_log(tmp_path_factory: pytest.TempPathFactory) -> TruthLog:
    """Two control chambers, two treated ones and a blank, stepped 14–30 °C, then a light
    curve at 20 °C; 30 s ticks, light and dark windows at every temperature."""
    path = tmp_path_factory.mktemp("truth") / "metabolism.sqlite"
    rig = make_rig(
        chamber_table("C1", CONTROL_BIO),
        chamber_table("C2", CONTROL_BIO),
        chamber_table("C3", TREATED_BIO),
        chamber_table("C4", TREATED_BIO),
        chamber_table("B1", BLANK_BIO),
    )
    truths = write_log(path, rig, [*temperature_phases(), light_curve_phase()])
    return TruthLog(path=path, truths=truths, analysis=analyze_log(path))


@dataclass(frozen=True)
class FlagLog:
    """A one-chamber log with a good window and three deliberately bad ones."""

    path: Path
    truths: list[WindowTruth]
    analysis: Analysis


@pytest.fixture(scope="session")
def flag_log(tmp_path_factory: pytest.TempPathFactory) -> FlagLog:
    """Windows, in order: good (45 min light), too short (8 min), non-linear (lamp off half
    way), O2 out of band (a 60 min dark window with strong respiration, no early stop)."""
    path = tmp_path_factory.mktemp("flags") / "bad-windows.sqlite"
    heavy = {**CONTROL_BIO, "resp_umol_m2_h": 600.0}
    rig = make_rig(chamber_table("F1", heavy, initial_temperature_c=26.0))
    steps = (
        Step("flush", 30.0, 600.0),
        Step("close", 45.0, 600.0),
        Step("flush", 15.0, 600.0),
        Step("close", 8.0, 600.0),
        Step("flush", 20.0, 600.0),
        Step("close", 60.0, 600.0),
        Step("flush", 20.0, 0.0),
        Step("close", 60.0, 0.0),
        Step("flush", 10.0, 0.0),
    )
    truths = write_log(
        path,
        rig,
        [PhasePlan("hot", 26.0, steps)],
        band_pct=(0.0, 1000.0),
        lamp_off_after_min={2: 30.0},
    )
    return FlagLog(path=path, truths=truths, analysis=analyze_log(path))
