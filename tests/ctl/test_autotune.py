"""Relay autotuning: gains on simulated chambers against SIMC gains from the simulator's true
parameters, the limit-cycle analysis on synthetic records, and the experiment's safety.

The true model of a thermal node (documented choice): the simulator's heat balance
C·dT/dt = P − UA·(T − T_room) is first order, so k = P_heater/100/UA (°C per % heater
drive) and τ1 = C/UA with C the node's heat capacity as the simulator has it
(``Rack.truth().heat_capacity_j_k``); the actuator dead time and the probe's first-order lag
make the dead time θ = dead time + probe lag (a ramp through a first-order lag is the ramp
delayed by the lag, which is what a relay cycle is made of), plus half the control tick for
the zero-order hold, as the runtime's model does.
"""

from __future__ import annotations

import math
from pathlib import Path

import control
import numpy as np
import pytest

from controller.cli.cmd_tune import tune_simulated
from controller.control import Fopdt, PidGains, fopdt_from_relay, simc
from controller.files import load_model
from controller.rig import Fault, FaultKind, Rig
from controller.runtime._autotune import RelaySettings, TuneAborted, relay_tune, tune_node
from controller.runtime._relay_analysis import analyse_relay, identify
from simulator import Rack

PERIOD_S = 10.0


@pytest.fixture(scope="module")
def rig(repo_root: Path) -> Rig:
    return load_model(repo_root / "rigs" / "saltmarrow-rack8.toml", Rig)


@pytest.fixture(scope="module")
def repo_root() -> Path:  # module-scoped twin of the shared fixture
    return Path(__file__).resolve().parents[2]


def true_model(rig: Rig, chamber: str) -> Fopdt:
    """The node's FOPDT from the simulator's true parameters (see the module docstring)."""
    node = tune_node(rig, chamber)
    th = node.thermal
    capacity_j_k = Rack(rig).truth(chamber).heat_capacity_j_k
    lag_s = max(rig.chamber(c).sim.sensors.temperature_tau_s for c in node.chambers)
    return Fopdt(
        gain=th.heater_max_w / 100.0 / th.ua_w_k,
        tau_s=capacity_j_k / th.ua_w_k,
        theta_s=th.dead_time_s + lag_s + PERIOD_S / 2.0,
    )


def gain_margin(model: Fopdt, gains: PidGains) -> float:
    """Gain margin of a PI loop on a FOPDT plant (python-control; 10th-order Padé delay)."""
    num, den = control.pade(model.theta_s, 10)
    plant = control.tf([model.gain], [model.tau_s, 1.0]) * control.tf(num, den)
    pi = control.tf([gains.kc * gains.ti_s, gains.kc], [gains.ti_s, 0.0])
    gm, _pm, _wg, _wp = control.margin(pi * plant)
    return float(gm)


@pytest.mark.parametrize(
    ("chamber", "seed"),
    [("C1", 3), ("C5", 5)],
    ids=["C1 in the shared bath", "C5 with its own water"],
)
def test_autotune_recovers_simc_gains_of_the_true_plant(rig: Rig, chamber: str, seed: int) -> None:
    result = tune_simulated(rig, chamber, RelaySettings(period_s=PERIOD_S), seed=seed)
    truth = true_model(rig, chamber)
    reference = simc(truth)  # Skogestad (2003), tight tuning τc = θ
    # Must-show: within 20 % of the SIMC gains from the simulator's true parameters.
    assert result.gains.kc == pytest.approx(reference.kc, rel=0.20)
    assert result.gains.ti_s == pytest.approx(reference.ti_s, rel=0.20)
    assert result.gains.td_s == 0.0
    # The identified plant itself is close, not just the gains.
    assert result.model.tau_s == pytest.approx(truth.tau_s, rel=0.15)
    assert result.control_model.theta_s == pytest.approx(truth.theta_s, rel=0.15)
    # On the true plant the tuned loop keeps SIMC's gain margin of about 3 (Skogestad 2003,
    # tight tuning; computed with python-control).
    assert gain_margin(truth, reference) == pytest.approx(3.0, rel=0.1)
    assert gain_margin(truth, result.gains) == pytest.approx(3.0, rel=0.2)
    # The relay stayed gentle: well inside the ±1 °C allowed around the start.
    assert np.ptp(result.y_c) < 0.5
    assert result.node.chambers == ((chamber,) if chamber == "C5" else ("C1", "C2", "C3", "C4"))


