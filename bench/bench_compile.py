"""Benchmark: compile a 30-day, 32-chamber protocol and sample it at 1 s.

The protocol is built in code and uses every block kind (hold, step, ramp, daily-cycle,
half-sine and sun-driven daylight, repeat, climatology, replay) and every event type (heatwave
by category on a constant baseline and on a climatology table, cold spell from a site series,
storm, and a compound heatwave + storm). Its CSV inputs are synthetic (invented data for the
benchmark only) and written to a temporary folder.

Printed: compile time, breakpoints per channel, samples per second of
:func:`controller.protocol.sample`, and the ratio of its time to a plain ``numpy.interp`` over
the same breakpoint tables and the same times, measured side by side in this run (best of a
few repeats each). Goal: ratio within 3x, also printed as a ``RESULT:`` line for
``bench/run``. Run: ``/work/venv/bin/python bench/bench_compile.py [--quick]`` (``--quick``
samples the first 5 days only, best of 2).
"""

from __future__ import annotations

import argparse
import tempfile
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from controller.protocol import Protocol, compile_protocol, sample

DAY_S = 86_400.0
CHUNK_S = 86_400  # one day of 1 s samples per chunk keeps memory small
REPEATS = 3
QUICK_DAYS = 5  # days sampled with --quick
GOAL_RATIO = 3.0


def write_inputs(folder: Path) -> None:
    """Synthetic climatology table, 30-year daily site series and a 30-min logger record."""
    doy = np.arange(1, 367)
    seas = 15.0 + 4.0 * np.sin(2 * np.pi * (doy - 110) / 366.0)
    pd.DataFrame({"doy": doy, "seas_c": seas, "thresh_c": seas + 1.3}).to_csv(
        folder / "clim.csv", index=False
    )
    dates = pd.date_range("1991-01-01", "2020-12-31", freq="D")
    rng = np.random.default_rng(11)
    temps = 15.0 + 4.0 * np.sin(2 * np.pi * (dates.day_of_year - 110) / 365.25)
    temps += rng.normal(0.0, 0.7, dates.size)
    pd.DataFrame({"date": dates.date, "temperature_c": temps}).to_csv(
        folder / "site.csv", index=False
    )
    times = pd.date_range("2024-07-01", periods=40 * 48, freq="30min", tz="UTC")
    elapsed = np.arange(times.size) * 1800.0
    record = 17.0 + 1.2 * np.sin(2 * np.pi * elapsed / DAY_S) + rng.normal(0, 0.05, times.size)
    pd.DataFrame(
        {"time": times.strftime("%Y-%m-%dT%H:%M:%S+00:00"), "temperature_c": record}
    ).to_csv(folder / "logger.csv", index=False)


def build_protocol() -> dict[str, Any]:
    """A 30-day protocol for 32 chambers in 8 groups (invented Saltmarrow Lagoon scenario)."""
    names = ["control", "hw_const", "hw_clim", "cold", "storm", "compound", "replay", "clim"]
    groups = {
        name: {
            "role": "control" if name == "control" else "treatment",
            "chambers": [f"C{4 * i + k + 1:02d}" for k in range(4)],
        }
        for i, name in enumerate(names)
    }
    cycle = {"kind": "daily-cycle", "mean_c": 17.0, "amplitude_c": 0.8, "warmest_at": "15:00"}
    half_sine = {"kind": "daylight", "sunrise": "05:30", "sunset": "21:00", "peak": 900.0}
    tide = {
        "kind": "repeat",
        "times": 38,
        "blocks": [
            {"kind": "step", "to": 8.0, "duration": "2h"},
            {"kind": "ramp", "to": 2.0, "duration": "4h"},
            {"kind": "hold", "value": 2.0, "duration": "6h 25min"},
        ],
    }
    exposure_overrides = {
        "replay": {
            "temperature": [{"kind": "replay", "series": "logger.csv", "offset_c": 1.0}],
            "light": [{"kind": "daylight", "source": "sun", "dli_mol_m2_d": 35.0}],
        },
        "clim": {
            "temperature": [
                {"kind": "ramp", "to": 19.0, "rate_per_day": 1.0},
                {"kind": "climatology", "table": "clim.csv"},
            ],
            "flow": [tide],
        },
    }
    base: dict[str, Any] = {"kind": "heatwave", "onset_rate_c_per_day": 1.0,
                            "decline_rate_c_per_day": 0.8, "peak_duration": "5d"}  # fmt: skip
    storm: dict[str, Any] = {
        "kind": "storm",
        "starts": "exposure",
        "offset": "8d",
        "duration": "2d",
        "kd_rise_per_m": 1.1,
        "ramp": "4h",
        "flow_peak_cm_s": 20.0,
        "pulse_every": "3h",
        "pulse_duration": "45min",
        "gustiness": 0.4,
        "seed": 5,
        "temperature_drop_c": 0.5,
    }
    events = [
        {**base, "name": "hw const", "groups": ["hw_const", "compound"], "starts": "exposure",
         "baseline_c": 17.0, "threshold_c": 18.2, "category": "strong"},
        {**base, "name": "hw clim", "groups": ["hw_clim"], "starts": "exposure",
         "offset": "1d", "climatology": "clim.csv", "category": "severe"},
        {**base, "kind": "cold-spell", "name": "cold", "groups": ["cold"], "starts": "exposure",
         "series": "site.csv", "baseline_years": [1991, 2020], "category": "moderate",
         "peak_duration": "4d"},
        {**storm, "name": "storm", "groups": ["storm", "compound"]},
        {**storm, "name": "second storm", "groups": ["compound"], "offset": "9d", "seed": 9,
         "kd_rise_per_m": 0.4, "flow_peak_cm_s": 12.0, "pulse_every": "5h"},
    ]  # fmt: skip
    return {
        "format": "squall-protocol/1",
        "title": "Benchmark: every block kind and event type",
        "begins": "on-launch",
        "utc_offset": "-02:00",
        "site": {
            "name": "Saltmarrow Lagoon (fictional)",
            "latitude_deg": 46.9,
            "longitude_deg": -30.5,
            "depth_m": 1.2,
            "reference_date": "2027-07-20",
        },
        "groups": groups,
        "phases": [
            {
                "name": "acclimation",
                "duration": "3d",
                "programs": {
                    "temperature": [cycle],
                    "light": [half_sine],
                    "flow": [{"kind": "hold", "value": 4.0}],
                },
            },
            {"name": "exposure", "duration": "20d", "groups": exposure_overrides},
            {
                "name": "recovery",
                "duration": "7d",
                "programs": {
                    "temperature": [{"kind": "ramp", "to": 17.0, "duration": "1d"}, cycle]
                },
            },
        ],
        "events": events,
        "sampling": [{"at": "exposure+10d", "what": "cores for pigments"}],
    }


