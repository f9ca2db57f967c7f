"""The rig's I/O map: which Modbus links reach which chamber blocks, and each optode's port.

Rules of this module
--------------------
- A rig reaches its chambers through one or more **Modbus links** (``[[io.modbus]]``), each
  a TCP connection (``tcp = { host, port }``) or an RTU serial line
  (``rtu = { port, baud, parity, stop_bits }``). Every chamber's block (the register map of
  ``hardware-notes/register-map.md``) sits on exactly one link; a link's ``register_map``
  lays out the blocks of *its* chambers (chamber k of the link's list at
  ``first_block_address + k * block_stride`` on ``unit_id``, unless overridden), so one
  module per chamber is a link per chamber with the defaults.
- Each chamber may have an **optode** on its own serial port (``[io.optodes.<chamber>]``);
  a chamber without one reports no oxygen. ``[io.corrections.<chamber>]`` holds the linear
  calibration corrections of its temperature, PAR and flow inputs
  (``hardware-notes/calibration.md``).
- ``from_announcement = "FILE.json"`` takes the links and optode ports from the ports file
  that ``squall simulate --ports-file FILE.json`` writes, so the very same rig file runs
  against the simulator on loopback. The file is read when the run starts (the simulator
  picks new pseudo-terminal paths every time), relative to the rig file's folder; the other
  settings of ``[io]`` (watchdog, optode cadence, timeouts) still apply. Each I/O module
  (unit id) the simulator serves gets a TCP link of its own, as a rack with a Modbus TCP
  module per eight chambers is wired.
- Everything is checked against the rig's chambers when the rig is loaded (or, for a ports
  file, when it is read) and reported as :class:`~controller.errors.SquallError` with the
  dotted field path, so ``squall check --rig`` points at the line.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Mapping, Sequence
from enum import StrEnum
from pathlib import Path
from typing import Any, Literal, Self

from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from controller._model import FileModel
from controller.drivers import ChamberBlockConfig, RegisterMap, RegisterMapConfig, WordOrder
from controller.errors import SquallError

__all__ = [
    "InputCorrection",
    "ModbusLink",
    "OptodePort",
    "Parity",
    "RigIo",
    "RtuConnection",
    "TcpConnection",
    "io_from_ports",
    "resolve_io",
]


class Parity(StrEnum):
    """Parity of a serial line."""

    NONE = "none"
    EVEN = "even"
    ODD = "odd"


class TcpConnection(FileModel):
    """A Modbus TCP device or gateway."""

    host: str = Field(min_length=1, description="Host name or IP address of the module.")
    port: int = Field(502, ge=1, le=65535, description="TCP port (Modbus TCP default 502).")


class RtuConnection(FileModel):
    """A Modbus RTU line (RS-485 adapter), 8 data bits."""

    port: str = Field(min_length=1, description="Serial device path, e.g. /dev/ttyUSB0.")
    baud: int = Field(19200, ge=300, le=921600, description="Line speed, bit/s.")
    parity: Parity = Field(
        Parity.EVEN, description="Parity; the Modbus serial-line default is even."
    )
    stop_bits: Literal[1, 2] = Field(1, description="Stop bits, count.")


class ModbusLink(FileModel):
    """One Modbus connection and the chamber blocks reached through it."""

    name: str = Field(min_length=1, description="Name of the link in messages and logs.")
    tcp: TcpConnection | None = Field(None, description="Modbus TCP connection.")
    rtu: RtuConnection | None = Field(None, description="Modbus RTU serial line.")
    chambers: list[str] | None = Field(
        None,
        description="Chamber ids whose blocks this link reaches, in block order; omit on a "
        "rig's only link for every chamber in rig order.",
    )
    register_map: RegisterMapConfig = Field(
        default_factory=RegisterMapConfig,
        description="Block layout of this link's chambers (unit id, addresses, word order).",
    )
    timeout_s: float = Field(
        0.5, gt=0, le=30, description="Longest wait for one reply once its request is sent, s."
    )
    attempts: int = Field(3, ge=1, le=10, description="Attempts per request, count.")
    backoff_s: float = Field(
        0.05, ge=0, le=10, description="Pause before the second attempt (doubling after), s."
    )

    @model_validator(mode="after")
    def _one_connection(self) -> Self:
        if (self.tcp is None) == (self.rtu is None):
            raise ValueError("give exactly one of tcp = { ... } or rtu = { ... }")
        if self.chambers is not None and len(set(self.chambers)) != len(self.chambers):
            raise ValueError("a chamber is listed twice")
        return self


class OptodePort(FileModel):
    """The serial port of one chamber's optode (line protocol of hardware-notes)."""

    port: str = Field(min_length=1, description="Serial device path, e.g. /dev/ttyUSB1.")
    baud: int = Field(9600, ge=300, le=921600, description="Line speed, bit/s.")


