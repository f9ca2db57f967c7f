"""Small rigs for simulator tests (invented; one chamber unless a test needs more)."""

from __future__ import annotations

from typing import Any

from controller.rig import Rig
from simulator import Rack


def chamber(cid: str = "C1", **fields: Any) -> dict[str, Any]:
    """A chamber table: 10 L over 0.05 m², quiet sensors, no dead time, no lamp warm-up."""
    sim: dict[str, Any] = {
        "sensors": {
            "temperature_noise_c": 0.0,
            "temperature_tau_s": 0.0,
            "par_noise_pct": 0.0,
            "flow_noise_cm_s": 0.0,
            "optode": {"t90_s": 0.0, "noise_umol_l": 0.0},
        },
        "lamp": {"warmup_tau_s": 0.0, "ageing_pct_per_1000_h": 0.0},
    }
    table: dict[str, Any] = {
        "id": cid,
        "water_volume_l": 10.0,
        "sediment_area_m2": 0.05,
        "sim": sim,
    }
    sim_fields = fields.pop("sim", {})
    for key, value in sim_fields.items():
        if isinstance(value, dict) and isinstance(sim.get(key), dict):
            sim[key] = {**sim[key], **value}
        else:
            sim[key] = value
    table.update(fields)
    return table


def thermal(**fields: Any) -> dict[str, Any]:
    """Thermal parameters with no dead time unless given."""
    return {"dead_time_s": 0.0, **fields}


def rig(*chambers: dict[str, Any], **top: Any) -> Rig:
    """A validated rig from chamber tables (one default chamber when none are given)."""
    data: dict[str, Any] = {"name": "test rack", "chambers": list(chambers) or [chamber()]}
    data.update(top)
    return Rig.model_validate(data)


def rack(*chambers: dict[str, Any], seed: int | None = None, **top: Any) -> Rack:
    """A rack built from chamber tables."""
    return Rack(rig(*chambers, **top), seed=seed)
