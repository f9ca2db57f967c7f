"""The O2 of one segment, summed in closed form, against the sub-step recurrence it solves.

``Stepper._oxygen`` gives C_m = a_o^m·(C_0 + Σ_(j<m) a_o^(−(j+1))·u_j) for m = 0..n, with
u_j = φ·S_j + (1 − a_o)·C_sat,j, a_o = e^(−k·h) and φ = (1 − a_o)/k (φ = h without exchange);
the reference steps C_m = a_o·C_(m−1) + u_(m−1) one sub-step at a time (the exact solution of
dC/dt = S − k·(C − C_sat) with S and C_sat held over the sub-step; from memory: the
zero-order-hold discretisation of a first-order process), floored at 0. Exchange rates run
from none to so fast that a_o^(−n) would overflow (the recurrence is stepped then).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from controller.cli.cmd_check import load_rig
from simulator import Rack
from simulator._step import Drive

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"


def reference(
    c0: list[float], net: np.ndarray, sat: np.ndarray, k: list[float], h: float
) -> np.ndarray:
    out = np.empty((len(c0), net.shape[1] + 1))
    for c, (start, rate) in enumerate(zip(c0, k, strict=True)):
        keep = math.exp(-rate * h)
        phi = (1.0 - keep) / rate if rate > 0.0 else h
        value = out[c, 0] = start
        for j in range(net.shape[1]):
            value = max(0.0, keep * value + phi * net[c, j] + (1.0 - keep) * sat[c, j])
            out[c, j + 1] = value
    return out


def segment(r: Rack, exchange: list[float], n: int, h: float, key: int):  # type: ignore[no-untyped-def]
    stepper = r._stepper
    act = r._act
    drive = Drive(
        act.water,
        [],
        act.lit,
        r._par_warm,
        r._flush_w_k,
        exchange,
        r._node_capacity,
        r._volume,
        key,
    )
    return stepper, stepper._grid(n, h), stepper._make_water(n, h, drive)


@pytest.mark.parametrize(("n", "h"), [(1, 1.0), (10, 1.0), (60, 0.5), (600, 1.0)])
def test_closed_form_agrees_with_the_sub_step_recurrence(n: int, h: float) -> None:
    r = Rack(load_rig(EXAMPLE), seed=1)
    rng = np.random.default_rng(n)
    # none, slow and fast flushing, s⁻¹; the last so fast that k·h·n > 500 for n = 600
    exchange = np.array([0.0, 1e-6, 3e-4, 2e-3, 0.02, 0.2, 1.0, rng.uniform(0.0, 5e-3)])
    stepper, grid, water = segment(r, exchange.tolist(), n, h, key=-1)
    grid.terms[:, 0] = rng.uniform(0.0, 0.05, (8, n))  # production, µmol L⁻¹ s⁻¹
    grid.terms[:, 1] = rng.uniform(0.0, 0.02, (8, n))  # respiration
    starts = rng.uniform(10.0, 25.0, (8, n))  # water temperature at sub-step starts, °C
    c0 = rng.uniform(50.0, 300.0, 8)
    got = stepper._oxygen(c0, starts, grid, water)
    sat = stepper._saturation.rows(starts)
    want = reference(c0.tolist(), grid.terms[:, 0] - grid.terms[:, 1], sat, exchange.tolist(), h)
    assert got.shape == (8, n + 1)
    np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-9)
    assert water.scaled == (n * h * 1.0 <= 500.0)


def test_floor_at_zero_is_kept_where_respiration_empties_the_chamber() -> None:
    r = Rack(load_rig(EXAMPLE), seed=1)
    n, h = 60, 1.0
    exchange = np.array([0.0, 0.0, 1e-4, 1e-3, 0.0, 0.0, 0.0, 0.0])
    stepper, grid, water = segment(r, exchange.tolist(), n, h, key=-2)
    grid.terms[:, 0] = 0.0
    grid.terms[:, 1] = 0.5  # strong respiration: 30 µmol L⁻¹ per minute
    starts = np.full((8, n), 20.0)
    c0 = np.array([10.0, 40.0, 5.0, 3.0, 0.0, 25.0, 29.0, 31.0])
    got = stepper._oxygen(c0, starts, grid, water)
    sat = stepper._saturation.rows(starts)
    want = reference(c0.tolist(), grid.terms[:, 0] - grid.terms[:, 1], sat, exchange.tolist(), h)
    assert got.min() >= 0.0
    assert got[0, -1] == 0.0 and got[7, -1] > 0.0  # emptied, and still above zero
    np.testing.assert_allclose(got, want, rtol=1e-11, atol=1e-9)
