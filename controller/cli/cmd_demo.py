"""``squall demo [--out DIR]``: write an example protocol, check it and preview it.

For now the demo stops before any run: it writes the compound heatwave + storm example and the
invented site series it needs, prints the check summary, and renders the preview figure and
setpoints CSV. A later issue extends it to a full simulated run.
"""

from __future__ import annotations

import argparse
from importlib import resources
from pathlib import Path
from typing import Any

from controller.cli.cmd_check import compile_loaded, load_protocol, print_summary, resolve_start
from controller.errors import SquallError

__all__ = ["DEFAULT_OUT", "register", "run", "write_demo_files"]

DEFAULT_OUT = Path("squall-demo")
"""Default output folder, relative to the working directory."""


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
    listing = [
        (protocol_path, "the protocol: edit it, then run 'squall check' on it"),
        (out / "data" / "saltmarrow-sst.csv", "the invented site series it uses"),
        (figure, "preview figure"),
        (table, f"setpoints of every chamber, {rows} rows"),
    ]
    console.print()
    console.print(f"Demo files written to {out}/:", soft_wrap=True)
    for path, what in listing:
        console.print(f"  {path}  ({what})", soft_wrap=True)
    return 0


def register(sub: Any) -> None:
    """Add the ``demo`` subcommand to the ``squall`` parser."""
    parser = sub.add_parser(
        "demo",
        help="write an example protocol, check it and render its preview",
        description="Write the compound heatwave + storm example protocol (invented lagoon, "
        "invented site data) into a folder, check it and render its preview figure and "
        "setpoints CSV.",
    )
    parser.add_argument(
        "--out",
        type=Path,
        default=DEFAULT_OUT,
        metavar="DIR",
        help=f"output folder (default ./{DEFAULT_OUT})",
    )
    parser.set_defaults(handler=run)
