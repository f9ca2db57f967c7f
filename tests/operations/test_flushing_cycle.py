"""The closed-incubation cycle on the simulated rig: three days and nights of windows.

Must show (issue 5): O2 stays inside the band over a 3-day simulated run with day and night,
and every closed window is in the log with its reason. The band is 80–120 % air saturation
with windows of 20 min to 2 h and 30 min of flushing (common practice: 80–120 %, 30–120 min
per light or dark run, flush between runs).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.runtime import RunSettings, SimulatedRun
from controller.storage import RunEndReason, RunLogReader

from ._rigs import TruthSpy, drive, protocol_text, rig_text, write_files

pytestmark = pytest.mark.timeout(240)

PERIOD_S = 30.0
"""Tick period, s (the optode's own cadence in the simulated rig)."""

# Allowance for the optode lag. The water changes O2 by at most about 15 % air saturation
# per hour in a closed window of this rig (≈ 35 µmol L⁻¹ h⁻¹ over ≈ 235 µmol L⁻¹ at
# saturation). A window ends at the first tick after the optode reads outside the band; the
# reading lags the water by the optode's time constant (t90 40 s / ln 10 ≈ 17 s, simulator
# default) plus up to one optode period (30 s) and one tick (30 s) before the pump starts:
# 15 %/h × 77 s ≈ 0.33 %, plus reading noise (0.3 µmol L⁻¹ ≈ 0.13 %). We allow 1 %.
ALLOWANCE_PCT = 1.0


def closed_stretches(rows: pd.DataFrame) -> list[tuple[pd.Timestamp, pd.Timestamp | None]]:
    """(first closed row, first open row after it or None) of every closed stretch."""
    closed = (rows["incubation"].astype(object) == "closed").to_numpy()
    times = rows["time"].to_list()
    spans: list[tuple[pd.Timestamp, pd.Timestamp | None]] = []
    start = None
    for i, is_closed in enumerate(closed):
        if is_closed and start is None:
            start = times[i]
        elif not is_closed and start is not None:
            spans.append((start, times[i]))
            start = None
    if start is not None:
        spans.append((start, None))
    return spans


@pytest.fixture(scope="module")
def three_days(tmp_path_factory: pytest.TempPathFactory) -> tuple[SimulatedRun, TruthSpy]:
    folder = tmp_path_factory.mktemp("three-days")
    protocol, rig, log = write_files(folder)
    run = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))
    spy = TruthSpy(run)
    summary, _ = drive(run, io=spy)
    assert summary.end_reason is RunEndReason.COMPLETED, summary.detail
    return run, spy


def test_o2_stays_inside_the_band_for_three_days_and_nights(
    three_days: tuple[SimulatedRun, TruthSpy],
) -> None:
    run, spy = three_days
    truth = np.array([o2 for _, _, o2 in spy.truth])
    assert spy.truth[-1][0] >= 3 * 86400.0 - 2 * PERIOD_S  # three whole days were run
    # the water itself (not only what the optode said) stayed in the band, lag allowed for
    assert truth.min() >= 80.0 - ALLOWANCE_PCT, truth.min()
    assert truth.max() <= 120.0 + ALLOWANCE_PCT, truth.max()
    # and the band was used: the windows went to both edges (day and night)
    assert truth.max() > 119.0 and truth.min() < 81.0
    with RunLogReader(run.writer.path) as reader:
        o2 = reader.samples(columns=["o2_sat_pct"]).o2_sat_pct.dropna()
    assert o2.min() >= 80.0 - ALLOWANCE_PCT and o2.max() <= 120.0 + ALLOWANCE_PCT


