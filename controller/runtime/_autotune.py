"""Relay autotuning of a thermal node: a limit cycle around the present temperature, a
first-order-plus-dead-time model from it, and SIMC gains for the control loop.

Rules of this module
--------------------
- The experiment (Åström & Hägglund 1984) runs on a :class:`~controller.runtime.ChamberIO`,
  so it is the same on the simulator and on hardware. It tunes a thermal node: a chamber
  with its own water, or the bath a chamber sits in (heater and chiller driven through the
  bath's first chamber, temperature = mean of every probe in the bath, as in a run).
- Relay output is in *heater-equivalent* drive v, % of the heater's full power: v > 0 heats
  (heater v %), v < 0 cools (chiller −v·P_heater/P_chiller %), so the relay is symmetric in
  watts and the model's gain is in the control loop's unit, °C per % heater drive.
- Sequence: outputs off (lamps off, pump at ``pump_pct``) while the node is watched for
  ``settle_s``: the start temperature T0 (the relay's centre), the probe noise (the default
  hysteresis is three noise standard deviations, at least 0.01 °C) and the drift (the first
  bias: the drive that cancels it, from the rig's heat capacity). Then the relay v = b ± d
  switches at T0 ± ε. Cycles are taken in windows of ``cycles`` under one bias (after one
  transient cycle); when the window's mean half-period asymmetry is within ``symmetry`` it is
  analysed, otherwise the bias is corrected (for a lag-dominant node the heating/cooling
  half-period ratio is (d − e)/(d + e) for a bias error e) and a new window begins. Single
  cycles are not judged: sampling and noise make each one's asymmetry scatter by several %.
- Safety, every sample: a temperature beyond T0 ± ``max_deviation_c`` or outside any member's
  chamber limits, a lost probe (``max_missing`` samples in a row), a pressed E-stop or a low
  level aborts the experiment (:class:`TuneAborted`). However it ends (done, aborted, failed,
  cancelled), every member chamber is sent its safe outputs, shielded from cancellation.
- Analysis (:mod:`controller.runtime._relay_analysis`): the averaged cycle's ramps give the
  triangle amplitude a, the effective hysteresis ε and the period P; with the static gain,
  :func:`~controller.control.fopdt_from_relay` turns them into τ1 and θ (θ includes the
  probe's lag, as it does in the runtime's model).
- Static gain: taken from the rig's thermal description, k = heater power/100/UA (the same
  as the runtime's model). For a lag-dominant node (τ1 ≫ θ) the SIMC gains hardly depend on
  it: Kc = τ1/(k(τc + θ)) rests on k/τ1 and θ, and the relay measures k/τ1 (the ramp slope
  per % drive) and θ whatever k is assumed (Skogestad 2003, the integrating-process limit).
- Gains: SIMC (Skogestad 2003) with τc = ``tau_c_factor``·θ on the model with half the
  control tick added to the dead time (the runtime's half rule for a zero-order hold).
"""

from __future__ import annotations

import asyncio
import logging
import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from controller.clock import Clock
from controller.control import Fopdt, Outputs, PidGains
from controller.errors import RuntimeFailure, SquallError
from controller.rig import Rig, ThermalSim
from controller.runtime._io import ChamberIO, ChamberReadings
from controller.runtime._relay_analysis import RelayAnalysis, analyse_relay, identify
from controller.runtime._settings import RunSettings, node_model, plan_control

__all__ = [
    "RelaySettings",
    "TuneAborted",
    "TuneNode",
    "TuneResult",
    "relay_tune",
    "tune_node",
]

_log = logging.getLogger(__name__)

F = NDArray[np.float64]


class TuneAborted(RuntimeFailure):
    """The relay experiment stopped before it could tune; the outputs were made safe."""


