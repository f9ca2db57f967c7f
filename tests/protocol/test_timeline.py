"""Evaluation: setpoints at an instant, vectorised sampling, phases; hypothesis properties."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.protocol import phase_at, phase_index_at, sample, setpoints_at

from ._build import compile_doc, document

H = 3600.0
D = 86400.0


def stepped():  # type: ignore[no-untyped-def]
    data = document(
        [
            {"kind": "hold", "value": 18.0, "duration": "6h"},
            {"kind": "step", "to": 20.0, "duration": "6h"},
            {"kind": "ramp", "to": 14.0, "duration": "12h"},
        ],
        duration="1d",
    )
    data["phases"].append(
        {
            "name": "two",
            "duration": "1d",
            "programs": {"temperature": [{"kind": "hold", "value": 9.0}]},
        }
    )
    return compile_doc(data)


def test_steps_are_right_continuous() -> None:
    compiled = stepped()
    assert setpoints_at(compiled, 6 * H - 1e-6)["C1"].temperature_c == pytest.approx(18.0)
    assert setpoints_at(compiled, 6 * H)["C1"].temperature_c == 20.0
    assert setpoints_at(compiled, D)["C1"].temperature_c == 9.0  # the later value wins
    assert setpoints_at(compiled, 18 * H)["C1"].temperature_c == pytest.approx(17.0)


def test_before_start_and_after_end_hold_the_end_values() -> None:
    compiled = stepped()
    assert setpoints_at(compiled, -100.0)["C1"].temperature_c == 18.0
    assert setpoints_at(compiled, 50 * D)["C1"].temperature_c == 9.0
    assert phase_at(compiled, -1.0) == "only"
    assert phase_at(compiled, 50 * D) == "two"


def test_phase_boundaries_belong_to_the_next_phase() -> None:
    compiled = stepped()
    assert phase_at(compiled, D - 1e-6) == "only"
    assert phase_at(compiled, D) == "two"
    assert phase_index_at(compiled, np.array([0.0, D - 1, D, 2 * D])).tolist() == [0, 0, 1, 1]
    assert setpoints_at(compiled, D)["C2"].phase == "two"


def test_sample_matches_numpy_interp_away_from_steps() -> None:
    compiled = stepped()
    channel = compiled.channels["C1"]["temperature_c"]
    t = np.linspace(1.0, 2 * D - 1, 10_001)
    t = t[~np.isin(t, channel.t_s)]
    got = sample(compiled, t)["C1"]["temperature_c"]
    assert np.allclose(got, np.interp(t, channel.t_s, channel.v), atol=1e-12)


def test_sample_arrays_are_shared_and_read_only() -> None:
    compiled = stepped()
    values = sample(compiled, np.array([0.0, 1.0]))
    assert values["C1"]["temperature_c"] is values["C2"]["temperature_c"]
    with pytest.raises(ValueError):
        values["C1"]["temperature_c"][0] = 1.0


def test_unsorted_and_sorted_times_give_the_same_values() -> None:
    compiled = stepped()
    t = np.random.default_rng(1).uniform(-D, 3 * D, 5000)
    t[:10] = [0.0, 6 * H, D, 2 * D, 12 * H, 24 * H, -5, 3 * D, 6 * H, D]
    unsorted = sample(compiled, t)["C1"]["temperature_c"]
    order = np.argsort(t)
    ordered = sample(compiled, t[order])["C1"]["temperature_c"]
    assert np.array_equal(unsorted[order], ordered)


segment = st.tuples(
    st.sampled_from(["hold", "ramp", "step"]),
    st.floats(min_value=-2.0, max_value=40.0, allow_nan=False),
    st.integers(min_value=1, max_value=48),
)


@settings(max_examples=60, deadline=None)
@given(first=st.floats(min_value=-2.0, max_value=40.0), segments=st.lists(segment, max_size=8))
def test_random_hold_ramp_sequences_stay_within_their_values(
    first: float, segments: list[tuple[str, float, int]]
) -> None:
    blocks = [{"kind": "hold", "value": first, "duration": "1h"}]
    values = [first]
    for kind, value, hours in segments:
        key = "value" if kind == "hold" else "to"
        blocks.append({"kind": kind, key: value, "duration": f"{hours}h"})
        values.append(value)
    hours_total = 1 + sum(h for _, _, h in segments)
    compiled = compile_doc(document(blocks, duration=f"{hours_total}h"))
    t = np.linspace(-H, (hours_total + 1) * H, 2001)
    got = sample(compiled, t)["C1"]["temperature_c"]
    assert got.min() >= min(values) - 1e-9
    assert got.max() <= max(values) + 1e-9
    # the value at each block's end is the block's target
    ends = np.cumsum([1] + [h for _, _, h in segments]) * H
    at_ends = compiled.channels["C1"]["temperature_c"].evaluate(ends - 1e-3)
    assert at_ends == pytest.approx(values, abs=1e-3 * 42 / H + 1e-9)


@settings(max_examples=40, deadline=None)
@given(times=st.lists(st.floats(min_value=-D, max_value=3 * D), min_size=1, max_size=40))
def test_sample_equals_setpoints_at_pointwise(times: list[float]) -> None:
    compiled = stepped()
    t = np.array(times)
    sampled = sample(compiled, t)
    for k, instant in enumerate(times):
        points = setpoints_at(compiled, instant)
        for chamber in ("C1", "C2"):
            assert sampled[chamber]["temperature_c"][k] == points[chamber].temperature_c
