"""Rig file models (TOML). Grows with the control runtime; the fields here are relied on by
``squall check --rig`` and by the simulator.

Rule: a chamber that names a ``bath`` shares one water body (one thermal node) with every other
chamber naming the same bath, so all of them must be given the same temperature program.
Simulator parameters live in :mod:`controller.rig._sim`; cross-references (bath names, fault
chambers, duplicate ids) are checked here and reported as :class:`SquallError` with the dotted
field path, so the file loader can point at the line.
"""

from __future__ import annotations

from typing import Annotated, Self

from pydantic import AfterValidator, Field, model_validator

from controller._model import FileModel
from controller.errors import SquallError
from controller.rig._control import ChamberControl
from controller.rig._facility import (
    ChamberCalibration,
    ChamberLamp,
    ChamberPump,
    Maintenance,
    Plant,
    PlantKind,
    Power,
)
from controller.rig._interlocks import ChamberInterlocks, check_interlocks_against_limits
from controller.rig._io import RigIo
from controller.rig._sim import Bath, ChamberSim, RackSim
from controller.telemetry._config import TelemetryConfig

__all__ = ["Chamber", "ChamberControl", "ChamberLimits", "Rig", "RigIncubation"]


class ChamberLimits(FileModel):
    """What a chamber can physically do; protocols beyond these are refused."""

    min_temperature_c: float = Field(
        0.0, ge=-5, le=50, description="Lowest water temperature the chamber can hold, °C."
    )
    max_temperature_c: float = Field(
        35.0, ge=-5, le=50, description="Highest water temperature the chamber can hold, °C."
    )
    max_ramp_c_per_h: float = Field(
        2.0, gt=0, le=60, description="Fastest temperature change the chamber can follow, °C h⁻¹."
    )
    max_par: float = Field(
        1500.0,
        ge=0,
        le=5000,
        description="Highest PAR the lamps deliver at the community, µmol photons m⁻² s⁻¹.",
    )
    max_flow_cm_s: float = Field(
        30.0, ge=0, le=200, description="Highest flow the pump delivers over the community, cm s⁻¹."
    )

    @model_validator(mode="after")
    def _ordered(self) -> Self:
        if self.min_temperature_c >= self.max_temperature_c:
            raise ValueError("min_temperature_c must be below max_temperature_c")
        return self


class Chamber(FileModel):
    """One incubation chamber."""

    id: str = Field(
        min_length=1,
        max_length=32,
        pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]*$",
        description="Chamber identifier used by protocols (letters, digits, '_', '.', '-').",
    )
    water_volume_l: float = Field(
        gt=0, le=10000, description="Water volume net of organisms and sediment, L."
    )
    sediment_area_m2: float = Field(
        gt=0, le=100, description="Planar area of the enclosed community, m²."
    )
    bath: str | None = Field(
        None,
        description="Shared water bath this chamber sits in; chambers in one bath share one "
        "temperature program.",
    )
    salinity: float = Field(
        35.0, ge=0, le=42, description="Practical salinity of the chamber water (PSS-78)."
    )
    limits: ChamberLimits = Field(default_factory=ChamberLimits)
    sim: ChamberSim = Field(
        default_factory=ChamberSim, description="Simulator parameters of this chamber."
    )
    control: ChamberControl | None = Field(
        None,
        description="Temperature-loop gains of this chamber's thermal node (e.g. from 'squall "
        "tune'); absent = derived from the thermal description. Chambers of one bath that "
        "give them must give the same.",
    )
    lamp: ChamberLamp = Field(default_factory=ChamberLamp, description="The chamber's lamp.")
    pump: ChamberPump = Field(default_factory=ChamberPump, description="The chamber's pump.")
    calibration: ChamberCalibration = Field(
        default_factory=ChamberCalibration,
        description="Dates of the last calibrations and cleaning of this chamber.",
    )
    interlocks: Annotated[
        ChamberInterlocks | None, AfterValidator(check_interlocks_against_limits)
    ] = Field(
        None,
        description="Interlock settings of this chamber (trip limits, plausible probe range, "
        "time limits, condition levels); absent keys are derived from limits and the run.",
    )

    @model_validator(mode="after")
    def _thermal_belongs_to_bath(self) -> Self:
        if self.bath is not None and self.sim.thermal is not None:
            raise ValueError(
                f"chamber {self.id!r} sits in bath {self.bath!r}: give its thermal parameters "
                "under [baths.thermal] of that bath, not [chambers.sim.thermal]"
            )
        return self


