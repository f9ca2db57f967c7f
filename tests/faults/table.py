"""Render the fault matrix's table (``tests/faults/README.md``) from measured records.

``python -m tests.faults.table`` runs the matrix (``pytest tests/faults``) with
``SQUALL_FAULT_RECORDS`` pointing at a temporary file, refuses to go on unless every test
passed and every row of :data:`ROWS` was measured, then writes the records with the run's
facts to ``tests/faults/records.json`` and renders the README from that file.
``--records FILE`` renders from an existing records file instead of running the matrix.
``test_table.py`` checks that the committed README is exactly what the committed records
render to, and that every simulator fault kind has its row.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import asdict
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from controller.rig import FaultKind

from ._harness import FaultRecord, RecordBook

__all__ = ["GAPS", "README", "RECORDS", "ROWS", "load", "main", "render"]

HERE = Path(__file__).resolve().parent
README = HERE / "README.md"
"""The rendered table."""
RECORDS = HERE / "records.json"
"""The measured records the table is rendered from."""

OTHER_FAULTS: tuple[tuple[str, str], ...] = (
    ("modbus-timeout", "test_endpoint_faults.py"),
    ("serial-disconnect", "test_endpoint_faults.py"),
    ("broker-outage", "test_broker_faults.py"),
    ("disk-full", "test_disk_faults.py"),
    ("clock-jump", "test_clock_faults.py"),
    ("sigkill", "test_process_faults.py"),
    ("power-cut", "test_process_faults.py"),
)
"""Faults outside the simulator's fault kinds, with the file that measures each."""
ROWS: tuple[str, ...] = tuple(k.value for k in FaultKind) + tuple(n for n, _ in OTHER_FAULTS)
"""Every row of the table, in order: the simulator's fault kinds, then the others."""
GAPS: tuple[tuple[str, str], ...] = (
    (
        "test_simulator_faults.py::"
        "test_a_slowly_drifting_probe_is_caught_before_the_water_leaves_its_limits",
        "A slowly drifting temperature probe (6 °C/h) is followed by the loop: the probe "
        "keeps reading the setpoint while the water leaves its limits, and nothing trips. "
        "The optode measures temperature too; no interlock compares the two.",
    ),
    (
        "test_simulator_faults.py::test_a_dead_pump_raises_an_alarm",
        "A dead pump raises nothing: no interlock watches the flow reading, which sits at "
        "zero against its setpoint. The log's incubation column keeps saying the chamber is "
        "open (the pump is commanded), though no water is exchanged.",
    ),
)
"""Known gaps, each kept by a strict ``xfail`` test (test id, what is missing)."""


def load(path: Path = RECORDS) -> tuple[dict[str, Any], list[FaultRecord]]:
    """The run facts and the records of a records file."""
    data = json.loads(path.read_text(encoding="utf-8"))
    return data["run"], [FaultRecord(**item) for item in data["records"]]


def _seconds(value: float | None) -> str:
    if value is None:
        return "–"
    return f"{value:.3g}" if value < 10 else f"{value:.0f}"


def _cell(text: str) -> str:
    return text.replace("|", "\\|")


