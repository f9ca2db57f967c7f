"""The closed-incubation cycle as a pure state machine: table, precedence, look-ahead, pinning.

Band, durations and settling times are the common-practice figures of closed benthic
incubations (80–120 % air saturation, 30–120 min per run, 15–30 min acclimation after the
light changes; common practice), scaled down where a test only needs their order.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from controller.control import (
    CycleInputs,
    CycleSignal,
    CycleState,
    IllegalCycleSignal,
    IncubationSettings,
    IncubationStatus,
    WindowEnd,
    cycle_step,
    cycle_table_markdown,
    end_window,
    light_change_times,
    next_status,
)

OPEN, CLOSED = IncubationStatus.OPEN, IncubationStatus.CLOSED
SETTINGS = IncubationSettings(
    o2_low_pct=80.0,
    o2_high_pct=120.0,
    min_closed_s=600.0,
    max_closed_s=3600.0,
    flush_s=900.0,
    settle_s=300.0,
    reclose_margin_pct=5.0,
    o2_stale_after_s=120.0,
)


def tick(
    t_s: float,
    *,
    o2: float | None = 100.0,
    light: bool = True,
    change_in_s: float = math.inf,
    phase: str = "p",
    ends_in_s: float = math.inf,
    forced: bool = False,
) -> CycleInputs:
    return CycleInputs(
        t_s=t_s,
        o2_sat_pct=o2,
        light=light,
        light_change_in_s=change_in_s,
        phase=phase,
        phase_ends_in_s=ends_in_s,
        forced=forced,
    )


def run(
    inputs: list[CycleInputs], settings: IncubationSettings = SETTINGS
) -> tuple[CycleState, list]:
    """Feed ticks from a fresh state; return the final state and every step."""
    state, steps = CycleState(), []
    for item in inputs:
        step = cycle_step(state, item, settings)
        state = step.state
        steps.append(step)
    return state, steps


def closed_at(t_s: float = 1000.0, **kw: object) -> CycleState:
    """A state closed at clock time ``t_s`` (after a flush from 0 s)."""
    state, steps = run([tick(0.0, **kw), tick(t_s, **kw)])  # type: ignore[arg-type]
    assert steps[-1].signal is CycleSignal.CLOSE and state.status is CLOSED
    return state


# -- the table ---------------------------------------------------------------------------


def test_the_table_allows_exactly_five_transitions_and_renders_them() -> None:
    legal = {
        (OPEN, CycleSignal.STAY): OPEN,
        (OPEN, CycleSignal.CLOSE): CLOSED,
        (OPEN, CycleSignal.FLUSH): OPEN,
        (CLOSED, CycleSignal.STAY): CLOSED,
        (CLOSED, CycleSignal.FLUSH): OPEN,
    }
    for (status, signal), after in legal.items():
        assert next_status(status, signal) is after
    with pytest.raises(IllegalCycleSignal, match=r"'close' is not allowed while .* closed"):
        next_status(CLOSED, CycleSignal.CLOSE)
    table = cycle_table_markdown()
    assert table.count("\n") == 2 + len(legal)
    assert "| closed | flush | open |" in table


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"o2_low_pct": 120.0}, "the O2 band is empty"),
        ({"reclose_margin_pct": 20.0}, "leaves nothing of the 80–120 % band"),
        ({"min_closed_s": 7200.0}, "longer than max_closed_s"),
        ({"flush_s": 0.0}, "flush_s must be a finite number above 0"),
        ({"settle_s": -1.0}, "settle_s must be a finite number, 0 or more"),
        ({"o2_high_pct": math.nan}, "o2_high_pct must be a finite number above 0"),
    ],
)
def test_contradictory_settings_are_refused(change: dict[str, float], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        replace(SETTINGS, **change)


# -- opening, closing --------------------------------------------------------------------


def test_a_chamber_starts_open_and_closes_once_the_flush_time_has_passed() -> None:
    state, steps = run([tick(t) for t in (0.0, 600.0, 899.0, 900.0, 1000.0)])
    assert [s.signal for s in steps] == [
        CycleSignal.STAY,
        CycleSignal.STAY,
        CycleSignal.STAY,
        CycleSignal.CLOSE,
        CycleSignal.STAY,
    ]
    assert steps[3].closed and state.status is CLOSED
    assert state.since_t_s == 900.0 and state.window_light is True and state.window_o2_pct == 100.0


@pytest.mark.parametrize(
    ("kw", "why"),
    [
        ({"o2": None}, "no fresh O2 reading"),
        ({"o2": 84.9}, "inside the band but within the re-close margin of 80 %"),
        ({"o2": 115.1}, "within the re-close margin of 120 %"),
        ({"forced": True}, "interlocks force the outputs"),
        ({"change_in_s": 599.0}, "the light switches before a minimum window would end"),
        ({"ends_in_s": 599.0}, "the phase ends before a minimum window would end"),
    ],
)
def test_an_open_chamber_stays_open_when_a_window_could_not_be_kept(
    kw: dict[str, object], why: str
) -> None:
    _, steps = run([tick(0.0), tick(1000.0, **kw)])  # type: ignore[arg-type]
    assert steps[-1].signal is not CycleSignal.CLOSE, why
    assert not steps[-1].closed


def test_a_light_change_delays_closing_by_the_settling_time() -> None:
    _, steps = run([tick(0.0, light=False), tick(1000.0, light=True), tick(1299.0), tick(1300.0)])
    assert [s.signal for s in steps[1:]] == [
        CycleSignal.STAY,
        CycleSignal.STAY,
        CycleSignal.CLOSE,
    ]


# -- ending windows, in order of precedence ---------------------------------------------


@pytest.mark.parametrize(
    ("kw", "reason", "words"),
    [
        ({"o2": 120.4}, WindowEnd.O2_HIGH, "O2 120.4 % above 120 %"),
        ({"o2": 79.9}, WindowEnd.O2_LOW, "O2 79.9 % below 80 %"),
        ({"phase": "q"}, WindowEnd.PHASE_CHANGE, "phase 'q' began"),
        ({"light": False}, WindowEnd.LIGHT_CHANGE, "the light went off"),
        ({"forced": True}, WindowEnd.ALARM, "the interlocks forced the outputs safe"),
        # an interlock wins over O2 leaving the band and over a phase change
        ({"forced": True, "o2": 130.0, "phase": "q"}, WindowEnd.ALARM, "interlocks"),
        # a phase change wins over a light change and over O2
        ({"phase": "q", "light": False, "o2": 70.0}, WindowEnd.PHASE_CHANGE, "phase 'q'"),
    ],
)
def test_a_closed_window_ends_with_the_first_reason_that_applies(
    kw: dict[str, object], reason: WindowEnd, words: str
) -> None:
    state = closed_at(1000.0)
    step = cycle_step(state, tick(1500.0, **kw), SETTINGS)  # type: ignore[arg-type]
    assert step.signal is CycleSignal.FLUSH and step.state.status is OPEN
    assert step.window is not None
    assert step.window.reason is reason and words in step.window.detail
    assert (step.window.start_t_s, step.window.end_t_s, step.window.light) == (1000.0, 1500.0, True)


def test_a_window_ends_at_its_maximum_duration_and_not_a_tick_before() -> None:
    state = closed_at(1000.0)
    before = cycle_step(state, tick(1000.0 + 3599.0), SETTINGS)
    assert before.signal is CycleSignal.STAY and before.window is None
    at = cycle_step(before.state, tick(1000.0 + 3600.0), SETTINGS)
    assert at.window is not None and at.window.reason is WindowEnd.MAX_DURATION


def test_o2_leaving_the_band_ends_even_a_window_shorter_than_the_minimum() -> None:
    state = closed_at(1000.0)
    step = cycle_step(state, tick(1060.0, o2=79.0), SETTINGS)
    assert step.window is not None and step.window.reason is WindowEnd.O2_LOW
    assert step.window.end_t_s - step.window.start_t_s < SETTINGS.min_closed_s


def test_a_silent_optode_is_tolerated_for_a_while_then_the_chamber_is_flushed() -> None:
    state = closed_at(1000.0)
    quiet = cycle_step(state, tick(1110.0, o2=None), SETTINGS)  # seen last at 1000 s
    assert quiet.signal is CycleSignal.STAY
    step = cycle_step(quiet.state, tick(1120.0, o2=None), SETTINGS)
    assert step.window is not None and step.window.reason is WindowEnd.ALARM
    assert step.window.detail == "no oxygen reading for 120 s"


def test_after_a_window_the_chamber_flushes_before_it_closes_again() -> None:
    state = closed_at(1000.0)
    ended = cycle_step(state, tick(2000.0, o2=121.0), SETTINGS)
    early = cycle_step(ended.state, tick(2000.0 + 899.0), SETTINGS)
    later = cycle_step(early.state, tick(2000.0 + 900.0), SETTINGS)
    assert (early.signal, later.signal) == (CycleSignal.STAY, CycleSignal.CLOSE)


def test_an_alarm_or_phase_change_while_open_restarts_the_flush() -> None:
    _, steps = run([tick(0.0), tick(800.0, forced=True), tick(1000.0), tick(1700.0)])
    assert steps[1].signal is CycleSignal.FLUSH and steps[1].window is None
    assert steps[2].signal is CycleSignal.STAY  # 900 s since 0 s, but only 200 s since 800 s
    assert steps[3].signal is CycleSignal.CLOSE
    _, steps = run([tick(0.0), tick(800.0, phase="q"), tick(1000.0, phase="q")])
    assert steps[1].signal is CycleSignal.FLUSH and steps[2].signal is CycleSignal.STAY


def test_an_operator_ends_a_window_from_outside_the_tick() -> None:
    state = closed_at(1000.0)
    step = end_window(state, 1300.0, WindowEnd.OPERATOR, "skipped")
    assert step.window is not None and step.window.reason is WindowEnd.OPERATOR
    assert step.state.status is OPEN and step.state.since_t_s == 1300.0
    again = end_window(step.state, 1400.0, WindowEnd.RUN_END)
    assert again.window is None and again.state.since_t_s == 1400.0  # flush restarted
    with pytest.raises(ValueError, match="t_s must be finite"):
        end_window(state, math.nan, WindowEnd.OPERATOR)


# -- pinned to the light schedule --------------------------------------------------------

PINNED = replace(SETTINGS, pinned_to_light=True, max_closed_s=20000.0)


def test_pinned_one_window_per_light_period_closing_after_the_settling_time() -> None:
    day_s = 12 * 3600.0
    # the light came on at 0 s and goes off at 12 h
    state, steps = run(
        [tick(t, change_in_s=day_s - t) for t in (0.0, 299.0, 300.0, 899.0, 900.0)], PINNED
    )
    # settled at 300 s, but the flush (since the first tick) lasts until 900 s
    assert [s.signal for s in steps].index(CycleSignal.CLOSE) == 4
    ended = cycle_step(state, tick(5000.0, o2=121.0, change_in_s=day_s - 5000.0), PINNED)
    assert ended.window is not None and ended.window.reason is WindowEnd.O2_HIGH
    later = cycle_step(ended.state, tick(9000.0, change_in_s=day_s - 9000.0), PINNED)
    assert later.signal is CycleSignal.STAY  # the light period had its window
    night = cycle_step(later.state, tick(day_s, light=False, change_in_s=day_s), PINNED)
    settled = cycle_step(night.state, tick(day_s + 300.0, light=False, change_in_s=day_s), PINNED)
    assert (night.signal, settled.signal) == (CycleSignal.STAY, CycleSignal.CLOSE)
    assert settled.state.window_light is False


def test_pinned_a_window_ends_one_flush_before_the_light_changes() -> None:
    state = closed_at(1000.0, change_in_s=10000.0)
    state = replace(state, period_used=True)
    keep = cycle_step(state, tick(2000.0, change_in_s=901.0), PINNED)
    assert keep.signal is CycleSignal.STAY
    step = cycle_step(keep.state, tick(2100.0, change_in_s=900.0), PINNED)
    assert step.window is not None and step.window.reason is WindowEnd.LIGHT_CHANGE
    assert "the light period ends in 15.0 min" in step.window.detail


def test_pinned_no_window_starts_without_room_for_the_minimum_before_the_flush() -> None:
    # 1499 s to the light change: minus the 900 s pre-change flush leaves < 600 s
    _, steps = run([tick(0.0), tick(1000.0, change_in_s=1499.0)], PINNED)
    assert steps[-1].signal is CycleSignal.STAY
    _, steps = run([tick(0.0), tick(1000.0, change_in_s=1500.0)], PINNED)
    assert steps[-1].signal is CycleSignal.CLOSE


# -- light-change times of a PAR schedule ------------------------------------------------


def test_light_changes_of_steps_and_ramps() -> None:
    t = np.array([0.0, 100.0, 100.0, 200.0, 300.0, 400.0])
    par = np.array([0.0, 0.0, 500.0, 500.0, 0.0, 0.0])  # step on at 100 s, ramp off 200–300 s
    changes = light_change_times(t, par, threshold=1.0)
    assert changes[0] == 100.0
    assert changes[1] == pytest.approx(300.0 - 100.0 / 500.0)  # crosses 1 µmol on the ramp
    assert len(changes) == 2


def test_a_rising_ramp_is_light_only_above_the_threshold() -> None:
    changes = light_change_times([0.0, 10.0], [0.0, 10.0], threshold=5.0)
    assert len(changes) == 1 and changes[0] > 5.0 and changes[0] == pytest.approx(5.0)


def test_a_constant_schedule_never_changes() -> None:
    assert light_change_times([0.0, 3600.0], [300.0, 300.0], 1.0).size == 0
    assert light_change_times([0.0], [0.0], 1.0).size == 0
