"""Run-log write and read speed, side by side with bare sqlite3 in the same run.

Writes N ticks × C chambers of sample rows through :class:`RunLogWriter` (from
:class:`SampleRow` objects, as the control loop hands them over) and, into a copy of the same
schema, with bare ``sqlite3`` ``executemany`` of the same rows as ready-made tuples, committing
at the same cadence (every ``commit_interval_s`` of clock time) with the same WAL settings.
Each variant runs several times alternately and the best time counts, which damps the noise of
a shared machine. Then reads the samples back through :class:`RunLogReader` and compares with a
bare ``fetchall`` of the same columns.

Goal (issue 4): writer rate ≥ 0.5 × bare rate, also printed as a ``RESULT:`` line for
``bench/run``.

Usage: ``python bench/bench_log.py [--ticks 1000] [--chambers 64] [--repeat 3] [--quick]``
(``--quick``: 300 ticks, best of 2).
"""

from __future__ import annotations

import argparse
import operator
import sqlite3
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from controller.storage import (
    ChamberRecord,
    ClockKind,
    IncubationState,
    RunLogReader,
    RunLogWriter,
    RunMeta,
    SampleRow,
    columns_of,
)

START_UTC_S = 1_780_000_000.0
GOAL_RATIO = 0.5


def _meta(n_chambers: int) -> RunMeta:
    """Invented run metadata for the benchmark rack."""
    return RunMeta(
        run_id="bench",
        protocol_text="# Saltmarrow Lagoon benchmark protocol\n",
        rig_text="# Saltmarrow Lagoon benchmark rack\n",
        start_utc_s=START_UTC_S,
        clock_kind=ClockKind.VIRTUAL,
        chambers=tuple(
            ChamberRecord(chamber=f"C{i:02d}", water_volume_l=20.0, sediment_area_m2=0.05)
            for i in range(n_chambers)
        ),
    )


def _rows(n_ticks: int, n_chambers: int, tick_s: float) -> list[list[SampleRow]]:
    """Invented sample rows, one list per tick."""
    rng = np.random.default_rng(7)
    noise = rng.normal(size=(n_ticks, n_chambers, 4)).tolist()
    ticks = []
    for k in range(n_ticks):
        t_s = k * tick_s
        tick = []
        for c in range(n_chambers):
            n = noise[k][c]
            tick.append(
                SampleRow(
                    t_s=t_s,
                    utc_s=START_UTC_S + t_s,
                    elapsed_s=t_s,
                    chamber=f"C{c:02d}",
                    phase="heatwave",
                    temperature_c=22.0 + 0.05 * n[0],
                    temperature_setpoint_c=22.0,
                    par=400.0 + 5.0 * n[1],
                    par_setpoint=400.0,
                    flow_cm_s=5.0 + 0.1 * n[2],
                    flow_setpoint_cm_s=5.0,
                    o2_umol_l=240.0 + n[3],
                    o2_sat_pct=97.0 + 0.4 * n[3],
                    heater_pct=35.0 + n[0],
                    chiller_pct=0.0,
                    lamp_pct=55.0,
                    pump_pct=60.0,
                    incubation=IncubationState.OPEN,
                    alarm=None,
                )
            )
        ticks.append(tick)
    return ticks


def _time_writer(
    path: Path, meta: RunMeta, ticks: list[list[SampleRow]], interval_s: float, durable: bool
) -> float:
    """Wall time to append every tick through RunLogWriter (creation excluded), s."""
    writer = RunLogWriter(path, meta=meta, commit_interval_s=interval_s, durable=durable)
    start = time.perf_counter()
    for tick in ticks:
        writer.append_samples(tick)
    writer.close()
    return time.perf_counter() - start


def _time_bare(
    path: Path,
    tuples: list[list[tuple]],
    t_by_tick: list[float],
    interval_s: float,
    durable: bool,
) -> float:
    """Wall time of bare executemany of the same rows, same commit cadence, s."""
    names = [c.name for c in columns_of(SampleRow)]
    sql = f"INSERT INTO samples ({', '.join(names)}) VALUES ({', '.join('?' * len(names))})"
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode = WAL")
    conn.execute(f"PRAGMA synchronous = {'FULL' if durable else 'NORMAL'}")
    start = time.perf_counter()
    last_commit = t_by_tick[0]
    conn.execute("BEGIN")
    for rows, t_s in zip(tuples, t_by_tick, strict=True):
        conn.executemany(sql, rows)
        if t_s - last_commit >= interval_s:
            conn.execute("COMMIT")
            conn.execute("BEGIN")
            last_commit = t_s
    conn.execute("COMMIT")
    conn.close()
    return time.perf_counter() - start


