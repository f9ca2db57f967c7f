"""A small invented rig and protocol for the view tests (TOML text): three chambers with their
own water, a 2-hour hold at 20 °C with light and flow. Numbers are invented but plausible for
small benthic chambers."""

from __future__ import annotations

from collections.abc import Sequence

CHAMBER = """
[[chambers]]
id = "{cid}"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.limits]
min_temperature_c = 10.0
max_temperature_c = {t_max}
max_ramp_c_per_h = 3.0
max_par = 800.0
max_flow_cm_s = 15.0

[chambers.sim]
initial_temperature_c = 20.0

[chambers.sim.sensors]
temperature_noise_c = 0.01
temperature_tau_s = 5.0

[chambers.sim.lamp]
par_at_full_drive = 700.0
warmup_tau_s = 60.0

[chambers.sim.pump]
dead_band_pct = 6.0
flow_at_full_drive_cm_s = 14.0
flush_at_full_drive_l_h = 20.0

[chambers.sim.thermal]
ua_w_k = 8.0
heater_max_w = 400.0
chiller_max_w = 300.0
dead_time_s = 10.0
"""


def rig_text(chambers: Sequence[str], *, t_max: float = 22.0) -> str:
    """TOML of the view-test rig with the given chambers."""
    head = (
        'name = "view test rack"\n\n[sim]\nroom_temperature_c = 18.0\nphysics_step_s = 1.0\n'
        "seed = 5\nlevel_alarm_loss_pct = 5.0\n"
    )
    return head + "".join(CHAMBER.format(cid=c, t_max=t_max) for c in chambers)


def protocol_text(chambers: Sequence[str], *, hours: float = 2.0) -> str:
    """TOML of a protocol holding 20 °C, 300 PAR and 4 cm/s for ``hours`` in two phases."""
    ids = ", ".join(f'"{c}"' for c in chambers)
    half = hours * 30
    text = f"""format = "squall-protocol/1"
title = "View test at Saltmarrow Lagoon"
begins = "2027-07-01T06:00:00+00:00"
utc_offset = "+00:00"

[groups.all]
role = "treatment"
chambers = [{ids}]
"""
    for name in ("settle", "watch"):
        text += f"""
[[phases]]
name = "{name}"
duration = "{half:g}min"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = 20.0 }} ]
  light = [ {{ kind = "hold", value = 300.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]
"""
    return text
