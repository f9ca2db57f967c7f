"""Small rigs and protocols for the schedule tests, written into temporary folders.

The test rig ("Test rack", zone Etc/GMT-1, room 20 °C) has a bath ``tank`` holding B1 and B2
and two chambers with their own water, S1 and S2. One chiller ``cold-loop`` serves all three
thermal nodes; the lamps share one circuit. Every number can be changed per test.
"""

from __future__ import annotations

import sqlite3
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from pathlib import Path

from controller.cli.cmd_check import compile_loaded, load_protocol, load_rig
from controller.rig import Rig
from controller.schedule import Booking

START = datetime(2027, 7, 10, 6, 0, tzinfo=UTC)
"""A start used throughout (08:00 local summer time at +02:00, 07:00 at the rig's +01:00)."""

RIG_DEFAULTS: dict[str, float] = {
    "room_c": 20.0,
    "bath_l": 40.0,
    "bath_ua": 10.0,
    "bath_heater": 400.0,
    "bath_chiller": 300.0,
    "own_ua": 2.0,
    "own_heater": 100.0,
    "own_chiller": 80.0,
    "chiller_capacity": 500.0,
    "lamp_budget": 300.0,
    "rated_w": 100.0,
    "max_par": 1000.0,
    "flush_l_h": 0.0,
    "max_ramp": 2.0,
}


def rig_text(**changes: float) -> str:
    """TOML of the test rig with some numbers changed (keys of :data:`RIG_DEFAULTS`)."""
    v = {**RIG_DEFAULTS, **changes}
    chambers = []
    for chamber, bath in (("B1", "tank"), ("B2", "tank"), ("S1", None), ("S2", None)):
        lines = [
            "[[chambers]]",
            f'id = "{chamber}"',
            "water_volume_l = 10.0",
            "sediment_area_m2 = 0.04",
            "salinity = 35.0",
        ]
        if bath:
            lines.append(f'bath = "{bath}"')
        lines += [
            "[chambers.lamp]",
            f"rated_w = {v['rated_w']}",
            "[chambers.limits]",
            f"max_par = {v['max_par']}",
            f"max_ramp_c_per_h = {v['max_ramp']}",
            "max_flow_cm_s = 20.0",
            "[chambers.sim.pump]",
            "flow_at_full_drive_cm_s = 20.0",
            f"flush_at_full_drive_l_h = {v['flush_l_h']}",
        ]
        if not bath:
            lines += [
                "[chambers.sim.thermal]",
                f"ua_w_k = {v['own_ua']}",
                f"heater_max_w = {v['own_heater']}",
                f"chiller_max_w = {v['own_chiller']}",
            ]
        chambers.append("\n".join(lines))
    return "\n".join(
        [
            'name = "Test rack"',
            "[sim]",
            f"room_temperature_c = {v['room_c']}",
            "[power]",
            f"lamp_budget_w = {v['lamp_budget']}",
            "[maintenance]",
            'timezone = "Etc/GMT-1"',
            "[[plants]]",
            'id = "cold-loop"',
            'kind = "chiller"',
            f"capacity_w = {v['chiller_capacity']}",
            'serves = ["tank", "S1", "S2"]',
            "[[baths]]",
            'id = "tank"',
            f"water_volume_l = {v['bath_l']}",
            "salinity = 35.0",
            "[baths.thermal]",
            f"ua_w_k = {v['bath_ua']}",
            f"heater_max_w = {v['bath_heater']}",
            f"chiller_max_w = {v['bath_chiller']}",
            *chambers,
        ]
    )


def write_rig(folder: Path, name: str = "rig.toml", **changes: float) -> Path:
    """Write the test rig (see :func:`rig_text`) and return its path."""
    path = folder / name
    path.write_text(rig_text(**changes) + "\n", encoding="utf-8")
    return path


@dataclass(frozen=True)
class Group:
    """One group of a test protocol: chambers and the blocks of each variable (TOML text)."""

    chambers: Sequence[str]
    temperature: str | None = '{ kind = "hold", value = 20.0 }'
    light: str | None = '{ kind = "hold", value = 0.0 }'
    flow: str | None = None


def protocol_text(
    groups: Mapping[str, Group] | None = None,
    *,
    duration: str = "1d",
    title: str = "Test protocol",
) -> str:
    """TOML of a one-phase protocol; every group is a treatment group with its own programs."""
    groups = groups if groups is not None else {"a": Group(["S1", "S2"])}
    lines = [
        'format = "squall-protocol/1"',
        f"title = {title!r}".replace("'", '"'),
        'begins = "on-launch"',
        'utc_offset = "+01:00"',
    ]
    for name, group in groups.items():
        quoted = ", ".join(f'"{c}"' for c in group.chambers)
        lines += [f"[groups.{name}]", 'role = "treatment"', f"chambers = [{quoted}]"]
    lines += ["[[phases]]", 'name = "only"', f'duration = "{duration}"']
    for name, group in groups.items():
        lines.append(f"[phases.groups.{name}]")
        for key in ("temperature", "light", "flow"):
            value = getattr(group, key)
            if value is not None:
                lines.append(f"{key} = [ {value} ]")
    return "\n".join(lines) + "\n"


def write_protocol(folder: Path, name: str = "protocol.toml", **kwargs: object) -> Path:
    """Write a test protocol (see :func:`protocol_text`) and return its path."""
    path = folder / name
    path.write_text(protocol_text(**kwargs), encoding="utf-8")  # type: ignore[arg-type]
    return path


def booking(
    protocol: Path,
    start: datetime = START,
    *,
    label: str = "this experiment",
    experiment_id: str | None = None,
) -> Booking:
    """A compiled booking of a protocol file at a start."""
    compiled = compile_loaded(load_protocol(protocol), start)
    end = start + timedelta(seconds=compiled.duration_s)
    return Booking(label, experiment_id, compiled.chambers, start, end, compiled)


def rig(path: Path) -> Rig:
    """The validated rig of a rig file."""
    return load_rig(path)


def dump(store_path: Path) -> list[str]:
    """Every row of a store file as SQL text (its content, independent of page layout)."""
    if not store_path.exists():
        return []
    conn = sqlite3.connect(store_path)
    try:
        return list(conn.iterdump())
    finally:
        conn.close()
