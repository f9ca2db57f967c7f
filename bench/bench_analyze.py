"""``squall analyze`` on a month-long 1 Hz log, side by side with simply reading its columns.

Builds an invented run log (default 30 days × 16 chambers × 1 Hz ≈ 41.5 million sample
rows, about 4.5 GB) in the real schema: metadata and closed windows through
:class:`RunLogWriter`, samples generated with numpy and inserted with bare ``executemany``.
Every chamber runs a 3 h flushing cycle with a 60 min closed window (light by day, dark by
night, cut short at the light change), a heatwave in the treatment group, optode noise.

Then, each in a fresh child process so peak memory is its own:

- **read**: the same columns the analysis needs, read in the same chunks through the same
  :class:`RunLogReader` path (:func:`controller.analysis.read_sample_chunks`), nothing else;
- **analyze**: :func:`controller.analysis.analyze_log` (window fits, metabolism, temperature
  and light responses, quality table); figures and report are not included.

Prints both times, their ratio (goal: analyze ≤ 3 × read) and the peak resident memory of
each child (``resource.getrusage(...).ru_maxrss``).

Runtime on the 2-core development machine: building the full log 17 min (41 k rows/s,
under load), then each pass 5–6 min when the machine is quiet (read 287 s, analyze 354 s:
ratio 1.23, peak 408 and 416 MB), so about half an hour with the default ``--repeat 1``;
``--quick`` (one day, for ``bench/run --quick``) finishes in about 1.5 min. ``--log FILE``
reuses a log built earlier with ``--keep FILE``. The ratio and the peak memory are also
printed as ``RESULT:`` lines for ``bench/run``.

Each kind of pass runs ``--repeat`` times, alternately, and the best time counts, which damps
the noise of a shared machine (a single pass of each can be skewed by load that comes and
goes during a 10-minute pass).

Usage: ``python bench/bench_analyze.py [--days 30] [--chambers 16] [--tick-s 1]
[--chunk-rows 200000] [--repeat 1] [--quick] [--keep FILE | --log FILE]``
"""

from __future__ import annotations

import argparse
import json
import math
import resource
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

GOAL_RATIO = 3.0
START_UTC_S = 1_786_000_000.0  # an invented start (2026-08-06)
CYCLE_S = 3 * 3600.0
WINDOW_S = 3600.0
FLUSH_TAU_S = 600.0
SAT_UMOL_L = 230.0
K_EV = 8.617333262e-5


