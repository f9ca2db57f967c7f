"""``squall simulate --rig RIG``: serve a simulated rack as hardware, until Ctrl-C.

The rig's chambers are simulated and presented as a Modbus TCP server (one register block per
chamber, ``hardware-notes/register-map.md``) and one optode per chamber on a pseudo-terminal
(``hardware-notes/optode-line-protocol.md``). Where to connect is printed and, with
``--ports-file``, written as JSON. The server binds to loopback only unless
``--allow-non-loopback`` is given: a simulator on a lab network could be mistaken for a rack.
"""

from __future__ import annotations

import argparse
import asyncio
import ipaddress
import math
import sys
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from controller.clock import Clock, RealClock, VirtualClock, run_with_clock
from controller.errors import SquallError
from controller.files import load_model
from controller.rig import Rig

__all__ = ["register"]

DEFAULT_PORT = 15020
"""TCP port served when ``--port`` is not given."""
REAL_CADENCE_S = 0.1
"""Wall seconds between rack updates when nobody asks, s."""


def register(sub: Any) -> None:
    """Add the ``simulate`` subcommand to the ``squall`` parser.

    Parameters
    ----------
    sub
        The subparsers object of the main parser.
    """
    parser = sub.add_parser(
        "simulate",
        help="serve a simulated rack over Modbus TCP and emulated optode serial ports",
        description=(
            "Simulate the rig's chambers and serve them as hardware: a Modbus TCP server "
            "(one register block per chamber) and one optode per chamber on a "
            "pseudo-terminal. Runs until Ctrl-C."
        ),
    )
    parser.add_argument("--rig", metavar="RIG", type=Path, required=True, help="rig file (TOML)")
    parser.add_argument(
        "--host",
        default="127.0.0.1",
        help="interface for Modbus TCP (default 127.0.0.1; loopback only unless "
        "--allow-non-loopback)",
    )
    parser.add_argument(
        "--port",
        type=int,
        default=DEFAULT_PORT,
        metavar="N",
        help=f"TCP port for Modbus (default {DEFAULT_PORT}; 0 = any free port)",
    )
    parser.add_argument(
        "--speed",
        type=float,
        default=1.0,
        metavar="N",
        help="simulated seconds per real second (default 1 = real time)",
    )
    parser.add_argument(
        "--ports-file",
        type=Path,
        metavar="FILE",
        help="write where to connect (Modbus host/port, register blocks, optode ports) as "
        "JSON; removed again on exit",
    )
    parser.add_argument(
        "--seed", type=int, default=None, metavar="N", help="sensor-noise seed (default: rig's)"
    )
    parser.add_argument(
        "--allow-non-loopback",
        action="store_true",
        help="allow --host to be a non-loopback interface (the simulator has no access control)",
    )
    parser.set_defaults(handler=_handle)


def check_host(host: str, *, allow_non_loopback: bool) -> str:
    """Refuse a non-loopback interface unless explicitly allowed.

    Parameters
    ----------
    host
        Interface name or address (no unit).
    allow_non_loopback
        The user's explicit permission (no unit).

    Returns
    -------
    str
        The host, unchanged (no unit).
    """
    if host == "localhost":
        return host
    try:
        loopback = ipaddress.ip_address(host).is_loopback
    except ValueError:
        raise SquallError(
            f"--host {host!r} is not an IP address (use 127.0.0.1, ::1 or localhost)",
            field="--host",
        ) from None
    if not loopback and not allow_non_loopback:
        raise SquallError(
            f"--host {host} is not a loopback address; a simulator reachable from the network "
            "could be mistaken for a real rack. Pass --allow-non-loopback if you mean it.",
            field="--host",
        )
    return host


def _check_args(args: argparse.Namespace) -> None:
    check_host(args.host, allow_non_loopback=args.allow_non_loopback)
    if not 0 <= args.port <= 65535:
        raise SquallError(f"--port {args.port} outside 0..65535", field="--port")
    if not (math.isfinite(args.speed) and args.speed > 0):
        raise SquallError(f"--speed must be a positive number, got {args.speed}", field="--speed")
    if args.seed is not None and args.seed < 0:
        raise SquallError(f"--seed must be 0 or more, got {args.seed}", field="--seed")
    if args.ports_file is not None and not args.ports_file.parent.is_dir():
        raise SquallError(f"folder {args.ports_file.parent} does not exist", field="--ports-file")


async def _serve(clock: Clock, rig: Rig, args: argparse.Namespace) -> None:
    # imported here: the simulator is only needed by this command
    from simulator import Rack
    from simulator.endpoints import RackServer

    start_utc = clock.utc(0.0)
    rack = Rack(rig, seed=args.seed, start_utc=start_utc)
    server = RackServer(rack, clock=clock)
    try:
        announcement = await server.start(
            args.host,
            args.port,
            ports_file=args.ports_file,
            extra={"speed": args.speed, "start_utc": start_utc.isoformat()},
        )
    except OSError as exc:
        await server.stop()
        raise SquallError(
            f"cannot serve Modbus on {args.host}:{args.port}: {exc.strerror or exc} "
            "(is another simulator running? --port 0 picks a free port)",
            field="--port",
        ) from None
    try:
        print(f"simulating rig {rig.name!r} at {args.speed:g}x real time", flush=True)
        for line in announcement.lines():
            print(line, flush=True)
        if args.ports_file is not None:
            print(f"ports written to {args.ports_file}", flush=True)
        print("serving; press Ctrl-C to stop", flush=True)
        await server.run(step_s=REAL_CADENCE_S * args.speed)
    finally:
        await server.stop()


def _handle(args: argparse.Namespace) -> int:
    """Serve until interrupted; exit 0 on Ctrl-C."""
    _check_args(args)
    rig = load_model(args.rig, Rig)
    clock: Clock
    if args.speed == 1.0:
        clock = RealClock()
    else:
        clock = VirtualClock(datetime.now(UTC), speed=args.speed)
    try:
        run_with_clock(clock, lambda c: _serve(c, rig, args))
    except (KeyboardInterrupt, asyncio.CancelledError):
        print("stopped", file=sys.stderr)
    return 0
