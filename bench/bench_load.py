"""Load: 64 chambers for 30 simulated days at a 10 s control tick, with random faults.

Builds a 64-chamber rig in code (invented ids: eight shared baths of four chambers,
``B1-1`` … ``B8-4``, and 32 chambers with their own water, ``W01`` … ``W32``) and a protocol
over all of them (a daily temperature cycle, daylight and a steady flow; the own-water
chambers get a heatwave event). Faults of every simulator kind (:class:`simulator.FaultKind`)
are drawn with a seeded random generator and written into the rig's ``[[sim.faults]]``, so
the run is the same every time and its log carries the faults it met. The run goes through
:class:`controller.runtime.SimulatedRun` on the virtual clock, control and run log included.

Checked and printed, each also as a ``RESULT:`` line for ``bench/run``:

- unhandled exceptions: the run raised, or something logged an error with a traceback
  (goal 0);
- log completeness: sample rows in the log over ticks × chambers, every (tick, chamber) pair
  present once, and ``PRAGMA integrity_check`` is ``ok``;
- memory: resident memory (current and peak, from ``/proc/self/status``) and the number of
  objects the garbage collector tracks, at the end of the first day and at the end; the
  RESULT line is peak RSS at the end over peak RSS after day 1 (goal ≤ 1.1x: flat);
- speed: wall milliseconds per control tick (no goal: the figure to watch).

``--quick`` runs 64 chambers for 6 h (memory compared at 1 h and 6 h) and estimates the
30-day wall time from its milliseconds per tick. The same machinery, smaller, runs in the
test suite (``tests/load/``), which imports this file.

Run: ``/work/venv/bin/python bench/bench_load.py [--days 30] [--chambers 64] [--period 10]
[--faults 40] [--seed 9] [--quick] [--keep DIR]``.

Measured (2026-12-02, the shared 2-core machine with a load average of 4-9 from other work,
so wall times are about twice those of a quiet run): ``--quick`` 57.7 ms/tick (2160 ticks,
138 240 rows, all present; peak RSS 198 then 203 MiB), ``--days 2`` 80.2 ms/tick (17 280
ticks, 1 105 920 rows, all present, integrity ok, 529 alarms from 40 faults, none
unhandled; peak RSS 204.6 MiB after day 1 and after day 2, gc-tracked objects 132 434 and
132 431). Those rates predate the simulated run's batched sensor reads. The full 30-day
form after them (2026-12-02, load about 1.5-3 with a benchmark and the test suite beside it):
259 200 of 259 200 ticks, 16 588 800 of 16 588 800 rows, no pair missing or repeated,
integrity ok, 534 alarms from 40 faults of all 11 kinds, no unhandled exception; peak RSS
203.0 MiB after day 1 and 204.6 MiB after day 30 (1.008x), gc-tracked objects 132 525 and
132 470; 2187 s wall, 8.44 ms per 64-chamber tick.
"""

from __future__ import annotations

import argparse
import gc
import logging
import random
import resource
import sqlite3
import sys
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

from controller.rig import SENSORS, FaultKind
from controller.runtime import RunSettings, SimulatedRun, TickStatus

__all__ = [
    "LoadReport",
    "MemoryMark",
    "check_log",
    "draw_faults",
    "load_protocol_text",
    "load_rig_text",
    "main",
    "run_load",
]

START_UTC = datetime(2027, 7, 1, tzinfo=UTC)
"""Wall time at the start of the load run (its protocol begins then)."""
DAY_S = 86400.0
PER_BATH = 4
"""Chambers per shared bath, dimensionless."""
_COMM_DEVICES = ("modbus", "optode")


@dataclass(frozen=True)
class MemoryMark:
    """Memory at one moment of the run.

    Attributes
    ----------
    elapsed_s
        Protocol time of the mark, s.
    rss_mib
        Resident memory now, MiB.
    peak_rss_mib
        Highest resident memory so far, MiB.
    gc_objects
        Objects the garbage collector tracks, dimensionless.
    """

    elapsed_s: float
    rss_mib: float
    peak_rss_mib: float
    gc_objects: int


