"""Child process for the crash tests: writes a run log tick by tick and reports over stdout.

Usage: ``python runlog_child.py MODE LOG``

- ``MODE=ticks``: append ticks of 0.1 s forever (commit interval 1 s), printing each tick's
  clock time after ``append_samples`` returned. The parent kills it with SIGKILL.
- ``MODE=full``: commit every tick, then cap the size any file may grow to (RLIMIT_FSIZE, a
  real I/O error from the kernel, like a full disk) and keep appending; print ``ok T`` after
  every successful tick and ``failed MESSAGE`` once the writer raises RuntimeFailure.
"""

from __future__ import annotations

import os
import resource
import signal
import sys
from pathlib import Path

from runlog_helpers import make_meta, tick_rows

from controller.errors import RuntimeFailure
from controller.storage import RunLogWriter

TICK_S = 0.1
N_CHAMBERS = 8


def _ticks(log: Path) -> None:
    writer = RunLogWriter(log, meta=make_meta(N_CHAMBERS), commit_interval_s=1.0)
    for k in range(10_000_000):
        t_s = round(k * TICK_S, 6)
        writer.append_samples(tick_rows(t_s, N_CHAMBERS))
        print(repr(t_s), flush=True)


def _full(log: Path) -> None:
    writer = RunLogWriter(log, meta=make_meta(N_CHAMBERS), commit_interval_s=0.0)
    k = 0
    for k in range(20):
        writer.append_samples(tick_rows(round(k * TICK_S, 6), N_CHAMBERS))
        print(f"ok {round(k * TICK_S, 6)!r}", flush=True)
    sizes = [os.path.getsize(f"{log}{s}") for s in ("", "-wal") if os.path.exists(f"{log}{s}")]
    # Past this size a write fails with EFBIG instead of killing us with SIGXFSZ.
    signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    limit = max(sizes) + 32 * 1024
    resource.setrlimit(resource.RLIMIT_FSIZE, (limit, resource.RLIM_INFINITY))
    try:
        while k < 100_000:
            k += 1
            t_s = round(k * TICK_S, 6)
            writer.append_samples(tick_rows(t_s, N_CHAMBERS))
            print(f"ok {t_s!r}", flush=True)
    except RuntimeFailure as exc:
        print(f"failed {exc}", flush=True)
    else:
        print("never failed", flush=True)
    os._exit(0)  # like a crash right after the failure: no clean close


if __name__ == "__main__":
    mode, path = sys.argv[1], Path(sys.argv[2])
    {"ticks": _ticks, "full": _full}[mode](path)