@dataclass(frozen=True, kw_only=True)
class RelaySettings:
    """Choices of a relay experiment.

    Parameters
    ----------
    amplitude_pct
        Relay amplitude d, % of the heater's full power (reduced to fit the heater and
        chiller around the bias).
    hysteresis_c
        Relay hysteresis ε, °C; None: three probe-noise standard deviations measured while
        settling, at least 0.01 °C.
    max_deviation_c
        Largest distance from the start temperature before the experiment aborts, °C.
    sample_s
        Sampling and switching period of the relay, s.
    settle_s
        Watching time with outputs off before the relay starts, s.
    cycles
        Cycles in a window under one bias, analysed together, dimensionless (at least 2).
    max_cycles
        Cycles after which the experiment gives up, dimensionless.
    symmetry
        Largest accepted mean half-period asymmetry (t_heat − t_cool)/(t_heat + t_cool) of a
        window, dimensionless.
    max_missing
        Samples in a row without a temperature before the experiment aborts, dimensionless.
    pump_pct
        Pump drive during the experiment, %; 0 keeps the water's heat balance as the rig
        describes it (no flushing).
    period_s
        Control tick period the gains are for, s (half of it is added to the dead time).
    tau_c_factor
        SIMC closed-loop time constant as a multiple of the dead time, dimensionless.
    """

    amplitude_pct: float = 40.0
    hysteresis_c: float | None = None
    max_deviation_c: float = 1.0
    sample_s: float = 2.0
    settle_s: float = 120.0
    cycles: int = 6
    max_cycles: int = 40
    symmetry: float = 0.05
    max_missing: int = 5
    pump_pct: float = 0.0
    period_s: float = 10.0
    tau_c_factor: float = 1.0

    def __post_init__(self) -> None:
        for name in ("amplitude_pct", "max_deviation_c", "sample_s", "settle_s", "period_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value > 0):
                raise SquallError(f"must be a number above 0, got {value!r}", field=name)
        if self.amplitude_pct > 100:
            raise SquallError("must be at most 100 %", field="amplitude_pct")
        if self.hysteresis_c is not None and not (
            math.isfinite(self.hysteresis_c) and 0 <= self.hysteresis_c < self.max_deviation_c / 4
        ):
            raise SquallError(
                "must be 0 or more and below a quarter of the largest deviation",
                field="hysteresis_c",
            )
        if not 0 <= self.pump_pct <= 100:
            raise SquallError("must be within 0–100 %", field="pump_pct")
        if self.cycles < 2 or self.max_cycles < self.cycles + 2:
            raise SquallError("needs cycles ≥ 2 and max_cycles ≥ cycles + 2", field="cycles")
        if not 0 < self.symmetry < 1:
            raise SquallError("must be between 0 and 1", field="symmetry")
        if self.max_missing < 1 or not (math.isfinite(self.tau_c_factor) and self.tau_c_factor > 0):
            raise SquallError("must be at least 1 (and tau_c_factor above 0)", field="max_missing")


@dataclass(frozen=True, kw_only=True)
class TuneNode:
    """The thermal node a chamber belongs to, as the experiment drives and reads it.

    Attributes
    ----------
    name
        Bath id, or the chamber id of a chamber with its own water.
    chambers
        Every chamber in the node's water, rig order (their probes are averaged).
    driver
        Chamber whose I/O module carries the node's heater and chiller.
    thermal
        The rig's thermal description of the node (heater and chiller power in W).
    model
        The rig's model of the node, no tick delay (°C per % heater drive, s, s).
    min_temperature_c, max_temperature_c
        Tightest chamber limits of the members, °C.
    """

    name: str
    chambers: tuple[str, ...]
    driver: str
    thermal: ThermalSim
    model: Fopdt
    min_temperature_c: float
    max_temperature_c: float


def tune_node(rig: Rig, chamber: str) -> TuneNode:
    """The thermal node of a chamber.

    Parameters
    ----------
    rig
        The rig (no unit).
    chamber
        A chamber id of the rig (no unit).

    Returns
    -------
    TuneNode
        Its node (no unit).

    Raises
    ------
    SquallError
        The rig has no such chamber.
    """
    try:
        first = rig.chamber(chamber)
    except KeyError:
        known = ", ".join(c.id for c in rig.chambers)
        raise SquallError(f"the rig has no chamber {chamber!r} (chambers: {known})") from None
    if first.bath is not None:
        members = tuple(c.id for c in rig.chambers if c.bath == first.bath)
        bath = rig.bath(first.bath)
        thermal = bath.thermal if bath is not None else ThermalSim()
        name = first.bath
    else:
        members, thermal, name = (chamber,), first.sim.thermal or ThermalSim(), chamber
    limits = [rig.chamber(c).limits for c in members]
    model = node_model(rig, members, period_s=0.0)
    return TuneNode(
        name=name,
        chambers=members,
        driver=members[0],
        thermal=thermal,
        model=model,
        min_temperature_c=max(lim.min_temperature_c for lim in limits),
        max_temperature_c=min(lim.max_temperature_c for lim in limits),
    )


# ---------------------------------------------------------------------- the experiment
@dataclass(frozen=True, kw_only=True)
class TuneResult:
    """What a relay experiment found.

    Attributes
    ----------
    node
        The node tuned.
    start_temperature_c
        Relay centre (temperature when the relay started), °C.
    noise_c
        Standard deviation of the node's temperature noise while settling, °C.
    bias_pct
        Heater-equivalent drive the limit cycle settled around, %.
    amplitude_pct
        Relay amplitude used, % heater drive.
    hysteresis_c
        Relay hysteresis set, °C.
    analysis
        The analysed limit cycle.
    ultimate_gain
        Ultimate gain by the describing function, % per °C.
    ultimate_period_s
        Ultimate period (the limit cycle's), s.
    model
        Identified plant, heater drive → probe (°C per %, s, s).
    control_model
        The model with half a control tick added to the dead time (°C per %, s, s).
    gains
        SIMC gains for the control loop (% per °C, s, s).
    period_s
        Control tick period the gains are for, s.
    duration_s
        Length of the experiment, s (clock time).
    cycles_run
        Relay cycles run in all, dimensionless.
    t_s, y_c, u_pct
        The relay record: sample times (s since the relay started), node temperature (°C)
        and heater-equivalent drive (%).
    """

    node: TuneNode
    start_temperature_c: float
    noise_c: float
    bias_pct: float
    amplitude_pct: float
    hysteresis_c: float
    analysis: RelayAnalysis
    ultimate_gain: float
    ultimate_period_s: float
    model: Fopdt
    control_model: Fopdt
    gains: PidGains
    period_s: float
    duration_s: float
    cycles_run: int
    t_s: F = field(repr=False)
    y_c: F = field(repr=False)
    u_pct: F = field(repr=False)


def _drives(node: TuneNode, v_pct: float, rest: Outputs) -> Outputs:
    """Heater-equivalent drive → heater or chiller % of the node's driver chamber."""
    th = node.thermal
    chill = 0.0 if v_pct >= 0 else min(100.0, -v_pct * th.heater_max_w / th.chiller_max_w)
    return Outputs(
        heater_pct=min(100.0, max(0.0, v_pct)),
        chiller_pct=chill,
        lamp_pct=rest.lamp_pct,
        pump_pct=rest.pump_pct,
    )


class _Experiment:
    """One relay experiment on a node (state kept between samples)."""

    def __init__(
        self,
        io: ChamberIO,
        clock: Clock,
        rig: Rig,
        node: TuneNode,
        settings: RelaySettings,
        progress: Callable[[str], None] | None,
    ) -> None:
        self.io, self.clock, self.node, self.s = io, clock, node, settings
        self.progress = progress or (lambda _text: None)
        plan = plan_control(
            rig,
            node.chambers,
            RunSettings(
                period_s=max(settings.sample_s, 1.0), read_timeout_s=0.4, write_timeout_s=0.4
            ),
        )
        self.safe = {c: plan.chambers[c].interlocks.safe_outputs() for c in node.chambers}
        self.quiet = Outputs(
            heater_pct=0.0, chiller_pct=0.0, lamp_pct=0.0, pump_pct=settings.pump_pct
        )
        th = node.thermal
        self.v_min = -100.0 * th.chiller_max_w / th.heater_max_w if th.heater_max_w > 0 else 0.0
        self.t0_s = clock.now_s()
        self.k = 0
        self.missing = 0
        self.centre_c: float | None = None

    async def _read(self) -> float | None:
        """The node's temperature now (mean of the members' fresh probes), °C; checks safety."""
        readings: dict[str, ChamberReadings] = {}

        async def one(chamber: str) -> None:
            try:
                readings[chamber] = await self.io.read(chamber)
            except Exception as exc:  # a driver failure: no reading this sample
                _log.warning("tune: reading %s failed: %r", chamber, exc)

        try:
            async with asyncio.timeout(0.8 * self.s.sample_s):
                async with asyncio.TaskGroup() as group:
                    for chamber in self.node.chambers:
                        group.create_task(one(chamber))
        except TimeoutError:
            pass
        temps = []
        for chamber in self.node.chambers:
            reading = readings.get(chamber)
            if reading is None:
                continue
            if reading.e_stop:
                raise TuneAborted(f"the E-stop of {chamber} is pressed")
            if reading.level_ok is False:
                raise TuneAborted(f"the water level of {chamber} is low")
            if reading.temperature_c is not None:
                temps.append(reading.temperature_c)
        if not temps:
            self.missing += 1
            if self.missing >= self.s.max_missing:
                raise TuneAborted(
                    f"no temperature from {self.node.name} for {self.missing} samples"
                )
            return None
        self.missing = 0
        y = math.fsum(temps) / len(temps)
        node = self.node
        if not node.min_temperature_c <= y <= node.max_temperature_c:
            raise TuneAborted(
                f"{node.name} at {y:.2f} °C left its limits "
                f"({node.min_temperature_c:g}–{node.max_temperature_c:g} °C)"
            )
        if self.centre_c is not None and abs(y - self.centre_c) > self.s.max_deviation_c:
            raise TuneAborted(
                f"{node.name} at {y:.2f} °C is more than {self.s.max_deviation_c:g} °C from "
                f"the start ({self.centre_c:.2f} °C)"
            )
        return y

    async def _write(self, v_pct: float) -> None:
        node, out = self.node, _drives(self.node, v_pct, self.quiet)
        writes = {c: self.quiet for c in node.chambers} | {node.driver: out}
        async with asyncio.timeout(0.8 * self.s.sample_s):
            async with asyncio.TaskGroup() as group:
                for chamber, value in writes.items():
                    group.create_task(self.io.write(chamber, value))

    async def _tick(self) -> float:
        """Wait for the next sample time; return its time since the start, s."""
        due = self.t0_s + self.k * self.s.sample_s
        self.k += 1
        await self.clock.sleep_until(due)
        return self.clock.now_s() - self.t0_s

    async def safe_outputs(self) -> None:
        """Send every member its safe outputs (never raises)."""
        try:
            async with asyncio.timeout(max(2.0, self.s.sample_s)):
                async with asyncio.TaskGroup() as group:
                    for chamber, value in self.safe.items():
                        group.create_task(self.io.write(chamber, value))
        except Exception:
            _log.exception("tune: writing safe outputs failed")

    async def settle(self) -> tuple[float, float, float]:
        """Watch with outputs off; return (centre °C, noise °C, drift °C s⁻¹)."""
        self.progress(f"settling {self.node.name} for {self.s.settle_s:g} s")
        times, temps = [], []
        while True:
            t = await self._tick()
            await self._write(0.0)
            y = await self._read()
            if y is not None:
                times.append(t)
                temps.append(y)
            if t >= self.s.settle_s:
                break
        if len(temps) < 5:
            raise TuneAborted("too few temperature readings while settling")
        tt, yy = np.asarray(times), np.asarray(temps)
        drift, _ = np.polyfit(tt, yy, 1)
        noise = float(np.std(np.diff(yy - drift * tt)) / math.sqrt(2.0))
        return float(yy[-max(3, len(yy) // 4) :].mean()), noise, float(drift)

    async def relay(
        self, centre: float, eps: float, bias: float, d: float
    ) -> tuple[RelayAnalysis, float, float, int, F, F, F]:
        """Run the relay until ``cycles`` symmetric cycles under one bias (see the rules)."""
        s = self.s
        self.centre_c = centre
        t_rec: list[float] = []
        y_rec: list[float] = []
        u_rec: list[float] = []
        heating = True
        last_rise: int | None = None
        last_fall: int | None = None
        window_start: int | None = None
        skip = True  # the first cycle, and the first after a bias change, are transients
        asyms: list[float] = []
        cycles = 0
        start = self.clock.now_s() - self.t0_s
        done = False
        while not done:
            t = await self._tick() - start
            y = await self._read()
            if y is not None:
                if heating and y > centre + eps:
                    heating, last_fall = False, len(t_rec)
                elif not heating and y < centre - eps:
                    heating, here = True, len(t_rec)
                    if last_rise is not None and last_fall is not None and last_fall > last_rise:
                        cycles += 1
                        span = t - t_rec[last_rise]
                        asym = (2.0 * (t_rec[last_fall] - t_rec[last_rise]) - span) / span
                        if skip:
                            skip, window_start, asyms = False, here, []
                        else:
                            asyms.append(asym)
                        self.progress(
                            f"relay cycle {cycles}: asymmetry {asym:+.0%}, "
                            f"{len(asyms)}/{s.cycles} cycles at bias {bias:.1f} %"
                        )
                        if len(asyms) == s.cycles:
                            mean = math.fsum(asyms) / len(asyms)
                            if abs(mean) <= s.symmetry:
                                done = True
                            else:
                                # a lag-dominant node heats for (d − e)/(d + e) of the time it
                                # cools when the bias is e too high: move the bias by −e
                                bias = min(100.0 - d, max(self.v_min + d, bias + d * mean))
                                skip = True
                    last_rise = here
                    if not done and cycles >= s.max_cycles:
                        raise TuneAborted(
                            f"no steady limit cycle after {cycles} relay cycles; try a larger "
                            "hysteresis or amplitude"
                        )
            v = bias + d if heating else bias - d
            await self._write(v)
            if y is not None:
                t_rec.append(t)
                y_rec.append(y)
                u_rec.append(v)
        assert window_start is not None
        # from the sample before the window's first switch, so that switch is in the record
        first = max(0, window_start - 1)
        tt, yy, uu = (np.asarray(x[first:]) for x in (t_rec, y_rec, u_rec))
        try:
            analysis = analyse_relay(tt, yy, uu, s.cycles)
        except ValueError as exc:
            raise TuneAborted(f"the limit cycle could not be analysed: {exc}") from None
        return analysis, bias, t, cycles, *(np.asarray(x) for x in (t_rec, y_rec, u_rec))


def _bias_range(node: TuneNode, v_min: float, bias: float, d: float) -> tuple[float, float]:
    """Bias and amplitude that fit the heater (≤ 100 %) and chiller (≥ v_min)."""
    bias = min(100.0, max(v_min, bias))
    room = min(100.0 - bias, bias - v_min)
    if room < 5.0:
        raise TuneAborted(
            f"{node.name} needs {bias:.0f} % heater drive to hold its temperature, which leaves "
            "no room for a relay; start from a temperature nearer the room's"
        )
    return bias, min(d, room)


async def relay_tune(
    io: ChamberIO,
    clock: Clock,
    rig: Rig,
    chamber: str,
    settings: RelaySettings | None = None,
    progress: Callable[[str], None] | None = None,
) -> TuneResult:
    """Run a relay experiment on a chamber's thermal node and tune its loop.

    Parameters
    ----------
    io
        The rack's chamber I/O, not yet entered (no unit).
    clock
        The clock (real, or virtual in the same event loop; no unit).
    rig
        The rig (no unit).
    chamber
        Chamber to tune; its whole thermal node is tuned (no unit).
    settings
        Experiment choices; default :class:`RelaySettings` (no unit).
    progress
        Called with a line of text as the experiment goes (no unit).

    Returns
    -------
    TuneResult
        Model, gains and the record (°C, s, %).

    Raises
    ------
    TuneAborted
        A safety limit, a lost probe, or no analysable limit cycle; outputs were made safe.
    """
    s = settings or RelaySettings()
    node = tune_node(rig, chamber)
    exp = _Experiment(io, clock, rig, node, s, progress)
    ready = asyncio.Event()
    async with io:
        background = asyncio.ensure_future(io.run(ready))
        try:
            try:
                async with asyncio.timeout(30.0):
                    await ready.wait()
            except TimeoutError:
                raise TuneAborted("the chamber devices were not ready within 30 s") from None
            exp.t0_s, exp.k = clock.now_s(), 0
            centre, noise, drift = await exp.settle()
            eps = s.hysteresis_c if s.hysteresis_c is not None else max(3.0 * noise, 0.01)
            if eps >= s.max_deviation_c / 4:
                raise TuneAborted(
                    f"the temperature is too noisy ({noise:.3f} °C) for a relay within "
                    f"±{s.max_deviation_c:g} °C"
                )
            # the drive that cancels the drift, C·dT/dt in % of heater power: τ1/k = 100·C/P
            capacity_pct_s = node.model.tau_s / node.model.gain  # % heater drive · s per °C
            bias, d = _bias_range(node, exp.v_min, -drift * capacity_pct_s, s.amplitude_pct)
            analysis, bias, run_s, cycles, tt, yy, uu = await exp.relay(centre, eps, bias, d)
        finally:
            await asyncio.shield(exp.safe_outputs())
            background.cancel()
            await asyncio.gather(background, return_exceptions=True)
    ku, model, control, gains = identify(analysis, d, node.model.gain, s.period_s, s.tau_c_factor)
    return TuneResult(
        node=node,
        start_temperature_c=centre,
        noise_c=noise,
        bias_pct=bias,
        amplitude_pct=d,
        hysteresis_c=eps,
        analysis=analysis,
        ultimate_gain=ku,
        ultimate_period_s=analysis.period_s,
        model=model,
        control_model=control,
        gains=gains,
        period_s=s.period_s,
        duration_s=s.settle_s + run_s,
        cycles_run=cycles,
        t_s=tt,
        y_c=yy,
        u_pct=uu,
    )
