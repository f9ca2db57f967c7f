"""The vectorised first-order recurrence against the plain step-by-step loop it replaces."""

from __future__ import annotations

import numpy as np
import pytest

from simulator._physics import series_recurrence


def _loop(a: np.ndarray, u: np.ndarray, y0: np.ndarray, floor: bool) -> np.ndarray:
    a = np.broadcast_to(a, u.shape)
    out = np.empty_like(u)
    y = y0.astype(float).copy()
    for k in range(u.shape[1]):
        y = a[:, k] * y + u[:, k]
        if floor:
            y = np.maximum(y, 0.0)
        out[:, k] = y
    return out


def _factors(rng: np.random.Generator, length: int) -> np.ndarray:
    """Rows of every kind: slow, fast, zero, one, one step that forgets, forgetting steps."""
    a = np.exp(-rng.uniform(0.0, 0.3, (7, length)))
    a[1] = np.exp(-rng.uniform(0.0, 800.0, length))  # many steps forget everything
    a[2] = 0.0
    a[3] = 1.0
    a[4, length // 2] = 0.0
    a[5] = 1.0 - 1e-6
    return a


@pytest.mark.parametrize("floor", [False, True])
def test_varying_factors_match_the_loop(floor: bool) -> None:
    rng = np.random.default_rng(2)
    a = _factors(rng, 3000)
    u = rng.normal(0.0, 1.0, a.shape)
    y0 = np.abs(rng.normal(0.0, 1.0, 7))
    expected = _loop(a, u, y0, floor)
    assert np.max(np.abs(series_recurrence(a, u, y0, floor=floor) - expected)) < 1e-12
    if floor:
        assert (expected == 0.0).any()


@pytest.mark.parametrize("floor", [False, True])
def test_constant_factors_match_the_loop(floor: bool) -> None:
    rng = np.random.default_rng(3)
    a = np.array([[0.9], [0.0], [1.0], [0.5], [1.0 - 1e-9]])
    u = rng.normal(0.2, 1.0, (5, 4000))
    y0 = np.array([1.0, 2.0, 0.0, 5.0, 3.0])
    expected = _loop(a, u, y0, floor)
    assert np.max(np.abs(series_recurrence(a, u, y0, floor=floor) - expected)) < 1e-12


def test_long_slow_decay_keeps_precision() -> None:
    # a thermal node: a = e^(−1/1e5) over 600 000 steps of a constant input settles at
    # u/(1 − a); the vectorised solution must not drift from the exact geometric sum.
    a = np.array([[np.exp(-1e-5)]])
    u = np.full((1, 600_000), 2.0)
    y = series_recurrence(a, u, np.array([0.0]))
    k = np.arange(1, 600_001)
    exact = 2.0 * -np.expm1(-1e-5 * k) / -np.expm1(-1e-5)
    assert np.max(np.abs(y[0] - exact) / exact) < 1e-12
