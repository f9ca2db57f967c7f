"""Serving a rack: Modbus TCP plus one optode pty per chamber, the rack advanced on a clock.

Rules of this module
--------------------
- :class:`RackServer` owns the endpoints. With a clock, the rack's simulated time follows the
  clock in whole steps of :data:`SYNC_QUANTUM_S` (or of ``[sim] physics_step_s`` when that is
  shorter): ``sync()`` advances the rack by every step that has fully passed, and every
  endpoint calls it before answering, so a reply (and a module's watchdog) is at most one
  step late, and the physics is integrated once per step however many requests arrive.
  :meth:`RackServer.run` also syncs on a fixed cadence, which
  keeps the physics and the device watchdogs moving when nobody asks.
- The rack is served as modules of eight chambers (:func:`module_layout`): chamber k (rig
  order) on unit ``1 + k // 8`` at base ``16 * (k % 8)``, so every unit is one run of
  neighbouring blocks that a controller reads and writes in one request each.
- Without a clock (tests), the caller steps the rack with ``rack.advance`` and ``tick()``.
- Where to connect is announced as an :class:`Announcement`: printed by the CLI and written as
  JSON to a ports file (atomically, removed again on shutdown) so a controller can find the
  pty paths, which change on every start.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from types import TracebackType
from typing import Any, Self

from controller.clock import Clock
from controller.drivers import (
    BLOCK_SPAN,
    MAX_RUN_BLOCKS,
    ChamberBlockConfig,
    RegisterMap,
    RegisterMapConfig,
)
from simulator import Rack
from simulator.endpoints._modbus import ModbusEndpoint
from simulator.endpoints._optode import OptodeEmulator

__all__ = ["SYNC_QUANTUM_S", "Announcement", "RackServer", "module_layout"]

SYNC_QUANTUM_S = 0.1
"""Longest step the rack follows the clock by, s (the physics step when that is shorter):
the rack is advanced at most once per quantum however many requests arrive, and a reply or
a watchdog expiry is at most this late."""


def module_layout(chamber_ids: tuple[str, ...]) -> RegisterMap:
    """The simulator's layout: modules of eight chambers, one unit id each.

    Parameters
    ----------
    chamber_ids
        Chamber ids in rig order (no unit).

    Returns
    -------
    RegisterMap
        Chamber k on unit ``1 + k // 8`` at base ``16 * (k % 8)`` (no unit).
    """
    per = MAX_RUN_BLOCKS
    overrides = {
        cid: ChamberBlockConfig(unit_id=1 + k // per, block_address=BLOCK_SPAN * (k % per))
        for k, cid in enumerate(chamber_ids)
    }
    return RegisterMap.build(
        chamber_ids, RegisterMapConfig(chambers=overrides), where="simulator.layout"
    )


@dataclass(frozen=True, kw_only=True)
class Announcement:
    """Where a served rack can be reached."""

    host: str
    """Modbus TCP host (no unit)."""
    port: int
    """Modbus TCP port (no unit)."""
    word_order: str
    """Register order of 32-bit values (``high-first`` or ``low-first``)."""
    blocks: dict[str, dict[str, int]]
    """Per chamber: ``unit_id`` and block ``base`` address (no unit)."""
    optodes: dict[str, str]
    """Per chamber: path of the optode's serial port (no unit)."""
    rig: str = ""
    """Rig name (no unit)."""
    extra: dict[str, Any] = field(default_factory=dict)
    """Anything else worth telling a client (speed, start time ...)."""

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready form (no unit).

        Returns
        -------
        dict
            ``{"rig", "modbus": {host, port, word_order, blocks}, "optodes", **extra}``.
        """
        return {
            "rig": self.rig,
            "modbus": {
                "host": self.host,
                "port": self.port,
                "word_order": self.word_order,
                "blocks": self.blocks,
            },
            "optodes": self.optodes,
            **self.extra,
        }

    def write(self, path: Path) -> None:
        """Write the JSON ports file atomically (a reader never sees half a file).

        Parameters
        ----------
        path
            Target file (no unit).
        """
        tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
        tmp.write_text(json.dumps(self.to_dict(), indent=2) + "\n", encoding="utf-8")
        os.replace(tmp, path)

    def lines(self) -> list[str]:
        """Human-readable summary, one line per endpoint (no unit).

        Returns
        -------
        list of str
            Lines to print.
        """
        out = [f"modbus tcp  {self.host}:{self.port}  (32-bit word order {self.word_order})"]
        for cid, block in self.blocks.items():
            out.append(
                f"  {cid:<12} unit {block['unit_id']:<3} block {block['base']:<5} "
                f"optode {self.optodes.get(cid, '-')}"
            )
        return out


class RackServer:
    """The Modbus TCP endpoint and the optode ptys of one rack.

    Parameters
    ----------
    rack
        The simulated rack (with ``start_utc`` set: it dates the optodes' calibration).
    register_map
        Where each chamber's block lives; None = :func:`module_layout`.
    clock
        The clock the rack follows; None when the caller steps the rack itself.
    """

    def __init__(
        self,
        rack: Rack,
        *,
        register_map: RegisterMap | None = None,
        clock: Clock | None = None,
    ) -> None:
        self.rack = rack
        self.clock = clock
        self._offset_s = 0.0 if clock is None else clock.now_s() - rack.t_s
        self._step_s = min(rack.rig.sim.physics_step_s, SYNC_QUANTUM_S)
        sync = None if clock is None else self.sync
        self.modbus = ModbusEndpoint(
            rack, register_map or module_layout(rack.chamber_ids), sync=sync
        )
        self.optodes: dict[str, OptodeEmulator] = {
            cid: OptodeEmulator(rack, cid, serial=f"SIM{i + 1:04d}", sync=sync)
            for i, cid in enumerate(rack.chamber_ids)
        }
        self._announcement: Announcement | None = None
        self._ports_file: Path | None = None

    # --------------------------------------------------------------- lifecycle

    async def start(
        self,
        host: str = "127.0.0.1",
        port: int = 0,
        *,
        ports_file: Path | None = None,
        extra: dict[str, Any] | None = None,
    ) -> Announcement:
        """Open every endpoint and announce them.

        Parameters
        ----------
        host
            Interface for Modbus TCP (no unit).
        port
            TCP port, 0 = any free port (no unit).
        ports_file
            Where to write the announcement as JSON; None = nowhere (no unit).
        extra
            More keys for the announcement (no unit).

        Returns
        -------
        Announcement
            Where everything is (no unit).
        """
        try:
            bound_host, bound_port = await self.modbus.start(host, port)
            paths = {cid: emulator.open() for cid, emulator in self.optodes.items()}
        except BaseException:
            await self.stop()
            raise
        rmap = self.modbus.register_map
        self._announcement = Announcement(
            host=bound_host,
            port=bound_port,
            word_order=rmap.word_order.value,
            blocks={b.chamber_id: {"unit_id": b.unit_id, "base": b.base} for b in rmap.blocks},
            optodes=paths,
            rig=self.rack.rig.name,
            extra=dict(extra or {}),
        )
        if ports_file is not None:
            self._announcement.write(ports_file)
            self._ports_file = ports_file
        return self._announcement

    async def stop(self) -> None:
        """Close every endpoint and remove the ports file written by :meth:`start`."""
        for emulator in self.optodes.values():
            emulator.close()
        await self.modbus.stop()
        if self._ports_file is not None:
            self._ports_file.unlink(missing_ok=True)
            self._ports_file = None

    async def __aenter__(self) -> Self:
        if self._announcement is None:
            await self.start()
        return self

    async def __aexit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        tb: TracebackType | None,
    ) -> None:
        await self.stop()

    @property
    def announcement(self) -> Announcement:
        """Where everything is (no unit); raises before :meth:`start`."""
        if self._announcement is None:
            raise RuntimeError("the rack server has not been started")
        return self._announcement

    # ------------------------------------------------------------------- time

    def sync(self) -> None:
        """Advance the rack by the whole steps the clock has passed; refresh every I/O module
        when it moved (the endpoints refresh the modules they answer for anyway)."""
        if self.clock is None:
            self.modbus.tick()
            return
        lag_s = self.clock.now_s() - self._offset_s - self.rack.t_s
        steps = math.floor(lag_s / self._step_s + 1e-9)
        if steps >= 1:
            self.rack.advance(steps * self._step_s)
            self.modbus.tick()

    async def run(self, *, step_s: float = 0.1) -> None:
        """Keep the rack following the clock until cancelled.

        Parameters
        ----------
        step_s
            Clock seconds between syncs, s (> 0).
        """
        if self.clock is None:
            raise RuntimeError("RackServer.run needs a clock")
        if not step_s > 0:
            raise ValueError(f"step_s must be positive, got {step_s!r}")
        next_s = self.clock.now_s()
        while True:
            self.sync()
            next_s += step_s
            await self.clock.sleep_until(next_s)