def best_of(action: Any, repeats: int = REPEATS) -> float:
    """Shortest wall time of ``repeats`` runs of ``action()``, s."""
    best = float("inf")
    for _ in range(repeats):
        start = time.perf_counter()
        action()
        best = min(best, time.perf_counter() - start)
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--quick", action="store_true", help=f"sample {QUICK_DAYS} days only, best of 2"
    )
    args = parser.parse_args()
    repeats = 2 if args.quick else REPEATS
    with tempfile.TemporaryDirectory() as folder:
        base_dir = Path(folder)
        write_inputs(base_dir)
        protocol = Protocol.model_validate(build_protocol())
        start = datetime(2027, 7, 20, 8, 0, tzinfo=UTC)
        t0 = time.perf_counter()
        compiled = compile_protocol(protocol, start_utc=start, base_dir=base_dir)
        compile_s = time.perf_counter() - t0

    channels = {
        id(c): c for chamber in compiled.channels.values() for c in chamber.values()
    }.values()
    sizes = [len(c) for c in channels]
    duration = int(compiled.duration_s)
    sampled = min(duration, int(QUICK_DAYS * DAY_S)) if args.quick else duration
    chunks = [np.arange(s, min(s + CHUNK_S, sampled), 1.0) for s in range(0, sampled, CHUNK_S)]
    points = sum(chunk.size for chunk in chunks)
    per_chamber_values = points * len(compiled.chambers) * 3

    def run_sample() -> None:
        for chunk in chunks:
            sample(compiled, chunk)

    def run_interp() -> None:
        for chunk in chunks:
            for channel in channels:
                np.interp(chunk, channel.t_s, channel.v)

    # interleave so that both see the same machine load
    sample_s = interp_s = float("inf")
    for _ in range(2):
        sample_s = min(sample_s, best_of(run_sample, repeats))
        interp_s = min(interp_s, best_of(run_interp, repeats))

    print(f"protocol: {len(compiled.chambers)} chambers, {duration / DAY_S:g} d, "
          f"{len(compiled.events)} events, {len(sizes)} distinct channels")  # fmt: skip
    print(f"breakpoints per channel: min {min(sizes)}, median {int(np.median(sizes))}, "
          f"max {max(sizes)}, total {sum(sizes)}")  # fmt: skip
    print(f"compile: {compile_s * 1000:.0f} ms")
    print(f"sample at 1 s: {points} times x {len(sizes)} distinct channels in "
          f"{sample_s * 1000:.0f} ms = {points * len(sizes) / sample_s / 1e6:.1f} M values/s "
          f"({per_chamber_values / sample_s / 1e6:.1f} M chamber-variable values/s)")  # fmt: skip
    print(f"numpy.interp, same tables and times: {interp_s * 1000:.0f} ms = "
          f"{points * len(sizes) / interp_s / 1e6:.1f} M values/s")  # fmt: skip
    ratio = sample_s / interp_s
    print(f"ratio sample / numpy.interp: {ratio:.2f}x (goal <= {GOAL_RATIO:g}x)")
    what = (
        f"{sampled / DAY_S:g} of {duration / DAY_S:g} d"
        if sampled < duration
        else f"{duration / DAY_S:g} d"
    )
    print(
        f"RESULT: sample / numpy.interp time | {ratio:.2f}x | <= {GOAL_RATIO:g}x | "
        f"{len(compiled.chambers)} chambers, {what} at 1 s, best of {repeats}"
    )


if __name__ == "__main__":
    main()