def _protocol(n_chambers: int) -> str:
    half = max(n_chambers // 2, 1)
    ids = [f"C{i:02d}" for i in range(n_chambers)]
    control = ", ".join(f'"{c}"' for c in ids[:half])
    treated = ", ".join(f'"{c}"' for c in ids[half:]) or '"C00"'
    return (
        "# Saltmarrow Lagoon benchmark: a heatwave on half the chambers (invented)\n"
        'format = "squall-protocol/1"\n\n'
        f'[groups.ambient]\nrole = "control"\nchambers = [{control}]\n\n'
        f'[groups.heatwave]\nrole = "treatment"\nchambers = [{treated}]\n'
    )


def _phase_bounds(days: float) -> tuple[float, float]:
    """Start and end of the exposure phase, s (acclimation 1/6, recovery the last 7/30)."""
    total = days * 86400.0
    return total / 6.0, total * 23.0 / 30.0


def _par_setpoint(t: np.ndarray) -> np.ndarray:
    """400 µmol photons m⁻² s⁻¹ from 06:00 to 18:00, dark otherwise."""
    hour = (t % 86400.0) / 3600.0
    return np.where((hour >= 6.0) & (hour < 18.0), 400.0, 0.0)


def _temperature_setpoint(t: np.ndarray, treated: bool, days: float) -> np.ndarray:
    """20 °C; the treatment adds a 4 °C half-sine heatwave over the exposure phase."""
    lo, hi = _phase_bounds(days)
    bump = np.where((t >= lo) & (t < hi), 4.0 * np.sin(np.pi * (t - lo) / (hi - lo)), 0.0)
    return 20.0 + (bump if treated else np.zeros_like(bump))


def _windows(c: int, days: float, treated: bool) -> dict[str, np.ndarray]:
    """The closed windows of chamber ``c``: start, end (s), light flag, O2 slope.

    Slopes (µmol L⁻¹ h⁻¹) follow Boltzmann–Arrhenius scaling at the window's middle
    temperature: dark −16·A(T; 0.65 eV), light 28·A(T; 0.32 eV) − 16·A(T; 0.65 eV).
    """
    total = days * 86400.0
    offset = 1800.0 + 600.0 * (c % 6)
    starts = np.arange(offset, total - WINDOW_S, CYCLE_S)
    light = _par_setpoint(starts) > 0
    next_change = (np.floor((starts - 6 * 3600.0) / 43200.0) + 1) * 43200.0 + 6 * 3600.0
    ends = np.minimum(starts + WINDOW_S, next_change)
    temp = _temperature_setpoint(0.5 * (starts + ends), treated, days) + 273.15
    factor_g = np.exp(0.32 / K_EV * (1 / 293.15 - 1 / temp))
    factor_r = np.exp(0.65 / K_EV * (1 / 293.15 - 1 / temp))
    slope = np.where(light, 28.0 * factor_g - 16.0 * factor_r, -16.0 * factor_r)
    return {"start": starts, "end": ends, "light": light, "slope": slope}


def build_log(path: Path, days: float, n_chambers: int, tick_s: float) -> int:
    """Write the benchmark log; return the number of sample rows."""
    from controller.storage import (
        ChamberRecord,
        ClockKind,
        LightState,
        RunEnd,
        RunEndReason,
        RunLogWriter,
        RunMeta,
        SampleRow,
        WindowEndReason,
        WindowRecord,
        columns_of,
    )

    ids = [f"C{i:02d}" for i in range(n_chambers)]
    treated = [i >= max(n_chambers // 2, 1) for i in range(n_chambers)]
    meta = RunMeta(
        run_id="bench-analyze",
        protocol_text=_protocol(n_chambers),
        rig_text='name = "Saltmarrow benchmark rack"\n',
        start_utc_s=START_UTC_S,
        clock_kind=ClockKind.VIRTUAL,
        chambers=tuple(
            ChamberRecord(chamber=c, water_volume_l=2.5, sediment_area_m2=0.1) for c in ids
        ),
    )
    windows = [_windows(c, days, treated[c]) for c in range(n_chambers)]
    total_s = days * 86400.0
    writer = RunLogWriter(path, meta=meta)
    for c, win in enumerate(windows):
        for start, end, light in zip(win["start"], win["end"], win["light"], strict=True):
            writer.record_window(
                WindowRecord(
                    chamber=ids[c],
                    light=LightState.LIGHT if light else LightState.DARK,
                    start_t_s=float(start),
                    start_utc_s=START_UTC_S + float(start),
                    end_t_s=float(end),
                    end_utc_s=START_UTC_S + float(end),
                    end_reason=(
                        WindowEndReason.MAX_DURATION
                        if end - start >= WINDOW_S
                        else WindowEndReason.LIGHT_CHANGE
                    ),
                )
            )
    writer.finish(RunEnd(end_t_s=total_s, end_utc_s=START_UTC_S + total_s,
                         end_reason=RunEndReason.COMPLETED))  # fmt: skip

    names = [c.name for c in columns_of(SampleRow)]
    sql = f"INSERT INTO samples ({', '.join(names)}) VALUES ({', '.join('?' * len(names))})"
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA synchronous = OFF")
    rng = np.random.default_rng(42)
    lo, hi = _phase_bounds(days)
    n_ticks = round(total_s / tick_s)
    per_chunk = max(int(3600.0 / tick_s), 1)
    rows = 0
    conn.execute("BEGIN")
    for k0 in range(0, n_ticks, per_chunk):
        t = (np.arange(k0, min(k0 + per_chunk, n_ticks)) * tick_s)[:, None]  # (T, 1)
        t2 = np.broadcast_to(t, (len(t), n_chambers))
        par_sp = np.broadcast_to(_par_setpoint(t), t2.shape)
        temp_sp = np.stack(
            [_temperature_setpoint(t[:, 0], treated[c], days) for c in range(n_chambers)], 1
        )
        closed = np.zeros(t2.shape, dtype=bool)
        dev = np.zeros(t2.shape)
        for c, win in enumerate(windows):
            tc = t[:, 0]
            k = np.searchsorted(win["start"], tc, side="right") - 1
            seen = k >= 0
            kk = np.where(seen, k, 0)
            inside = seen & (tc < win["end"][kk])
            since = tc - win["start"][kk]
            dev_end = win["slope"][kk] * (win["end"][kk] - win["start"][kk]) / 3600.0
            flushed = dev_end * np.exp(-(tc - win["end"][kk]) / FLUSH_TAU_S)
            dev[:, c] = np.where(
                inside, win["slope"][kk] * since / 3600.0, np.where(seen, flushed, 0)
            )
            closed[:, c] = inside
        shape = t2.shape
        o2 = SAT_UMOL_L + dev + rng.normal(0.0, 0.3, shape)
        temp = temp_sp + rng.normal(0.0, 0.05, shape)
        par = par_sp * (1.0 + rng.normal(0.0, 0.01, shape))
        flow = np.where(closed, 0.0, 4.0 + rng.normal(0.0, 0.1, shape))
        phase = np.where(t2 < lo, "acclimation", np.where(t2 < hi, "exposure", "recovery"))
        columns = {
            "t_s": t2,
            "utc_s": START_UTC_S + t2,
            "elapsed_s": t2,
            "chamber": np.broadcast_to(np.array(ids, dtype=object), shape),
            "phase": phase.astype(object),
            "temperature_c": temp,
            "temperature_setpoint_c": temp_sp,
            "par": par,
            "par_setpoint": par_sp,
            "flow_cm_s": flow,
            "flow_setpoint_cm_s": np.full(shape, 4.0),
            "o2_umol_l": o2,
            "o2_sat_pct": 100.0 * o2 / SAT_UMOL_L,
            "heater_pct": np.clip(20.0 + 10.0 * (temp_sp - 20.0), 0, 100),
            "chiller_pct": np.zeros(shape),
            "lamp_pct": par_sp / 10.0,
            "pump_pct": np.where(closed, 0.0, 60.0),
            "incubation": np.where(closed, "closed", "open").astype(object),
            "alarm": np.full(shape, None, dtype=object),
        }
        lists = [np.ravel(columns[name]).tolist() for name in names]
        conn.executemany(sql, zip(*lists, strict=True))
        rows += shape[0] * shape[1]
        if (k0 // per_chunk) % 24 == 23:
            conn.execute("COMMIT")
            conn.execute("BEGIN")
    conn.execute("COMMIT")
    conn.close()
    return rows


def _measure(kind: str, log: Path, chunk_rows: int) -> None:
    """Child process: time one pass over the log and print JSON with its peak memory."""
    from controller.analysis import READ_COLUMNS, analyze_log, read_sample_chunks

    start = time.perf_counter()
    if kind == "read":
        rows = 0
        for frame in read_sample_chunks(log, READ_COLUMNS, chunk_rows):
            rows += len(frame)
        extra: dict[str, float] = {}
    else:
        analysis = analyze_log(log, chunk_rows=chunk_rows)
        rows = analysis.rows_read
        fits = analysis.temperature_fits.set_index(["unit", "rate"])["ea_ev"]
        extra = {
            "windows": float(len(analysis.windows)),
            "usable": float(analysis.windows["usable"].sum()),
            "ea_r_ev": float(fits.get(("heatwave", "r"), math.nan)),
            "ea_gpp_ev": float(fits.get(("heatwave", "gpp"), math.nan)),
        }
    seconds = time.perf_counter() - start
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # KiB on Linux
    print(json.dumps({"seconds": seconds, "rows": rows, "peak_mb": peak_mb, **extra}))


def _child(kind: str, log: Path, chunk_rows: int) -> dict[str, float]:
    out = subprocess.run(
        [sys.executable, __file__, "--measure", kind, "--log", str(log),
         "--chunk-rows", str(chunk_rows)],
        capture_output=True, text=True, check=True,
    )  # fmt: skip
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--days", type=float, default=30.0, help="run length, days")
    parser.add_argument("--chambers", type=int, default=16, help="chambers")
    parser.add_argument("--tick-s", type=float, default=1.0, help="logging period, s")
    parser.add_argument("--chunk-rows", type=int, default=200_000, help="rows per read")
    parser.add_argument("--keep", type=Path, default=None, help="build the log at this path")
    parser.add_argument("--log", type=Path, default=None, help="reuse an existing log")
    parser.add_argument(
        "--repeat", type=int, default=1, help="passes of each kind, alternated; best counts"
    )
    parser.add_argument(
        "--quick", action="store_true", help="1 day instead of --days (about 1.5 min)"
    )
    parser.add_argument("--measure", choices=("read", "analyze"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.quick:
        args.days = 1.0
    if args.measure:
        _measure(args.measure, args.log, args.chunk_rows)
        return

    with tempfile.TemporaryDirectory() as tmp:
        log = args.log
        if log is None:
            log = args.keep or Path(tmp) / "bench-analyze.sqlite"
            start = time.perf_counter()
            rows = build_log(log, args.days, args.chambers, args.tick_s)
            took = time.perf_counter() - start
            print(
                f"built {log.name}: {args.days:g} d x {args.chambers} chambers at "
                f"{args.tick_s:g} s = {rows:,} rows, {log.stat().st_size / 1e9:.2f} GB "
                f"in {took:.0f} s ({rows / took:,.0f} rows/s)"
            )
        reads, analyses = [], []
        for _ in range(max(args.repeat, 1)):  # alternate, so both see the same machine load
            reads.append(_child("read", log, args.chunk_rows))
            analyses.append(_child("analyze", log, args.chunk_rows))
        read = min(reads, key=lambda r: r["seconds"])
        analyze = min(analyses, key=lambda r: r["seconds"])
    ratio = analyze["seconds"] / read["seconds"]
    verdict = "meets" if ratio <= GOAL_RATIO else "MISSES"
    rows = int(read["rows"])
    print(
        f"{rows:,} rows, chunks of {args.chunk_rows:,} rows, each pass in a fresh process, "
        f"best of {max(args.repeat, 1)}"
    )
    print(
        f"  read the analysis columns  {read['seconds']:9.1f} s  "
        f"{rows / read['seconds']:12,.0f} rows/s  peak {read['peak_mb']:8.0f} MB"
    )
    print(
        f"  squall analyze             {analyze['seconds']:9.1f} s  "
        f"{rows / analyze['seconds']:12,.0f} rows/s  peak {analyze['peak_mb']:8.0f} MB"
    )
    print(f"  ratio analyze/read         {ratio:9.2f}    ({verdict} goal <= {GOAL_RATIO:g})")
    print(
        f"RESULT: analyze / read of the same columns | {ratio:.2f}x | <= {GOAL_RATIO:g}x | "
        f"{rows:,} rows, {analyze['seconds']:.0f} s vs {read['seconds']:.0f} s"
    )
    peak = f"{analyze['peak_mb']:.0f} MB | | read: {read['peak_mb']:.0f} MB"
    print(f"RESULT: analyze peak memory | {peak}")
    print(
        f"  windows {analyze['windows']:.0f} ({analyze['usable']:.0f} usable); heatwave group "
        f"Ea R {analyze['ea_r_ev']:.3f} eV (set 0.65), GPP {analyze['ea_gpp_ev']:.3f} eV "
        "(set 0.32)"
    )


if __name__ == "__main__":
    main()