class InputCorrection(FileModel):
    """Calibration corrections of a chamber's analog inputs: ``gain × reading + offset``.

    Found by calibrating the whole chain (sensor, transmitter, module) against a reference
    (``hardware-notes/calibration.md``) and applied by the controller to every reading.
    """

    temperature_gain: float = Field(1.0, ge=0.8, le=1.2, description="Probe gain, °C per °C.")
    temperature_offset_c: float = Field(0.0, ge=-5, le=5, description="Probe offset, °C.")
    par_gain: float = Field(
        1.0, ge=0.2, le=5, description="PAR sensor gain, dimensionless (reference per reading)."
    )
    par_offset: float = Field(
        0.0, ge=-100, le=100, description="PAR sensor offset, µmol photons m⁻² s⁻¹."
    )
    flow_gain: float = Field(1.0, ge=0.2, le=5, description="Flow sensor gain, dimensionless.")
    flow_offset_cm_s: float = Field(0.0, ge=-10, le=10, description="Flow sensor offset, cm s⁻¹.")
    calibrated_on: dt.date | None = Field(
        None, description="Date of the calibration these corrections come from."
    )


class RigIo(FileModel):
    """How the controller reaches the rig's devices (the ``[io]`` table of a rig file)."""

    from_announcement: str | None = Field(
        None,
        description="Ports file written by 'squall simulate --ports-file' (path relative to "
        "the rig file's folder); replaces modbus and optodes.",
    )
    modbus: list[ModbusLink] = Field(
        default_factory=list, description="Modbus links to the chambers' I/O modules."
    )
    optodes: dict[str, OptodePort] = Field(
        default_factory=dict, description="Optode serial port per chamber id."
    )
    watchdog_timeout_s: float | None = Field(
        None,
        ge=0.5,
        le=6000,
        description="Device watchdog timeout of every I/O module, s; default three control "
        "tick periods.",
    )
    optode_period_s: float = Field(
        30.0, ge=1, le=3600, description="Time between optode measurements, s."
    )
    optode_timeout_s: float = Field(
        1.0, gt=0, le=30, description="Longest wait for an optode reply, s."
    )
    corrections: dict[str, InputCorrection] = Field(
        default_factory=dict,
        description="Calibration corrections of the analog inputs, per chamber id.",
    )

    @model_validator(mode="after")
    def _one_source(self) -> Self:
        if self.from_announcement is not None:
            if self.modbus or self.optodes:
                raise ValueError(
                    "from_announcement takes links and optodes from the ports file; "
                    "remove [[io.modbus]] and [io.optodes]"
                )
        elif not self.modbus:
            raise ValueError("give at least one [[io.modbus]] link, or from_announcement")
        names = [link.name for link in self.modbus]
        if len(set(names)) != len(names):
            raise ValueError("two Modbus links share a name")
        return self

    def link_chambers(self, chamber_ids: Sequence[str]) -> list[tuple[str, ...]]:
        """The chambers of every link, in block order.

        Parameters
        ----------
        chamber_ids
            The rig's chamber ids in rig order (no unit).

        Returns
        -------
        list of tuple of str
            One tuple per link of :attr:`modbus` (no unit).
        """
        return [
            tuple(chamber_ids) if link.chambers is None else tuple(link.chambers)
            for link in self.modbus
        ]

    def check_chambers(self, chamber_ids: Sequence[str], *, where: str = "io") -> None:
        """Check the map against the rig's chambers (nothing to check for a ports file).

        Every chamber must sit on exactly one link, links and optodes may name only the
        rig's chambers, and each link's register layout must fit.

        Parameters
        ----------
        chamber_ids
            The rig's chamber ids in rig order (no unit).
        where
            Field-path prefix of this table in errors (no unit).
        """
        if self.from_announcement is not None:
            return
        known = set(chamber_ids)
        if len(self.modbus) > 1:
            for i, link in enumerate(self.modbus):
                if link.chambers is None:
                    raise SquallError(
                        "with several links, every link must list its chambers",
                        field=f"{where}.modbus.{i}.chambers",
                    )
        seen: dict[str, int] = {}
        for i, ids in enumerate(self.link_chambers(chamber_ids)):
            field = f"{where}.modbus.{i}.chambers"
            for cid in ids:
                if cid not in known:
                    raise SquallError(f"the rig has no chamber {cid!r}", field=field)
                if cid in seen:
                    raise SquallError(
                        f"chamber {cid!r} is already on link {self.modbus[seen[cid]].name!r}",
                        field=field,
                    )
                seen[cid] = i
            if ids:
                # the same checks the drivers make when they lay the blocks out
                RegisterMap.build(
                    ids, self.modbus[i].register_map, where=f"{where}.modbus.{i}.register_map"
                )
        missing = [cid for cid in chamber_ids if cid not in seen]
        if missing:
            raise SquallError(
                f"chamber(s) {', '.join(missing)} are on no Modbus link", field=f"{where}.modbus"
            )
        for table, keys in (("optodes", self.optodes), ("corrections", self.corrections)):
            for cid in keys:
                if cid not in known:
                    raise SquallError(
                        f"{table} entry for unknown chamber {cid!r}", field=f"{where}.{table}.{cid}"
                    )


# --------------------------------------------------------------------------- ports files


