"""A controller process for ``test_process_faults``: ``HardwareRun`` (what ``squall run``
runs on a rig's devices) that reports every tick on stdout, so the test knows what the
controller had produced when it was killed.

Usage: ``python tests/faults/_controller.py start PROTOCOL RIG LOG PERIOD_S`` or
``python tests/faults/_controller.py resume LOG``. Each tick prints ``tick UTC`` (POSIX s)
right after its rows were handed to the run log's queue.
"""

from __future__ import annotations

import sys
from pathlib import Path

from controller.runtime import HardwareRun, RunSettings, TickStatus

__all__ = ["main"]


def report(status: TickStatus) -> None:
    """Print one tick's UTC time (POSIX s), flushed at once."""
    print(f"tick {status.utc.timestamp()!r}", flush=True)


def settings_for(period_s: float) -> RunSettings:
    """Run settings of a tick period (s), with read and write timeouts of a quarter tick, as
    ``squall run --period`` sets them."""
    timeout_s = min(RunSettings().read_timeout_s, period_s / 4.0)
    return RunSettings(period_s=period_s, read_timeout_s=timeout_s, write_timeout_s=timeout_s)


def main(argv: list[str]) -> int:
    """Start or resume a run and drive it until it ends or the process is killed."""
    if argv[0] == "start":
        protocol, rig, log, period_s = argv[1:5]
        run = HardwareRun.prepare(
            Path(protocol), Path(rig), Path(log), settings=settings_for(float(period_s))
        )
    elif argv[0] == "resume":
        run = HardwareRun.resume(Path(argv[1]), settings_for=settings_for)
    else:
        raise SystemExit(f"unknown command {argv[0]!r}")
    run.run(progress=report)
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
