"""Shared pieces of the hardware-I/O tests: an invented rig, and a virtual-time runner.

Every test here talks to the simulator's real endpoints (Modbus TCP on 127.0.0.1 with an
ephemeral port, optodes on pseudo-terminals) from inside one event loop that runs on a
:class:`~controller.clock.VirtualClock` in autojump mode. Timeouts, back-off pauses and tick
periods therefore cost no real time: when every task waits, virtual time jumps to the next
deadline. ``io_grace_s`` gives the kernel a few real milliseconds to deliver loopback and pty
bytes before a jump, as the clock's documentation advises for peers outside the loop.
Every test also carries a real-time bound (pytest-timeout) in case a peer hangs.
"""

from __future__ import annotations

import asyncio
import datetime as dt
from collections.abc import Awaitable, Callable
from typing import TypeVar

from controller.clock import Clock, VirtualClock, run_with_clock
from controller.rig import Rig

T = TypeVar("T")

START = dt.datetime(2027, 7, 1, 6, 0, tzinfo=dt.UTC)
"""Start of every simulated rack and clock."""
IO_GRACE_S = 0.01
"""Real time the virtual clock leaves loopback and pty peers before each jump, s."""
VIRTUAL_BOUND_S = 7200.0
"""Longest virtual time a test body may take, s."""

CHAMBER = """
[[chambers]]
id = "{cid}"
water_volume_l = 8.0
sediment_area_m2 = 0.03
salinity = 30.0

[chambers.limits]
min_temperature_c = 10.0
max_temperature_c = 26.0
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


def rig_text(chambers: tuple[str, ...] = ("c1", "c2"), io: str = "") -> str:
    """TOML of a small invented rack (Saltmarrow Lagoon benthic chambers) with an [io] text."""
    head = (
        'name = "Saltmarrow test rack"\n'
        "[sim]\nroom_temperature_c = 18.0\nphysics_step_s = 1.0\nseed = 3\n"
    )
    return head + "".join(CHAMBER.format(cid=c) for c in chambers) + io


def rig(chambers: tuple[str, ...] = ("c1", "c2")) -> Rig:
    """The rig of :func:`rig_text`, validated, without an [io] table."""
    import tomllib

    return Rig.model_validate(tomllib.loads(rig_text(chambers)))


def virtual(body: Callable[[VirtualClock], Awaitable[T]]) -> T:
    """Run ``body(clock)`` on a fresh autojumping virtual clock starting at :data:`START`."""
    clock = VirtualClock(START, io_grace_s=IO_GRACE_S)

    async def main(_clock: Clock) -> T:
        async with asyncio.timeout(VIRTUAL_BOUND_S):
            return await body(clock)

    return run_with_clock(clock, main)
