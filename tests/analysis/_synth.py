"""Known-truth run logs: a simulated rack driven tick by tick, logged with RunLogWriter.

The closed-incubation cycle of the control runtime is not built yet, so this driver plays
its part: per phase it holds a temperature (a PI loop from controller.control), then runs a
schedule of flushes (pump on) and closed windows (pump off, lamp on for light windows and
off for dark ones). A window ends at its maximum length or, like the future cycle, when the
optode leaves 85–115 % air saturation. Every reading goes into the log as the control loop
would log it; the rack's true GPP and R are averaged over each window's fitted part, so the
analysis can be checked against the simulator's own numbers.

Everything here is invented (Saltmarrow Lagoon rigs); the biology follows the design's
``[chambers.sim.biology]`` contract.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from controller.control import PidParams, PidState, pid_step
from controller.rig import Rig
from controller.science.rates import arrhenius_factor, jassby_platt
from controller.storage import (
    ChamberRecord,
    ClockKind,
    IncubationState,
    LightState,
    RunLogWriter,
    RunMeta,
    SampleRow,
    WindowEndReason,
    WindowRecord,
)
from simulator import Rack

START_UTC_S = 1_786_000_000.0  # an invented start, 2026-08-06
VOLUME_L = 2.5
AREA_M2 = 0.1
FLOW_CM_S = 5.0
FLUSH_DRIVE_PCT = 40.0
PAR_AT_FULL = 1000.0
SAT_BAND_PCT = (85.0, 115.0)

CONTROL_BIO = {
    "gpp_max_umol_m2_h": 550.0,
    "ik_umol_m2_s": 200.0,
    "resp_umol_m2_h": 400.0,
    "ea_gpp_ev": 0.32,
    "ea_resp_ev": 0.65,
    "t_ref_c": 20.0,
}
TREATED_BIO = {**CONTROL_BIO, "resp_umol_m2_h": 500.0, "ea_gpp_ev": 0.40, "ea_resp_ev": 0.80}
BLANK_BIO = {**CONTROL_BIO, "gpp_max_umol_m2_h": 0.0, "resp_umol_m2_h": 0.0}

PROTOCOL_TEXT = """# Saltmarrow Lagoon metabolism test: temperature steps and a light curve
format = "squall-protocol/1"
title = "Known-truth metabolism run (invented)"

[groups.ambient]
role = "control"
chambers = ["C1", "C2"]
label = "Ambient <control>"

[groups.treated]
role = "treatment"
chambers = ["C3", "C4"]
"""


def chamber_table(cid: str, biology: dict[str, float], **sim: Any) -> dict[str, Any]:
    """A rig chamber: 2.5 L over 0.1 m², a strong heater, linear lamp, fast flushing."""
    return {
        "id": cid,
        "water_volume_l": VOLUME_L,
        "sediment_area_m2": AREA_M2,
        "limits": {"max_par": PAR_AT_FULL, "max_flow_cm_s": 20.0},
        "sim": {
            "thermal": {"heater_max_w": 1500.0, "chiller_max_w": 1500.0, "dead_time_s": 0.0},
            "lamp": {
                "par_at_full_drive": PAR_AT_FULL,
                "curve_shape": 0.0,
                "ageing_pct_per_1000_h": 0.0,
            },
            "pump": {
                "dead_band_pct": 0.0,
                "flow_at_full_drive_cm_s": FLOW_CM_S * 100.0 / FLUSH_DRIVE_PCT,
                "flush_at_full_drive_l_h": 50.0,
            },
            "biology": biology,
            "initial_temperature_c": 14.0,
            **sim,
        },
    }


def make_rig(*chambers: dict[str, Any], seed: int = 11) -> Rig:
    """A validated rig of the given chambers."""
    return Rig.model_validate(
        {"name": "Saltmarrow test rack", "chambers": list(chambers), "sim": {"seed": seed}}
    )


@dataclass(frozen=True)
class Step:
    """One stretch of a phase: a flush (pump on) or a closed window (pump off).

    ``par`` is the lamp's target (0 = off); ``minutes`` the length (the longest, for a
    window, which may end earlier on the saturation band).
    """

    kind: str  # "flush" or "close"
    minutes: float
    par: float = 0.0


@dataclass(frozen=True)
class PhasePlan:
    """A protocol phase: a held temperature and its steps."""

    name: str
    temperature_c: float
    steps: tuple[Step, ...]


@dataclass
class WindowTruth:
    """The simulator's truth over one window's fitted part (means of every third tick)."""

    chamber: str
    light: str
    phase: str
    par_target: float
    start_s: float
    end_s: float = math.nan
    gpp: list[float] = field(default_factory=list)
    resp: list[float] = field(default_factory=list)
    temp: list[float] = field(default_factory=list)
    par: list[float] = field(default_factory=list)

    @property
    def gpp_umol_m2_h(self) -> float:
        return float(np.mean(self.gpp))

    @property
    def resp_umol_m2_h(self) -> float:
        return float(np.mean(self.resp))

    @property
    def temperature_c(self) -> float:
        return float(np.mean(self.temp))


def true_rates(bio: dict[str, float], temp_c: float, par: float) -> tuple[float, float]:
    """GPP and R of the simulator's biology model, µmol O2 m⁻² h⁻¹ (design contract)."""
    factor_g = float(arrhenius_factor(temp_c, bio["t_ref_c"], bio["ea_gpp_ev"]))
    factor_r = float(arrhenius_factor(temp_c, bio["t_ref_c"], bio["ea_resp_ev"]))
    gpp = float(jassby_platt(par, bio["gpp_max_umol_m2_h"], bio["ik_umol_m2_s"])) * factor_g
    return gpp, bio["resp_umol_m2_h"] * factor_r