class RigIncubation(FileModel):
    """The rig's default closed-incubation cycle, for protocols without an ``[incubation]``
    table of their own; a protocol's table overrides it setting by setting (and
    ``enabled = false`` there switches it off). Settings left out take the built-in defaults
    of :class:`controller.control.IncubationSettings`."""

    o2_low_pct: float | None = Field(
        None, gt=0, le=300, description="Lower edge of the O2 band, % air saturation."
    )
    o2_high_pct: float | None = Field(
        None, gt=0, le=300, description="Upper edge of the O2 band, % air saturation."
    )
    min_closed_s: float | None = Field(
        None, ge=0, le=30 * 86400, description="Shortest window worth starting, s."
    )
    max_closed_s: float | None = Field(
        None, gt=0, le=30 * 86400, description="Longest closed window, s."
    )
    flush_s: float | None = Field(
        None, gt=0, le=30 * 86400, description="Flushing time between windows, s."
    )
    settle_s: float | None = Field(
        None, ge=0, le=30 * 86400, description="Wait after a light change before closing, s."
    )
    pinned_to_light: bool | None = Field(
        None, description="One window per light and per dark period."
    )
    reclose_margin_pct: float | None = Field(
        None,
        ge=0,
        le=100,
        description="Close only with O2 this far inside both band edges, % air saturation.",
    )
    light_threshold_par: float | None = Field(
        None,
        ge=0,
        le=5000,
        description="PAR setpoint above which a period is light, µmol photons m⁻² s⁻¹.",
    )

    def check(self, where: str) -> None:
        """Refuse an empty band or a minimum above the maximum.

        Parameters
        ----------
        where
            Dotted path of this table in the file (no unit).
        """
        low, high = self.o2_low_pct, self.o2_high_pct
        if low is not None and high is not None and low >= high:
            raise SquallError("must be above o2_low_pct", field=f"{where}.o2_high_pct")
        short, long = self.min_closed_s, self.max_closed_s
        if short is not None and long is not None and short > long:
            raise SquallError("must not be longer than max_closed_s", field=f"{where}.min_closed_s")


