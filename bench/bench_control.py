"""Benchmark: control quality on the simulated plant against python-control references.

The plant is chamber C5 of the example rig (``rigs/saltmarrow-rack8.toml``: 12 L of its own
water, 300 W heater, 250 W chiller, UA 6 W/K, 20 s actuator dead time, a probe with a 10 s
lag and 0.01 °C noise), alone on the simulated rack, driven by the real runtime (interlocks,
rate limiter, PID with split range, 10 s tick, run log) on the virtual clock. The runtime
tunes its PI by the SIMC rules on the first-order-plus-dead-time (FOPDT) model it derives
from the rig (:func:`controller.runtime.node_model`); the reference is a SIMC PI
(Skogestad 2003: Kc = τ/(k·(τc + θ)), τI = min(τ, 4·(τc + θ)), τc = θ) on that same FOPDT
model, simulated in continuous time with python-control (the dead time as a 6th-order Padé
approximant, the PI with the same output limits and back-calculation anti-windup), fed the
same setpoint.

Three figures, with the goals of the control-runtime issue:

- 1 °C/h ramp (18 → 24 °C): RMS tracking error of the water temperature, goal ≤ 0.05 °C;
- 5 °C step (18 → 23 °C): overshoot, goal ≤ 0.2 °C (the chamber's ramp limit is raised to
  60 °C/h for this test, so the rate limiter does not turn the step into a slow ramp);
- the same step: integrated absolute error over 3 h, goal ≤ 1.2 x the SIMC reference's.

Errors of the runtime are taken on the true water temperature (sampled from the simulator
half-way between ticks); the logged probe readings are printed beside them.

Each figure is also printed as a ``RESULT:`` line for ``bench/run``. With ``--quick`` the
ramp runs 3 h (18 → 21 °C, judged from 1 h to 4 h) instead of 6 h; the step is unchanged.

Run: ``/work/venv/bin/python bench/bench_control.py [--quick]``.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import math
import tempfile
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import control
import numpy as np

from controller.clock import Clock, run_with_clock
from controller.control import Fopdt, simc
from controller.files import load_model
from controller.protocol import Protocol, Severity, compile_protocol
from controller.rig import Rig
from controller.runtime import RunInputs, RunSettings, SimulatedRun
from controller.storage import RunLogReader

ROOT = Path(__file__).resolve().parent.parent
RIG = ROOT / "rigs" / "saltmarrow-rack8.toml"
START = datetime(2027, 7, 1, tzinfo=UTC)
PERIOD_S = 10.0
T0_C = 18.0  # the rig's room temperature: the plant starts at rest
HOUR = 3600.0
GOAL_RMS_C = 0.05
GOAL_OVERSHOOT_C = 0.2
GOAL_IAE_RATIO = 1.2


def one_chamber_rig(max_ramp_c_per_h: float | None = None) -> Rig:
    """The example rig reduced to chamber C5, without scheduled faults."""
    rig = load_model(RIG, Rig)
    c5 = rig.chamber("C5")
    if max_ramp_c_per_h is not None:
        limits = c5.limits.model_copy(update={"max_ramp_c_per_h": max_ramp_c_per_h})
        c5 = c5.model_copy(update={"limits": limits})
    sim = rig.sim.model_copy(update={"faults": []})
    return rig.model_copy(update={"chambers": [c5], "baths": [], "sim": sim, "io": None})


def protocol(blocks: list[dict[str, Any]], hours: float) -> Protocol:
    """A one-chamber protocol: hold T0 for 1 h, then ``blocks`` for the rest."""
    return Protocol.model_validate(
        {
            "format": "squall-protocol/1",
            "title": "control bench",
            "begins": START.isoformat(),
            "utc_offset": "+00:00",
            "groups": {"plant": {"role": "treatment", "chambers": ["C5"]}},
            "phases": [
                {
                    "name": "rest",
                    "duration": "1h",
                    "programs": {"temperature": [{"kind": "hold", "value": T0_C}]},
                },
                {
                    "name": "test",
                    "duration": f"{(hours - 1) * 60:g}min",
                    "programs": {"temperature": blocks},
                },
            ],
        }
    )


@dataclass
class Trace:
    """A run of the runtime: setpoint, true and logged temperature at tick times."""

    t_s: np.ndarray
    setpoint_c: np.ndarray
    true_c: np.ndarray
    logged_c: np.ndarray
    model: Fopdt


def run_runtime(rig: Rig, doc: Protocol, folder: Path, name: str) -> Trace:
    """Run the protocol on the simulated chamber; sample the true temperature mid-tick."""
    compiled = compile_protocol(doc, start_utc=START, rig=rig)
    errors = [f.message for f in compiled.findings if f.severity is Severity.ERROR]
    if errors:
        raise SystemExit(f"bench protocol refused: {errors}")
    inputs = RunInputs(
        protocol_path=folder / f"{name}.toml",
        rig_path=RIG,
        protocol_text=doc.model_dump_json(),
        rig_text=json.dumps(rig.model_dump(mode="json")),
        rig=rig,
        compiled=compiled,
    )
    run = SimulatedRun.assemble(
        inputs, folder / f"{name}.sqlite", settings=RunSettings(period_s=PERIOD_S)
    )
    loop = run.loop()
    n = round(compiled.duration_s / PERIOD_S)
    true_c = np.empty(n)

    async def sample(clock: Clock) -> None:
        for k in range(n):
            await clock.sleep_until((k + 0.5) * PERIOD_S)
            true_c[k] = run.rack.truth("C5").temperature_c

    async def main(clock: Clock) -> None:
        async with asyncio.TaskGroup() as group:
            group.create_task(sample(clock))
            await loop.run()

    run_with_clock(run.clock, main)
    with RunLogReader(run.writer.path) as reader:
        rows = reader.samples("C5")
    return Trace(
        t_s=rows.t_s.to_numpy(),
        setpoint_c=rows.temperature_setpoint_c.to_numpy(),
        true_c=true_c,
        logged_c=rows.temperature_c.to_numpy(),
        model=run.plan.nodes[0].model,
    )


def simc_reference(model: Fopdt, t_s: np.ndarray, setpoint: np.ndarray) -> np.ndarray:
    """Closed loop of a SIMC PI on the FOPDT model in python-control; output in deviation.

    Parameters
    ----------
    model
        The plant: gain °C per %, time constant and dead time in s.
    t_s
        Time points, s.
    setpoint
        Setpoint deviation from rest at those times, °C.

    Returns
    -------
    numpy.ndarray
        Temperature deviation from rest, °C.
    """
    gains = simc(model, model.theta_s)
    kc, ti = gains.kc, gains.ti_s
    tt = 2.0 * model.theta_s  # tracking time tau_c + theta with tau_c = theta, as the runtime
    num, den = control.pade(model.theta_s, 6)
    plant = control.tf2ss(
        control.tf([model.gain], [model.tau_s, 1.0]) * control.tf(num, den),
        inputs="u",
        outputs="y",
        name="plant",
    )

    def saturate(v: float) -> float:
        return min(100.0, max(-100.0, v))

    def update(t: float, x: np.ndarray, u: np.ndarray, params: dict[str, Any]) -> np.ndarray:
        r, y = u
        v = kc * (r - y) + x[0]
        return np.array([kc / ti * (r - y) + (saturate(v) - v) / tt])

    def output(t: float, x: np.ndarray, u: np.ndarray, params: dict[str, Any]) -> np.ndarray:
        r, y = u
        return np.array([saturate(kc * (r - y) + x[0])])

    pi = control.nlsys(update, output, inputs=["r", "y"], outputs=["u"], states=1, name="pi")
    loop = control.interconnect([plant, pi], inplist=["r"], outlist=["y"], outputs=["y"])
    response = control.input_output_response(
        loop, t_s, setpoint, solve_ivp_kwargs={"max_step": 1.0, "method": "LSODA"}
    )
    return np.asarray(response.outputs, dtype=float).ravel()


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a 3 h ramp instead of 6 h")
    args = parser.parse_args()
    ramp_h = 3.0 if args.quick else 6.0  # at 1 °C/h from T0 after the 1 h rest
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        ramp = run_runtime(
            one_chamber_rig(),
            protocol(
                [
                    {"kind": "ramp", "to": T0_C + ramp_h, "rate_per_h": 1.0},
                    {"kind": "hold", "value": T0_C + ramp_h},
                ],
                ramp_h + 2.0,
            ),
            folder,
            "ramp",
        )
        step = run_runtime(
            one_chamber_rig(max_ramp_c_per_h=60.0),
            protocol([{"kind": "step", "to": 23.0}], 4.0),
            folder,
            "step",
        )
    model = step.model
    gains = simc(model, model.theta_s)
    print(
        f"plant model (C5): k = {model.gain:.3f} °C/%, tau = {model.tau_s:.0f} s, "
        f"theta = {model.theta_s:.0f} s; SIMC PI: Kc = {gains.kc:.1f} %/°C, "
        f"Ti = {gains.ti_s:.0f} s; tick {PERIOD_S:g} s"
    )

    # ramp: 1 °C/h from 1 h to 1 h + ramp_h
    on_ramp = (ramp.t_s >= 1 * HOUR) & (ramp.t_s < (1 + ramp_h) * HOUR)
    mid = ramp.t_s + PERIOD_S / 2
    sp_mid = np.interp(mid, ramp.t_s, ramp.setpoint_c)
    rms_true = math.sqrt(np.mean((ramp.true_c - sp_mid)[on_ramp] ** 2))
    rms_logged = math.sqrt(np.mean((ramp.logged_c - ramp.setpoint_c)[on_ramp] ** 2))
    t_ref = np.arange(0.0, (ramp_h + 2.0) * HOUR, 1.0)
    r_ref = np.interp(t_ref, ramp.t_s, ramp.setpoint_c) - T0_C
    y_ref = simc_reference(ramp.model, t_ref, r_ref)
    ref_on = (t_ref >= 1 * HOUR) & (t_ref < (1 + ramp_h) * HOUR)
    rms_ref = math.sqrt(np.mean((y_ref - r_ref)[ref_on] ** 2))

    # step: 18 -> 23 °C at 1 h, judged over the following 3 h
    after = step.t_s >= 1 * HOUR
    overshoot = float(np.max(step.true_c[after]) - 23.0)
    overshoot_logged = float(np.nanmax(step.logged_c[after]) - 23.0)
    iae = float(np.sum(np.abs(23.0 - step.true_c[after])) * PERIOD_S)
    t_step = np.arange(0.0, 4 * HOUR, 1.0)
    r_step = np.where(t_step >= 1 * HOUR, 5.0, 0.0)
    y_step = simc_reference(model, t_step, r_step)
    ref_after = t_step >= 1 * HOUR
    iae_ref = float(np.sum(np.abs(r_step - y_step)[ref_after]) * 1.0)
    overshoot_ref = float(np.max(y_step[ref_after]) - 5.0)

    def verdict(ok: bool) -> str:
        return "met" if ok else "MISSED"

    print(f"{'figure':<34} {'runtime':>10} {'logged':>9} {'SIMC ref':>9}  goal")
    print(
        f"{'1 °C/h ramp RMS error, °C':<34} {rms_true:>10.4f} {rms_logged:>9.4f} "
        f"{rms_ref:>9.4f}  ≤ {GOAL_RMS_C:g}: {verdict(rms_true <= GOAL_RMS_C)}"
    )
    print(
        f"{'5 °C step overshoot, °C':<34} {overshoot:>10.3f} {overshoot_logged:>9.3f} "
        f"{overshoot_ref:>9.3f}  ≤ {GOAL_OVERSHOOT_C:g}: {verdict(overshoot <= GOAL_OVERSHOOT_C)}"
    )
    ratio = iae / iae_ref
    print(
        f"{'5 °C step IAE over 3 h, °C·s':<34} {iae:>10.0f} {'':>9} {iae_ref:>9.0f}  "
        f"ratio {ratio:.3f} ≤ {GOAL_IAE_RATIO:g}: {verdict(ratio <= GOAL_IAE_RATIO)}"
    )
    print(
        f"RESULT: 1 °C/h ramp RMS tracking error | {rms_true:.4f} °C | <= {GOAL_RMS_C:g} °C | "
        f"true water temperature over {ramp_h:g} h; logged probe {rms_logged:.4f} °C, "
        f"SIMC reference {rms_ref:.4f} °C"
    )
    print(
        f"RESULT: 5 °C step overshoot | {overshoot:.3f} °C | <= {GOAL_OVERSHOOT_C:g} °C | "
        f"SIMC reference {overshoot_ref:.3f} °C"
    )
    print(
        f"RESULT: 5 °C step IAE / SIMC PI reference | {ratio:.3f} | <= {GOAL_IAE_RATIO:g} | "
        f"{iae:.0f} vs {iae_ref:.0f} °C·s over 3 h; SIMC PI of Skogestad 2003 in python-control"
    )


if __name__ == "__main__":
    main()