def analytic_crossing_c(bio: dict[str, float], par: float) -> float:
    """Temperature where the set GPP(T) at ``par`` equals the set R(T), °C.

    ln(Gref/Rref) = ((E_R − E_G)/k)·(1/T_ref − 1/T), solved for T.
    """
    k = 8.617333262e-5
    g_ref = float(jassby_platt(par, bio["gpp_max_umol_m2_h"], bio["ik_umol_m2_s"]))
    t_ref = bio["t_ref_c"] + 273.15
    inv_t = 1.0 / t_ref - math.log(g_ref / bio["resp_umol_m2_h"]) * k / (
        bio["ea_resp_ev"] - bio["ea_gpp_ev"]
    )
    return 1.0 / inv_t - 273.15


def write_log(
    path: Path,
    rig: Rig,
    phases: list[PhasePlan],
    *,
    tick_s: float = 30.0,
    settle_s: float = 300.0,
    protocol_text: str = PROTOCOL_TEXT,
    band_pct: tuple[float, float] = SAT_BAND_PCT,
    lamp_off_after_min: dict[int, float] | None = None,
) -> list[WindowTruth]:
    """Drive every chamber of ``rig`` through ``phases`` and log the run to ``path``.

    Parameters
    ----------
    lamp_off_after_min
        Window number (counted over the run, from 0) → minutes after which the lamp is
        switched off inside that window (to make a deliberately non-linear window).

    Returns
    -------
    list of WindowTruth
        One per window per chamber, in the order the windows were written.
    """
    rack = Rack(rig)
    ids = [c.id for c in rig.chambers]
    meta = RunMeta(
        run_id=path.stem,
        protocol_text=protocol_text,
        rig_text=f'name = "{rig.name}"\n# chambers {", ".join(ids)} (invented)\n',
        start_utc_s=START_UTC_S,
        clock_kind=ClockKind.VIRTUAL,
        chambers=tuple(
            ChamberRecord(
                chamber=c.id, water_volume_l=c.water_volume_l, sediment_area_m2=c.sediment_area_m2
            )
            for c in rig.chambers
        ),
    )
    pid = PidParams(kc=40.0, ti_s=300.0, out_min=-100.0, out_max=100.0)
    states = {cid: PidState() for cid in ids}
    truths: list[WindowTruth] = []
    open_windows: dict[str, WindowTruth] = {}
    lamp_off = lamp_off_after_min or {}
    window_no = -1
    t = 0.0
    with RunLogWriter(path, meta=meta, commit_interval_s=3600.0) as writer:
        for phase in phases:
            for step in phase.steps:
                closing = step.kind == "close"
                if closing:
                    window_no += 1
                    for cid in ids:
                        open_windows[cid] = WindowTruth(
                            chamber=cid,
                            light="light" if step.par > 0 else "dark",
                            phase=phase.name,
                            par_target=step.par,
                            start_s=t,
                        )
                step_end = t + step.minutes * 60.0
                while t < step_end - 1e-9:
                    rows = []
                    for cid in ids:
                        window = open_windows.get(cid) if closing else None
                        par_target = step.par
                        off_at = lamp_off.get(window_no) if closing else None
                        if off_at is not None and t - open_windows[cid].start_s >= off_at * 60:
                            par_target = 0.0
                        temp = rack.read_temperature(cid)
                        result = pid_step(states[cid], pid, temp, phase.temperature_c, tick_s)
                        states[cid] = result.state
                        u = result.output
                        rack.set_outputs(
                            cid,
                            heater_pct=max(u, 0.0),
                            chiller_pct=max(-u, 0.0),
                            lamp_pct=par_target / PAR_AT_FULL * 100.0,
                            pump_pct=0.0 if window is not None else FLUSH_DRIVE_PCT,
                        )
                        optode = rack.read_optode(cid)
                        elapsed = t - window.start_s if window is not None else -1.0
                        # the truth every third tick of the fitted part (truth() is costly)
                        if elapsed >= settle_s and round((elapsed - settle_s) / tick_s) % 3 == 0:
                            assert window is not None
                            truth = rack.truth(cid)
                            window.gpp.append(truth.gpp_umol_m2_h)
                            window.resp.append(truth.resp_umol_m2_h)
                            window.temp.append(truth.temperature_c)
                            window.par.append(truth.par)
                        rows.append(
                            SampleRow(
                                t_s=t,
                                utc_s=START_UTC_S + t,
                                elapsed_s=t,
                                chamber=cid,
                                phase=phase.name,
                                temperature_c=temp,
                                temperature_setpoint_c=phase.temperature_c,
                                par=rack.read_par(cid),
                                par_setpoint=step.par,
                                flow_cm_s=rack.read_flow(cid),
                                flow_setpoint_cm_s=FLOW_CM_S,
                                o2_umol_l=optode.o2_umol_l,
                                o2_sat_pct=optode.o2_sat_pct,
                                heater_pct=max(u, 0.0),
                                chiller_pct=max(-u, 0.0),
                                lamp_pct=par_target / PAR_AT_FULL * 100.0,
                                pump_pct=0.0 if window is not None else FLUSH_DRIVE_PCT,
                                incubation=(
                                    IncubationState.CLOSED
                                    if window is not None
                                    else IncubationState.OPEN
                                ),
                            )
                        )
                        if window is not None:
                            reason = None
                            if optode.o2_sat_pct < band_pct[0]:
                                reason = WindowEndReason.O2_LOW
                            elif optode.o2_sat_pct > band_pct[1]:
                                reason = WindowEndReason.O2_HIGH
                            elif t + tick_s >= step_end - 1e-9:
                                reason = WindowEndReason.MAX_DURATION
                            if reason is not None:
                                _close(writer, window, t + tick_s, reason)
                                truths.append(window)
                                del open_windows[cid]
                    writer.append_samples(rows)
                    rack.advance(tick_s)
                    t += tick_s
    return truths


