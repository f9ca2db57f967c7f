"""Breakpoint channels: evaluation and the exact / bounded operations used to combine them."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from controller.protocol import Channel
from controller.protocol._channel import (
    add,
    concat,
    constant,
    cumulative_integral,
    left_limit,
    maximum,
    multiply,
    right_value,
    window,
)


def ch(points: list[tuple[float, float]]) -> Channel:
    t, v = zip(*points, strict=True)
    return Channel(np.array(t), np.array(v))


STEP = ch([(0, 1), (10, 1), (10, 5), (20, 3)])


def test_evaluation_is_right_continuous_and_holds_outside() -> None:
    got = STEP.evaluate(np.array([-5.0, 0.0, 9.999, 10.0, 15.0, 20.0, 99.0]))
    assert got.tolist() == pytest.approx([1, 1, 1, 5, 4, 3, 3])
    assert left_limit(STEP, [10.0]).tolist() == [1.0]
    assert right_value(STEP, [10.0]).tolist() == [5.0]


def test_bad_tables_are_refused() -> None:
    with pytest.raises(ValueError, match="non-decreasing"):
        ch([(0, 1), (5, 1), (4, 2)])
    with pytest.raises(ValueError, match="finite"):
        ch([(0, 1), (5, float("nan"))])
    with pytest.raises(ValueError, match="equal 1-D"):
        Channel(np.array([0.0, 1.0]), np.array([1.0]))


def test_add_is_exact_and_keeps_steps() -> None:
    total = add([STEP, ch([(0, 0), (20, 10)])])
    assert total.t_s.tolist() == [0, 10, 10, 20]
    assert total.v.tolist() == pytest.approx([1, 6, 10, 13])


def test_maximum_inserts_crossings() -> None:
    up, down = ch([(0, 0), (10, 10)]), ch([(0, 8), (10, 0)])
    top = maximum([up, down])
    crossing = 80 / 18
    assert top.t_s.tolist() == pytest.approx([0, crossing, 10])
    assert top.v.tolist() == pytest.approx([8, crossing, 10])


def test_multiply_refines_to_the_tolerance() -> None:
    a, b = ch([(0, 0), (100, 100)]), ch([(0, 1), (100, 0)])
    product = multiply([a, b], tol=0.01)
    t = np.linspace(0, 100, 100_001)
    truth = a.evaluate(t) * b.evaluate(t)
    assert np.max(np.abs(product.evaluate(t) - truth)) <= 0.01 + 1e-12  # equal at midpoints
    # |Δa·Δb|/4 = 25 -> ceil(sqrt(25/0.01)) = 50 pieces
    assert len(product) == 51


def test_window_and_concat_make_steps_where_pieces_disagree() -> None:
    first = window(ch([(0, 0), (10, 10)]), 2, 6)
    assert (first.t_s.tolist(), first.v.tolist()) == ([2, 6], [2, 6])
    joined = concat([first, constant(1.0, 6.0, 8.0)])
    assert joined.t_s.tolist() == [2, 6, 6, 8]
    assert joined.v.tolist() == [2, 6, 1, 1]
    with pytest.raises(ValueError, match="overlap"):
        concat([constant(1.0, 0, 5), constant(1.0, 4, 6)])


def test_cumulative_integral_is_exact() -> None:
    values = cumulative_integral(STEP, [0.0, 10.0, 15.0, 20.0, 30.0])
    assert values.tolist() == pytest.approx([0, 10, 10 + 22.5, 10 + 40, 10 + 40 + 30])


def test_steps_and_slopes_are_reported() -> None:
    times, sizes = STEP.steps()
    assert (times.tolist(), sizes.tolist()) == ([10.0], [4.0])
    assert STEP.max_abs_slope() == (pytest.approx(0.2), 10.0)


tables = st.lists(
    st.tuples(st.integers(0, 50), st.floats(-50, 50, allow_nan=False)), min_size=1, max_size=12
).map(lambda pts: ch(sorted(((float(t), v) for t, v in pts), key=lambda p: p[0])))


def _probe(*channels: Channel) -> np.ndarray:
    t = np.concatenate([np.linspace(-5, 55, 601)] + [c.t_s for c in channels])
    return np.unique(t)


@settings(max_examples=80, deadline=None)
@given(a=tables, b=tables)
def test_add_and_maximum_match_pointwise(a: Channel, b: Channel) -> None:
    t = _probe(a, b)
    assert np.allclose(add([a, b]).evaluate(t), a.evaluate(t) + b.evaluate(t), atol=1e-9)
    assert np.allclose(
        maximum([a, b]).evaluate(t), np.maximum(a.evaluate(t), b.evaluate(t)), atol=1e-9
    )


@settings(max_examples=60, deadline=None)
@given(a=tables, b=tables)
def test_multiply_stays_within_tolerance(a: Channel, b: Channel) -> None:
    t = _probe(a, b)
    product = multiply([a, b], tol=0.05)
    assert np.max(np.abs(product.evaluate(t) - a.evaluate(t) * b.evaluate(t))) <= 0.05 + 1e-9


@settings(max_examples=60, deadline=None)
@given(a=tables, t=st.lists(st.floats(-10, 60, allow_nan=False), min_size=1, max_size=30))
def test_fast_and_exact_evaluation_agree(a: Channel, t: list[float]) -> None:
    probe = np.array(t)
    assert np.allclose(a.evaluate(probe), right_value(a, probe), atol=1e-9)
    dense = np.sort(np.concatenate([probe, np.linspace(-10, 60, 500)]))
    assert np.allclose(a.evaluate(dense), right_value(a, dense), atol=1e-9)