class Rig(FileModel):
    """A rack of chambers and the hardware behind them."""

    name: str = Field(min_length=1, description="Human-readable rig name.")
    chambers: list[Chamber] = Field(min_length=1, description="Every chamber of the rig.")

    baths: list[Bath] = Field(
        default_factory=list,
        description="Shared water baths; when any is given, every bath a chamber names must be "
        "defined here.",
    )
    sim: RackSim = Field(default_factory=RackSim, description="Rack-wide simulator settings.")
    io: RigIo | None = Field(
        None, description="How the controller reaches the devices (links, optode ports)."
    )
    incubation: RigIncubation | None = Field(
        None, description="Default closed-incubation cycle for protocols run on this rig."
    )
    plants: list[Plant] = Field(
        default_factory=list,
        description="Chillers and heaters shared by several thermal nodes, with their capacity.",
    )
    power: Power = Field(default_factory=Power, description="Electrical budgets of the rack.")
    maintenance: Maintenance = Field(
        default_factory=Maintenance,
        description="Calibration age limits, cleaning interval and daily check of the rack.",
    )
    telemetry: TelemetryConfig | None = Field(
        None, description="MQTT telemetry of this rig's controller; absent = none."
    )

    @model_validator(mode="after")
    def _cross_references(self) -> Self:
        seen: set[str] = set()
        for i, chamber in enumerate(self.chambers):
            if chamber.id in seen:
                raise SquallError(
                    f"chamber id {chamber.id!r} appears twice", field=f"chambers.{i}.id"
                )
            seen.add(chamber.id)
        bath_ids: set[str] = set()
        for i, bath in enumerate(self.baths):
            if bath.id in bath_ids:
                raise SquallError(f"bath id {bath.id!r} appears twice", field=f"baths.{i}.id")
            bath_ids.add(bath.id)
        named = {c.bath for c in self.chambers if c.bath is not None}
        if self.baths:
            for i, chamber in enumerate(self.chambers):
                if chamber.bath is not None and chamber.bath not in bath_ids:
                    raise SquallError(
                        f"bath {chamber.bath!r} is not defined under [[baths]] "
                        f"(defined: {', '.join(sorted(bath_ids))})",
                        field=f"chambers.{i}.bath",
                    )
            for i, bath in enumerate(self.baths):
                if bath.id not in named:
                    raise SquallError(f"no chamber sits in bath {bath.id!r}", field=f"baths.{i}.id")
        for i, fault in enumerate(self.sim.faults):
            if fault.chamber is not None and fault.chamber not in seen:
                raise SquallError(
                    f"fault names chamber {fault.chamber!r}, which the rig does not have",
                    field=f"sim.faults.{i}.chamber",
                )
        if self.io is not None:
            self.io.check_chambers([c.id for c in self.chambers])
        if self.incubation is not None:
            self.incubation.check("incubation")
        self._bath_gains_agree()
        self._curves_reach_limits()
        self._plants_serve_nodes()
        if self.power.lamp_budget_w is not None:
            for i, chamber in enumerate(self.chambers):
                if chamber.lamp.rated_w is None:
                    raise SquallError(
                        "[power] lamp_budget_w is set, so every chamber's lamp needs its rated_w",
                        field=f"chambers.{i}.lamp.rated_w",
                    )
        return self

    def _curves_reach_limits(self) -> None:
        """A chamber may not promise more PAR or flow than its measured curve gives at full
        drive: protocols are checked against the limits, and the runtime would saturate."""
        for i, chamber in enumerate(self.chambers):
            for curve, limit, key, table in (
                (chamber.lamp.curve(), chamber.limits.max_par, "max_par", "lamp.drive_pct_par"),
                (
                    chamber.pump.curve(),
                    chamber.limits.max_flow_cm_s,
                    "max_flow_cm_s",
                    "pump.drive_pct_flow_cm_s",
                ),
            ):
                if curve is not None and limit > curve.full + 1e-9:
                    raise SquallError(
                        f"{key} {limit:g} is above what [chambers.{table.split('.')[0]}] "
                        f"{table.split('.')[1]} gives at 100 % drive ({curve.full:g}); set "
                        f"[chambers.limits] {key} to at most {curve.full:g}",
                        field=f"chambers.{i}.limits.{key}",
                    )

    def _plants_serve_nodes(self) -> None:
        """A plant serves thermal nodes: baths, or chambers with their own water; a node
        draws on at most one chiller and one heater."""
        ids: set[str] = set()
        nodes = set(self.thermal_nodes())
        drawn: dict[tuple[str, PlantKind], str] = {}
        for i, plant in enumerate(self.plants):
            if plant.id in ids:
                raise SquallError(f"plant id {plant.id!r} appears twice", field=f"plants.{i}.id")
            ids.add(plant.id)
            for j, node in enumerate(plant.serves):
                if node not in nodes:
                    raise SquallError(
                        f"{node!r} is not a thermal node of this rig (baths and chambers with "
                        f"their own water: {', '.join(sorted(nodes))})",
                        field=f"plants.{i}.serves.{j}",
                    )
                other = drawn.setdefault((node, plant.kind), plant.id)
                if other != plant.id:
                    raise SquallError(
                        f"{node!r} is already served by {plant.kind.value} {other!r}",
                        field=f"plants.{i}.serves.{j}",
                    )

    def thermal_nodes(self) -> dict[str, tuple[str, ...]]:
        """Every thermal node of the rig with its chambers, in rig order.

        Returns
        -------
        dict of str to tuple of str
            Node id (the bath id, or the chamber id of a chamber with its own water) to the
            ids of the chambers in it (no unit).
        """
        nodes: dict[str, list[str]] = {}
        for chamber in self.chambers:
            nodes.setdefault(chamber.bath or chamber.id, []).append(chamber.id)
        return {name: tuple(members) for name, members in nodes.items()}

    def _bath_gains_agree(self) -> None:
        """Chambers of one bath are one temperature loop: their [chambers.control] agree."""
        first: dict[str, ChamberControl] = {}
        for i, chamber in enumerate(self.chambers):
            if chamber.bath is None or chamber.control is None:
                continue
            seen = first.setdefault(chamber.bath, chamber.control)
            if not seen.same_gains(chamber.control):
                raise SquallError(
                    f"chambers of bath {chamber.bath!r} share one temperature loop, but "
                    f"{chamber.id!r} gives other gains than an earlier chamber of the bath",
                    field=f"chambers.{i}.control",
                )

    def bath(self, bath_id: str) -> Bath | None:
        """Return the defined bath with this id, or ``None`` when it is not defined."""
        for bath in self.baths:
            if bath.id == bath_id:
                return bath
        return None

    def chamber(self, chamber_id: str) -> Chamber:
        """Return the chamber with this id; raise ``KeyError`` if there is none."""
        for chamber in self.chambers:
            if chamber.id == chamber_id:
                return chamber
        raise KeyError(chamber_id)
