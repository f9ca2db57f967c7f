"""Commanding every chamber in one call, and the float short-cuts of a control tick, against
the long way round (the rack against itself; invented drives, no outside reference needed).

- ``Rack.set_outputs_all`` must leave a rack exactly where ``set_outputs`` on each row in turn
  leaves it, and a bad row must fail as ``set_outputs`` fails on it without stopping the
  others.
- The stepper skips the stress reduction over a segment's temperature path when a float
  bound (start and settling temperatures of each node) keeps every node below the lowest
  threshold: the bound must hold for every segment, whatever the heaters do and whenever
  their power arrives.
- The heat ledger folds the flushing loss per stretch of constant flow; a rack whose pumps
  change every tick must end with the loss of one whose pumps never changed, summed the long
  way: G·∫(T − T_in)dt per segment.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from controller.cli.cmd_check import load_rig
from simulator import Rack
from simulator._heat import HeatLedger

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"


def rows(r: Rack, t: int) -> list[tuple[str, float, float, float, float]]:
    return [
        (
            cid,
            float((13 * i + 7 * t) % 90),
            float((5 * i + t) % 4),
            0.0 if (i + t // 3) % 4 == 0 else 15.0 + (3 * t + i) % 60,
            float(5 + (11 * i + 17 * t) % 90),
        )
        for i, cid in enumerate(r.chamber_ids)
    ]


def test_commanding_all_chambers_at_once_steps_as_one_by_one() -> None:
    rig = load_rig(EXAMPLE)
    batched, single = Rack(rig, seed=3), Rack(rig, seed=3)
    ids = batched.chamber_ids
    for t in range(25):
        commands = rows(batched, t)
        assert batched.set_outputs_all(commands) == [None] * len(ids)
        for cid, heater, chiller, lamp, pump in commands:
            single.set_outputs(
                cid, heater_pct=heater, chiller_pct=chiller, lamp_pct=lamp, pump_pct=pump
            )
        batched.advance(10.0)
        single.advance(10.0)
        for cid in ids:
            assert batched.outputs(cid) == single.outputs(cid)
            assert dataclasses.asdict(batched.truth(cid)) == dataclasses.asdict(single.truth(cid))
        optode = [t % 3 == 0] * len(ids)
        assert batched.sweep(ids, optode) == single.sweep(ids, optode)


def test_a_bad_row_fails_alone_as_set_outputs_would() -> None:
    r = Rack(load_rig(EXAMPLE), seed=1)
    a, b, c = r.chamber_ids[4:7]  # chambers with their own water (own heater)
    before = r.outputs(b)
    errors = r.set_outputs_all(
        [
            (a, 10.0, 0.0, 20.0, 30.0),
            (b, 10.0, 0.0, 120.0, 30.0),  # lamp above 100 %
            ("nowhere", 1.0, 1.0, 1.0, 1.0),
            (c, 40.0, 5.0, float("nan"), 30.0),
        ]
    )
    assert errors[0] is None
    assert isinstance(errors[1], ValueError) and "lamp_pct" in str(errors[1])
    assert isinstance(errors[2], KeyError)
    assert isinstance(errors[3], ValueError) and "lamp_pct" in str(errors[3])
    with pytest.raises(ValueError, match="lamp_pct") as single:
        r.set_outputs(b, heater_pct=10.0, chiller_pct=0.0, lamp_pct=120.0, pump_pct=30.0)
    assert str(single.value) == str(errors[1])
    r.advance(1.0)
    assert r.outputs(a).lamp_pct == 20.0 and r.outputs(a).pump_pct == 30.0
    assert r.outputs(b) == before  # nothing of the bad row was taken


def test_the_float_bound_of_a_segment_holds_its_temperature_path() -> None:
    r = Rack(load_rig(EXAMPLE), seed=2)
    stepper = r._stepper
    seen: list[tuple[float, float, bool]] = []
    thermal = stepper._thermal

    def spy(*args, **kwargs):  # type: ignore[no-untyped-def]
        path, excess, bound = thermal(*args, **kwargs)
        seen.append((float(path.max()), bound, bool(args[1].arrivals)))
        return path, excess, bound

    stepper._thermal = spy  # type: ignore[method-assign]
    for t in range(60):
        heat = 100.0 if (t // 10) % 2 == 0 else 0.0  # heat up hard, then cool down
        r.set_outputs_all([(cid, heat, 0.0, 40.0, 30.0) for cid in r.chamber_ids])
        r.advance(10.0 if t % 7 else 3.5)  # some segments end between sub-steps
    assert len(seen) >= 60
    for hottest, bound, _ in seen:
        assert hottest <= bound + 1e-9
    # without power arriving mid-segment the bound is the path's own maximum (its higher end)
    assert all(bound == hottest for hottest, bound, arrived in seen if not arrived)
    # power arrived mid-segment (dead times of 25 s) in some segments, and was bounded too
    assert any(arrived for _, _, arrived in seen)


def test_the_flushing_loss_folded_per_epoch_is_the_loss_summed_per_segment() -> None:
    r = Rack(load_rig(EXAMPLE), seed=5)
    p = r._p
    node_of = p.node_of_chamber.tolist()
    summed = np.zeros(len(p.node_names))
    for t in range(40):
        r.set_outputs_all(rows(r, t))
        r.advance(0.0)  # the new flows take effect now
        before = r._heat.excess_k_s
        flush_w_k = np.zeros(len(p.node_names))
        for i, node in enumerate(node_of):
            flush_w_k[node] += r._act.flush_l_s[i] * float(p.rho_cp_j_l_k[i])
        r.advance(10.0)
        excess = np.array(r._heat.excess_k_s) - np.array(before)
        inflow = excess + (p.room_temperature_c - p.inflow_temperature_c) * 10.0
        summed += flush_w_k * inflow
    got = np.array(r._heat.flush_loss_j())
    assert np.abs(summed).max() > 0.0
    np.testing.assert_allclose(got, summed, rtol=1e-9)


def test_a_drive_that_is_not_a_number_fails_its_row_alone() -> None:
    # the all-good pass stops at the comparison; the row-by-row pass names the culprit
    r = Rack(load_rig(EXAMPLE), seed=1)
    a, b = r.chamber_ids[4:6]
    errors = r.set_outputs_all(
        [(a, 10.0, 0.0, 20.0, 30.0), (b, 10.0, "warm", 20.0, 30.0)]  # type: ignore[list-item]
    )
    assert errors[0] is None and isinstance(errors[1], TypeError)
    r.advance(1.0)
    assert r.outputs(a).lamp_pct == 20.0 and r.outputs(b).lamp_pct == 0.0


def test_a_new_epoch_of_the_heat_ledger_is_close_then_set_flow() -> None:
    """HeatLedger.new_epoch (what a control tick uses, its pumps trimming) must leave the
    ledger where close with its own totals and set_flow leave it (invented numbers)."""
    fast, slow = HeatLedger(3, 21.0, 17.5), HeatLedger(3, 21.0, 17.5)
    for t in range(20):
        excess = [0.1 * t - 0.3 * j for j in range(3)]
        flow = [(t * 7 + j) % 5 * 0.31 for j in range(3)]
        for ledger in (fast, slow):
            ledger.add(excess, 10.0)
        fast.new_epoch(flow)
        slow.close(slow.flush_loss_j(), slow.excess_k_s, slow.span_s)
        slow.set_flow(flow)
        assert fast.flush_loss_j() == slow.flush_loss_j()
        assert fast.excess_k_s == slow.excess_k_s and fast.span_s == slow.span_s
    assert any(v != 0.0 for v in fast.flush_loss_j())