def _close(writer: RunLogWriter, window: WindowTruth, end_s: float, why: WindowEndReason) -> None:
    """Record a window that ends at ``end_s`` (s): the pump restarts at the next tick."""
    window.end_s = end_s
    writer.record_window(
        WindowRecord(
            chamber=window.chamber,
            light=LightState(window.light),
            start_t_s=window.start_s,
            start_utc_s=START_UTC_S + window.start_s,
            end_t_s=end_s,
            end_utc_s=START_UTC_S + end_s,
            end_reason=why,
            detail="synthetic",
        )
    )


def temperature_phases(
    temps: tuple[float, ...] = (14.0, 18.0, 22.0, 26.0, 30.0),
) -> list[PhasePlan]:
    """One phase per temperature: warm up, a light window at PAR 600, a dark window."""
    steps = (
        Step("flush", 40.0, 600.0),
        Step("close", 60.0, 600.0),
        Step("flush", 20.0, 0.0),
        Step("close", 60.0, 0.0),
        Step("flush", 20.0, 0.0),
    )
    return [PhasePlan(f"t{int(temp)}", temp, steps) for temp in temps]


def light_curve_phase(pars: tuple[float, ...] = (50.0, 100.0, 200.0, 400.0, 800.0)) -> PhasePlan:
    """A phase at 20 °C with light windows at several irradiances and one dark window."""
    steps: list[Step] = [Step("flush", 40.0, pars[0])]
    for k, par in enumerate(pars):
        steps.append(Step("close", 45.0, par))
        steps.append(Step("flush", 15.0, pars[k + 1] if k + 1 < len(pars) else 0.0))
    steps += [Step("close", 60.0, 0.0), Step("flush", 20.0, 0.0)]
    return PhasePlan("light-curve", 20.0, tuple(steps))
