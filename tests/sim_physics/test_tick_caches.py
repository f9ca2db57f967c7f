"""What the rack keeps between control ticks is seen to change when its inputs change.

Each per-tick cache (the stepper's coefficient tables per water configuration, the light of
settled lamps keyed on the lamp arrays, the heat capacity kept per volume version, the lit
pattern's array kept while the pattern holds) is a pure function of what it is keyed on. A
twin rack that throws every cache away before every tick must therefore step to the very same
numbers while pumps, lamps and heaters change every tick, a leak shrinks a chamber mid-run
and a pump fails (invented drives, no outside reference needed: the rack against itself).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest

from controller.cli.cmd_check import load_rig
from controller.rig import Fault, FaultKind
from simulator import Rack

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"


def forget(r: Rack) -> None:
    """Throw away everything the rack and its stepper keep between ticks."""
    stepper = r._stepper
    stepper._waters.clear()
    stepper._grids.clear()
    stepper._light_key = (None, None)
    stepper._scale_key = None
    r._capacity_version = -1
    r._water_key = (-1, -1)  # the flows and volumes are configured afresh
    act = r._act
    act.lit = act.lit.copy()  # a new array object: the identity tests fail on purpose
    r._sweep_consts = None
    r._age_steps.clear()


def drive(r: Rack, t: int) -> None:
    for i, cid in enumerate(r.chamber_ids):
        r.set_outputs(
            cid,
            heater_pct=float((13 * i + 7 * t) % 70),
            chiller_pct=float((5 * i + t) % 3),
            lamp_pct=0.0 if (i + t // 4) % 3 == 0 else 20.0 + (3 * t + i) % 50,
            pump_pct=float(10 + (11 * i + 17 * t) % 80),
        )


def test_a_rack_that_forgets_every_tick_steps_to_the_same_numbers() -> None:
    rig = load_rig(EXAMPLE)
    kept, fresh = Rack(rig, seed=4), Rack(rig, seed=4)
    ids = kept.chamber_ids
    events = {
        6: Fault(kind=FaultKind.LEAK, chamber=ids[2], magnitude=30.0, duration_s=95.0),
        14: Fault(kind=FaultKind.PUMP_FAILURE, chamber=ids[5], duration_s=40.0),
    }
    for t in range(30):
        if t in events:
            kept.inject(events[t])
            fresh.inject(events[t])
        drive(kept, t)
        drive(fresh, t)
        forget(fresh)
        kept.advance(10.0)
        fresh.advance(10.0)
        for cid in ids:
            a = dataclasses.asdict(kept.truth(cid))
            b = dataclasses.asdict(fresh.truth(cid))
            # flushing loss is folded per stretch of constant flow: forgetting closes a
            # stretch every tick, which only reorders that sum
            assert b.pop("flush_loss_j") == pytest.approx(a.pop("flush_loss_j"), rel=1e-12)
            assert a == b, (t, cid)
        optode = [t % 3 == 0] * len(ids)
        assert kept.sweep(ids, optode) == fresh.sweep(ids, optode)
    assert kept.truth(ids[2]).water_volume_l < float(kept._p.volume_l[2])  # it leaked


def test_heat_capacity_follows_the_volume_a_leak_leaves() -> None:
    r = Rack(load_rig(EXAMPLE), seed=1)
    before = r._node_capacity.copy()
    r.inject(Fault(kind=FaultKind.LEAK, chamber=r.chamber_ids[0], magnitude=60.0))
    for _ in range(12):
        r.set_outputs(r.chamber_ids[0], pump_pct=40.0)
        r.advance(10.0)
    r.clear_faults(FaultKind.LEAK)
    r.advance(10.0)  # the volume the leak left is configured at this segment's start
    node = int(r._p.node_of_chamber[0])
    assert r._node_capacity[node] < before[node]
    np.testing.assert_array_equal(r._node_capacity, r._capacity())


def test_the_lit_array_is_kept_while_the_pattern_holds_and_replaced_when_it_changes() -> None:
    r = Rack(load_rig(EXAMPLE), seed=1)
    cid = r.chamber_ids[0]
    r.set_outputs(cid, lamp_pct=40.0)
    r.advance(10.0)
    lit = r._act.lit
    r.set_outputs(cid, lamp_pct=70.0)  # brighter, still lit: same pattern, same array
    r.advance(10.0)
    assert r._act.lit is lit
    assert r._act.new_lamp_par[0] > 0.0
    r.set_outputs(cid, lamp_pct=0.0)  # off: a new pattern, a new array
    r.advance(10.0)
    assert r._act.lit is not lit
    assert r._act.lit[0] == 0.0 and not r._act.any_lit