@dataclass
class LoadReport:
    """What a load run did and left behind.

    Attributes
    ----------
    chambers
        Chambers in the rig, dimensionless.
    faults
        Faults drawn into the rig, as ``kind`` values in order.
    ticks
        Control ticks run, dimensionless.
    ticks_total
        Ticks the protocol needs at the tick period, dimensionless.
    end_reason
        How the run ended (``completed`` when all went well), or the exception's type.
    unhandled
        Unhandled errors: the exception the run raised, and every log record at level ERROR or
        above that carries a traceback, as text.
    rows_logged
        Sample rows in the run log, dimensionless.
    rows_expected
        Ticks × chambers, dimensionless.
    pairs_missing
        (tick, chamber) pairs without a row, dimensionless.
    pairs_repeated
        (tick, chamber) pairs with more than one row, dimensionless.
    integrity
        Result of ``PRAGMA integrity_check`` on the log.
    alarms
        Alarms the run raised, dimensionless.
    wall_s
        Wall time of the run itself (not building or checking), s.
    marks
        Memory at the marks asked for, in time order.
    """

    chambers: int
    faults: list[str]
    ticks: int = 0
    ticks_total: int = 0
    end_reason: str = ""
    unhandled: list[str] = field(default_factory=list)
    rows_logged: int = 0
    rows_expected: int = 0
    pairs_missing: int = 0
    pairs_repeated: int = 0
    integrity: str = ""
    alarms: int = 0
    wall_s: float = 0.0
    marks: list[MemoryMark] = field(default_factory=list)

    @property
    def ms_per_tick(self) -> float:
        """Wall time per control tick, ms."""
        return 1000.0 * self.wall_s / self.ticks if self.ticks else float("nan")

    @property
    def log_complete(self) -> bool:
        """Every (tick, chamber) row present once and the file intact."""
        return (
            self.rows_logged == self.rows_expected > 0
            and self.pairs_missing == 0
            and self.pairs_repeated == 0
            and self.integrity == "ok"
        )