def render(run: dict[str, Any], records: list[FaultRecord]) -> str:
    """The README text for the run facts and records (rows in :data:`ROWS` order)."""
    by_fault = {r.fault: r for r in records}
    lines = [
        "# Fault matrix",
        "",
        "One row per fault: every fault kind the simulator can inject, and the faults that",
        "happen outside it (the wire, the disk, the clock, the broker, the controller's own",
        "process). Each row is measured by a test in this folder that asserts the alarm, the",
        "time from the fault's onset to safe outputs (seconds of run time), and the run log",
        "afterwards: `PRAGMA integrity_check`, rows contiguous in tick order (a resumed run's",
        "gap recorded as such), and run time missing from the log within the stated bound.",
        "",
        "This file is generated from measured records (`records.json`); do not edit it.",
        "Regenerate both with `python -m tests.faults.table` (runs the matrix: about two",
        "minutes on a loaded 2-core machine). A fault kind added to the simulator without a",
        "row here fails `test_table.py`.",
        "",
        f"Measured {run['generated_utc']} on Python {run['python']} ({run['machine']}), "
        f"broker {run['broker']}; the whole matrix took {run['wall_s']:.0f} s.",
        "",
        "| Fault | Injected | Expected behaviour | Alarm | Safe after (s) | Bound (s) "
        "| Log | Lost (s) | Lost bound (s) | Also measured |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for name in ROWS:
        r = by_fault[name]
        log = "ok" if r.integrity == "ok" and r.contiguous else "**not whole**"
        lines.append(
            f"| `{r.fault}` | {_cell(r.injected)} | {_cell(r.expected)} "
            f"| {', '.join(f'`{c}`' for c in (r.alarm or '').split(', ') if c) or '–'} "
            f"| {_seconds(r.safe_after_s)} | {_seconds(r.safe_bound_s)} | {log} "
            f"| {_seconds(r.lost_s)} | {_seconds(r.lost_bound_s)} | {_cell(r.note) or '–'} |"
        )
    lines += [
        "",
        "Safe after: from onset to the first moment the chamber's outputs were safe (what",
        "the controller commands under a trip, or what the actuators do where it cannot",
        "reach them), looked at every second of run time; – where the fault leaves nothing",
        "to make safe. Lost: run time the controller ran that the log does not hold. Its",
        "bound is the run's commit interval: 600 s of simulated time for the in-process",
        "runs at full simulation speed (well under a second of real time; a finished run",
        "loses nothing), 0.5 s on the real clock, where a killed process may also lose the",
        "tick queued for the log; for `disk-full` it includes the time the disk was full.",
        "",
        "## Known gaps",
        "",
        "Each is kept by a strict `xfail` test, which fails (XPASS) once the gap is closed.",
        "",
    ]
    lines += [f"- `{test}`: {text}" for test, text in GAPS]
    return "\n".join(lines) + "\n"


def _broker() -> str:
    sys.path.insert(0, str(HERE.parent))
    from telemetry._brokers import broker_kind

    return broker_kind()


def run_matrix() -> tuple[dict[str, Any], list[FaultRecord]]:
    """Run ``pytest tests/faults``; return the run facts and the records it measured."""
    with tempfile.TemporaryDirectory() as folder:
        target = Path(folder) / "records.json"
        env = {**os.environ, "SQUALL_FAULT_RECORDS": str(target)}
        started = time.perf_counter()
        done = subprocess.run(
            # the table's own checks compare the committed files, which are being replaced
            [
                sys.executable,
                "-m",
                "pytest",
                str(HERE),
                "-p",
                "no:cacheprovider",
                "--ignore",
                str(HERE / "test_table.py"),
                "-rfE",
            ],
            env=env,
            check=False,
        )
        wall_s = time.perf_counter() - started
        if done.returncode != 0:
            raise SystemExit(f"the fault matrix failed (pytest exit {done.returncode})")
        records = RecordBook.read(target)
    run = {
        "generated_utc": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "python": platform.python_version(),
        "machine": f"{os.cpu_count()} cores",
        "broker": _broker(),
        "wall_s": round(wall_s, 1),
    }
    return run, records


def main(argv: list[str] | None = None) -> int:
    """Command line: run (or read) the records, write records.json and the README."""
    parser = argparse.ArgumentParser(prog="python -m tests.faults.table", description=__doc__)
    parser.add_argument("--records", type=Path, help="render from this records file")
    args = parser.parse_args(argv)
    if args.records is not None:
        run, records = load(args.records)
    else:
        run, records = run_matrix()
    missing = [name for name in ROWS if name not in {r.fault for r in records}]
    if missing:
        raise SystemExit(f"no record for: {', '.join(missing)}")
    ordered = sorted(records, key=lambda r: ROWS.index(r.fault) if r.fault in ROWS else 999)
    data = {"run": run, "records": [asdict(r) for r in ordered]}
    RECORDS.write_text(json.dumps(data, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    README.write_text(render(*load(RECORDS)), encoding="utf-8")
    print(f"wrote {README} and {RECORDS} ({len(records)} rows)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
