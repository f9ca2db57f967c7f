"""Rack.sweep (all chambers read at once) against the one-by-one reads it replaces.

The reference is the rack's own ``read_temperature``/``read_par``/``read_flow``/
``read_level_ok``/``read_optode`` called chamber by chamber, on a twin rack with the same
seed: the sweep must give the same readings, raise nothing where they raised nothing, and
leave the noise generator in the same state (it drew the same numbers in the same order).
The O2 saturation behind ``o2_sat_pct`` is ``controller.science.oxygen.solubility`` (Garcia &
Gordon 1992) either way; the vectorised call must agree with the per-reading calls to 1e-9.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from sim_rigs import chamber, rack

from controller.cli.cmd_check import load_rig
from controller.rig import Fault, FaultKind
from simulator import Rack, SensorNoReply
from simulator._readout import Sweep

EXAMPLE = Path(__file__).parents[2] / "rigs" / "saltmarrow-rack8.toml"
REL = 1e-9


def one_by_one(r: Rack, ids: list[str], optode: list[bool]) -> Sweep:
    """What reading each chamber in turn gives (the reference)."""
    n = len(ids)
    out = Sweep([None] * n, [None] * n, [None] * n, [None] * n, [None] * n, [None] * n, [None] * n)
    for k, cid in enumerate(ids):
        try:
            for name, reader in (
                ("temperature_c", r.read_temperature),
                ("par", r.read_par),
                ("flow_cm_s", r.read_flow),
            ):
                try:
                    getattr(out, name)[k] = float(reader(cid))
                except SensorNoReply:
                    pass
            out.level_ok[k] = r.read_level_ok(cid)
            if optode[k]:
                try:
                    reading = r.read_optode(cid)
                except SensorNoReply:
                    continue
                out.o2_umol_l[k] = reading.o2_umol_l
                out.o2_sat_pct[k] = reading.o2_sat_pct
        except Exception as error:
            out.errors[k] = error
    return out


def assert_same(got: Sweep, want: Sweep) -> None:
    for name in ("temperature_c", "par", "flow_cm_s", "o2_umol_l", "o2_sat_pct"):
        g, w = getattr(got, name), getattr(want, name)
        assert [v is None for v in g] == [v is None for v in w], name
        assert [v for v in g if v is not None] == pytest.approx(
            [v for v in w if v is not None], rel=REL, abs=1e-12
        ), name
    assert got.level_ok == want.level_ok
    assert [type(e) for e in got.errors] == [type(e) for e in want.errors]
    assert [str(e) for e in got.errors] == [str(e) for e in want.errors]


def same_generator(a: Rack, b: Rack) -> bool:
    return a._rng.bit_generator.state == b._rng.bit_generator.state  # type: ignore[no-any-return]


def twins(seed: int = 3) -> tuple[Rack, Rack]:
    rig = load_rig(EXAMPLE)
    return Rack(rig, seed=seed), Rack(rig, seed=seed)


def drive(r: Rack, t: int) -> None:
    """Some lamps on, some pumps running, heaters and chillers varied (invented drives)."""
    for i, cid in enumerate(r.chamber_ids):
        r.set_outputs(
            cid,
            heater_pct=float((7 * i + t) % 60),
            chiller_pct=float((3 * i) % 20),
            lamp_pct=0.0 if (i + t) % 3 == 0 else 55.0,
            pump_pct=0.0 if i % 4 == 1 else 40.0,
        )


def test_sweep_equals_one_by_one_reads_over_time_and_faults() -> None:
    a, b = twins()
    ids = list(a.chamber_ids)
    reversed_ids = ids[::-1]
    faults = {
        3: Fault(kind=FaultKind.SPIKES, chamber=ids[2], sensor="temperature", magnitude=2.0),
        5: Fault(kind=FaultKind.DRIFT, chamber=ids[5], sensor="optode", magnitude=4.0),
        7: Fault(kind=FaultKind.DROPOUT, chamber=ids[0], sensor="par", duration_s=240.0),
        9: Fault(kind=FaultKind.STUCK, chamber=ids[7], sensor="flow"),
        11: Fault(kind=FaultKind.COMM_TIMEOUT, chamber=ids[3], sensor="optode", duration_s=120.0),
        13: Fault(kind=FaultKind.SPIKES, chamber=None, sensor="par", magnitude=30.0),
    }
    for t in range(18):
        if t in faults:
            a.inject(faults[t])
            b.inject(faults[t])
        drive(a, t)
        drive(b, t)
        a.advance(60.0)
        b.advance(60.0)
        order = ids if t % 2 == 0 else reversed_ids
        optode = [(k + t) % 3 != 0 for k in range(len(order))]
        assert_same(b.sweep(order, optode), one_by_one(a, order, optode))
        assert same_generator(a, b), f"noise draws differ at step {t}"
    assert a.truth(ids[4]) == b.truth(ids[4])


def test_sweep_of_noise_free_sensors_and_dark_lamps_draws_nothing() -> None:
    quiet = rack(chamber("Q1"), chamber("Q2"), seed=1)
    before = quiet._rng.bit_generator.state
    got = quiet.sweep(["Q2", "Q1"], [True, True])
    assert quiet._rng.bit_generator.state == before
    assert got.par == [0.0, 0.0]  # lamps off: no light, and no noise drawn on it
    assert got.errors == [None, None]
    assert got.o2_sat_pct[0] == pytest.approx(one_by_one(quiet, ["Q2"], [True]).o2_sat_pct[0])


def test_solubility_refusal_ends_only_that_chambers_reading() -> None:
    # A probe beyond the Garcia & Gordon range (solubility refuses > 50 °C): the chamber's
    # optode read raises, the others read on; both ways the same error and the same draws.
    a, b = twins(seed=9)
    for r in (a, b):
        hot = r._water.probe_c.copy()
        hot[1] = 61.0
        r._water = r._water._replace(probe_c=hot)
    ids = list(a.chamber_ids)
    want = one_by_one(a, ids, [True] * len(ids))
    got = b.sweep(ids, [True] * len(ids))
    assert want.errors[1] is not None and got.errors[1] is not None
    assert got.temperature_c[1] is not None and got.o2_umol_l[1] is None
    assert_same(got, want)
    assert same_generator(a, b)


def test_sweep_refuses_an_unknown_chamber() -> None:
    a, _ = twins()
    with pytest.raises(KeyError, match="no chamber"):
        a.sweep(["nowhere"], [True])


def test_vectorised_saturation_agrees_with_per_reading_calls() -> None:
    # controller.science.oxygen.solubility on an array against one call per temperature
    from simulator._science import saturation_umol_l

    temps = np.linspace(-5.0, 50.0, 997)
    batch = saturation_umol_l(temps, np.full_like(temps, 31.5), 101.0)
    single = np.array([float(saturation_umol_l(float(t), 31.5, 101.0)) for t in temps])
    np.testing.assert_allclose(batch, single, rtol=REL, atol=0.0)


def test_comm_ok_all_equals_comm_ok_chamber_by_chamber() -> None:
    a, _ = twins()
    ids = a.chamber_ids
    assert a.comm_ok_all("modbus") == (True,) * len(ids)
    a.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber=ids[1], sensor="optode"))
    a.inject(Fault(kind=FaultKind.POWER_LOSS, chamber=ids[4]))
    a.advance(1.0)
    for device in ("modbus", "optode"):
        assert a.comm_ok_all(device) == tuple(a.comm_ok(c, device) for c in ids)
    assert a.comm_ok_all("optode").count(False) == 2
    assert a.comm_ok_all("modbus").count(False) == 1


def test_scalar_solubility_is_the_array_solubility_one_value_at_a_time() -> None:
    # solubility_umol_l_scalar repeats controller.science.oxygen.solubility (Garcia & Gordon
    # 1992, mL/L fit, SCOR WG 142 conversion) in plain floats: same values, same refusals.
    from controller.errors import SquallError
    from controller.science.oxygen import solubility, solubility_umol_l_scalar

    rng = np.random.default_rng(5)
    temps = rng.uniform(-5.0, 50.0, 500)
    salts = rng.uniform(0.0, 50.0, 500)
    kpas = rng.uniform(10.0, 200.0, 500)
    want = solubility(temps, salts, kpas, unit="umol/L")
    got = [solubility_umol_l_scalar(t, s, p) for t, s, p in zip(temps, salts, kpas, strict=True)]
    np.testing.assert_allclose(got, want, rtol=1e-14, atol=0.0)
    for bad in ((50.5, 30.0, 101.0), (10.0, -1.0, 101.0), (10.0, 30.0, 9.0)):
        with pytest.raises(SquallError) as theirs:
            solubility(*bad, unit="umol/L")
        with pytest.raises(SquallError) as mine:
            solubility_umol_l_scalar(*bad)
        assert str(mine.value) == str(theirs.value)