def _best(fn: Callable[[int], float], repeat: int) -> float:
    return min(fn(i) for i in range(repeat))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--ticks", type=int, default=1000, help="ticks to write")
    parser.add_argument("--chambers", type=int, default=64, help="chambers per tick")
    parser.add_argument("--tick-s", type=float, default=1.0, help="clock time per tick, s")
    parser.add_argument("--commit-interval-s", type=float, default=1.0, help="s")
    parser.add_argument("--repeat", type=int, default=3, help="runs per variant; best counts")
    parser.add_argument("--durable", action="store_true", help="synchronous=FULL in both")
    parser.add_argument("--quick", action="store_true", help="300 ticks, best of 2")
    args = parser.parse_args()
    if args.quick:
        args.ticks, args.repeat = min(args.ticks, 300), min(args.repeat, 2)

    meta = _meta(args.chambers)
    ticks = _rows(args.ticks, args.chambers, args.tick_s)
    getter = operator.attrgetter(*(c.name for c in columns_of(SampleRow)))
    tuples = [[getter(r) for r in tick] for tick in ticks]
    t_by_tick = [tick[0].t_s for tick in ticks]
    n_rows = args.ticks * args.chambers

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        writer_times: list[float] = []
        bare_times: list[float] = []
        for i in range(args.repeat):  # alternate, so both see the same machine load
            writer_times.append(
                _time_writer(
                    folder / f"w{i}.sqlite", meta, ticks, args.commit_interval_s, args.durable
                )
            )
            bare_path = folder / f"b{i}.sqlite"
            RunLogWriter(bare_path, meta=meta).close()  # same schema, no samples yet
            bare_times.append(
                _time_bare(bare_path, tuples, t_by_tick, args.commit_interval_s, args.durable)
            )
        w_rate, b_rate = n_rows / min(writer_times), n_rows / min(bare_times)
        ratio = w_rate / b_rate
        print(
            f"write {args.ticks} ticks x {args.chambers} chambers = {n_rows} rows, commit "
            f"every {args.commit_interval_s:g} s of clock time at {args.tick_s:g} s ticks, "
            f"synchronous={'FULL' if args.durable else 'NORMAL'}, best of {args.repeat}"
        )
        print(f"  RunLogWriter.append_samples   {w_rate:12,.0f} rows/s")
        print(f"  bare sqlite3 executemany      {b_rate:12,.0f} rows/s")
        verdict = "meets" if ratio >= GOAL_RATIO else "MISSES"
        print(f"  ratio writer/bare             {ratio:12.2f}  ({verdict} goal >= {GOAL_RATIO})")
        size = (folder / "w0.sqlite").stat().st_size
        print(f"  file size                     {size / n_rows:12.1f} bytes/row")

        log = folder / "w0.sqlite"
        names = [c.name for c in columns_of(SampleRow)]
        with RunLogReader(log) as reader:
            t_all = _best(lambda _: _timed(reader.samples), args.repeat)
            t_two = _best(
                lambda _: _timed(lambda: reader.samples(columns=["time", "temperature_c"])),
                args.repeat,
            )
        conn = sqlite3.connect(log)
        t_bare = _best(
            lambda _: _timed(
                lambda: conn.execute(f"SELECT seq, {', '.join(names)} FROM samples").fetchall()
            ),
            args.repeat,
        )
        conn.close()
        print(f"read {n_rows} rows back")
        print(f"  RunLogReader.samples() all    {n_rows / t_all:12,.0f} rows/s")
        print(f"  samples(time, temperature_c)  {n_rows / t_two:12,.0f} rows/s")
        print(f"  bare fetchall, all columns    {n_rows / t_bare:12,.0f} rows/s")
        print(f"  ratio reader/bare (all)       {t_bare / t_all:12.2f}")
        print(
            f"RESULT: run-log write rate / bare executemany | {ratio:.2f} | >= {GOAL_RATIO} | "
            f"{n_rows} rows, {args.chambers} chambers, best of {args.repeat}"
        )


def _timed(fn: Callable[[], object]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


if __name__ == "__main__":
    main()