def chamber_ids(chambers: int) -> tuple[list[str], list[str]]:
    """Ids of a rig of ``chambers`` chambers: (in shared baths, with their own water).

    Half (rounded down to whole baths of four) sit in baths; the rest have their own water.
    """
    baths = (chambers // 2) // PER_BATH
    in_bath = [f"B{b + 1}-{k + 1}" for b in range(baths) for k in range(PER_BATH)]
    own = [f"W{k + 1:02d}" for k in range(chambers - len(in_bath))]
    return in_bath, own


def draw_faults(
    rng: random.Random, ids: Sequence[str], duration_s: float, count: int
) -> list[dict[str, object]]:
    """Draw ``count`` faults of every kind in turn, at random chambers, times and lengths.

    Parameters
    ----------
    rng
        The seeded generator.
    ids
        Chamber ids to pick from.
    duration_s
        Length of the run, s; faults start in its first 90 %.
    count
        Faults to draw, dimensionless.

    Returns
    -------
    list of dict
        One ``[[sim.faults]]`` table each (kind, chamber, sensor, at_s, duration_s,
        magnitude as the kind needs). Kinds cycle through :class:`FaultKind` in a shuffled
        order so every kind appears once ``count`` reaches their number. A power loss hits the
        whole rack for at most two minutes; other faults last 1 min to 2 h.
    """
    kinds = list(FaultKind)
    rng.shuffle(kinds)
    faults: list[dict[str, object]] = []
    for n in range(count):
        kind = kinds[n % len(kinds)]
        fault: dict[str, object] = {"kind": kind.value}
        if kind is not FaultKind.POWER_LOSS:
            fault["chamber"] = rng.choice(list(ids))
        if kind in (FaultKind.STUCK, FaultKind.DROPOUT, FaultKind.SPIKES, FaultKind.DRIFT):
            fault["sensor"] = rng.choice(SENSORS)
        elif kind is FaultKind.COMM_TIMEOUT:
            fault["sensor"] = rng.choice(_COMM_DEVICES)
        if kind is FaultKind.SPIKES:
            fault["magnitude"] = round(rng.uniform(0.5, 5.0), 2)
        elif kind is FaultKind.DRIFT:
            fault["magnitude"] = round(rng.uniform(-2.0, 2.0), 2) or 0.5
        elif kind is FaultKind.LEAK:
            fault["magnitude"] = round(rng.uniform(0.1, 2.0), 2)
        fault["at_s"] = round(rng.uniform(0.0, 0.9 * duration_s), 1)
        longest_s = 120.0 if kind is FaultKind.POWER_LOSS else 7200.0
        fault["duration_s"] = round(rng.uniform(60.0, longest_s), 1)
        faults.append(fault)
    return faults


def _toml_value(value: object) -> str:
    """A TOML literal of a string or number."""
    return f'"{value}"' if isinstance(value, str) else repr(value)


def load_rig_text(chambers: int, faults: Sequence[dict[str, object]] = ()) -> str:
    """TOML of the load rig: baths of four chambers and own-water chambers, and the faults.

    Parameters
    ----------
    chambers
        Chambers in all, dimensionless (at least 1).
    faults
        ``[[sim.faults]]`` tables, e.g. from :func:`draw_faults`.

    Returns
    -------
    str
        The rig file's text. All numbers are invented but plausible for 10 L benthic chambers.
    """
    in_bath, own = chamber_ids(chambers)
    parts = [
        f'name = "Saltmarrow Lagoon load rack ({chambers} chambers)"\n\n',
        "[sim]\nroom_temperature_c = 18.0\ninflow_temperature_c = 18.0\n"
        "physics_step_s = 1.0\nseed = 64\nlevel_alarm_loss_pct = 5.0\n",
    ]
    for fault in faults:
        body = "".join(f"{key} = {_toml_value(value)}\n" for key, value in fault.items())
        parts.append(f"\n[[sim.faults]]\n{body}")
    for b in range(len(in_bath) // PER_BATH):
        parts.append(
            f'\n[[baths]]\nid = "bath-{b + 1}"\nwater_volume_l = 60.0\nsalinity = 31.0\n\n'
            "[baths.thermal]\nua_w_k = 20.0\nheater_max_w = 1000.0\nchiller_max_w = 800.0\n"
            "dead_time_s = 30.0\n"
        )
    for n, cid in enumerate(in_bath + own):
        bath = f'bath = "bath-{cid[1:].split("-")[0]}"\n' if cid.startswith("B") else ""
        thermal = (
            ""
            if bath
            else "\n[chambers.sim.thermal]\nua_w_k = 6.0\nheater_max_w = 300.0\n"
            "chiller_max_w = 250.0\ndead_time_s = 20.0\n"
        )
        parts.append(
            f'\n[[chambers]]\nid = "{cid}"\nwater_volume_l = 10.0\nsediment_area_m2 = 0.03\n'
            f"salinity = 31.0\n{bath}\n[chambers.sim.biology]\n"
            f"gpp_max_umol_m2_h = {1800.0 + 20.0 * (n % 16):.1f}\nik_umol_m2_s = 250.0\n"
            "resp_umol_m2_h = 900.0\nea_gpp_ev = 0.32\nea_resp_ev = 0.65\nt_ref_c = 18.0\n"
            f"{thermal}"
        )
    return "".join(parts)


def load_protocol_text(chambers: int, duration_s: float) -> str:
    """TOML of a protocol over every chamber of :func:`load_rig_text`'s rig.

    Parameters
    ----------
    chambers
        Chambers in the rig, dimensionless.
    duration_s
        Protocol length, s (a whole number of minutes).

    Returns
    -------
    str
        Bath chambers are the controls; own-water chambers the treatment. An exposure
        phase of two days or more gives the treatment a heatwave (baseline 18 °C, threshold
        19.5 °C, category moderate: 1.5 °C up) starting a tenth of the way in, its onset and
        decline a fifth of the rest each.
    """
    in_bath, own = chamber_ids(chambers)
    minutes = round(duration_s / 60.0)
    first = max(1, minutes // 10)

    def listed(ids: list[str]) -> str:
        return ", ".join(f'"{c}"' for c in ids)

    groups = ""
    if in_bath:
        groups += f'[groups.ambient]\nrole = "control"\nchambers = [{listed(in_bath)}]\n\n'
    groups += f'[groups.warmed]\nrole = "treatment"\nchambers = [{listed(own)}]\n'
    exposure_min = minutes - first
    event = ""
    if exposure_min >= 2 * 1440:  # onset and decline a fifth of the exposure each
        rate_c_per_day = round(1.5 / (exposure_min / 1440.0 / 5.0), 3)
        event = f"""
[[events]]
kind = "heatwave"
name = "moderate heatwave"
groups = ["warmed"]
starts = "exposure"
baseline_c = 18.0
threshold_c = 19.5
category = "moderate"
onset_rate_c_per_day = {rate_c_per_day}
peak_duration = "{exposure_min // 3}min"
decline_rate_c_per_day = {rate_c_per_day}
"""
    return f"""format = "squall-protocol/1"
title = "Load run over {chambers} chambers"
begins = "{START_UTC.isoformat()}"
utc_offset = "+00:00"

[site]
name = "Saltmarrow Lagoon (fictional)"
latitude_deg = 46.9
longitude_deg = -30.5
depth_m = 1.0
salinity = 31.0

{groups}
[[phases]]
name = "acclimation"
duration = "{first}min"
  [phases.programs]
  temperature = [ {{ kind = "daily-cycle", mean_c = 18.0, amplitude_c = 0.5, warmest_at = "14:00" }} ]
  light = [ {{ kind = "daylight", sunrise = "06:00", sunset = "20:00", peak = 400.0 }} ]
  flow = [ {{ kind = "hold", value = 4.0 }} ]

[[phases]]
name = "exposure"
duration = "{exposure_min}min"
{event}"""  # noqa: E501


def _memory_mark(elapsed_s: float) -> MemoryMark:
    """Resident memory now and at peak (``/proc/self/status``), and gc-tracked objects."""
    rss_kib = peak_kib = 0.0
    try:
        with open("/proc/self/status", encoding="ascii") as status:
            for line in status:
                if line.startswith("VmRSS:"):
                    rss_kib = float(line.split()[1])
                elif line.startswith("VmHWM:"):
                    peak_kib = float(line.split()[1])
    except OSError:  # not Linux: peak from getrusage (KiB on Linux, bytes on macOS)
        peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
        rss_kib = peak_kib
    gc.collect()  # count live objects, not garbage waiting for the collector
    return MemoryMark(elapsed_s, rss_kib / 1024.0, peak_kib / 1024.0, len(gc.get_objects()))


class _ErrorTracebacks(logging.Handler):
    """Keeps every log record at ERROR or above that carries a traceback."""

    def __init__(self) -> None:
        super().__init__(logging.ERROR)
        self.seen: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        if record.exc_info:
            self.seen.append(f"{record.name}: {record.getMessage()}")


def check_log(log: Path, report: LoadReport, ids: Sequence[str]) -> None:
    """Fill the log-completeness fields of ``report`` from the run log's samples.

    Parameters
    ----------
    log
        The run log.
    report
        Its ``ticks`` and ``chambers`` say what should be there; the other log fields are set.
    ids
        Every chamber id of the rig.
    """
    with sqlite3.connect(f"file:{log}?mode=ro", uri=True) as conn:
        report.integrity = str(conn.execute("PRAGMA integrity_check").fetchone()[0])
        report.rows_logged = int(conn.execute("SELECT COUNT(*) FROM samples").fetchone()[0])
        per_chamber = dict(
            conn.execute("SELECT chamber, COUNT(DISTINCT t_s) FROM samples GROUP BY chamber")
        )
        (repeated,) = conn.execute(
            "SELECT COUNT(*) FROM (SELECT 1 FROM samples GROUP BY t_s, chamber HAVING COUNT(*) > 1)"
        ).fetchone()
        (log_ticks,) = conn.execute("SELECT COUNT(DISTINCT t_s) FROM samples").fetchone()
        report.alarms = int(
            conn.execute("SELECT COUNT(*) FROM alarms WHERE action = 'raise'").fetchone()[0]
        )
    report.rows_expected = report.ticks * report.chambers
    # a pair is missing when a chamber lacks a tick the loop ran (or the log has ticks the
    # loop never counted, which shows up as a mismatch too)
    report.pairs_missing = sum(max(0, report.ticks - per_chamber.get(c, 0)) for c in ids)
    report.pairs_missing += abs(int(log_ticks) - report.ticks) * report.chambers
    report.pairs_repeated = int(repeated)


def run_load(
    folder: Path,
    *,
    chambers: int = 64,
    duration_s: float = 30 * DAY_S,
    period_s: float = 10.0,
    faults: int = 40,
    seed: int = 9,
    marks_s: Sequence[float] = (DAY_S,),
) -> LoadReport:
    """Build the rig and protocol in ``folder``, run them, and check the log and memory.

    Parameters
    ----------
    folder
        Where the rig, protocol and run log are written.
    chambers
        Chambers in the rig, dimensionless.
    duration_s
        Protocol length, s.
    period_s
        Control tick period, s.
    faults
        Faults drawn into the rig, dimensionless.
    seed
        Seed of the fault draw, dimensionless.
    marks_s
        Protocol times at which memory is recorded, s; the end of the last tick is always
        recorded (while the run is still live).

    Returns
    -------
    LoadReport
        The figures; nothing is asserted here.
    """
    in_bath, own = chamber_ids(chambers)
    drawn = draw_faults(random.Random(seed), in_bath + own, duration_s, faults)
    rig = folder / "load-rig.toml"
    rig.write_text(load_rig_text(chambers, drawn), encoding="utf-8")
    protocol = folder / "load-protocol.toml"
    protocol.write_text(load_protocol_text(chambers, duration_s), encoding="utf-8")
    log = folder / "load.sqlite"
    report = LoadReport(chambers=chambers, faults=[str(f["kind"]) for f in drawn])
    pending = sorted(m for m in marks_s if m < duration_s)

    def progress(status: TickStatus) -> None:
        report.ticks_total = status.ticks_total
        while pending and status.elapsed_s + period_s > pending[0]:
            report.marks.append(_memory_mark(pending.pop(0)))
        if status.tick + 1 == status.ticks_total:  # the last tick, before the run winds up
            report.marks.append(_memory_mark(status.elapsed_s + period_s))

    errors = _ErrorTracebacks()
    root = logging.getLogger()
    root.addHandler(errors)
    gc.collect()
    try:
        run = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=period_s))
        start = time.perf_counter()
        try:
            summary = run.run(progress)
        except Exception as error:  # the very thing this benchmark counts
            report.end_reason = type(error).__name__
            report.unhandled.append(f"{type(error).__name__}: {error}")
        else:
            report.end_reason = str(summary.end_reason)
            report.ticks = summary.ticks.ticks
        report.wall_s = time.perf_counter() - start
    finally:
        root.removeHandler(errors)
    if not report.marks or report.marks[-1].elapsed_s < duration_s:  # it never got there
        report.marks.append(_memory_mark(duration_s))
    report.unhandled.extend(errors.seen)
    if log.exists():
        check_log(log, report, in_bath + own)
    return report


def _print_report(report: LoadReport, period_s: float, quick: bool) -> None:
    """The figures, then the RESULT lines."""
    kinds = sorted(set(report.faults))
    print(f"faults drawn: {len(report.faults)} ({len(kinds)} kinds: {', '.join(kinds)})")
    print(f"run ended: {report.end_reason}; alarms raised: {report.alarms}")
    for text in report.unhandled[:10]:
        print(f"  unhandled: {text}")
    print(
        f"ticks: {report.ticks} of {report.ticks_total}; rows logged {report.rows_logged} of "
        f"{report.rows_expected}; missing pairs {report.pairs_missing}, repeated "
        f"{report.pairs_repeated}; integrity_check: {report.integrity}"
    )
    print(f"wall time {report.wall_s:.1f} s, {report.ms_per_tick:.2f} ms/tick")
    print(f"{'protocol time':>14} {'RSS MiB':>9} {'peak MiB':>9} {'gc objects':>11}")
    for mark in report.marks:
        print(
            f"{mark.elapsed_s / 3600.0:>12.1f} h {mark.rss_mib:>9.1f} {mark.peak_rss_mib:>9.1f} "
            f"{mark.gc_objects:>11d}"
        )
    first, last = report.marks[0], report.marks[-1]
    span = f"{last.elapsed_s / 3600:g} h / {first.elapsed_s / 3600:g} h"
    print(f"RESULT: unhandled exceptions | {len(report.unhandled)} | <= 0")
    share = report.rows_logged / max(1, report.rows_expected)
    print(
        f"RESULT: rows logged / rows expected | {share:.6f} | >= 1 | {report.rows_logged} of "
        f"{report.rows_expected}; integrity {report.integrity}"
    )
    print(
        f"RESULT: peak RSS {span} | {last.peak_rss_mib / first.peak_rss_mib:.3f}x | <= 1.1x | "
        f"{first.peak_rss_mib:.0f} MiB then {last.peak_rss_mib:.0f} MiB"
    )
    where = f"{report.chambers} chambers, {period_s:g} s tick"
    print(f"RESULT: wall time per tick ({where}) | {report.ms_per_tick:.2f} ms")
    if quick:
        estimate_h = report.ms_per_tick * 30 * DAY_S / period_s / 1000.0 / 3600.0
        print(f"estimated wall time of the full form (30 d): {estimate_h:.1f} h")


def main(argv: Sequence[str] | None = None) -> int:
    """Run the load benchmark; print the figures; exit 1 if a goal is missed."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=30.0, help="simulated days (default 30)")
    parser.add_argument("--chambers", type=int, default=64, help="chambers (default 64)")
    parser.add_argument("--period", type=float, default=10.0, help="control tick, s (default 10)")
    parser.add_argument("--faults", type=int, default=40, help="faults drawn (default 40)")
    parser.add_argument("--seed", type=int, default=9, help="seed of the fault draw")
    parser.add_argument("--quick", action="store_true", help="6 h instead of the full form")
    parser.add_argument("--keep", type=Path, help="write the files here and keep them")
    args = parser.parse_args(argv)
    days = 0.25 if args.quick else args.days
    first_mark_s = 3600.0 if args.quick else min(DAY_S, days * DAY_S / 2)
    faults = min(args.faults, len(FaultKind)) if args.quick else args.faults
    print(
        f"{args.chambers} chambers × {days:g} days at a {args.period:g} s tick, {faults} faults "
        f"(seed {args.seed})"
    )
    with tempfile.TemporaryDirectory() as tmp:
        folder = args.keep or Path(tmp)
        folder.mkdir(parents=True, exist_ok=True)
        report = run_load(
            folder,
            chambers=args.chambers,
            duration_s=days * DAY_S,
            period_s=args.period,
            faults=faults,
            seed=args.seed,
            marks_s=(first_mark_s,),
        )
    _print_report(report, args.period, args.quick)
    flat = report.marks[-1].peak_rss_mib <= 1.1 * report.marks[0].peak_rss_mib
    return 0 if not report.unhandled and report.log_complete and flat else 1


if __name__ == "__main__":
    sys.exit(main())