def test_every_closed_window_is_in_the_log_with_its_reason(
    three_days: tuple[SimulatedRun, TruthSpy],
) -> None:
    run, _ = three_days
    with RunLogReader(run.writer.path) as reader:
        rows = reader.samples(columns=["time", "incubation", "pump_pct", "flow_setpoint_cm_s"])
        windows = reader.windows()
    spans = closed_stretches(rows)
    assert len(spans) == len(windows) >= 30  # about 14 a day here
    end_of_run = rows["time"].iloc[-1] + pd.Timedelta(seconds=PERIOD_S)
    for (first, after), (_, window) in zip(spans, windows.iterrows(), strict=True):
        assert window["start_time"] == first
        assert window["end_time"] == (after if after is not None else end_of_run)
        assert window["detail"]
    reasons = windows["end_reason"].astype(str)
    # by day O2 rises out of the band, by night it falls out of it
    assert set(windows.loc[reasons == "o2_high", "light"].astype(str)) == {"light"}
    assert (reasons[windows["light"].astype(str) == "dark"] == "o2_low").sum() >= 15
    assert {"o2_high", "o2_low", "light_change", "run_end"} <= set(reasons)
    assert set(reasons) <= {"o2_high", "o2_low", "light_change", "max_duration", "run_end"}
    durations = (windows["end_time"] - windows["start_time"]).dt.total_seconds()
    assert durations.max() <= 2 * 3600.0 + PERIOD_S
    # closed: the flushing pump is off; open: it runs for the protocol's flow
    closed = rows["incubation"].astype(object) == "closed"
    assert (rows.loc[closed, "pump_pct"] == 0.0).all()
    settled = rows["time"] >= rows["time"].iloc[0] + pd.Timedelta(minutes=10)
    assert (rows.loc[~closed & settled, "pump_pct"] > 0.0).all()


def test_between_windows_the_chamber_is_flushed_for_the_flush_time(
    three_days: tuple[SimulatedRun, TruthSpy],
) -> None:
    run, _ = three_days
    with RunLogReader(run.writer.path) as reader:
        windows = reader.windows()
    gaps = windows["start_time"].iloc[1:].to_numpy() - windows["end_time"].iloc[:-1].to_numpy()
    gaps_s = gaps.astype("timedelta64[ms]").astype(float) / 1000.0
    assert gaps_s.min() >= 30 * 60.0  # the protocol's flush


def test_pinned_to_the_light_one_window_per_light_and_dark_period(tmp_path: Path) -> None:
    pinned = """
[incubation]
pinned_to_light = true
o2_low_pct = 80.0
o2_high_pct = 120.0
min_closed = "1h"
max_closed = "12h"
flush = "30min"
settle = "15min"
"""
    protocol, rig, log = write_files(
        tmp_path,
        rig=rig_text(productive=False),
        protocol=protocol_text(phases=(("incubations", "1d"),), incubation=pinned),
    )
    run = SimulatedRun.prepare(protocol, rig, log, settings=RunSettings(period_s=PERIOD_S))
    summary, _ = drive(run)
    assert summary.end_reason is RunEndReason.COMPLETED, summary.detail
    with RunLogReader(log) as reader:
        windows = reader.windows()
        rows = reader.samples(columns=["time", "incubation"])
    assert len(closed_stretches(rows)) == len(windows) == 3
    day0 = pd.Timestamp("2027-07-01T00:00:00Z")
    hours = [
        (
            (w.start_time - day0).total_seconds() / 3600.0,
            (w.end_time - day0).total_seconds() / 3600.0,
        )
        for w in windows.itertuples()
    ]
    light = windows["light"].astype(str).tolist()
    reasons = windows["end_reason"].astype(str).tolist()
    assert light == ["dark", "light", "dark"]
    assert reasons == ["light_change", "light_change", "run_end"]
    # night: after the first flush (30 min), flushed 30 min before the light comes on at 06:00
    assert hours[0] == pytest.approx((0.5, 5.5), abs=0.02)
    # day: 15 min of settling after sunrise, flushed 30 min before sunset at 18:00
    assert hours[1] == pytest.approx((6.25, 17.5), abs=0.05)
    # evening: after sunset and settling, until the protocol ends
    assert hours[2] == pytest.approx((18.25, 24.0), abs=0.05)
