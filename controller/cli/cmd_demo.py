"""``squall demo [--out DIR] [--no-run]``: the whole job once, on simulated chambers.

The demo writes the compound heatwave + storm example, the invented site series it needs and
the example 8-chamber rig into a folder, prints the check summary, renders the preview figure
and setpoints CSV, then runs the protocol on the in-process simulated rack at full speed (the
same control loop, interlocks and run log as a real run; a 5-minute control tick keeps the
28-day run to about a minute) and says where everything is and what to try next.
"""

from __future__ import annotations

import argparse
from importlib import resources
from pathlib import Path
from typing import Any

from controller.cli.cmd_check import compile_loaded, load_protocol, print_summary, resolve_start
from controller.errors import RuntimeFailure, SquallError

__all__ = ["DEFAULT_OUT", "register", "run", "write_demo_files"]

DEFAULT_OUT = Path("squall-demo")
"""Default output folder, relative to the working directory."""
DEMO_PERIOD_S = 300.0
"""Control tick of the demo run, s: coarse enough to simulate 28 days in about a minute, fine
enough for the slow water baths of the example rig (tracking RMS about 0.02 °C)."""


def write_demo_files(out: Path) -> Path:
    """Copy the demo protocol and its site series into ``out``.

    Parameters
    ----------
    out
        Output folder; created if needed. Existing demo files in it are replaced.

    Returns
    -------
    Path
        The protocol file written.
    """
    from controller.demo import DEMO_FILES, DEMO_PROTOCOL

    package = resources.files("controller.demo")
    try:
        for name, relative in DEMO_FILES.items():
            target = out / relative
            target.parent.mkdir(parents=True, exist_ok=True)
            target.write_bytes(package.joinpath(name).read_bytes())
    except OSError as exc:
        raise SquallError(
            f"cannot write the demo files: {exc.strerror or exc}", file=exc.filename or out
        ) from None
    return out / DEMO_FILES[DEMO_PROTOCOL]


def run(args: argparse.Namespace) -> int:
    """Run ``squall demo``; return the exit code."""
    from rich.console import Console

    from controller.cli.cmd_preview import write_preview
    from controller.demo import DEMO_FILES, DEMO_RIG

    out: Path = args.out
    protocol_path = write_demo_files(out)
    loaded = load_protocol(protocol_path)
    start_utc, note = resolve_start(loaded.protocol, None)
    compiled = compile_loaded(loaded, start_utc)
    console = Console(highlight=False, soft_wrap=False)
    print_summary(console, loaded, compiled, note)
    figure = protocol_path.with_suffix(".png")
    table = protocol_path.with_name(protocol_path.stem + "-setpoints.csv")
    rows = write_preview(loaded, compiled, figure, table)
    rig_path = out / DEMO_FILES[DEMO_RIG]
    listing = [
        (protocol_path, "the protocol: edit it, then run 'squall check' on it"),
        (out / "data" / "saltmarrow-sst.csv", "the invented site series it uses"),
        (rig_path, "the simulated 8-chamber rig it runs on"),
        (figure, "preview figure"),
        (table, f"setpoints of every chamber, {rows} rows"),
    ]
    log_path: Path | None = None
    if not args.no_run:
        log_path = _run(protocol_path, rig_path, out, console)
        listing.append((log_path, "run log (SQLite): every tick, alarm, closed window and command"))
    console.print()
    console.print(f"Demo files written to {out}/:", soft_wrap=True)
    for path, what in listing:
        console.print(f"  {path}  ({what})", soft_wrap=True)
    if log_path is not None:
        console.print()
        console.print("Next:", soft_wrap=True)
        for line in (
            f"squall replay {log_path}        # watch the run again in the terminal",
            f"squall analyze {log_path} --report {out / 'report.html'}",
            f"squall export {log_path} -o {out / 'run.csv'}",
        ):
            console.print(f"  {line}", soft_wrap=True, markup=False)
    return 0


def _run(protocol_path: Path, rig_path: Path, out: Path, console: Any) -> Path:
    """Run the demo protocol on the simulated rig through ``squall run``; return the log path."""
    from datetime import UTC, datetime

    from controller.cli import build_parser

    stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
    log_path = out / "runs" / f"{protocol_path.stem}-{stamp}.sqlite"
    log_path.parent.mkdir(parents=True, exist_ok=True)
    console.print()
    console.print(
        f"Running it on the simulated rig at full speed ({DEMO_PERIOD_S:.0f} s control tick)...",
        soft_wrap=True,
    )
    argv = [
        "run", str(protocol_path), "--rig", str(rig_path), "--sim", "--speed", "max",
        "--period", str(DEMO_PERIOD_S), "--log", str(log_path),
    ]  # fmt: skip
    args = build_parser().parse_args(argv)
    code = args.handler(args)
    if code != 0:
        raise RuntimeFailure(f"the demo run ended with exit code {code}; its log is {log_path}")
    return log_path


def register(sub: Any) -> None:
    """Add the ``demo`` subcommand to the ``squall`` parser."""
    parser = sub.add_parser(
        "demo",
        help="write an example protocol, check, preview and simulate it",
        description="Write the compound heatwave + storm example protocol (invented lagoon, "
        "invented site data) and an example rig into a folder, check it, render its preview "
        "figure and setpoints CSV, and run it on simulated chambers into a run log.",
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=DEFAULT_OUT,
        metavar="DIR",
        help=f"output folder (default ./{DEFAULT_OUT})",
    )
    parser.add_argument(
        "--no-run",
        action="store_true",
        help="stop after the check and the preview (no simulated run)",
    )
    parser.set_defaults(handler=run)