def _relay_record(
    model: Fopdt, d: float, eps: float, dt: float, periods: int, noise: float, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """An exact-enough relay experiment on a FOPDT plant (Euler steps of dt ≪ θ)."""
    rng = np.random.default_rng(seed)
    delay = round(model.theta_s / dt)
    a = math.exp(-dt / model.tau_s)
    x, u_hist = 0.0, [d] * (delay + 1)
    heating, rises = True, 0
    t, y, u = [], [], []
    for k in range(10**7):
        meas = x + noise * rng.standard_normal()
        if heating and meas > eps:
            heating = False
        elif not heating and meas < -eps:
            heating, rises = True, rises + 1
            if rises > periods:
                break
        v = d if heating else -d
        t.append(k * dt)
        y.append(meas)
        u.append(v)
        u_hist.append(v)
        x = a * x + (1 - a) * model.gain * u_hist[-delay - 2]
    return np.asarray(t), np.asarray(y), np.asarray(u)


@pytest.mark.parametrize("noise", [0.0, 0.01])
def test_analysis_recovers_a_known_fopdt_plant(noise: float) -> None:
    plant = Fopdt(gain=0.5, tau_s=6000.0, theta_s=30.0)
    t, y, u = _relay_record(plant, d=40.0, eps=0.03, dt=0.5, periods=12, noise=noise, seed=7)
    found = analyse_relay(t, y, u, cycles=8)
    model = fopdt_from_relay(40.0, found.amplitude_c, found.period_s, 0.5, found.hysteresis_c)
    assert model.theta_s == pytest.approx(30.0, rel=0.06)
    assert model.tau_s == pytest.approx(6000.0, rel=0.06)
    assert found.hysteresis_c == pytest.approx(0.03, abs=0.006 + noise)
    assert abs(found.asymmetry) < 0.02
    # the raw peak-to-peak is inflated by noise; the ramp triangle is not
    if noise:
        assert found.raw_amplitude_c > found.amplitude_c


def test_gains_barely_depend_on_the_assumed_static_gain() -> None:
    # Lag-dominant node: SIMC rests on k/τ1 and θ, which the relay measures whatever k is
    # assumed (Skogestad 2003, integrating-process limit).
    plant = Fopdt(gain=0.5, tau_s=6000.0, theta_s=30.0)
    t, y, u = _relay_record(plant, d=40.0, eps=0.03, dt=0.5, periods=10, noise=0.0, seed=1)
    found = analyse_relay(t, y, u, cycles=6)
    _, _, _, right = identify(found, 40.0, 0.5, PERIOD_S)
    _, _, _, doubled = identify(found, 40.0, 1.0, PERIOD_S)
    _, _, _, halved = identify(found, 40.0, 0.25, PERIOD_S)
    for other in (doubled, halved):
        assert other.kc == pytest.approx(right.kc, rel=0.03)
        assert other.ti_s == pytest.approx(right.ti_s, rel=0.03)


def test_too_few_cycles_or_no_cycle_is_refused() -> None:
    t = np.arange(100.0)
    with pytest.raises(ValueError, match="whole relay cycles"):
        analyse_relay(t, np.sin(t / 5), np.where(np.arange(100) < 50, 1.0, -1.0), cycles=3)


def _experiment(rig: Rig, chamber: str, fault: Fault, settings: RelaySettings):  # type: ignore[no-untyped-def]
    from datetime import UTC, datetime

    from controller.clock import VirtualClock, run_with_clock
    from controller.runtime._sim_io import SimulatedIO

    start = datetime(2027, 7, 10, 8, tzinfo=UTC)
    clock = VirtualClock(start)
    rack = Rack(rig, seed=2, start_utc=start)
    rack.inject(fault)
    io = SimulatedIO(rack, clock, step_s=2.0, watchdog_s=10.0)
    lines: list[str] = []

    async def main(_clock):  # type: ignore[no-untyped-def]
        return await relay_tune(io, clock, rig, chamber, settings, lines.append)

    return io, rack, lines, (lambda: run_with_clock(clock, main))


def test_a_runaway_heater_aborts_the_experiment_and_leaves_outputs_safe(rig: Rig) -> None:
    stuck = Fault(kind=FaultKind.HEATER_STUCK_ON, chamber="C5", at_s=600.0)
    io, _rack, lines, go = _experiment(rig, "C5", stuck, RelaySettings(max_deviation_c=0.5))
    with pytest.raises(
        TuneAborted, match=r"C5 at 1\d\.\d\d °C is more than 0\.5 °C from the start"
    ):
        go()
    assert any(line.startswith("relay cycle") for line in lines)  # it was under way
    safe = io.last_written["C5"]
    assert (safe.heater_pct, safe.chiller_pct, safe.lamp_pct) == (0.0, 0.0, 0.0)
    assert safe.pump_pct == 30.0  # the interlocks' safe flow (flushes the chamber)


def test_a_lost_probe_aborts_the_experiment(rig: Rig) -> None:
    dropout = Fault(kind=FaultKind.DROPOUT, chamber="C5", sensor="temperature", at_s=400.0)
    io, _rack, _lines, go = _experiment(rig, "C5", dropout, RelaySettings(max_missing=3))
    with pytest.raises(TuneAborted, match="no temperature from C5 for 3 samples"):
        go()
    assert io.last_written["C5"].heater_pct == 0.0


def test_settings_out_of_range_name_their_option() -> None:
    with pytest.raises(Exception, match="must be at most 100 %"):
        RelaySettings(amplitude_pct=150.0)
    with pytest.raises(Exception, match="below a quarter of the largest deviation"):
        RelaySettings(hysteresis_c=0.5, max_deviation_c=1.0)


def test_away_from_room_the_relay_centres_on_the_drive_that_holds_the_temperature(
    rig: Rig,
) -> None:
    warm = [
        c.model_copy(update={"sim": c.sim.model_copy(update={"initial_temperature_c": 24.0})})
        if c.id == "C5"
        else c
        for c in rig.chambers
    ]
    warm_rig = rig.model_copy(update={"chambers": warm})
    result = tune_simulated(warm_rig, "C5", RelaySettings(period_s=PERIOD_S), seed=1)
    th = result.node.thermal
    room_c = warm_rig.sim.room_temperature_c
    # Lumped heat balance: holding T needs P = UA·(T − T_room) (REFERENCES §8, from memory).
    holding_pct = 100.0 * th.ua_w_k * (result.start_temperature_c - room_c) / th.heater_max_w
    assert result.bias_pct == pytest.approx(holding_pct, rel=0.15)
    reference = simc(true_model(warm_rig, "C5"))
    assert result.gains.kc == pytest.approx(reference.kc, rel=0.20)
    assert result.gains.ti_s == pytest.approx(reference.ti_s, rel=0.20)