_LOOPBACK_TIMEOUT_S = 0.1
"""Reply timeout of the simulator's link, s: on loopback a block answers within milliseconds,
so a short timeout lets retries fit even a 1 s control tick."""


class _Loose(BaseModel):
    model_config = ConfigDict(extra="ignore", frozen=True)


class _PortsBlock(_Loose):
    unit_id: int = Field(ge=1, le=247)
    base: int = Field(ge=0, le=65535)


class _PortsModbus(_Loose):
    host: str = Field(min_length=1)
    port: int = Field(ge=1, le=65535)
    word_order: WordOrder = WordOrder.HIGH_FIRST
    blocks: dict[str, _PortsBlock]


class _PortsFile(_Loose):
    rig: str = ""
    modbus: _PortsModbus
    optodes: dict[str, str] = Field(default_factory=dict)


def io_from_ports(
    data: Mapping[str, Any],
    chamber_ids: Sequence[str],
    *,
    template: RigIo | None = None,
    source: str | Path | None = None,
) -> RigIo:
    """An explicit I/O map from a simulator announcement (the ports file's JSON content).

    Parameters
    ----------
    data
        The announcement as a mapping: ``{"modbus": {host, port, word_order, blocks},
        "optodes": {chamber: path}, ...}`` (what ``Announcement.to_dict()`` gives).
    chamber_ids
        The rig's chamber ids in rig order; every one must be served (no unit).
    template
        Settings to keep (watchdog, optode cadence, timeouts); default :class:`RigIo`'s.
    source
        The ports file, named in errors (no unit).

    Returns
    -------
    RigIo
        One TCP link per I/O module the simulator serves (as a rack with a Modbus TCP
        module per eight chambers is wired: the modules are read side by side, and a slow
        reply holds up only its own module's chambers), each chamber's block where the
        simulator serves it, and one optode port per chamber (no unit).
    """
    try:
        ports = _PortsFile.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        field = ".".join(str(p) for p in first["loc"])
        raise SquallError(
            f"not a simulator ports file: {first['msg']}", file=source, field=field or None
        ) from None
    missing = [cid for cid in chamber_ids if cid not in ports.modbus.blocks]
    if missing:
        served = ", ".join(ports.modbus.blocks) or "none"
        raise SquallError(
            f"the simulator{f' of rig {ports.rig!r}' if ports.rig else ''} serves no block "
            f"for chamber(s) {', '.join(missing)} (it serves {served}); is it running this rig?",
            file=source,
            field="modbus.blocks",
        )
    units: dict[int, list[str]] = {}  # chambers of each I/O module, in rig order
    for cid in chamber_ids:
        units.setdefault(ports.modbus.blocks[cid].unit_id, []).append(cid)
    try:
        links = [
            ModbusLink(
                name="simulator" if len(units) == 1 else f"simulator-unit-{unit}",
                tcp=TcpConnection(host=ports.modbus.host, port=ports.modbus.port),
                timeout_s=_LOOPBACK_TIMEOUT_S,
                chambers=ids,
                register_map=RegisterMapConfig(
                    word_order=ports.modbus.word_order,
                    chambers={
                        cid: ChamberBlockConfig(
                            unit_id=unit, block_address=ports.modbus.blocks[cid].base
                        )
                        for cid in ids
                    },
                ),
            )
            for unit, ids in units.items()
        ]
    except ValidationError as exc:
        raise SquallError(
            f"unusable block layout: {exc.errors()[0]['msg']}", file=source, field="modbus.blocks"
        ) from None
    base = template or RigIo(modbus=links)
    settings = dict(base)
    for key in ("from_announcement", "modbus", "optodes"):
        del settings[key]
    optodes = {
        cid: OptodePort(port=path) for cid, path in ports.optodes.items() if cid in chamber_ids
    }
    io = RigIo(modbus=links, optodes=optodes, **settings)
    io.check_chambers(chamber_ids, where="announcement")
    return io


def resolve_io(io: RigIo, chamber_ids: Sequence[str], *, base_dir: Path) -> RigIo:
    """The explicit I/O map to run with: ``io`` itself, or what its ports file announces.

    Parameters
    ----------
    io
        The rig's ``[io]`` table.
    chamber_ids
        The rig's chamber ids in rig order (no unit).
    base_dir
        Folder of the rig file; ``from_announcement`` is relative to it (no unit).

    Returns
    -------
    RigIo
        A map with explicit links and optode ports, checked against the chambers.
    """
    if io.from_announcement is None:
        io.check_chambers(chamber_ids)
        return io
    path = Path(base_dir) / io.from_announcement
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SquallError(
            "ports file not found; start 'squall simulate --rig RIG --ports-file FILE' first",
            file=path,
            field="io.from_announcement",
        ) from None
    except OSError as exc:
        raise SquallError(f"cannot read the ports file: {exc.strerror}", file=path) from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise SquallError(f"not JSON: {exc.msg}", file=path, line=exc.lineno) from None
    if not isinstance(data, dict):
        raise SquallError("not a simulator ports file: expected a JSON object", file=path)
    return io_from_ports(data, chamber_ids, template=io, source=path)
