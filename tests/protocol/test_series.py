"""Replay and climatology blocks read CSV files relative to the protocol's folder."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from controller.errors import SquallError
from controller.protocol import load_replay_csv, sample, setpoints_at
from controller.science.heatwave import climatology

from ._build import compile_doc, document

D = 86400.0
H = 3600.0


def write_record(path: Path, days: int = 3) -> tuple[np.ndarray, np.ndarray]:
    times = pd.date_range("2024-07-01", periods=days * 48, freq="30min", tz="UTC")
    elapsed = np.arange(times.size) * 1800.0
    values = 18.0 + 1.5 * np.sin(2 * np.pi * elapsed / D) + 0.2 * np.cos(elapsed / 7000.0)
    frame = pd.DataFrame({"time": times.strftime("%Y-%m-%dT%H:%M:%S+00:00"), "temp": values})
    frame["temperature_c"] = frame["temp"]
    frame.to_csv(path, index=False)
    return elapsed, values


def replay_doc(**block: object) -> dict[str, object]:
    return document([{"kind": "replay", "series": "logger.csv", **block}], duration="1d")


def test_replay_follows_the_record_with_offset_and_scale(tmp_path: Path) -> None:
    elapsed, values = write_record(tmp_path / "logger.csv")
    compiled = compile_doc(
        replay_doc(**{"from": "2024-07-01T12:00:00+00:00", "offset_c": 0.5, "scale": 2.0}),
        base_dir=tmp_path,
    )
    t = np.linspace(0.0, D, 2001)
    raw = np.interp(t + 12 * H, elapsed, values)
    mean = (
        np.trapezoid(np.interp(np.arange(0, D + 1, 1800.0) + 12 * H, elapsed, values), dx=1800.0)
        / D
    )
    expected = mean + 2.0 * (raw - mean) + 0.5
    got = sample(compiled, t)["C1"]["temperature_c"]
    assert got == pytest.approx(expected, abs=1e-9)


def test_replay_picks_a_column_and_a_start_date(tmp_path: Path) -> None:
    elapsed, values = write_record(tmp_path / "logger.csv")
    compiled = compile_doc(replay_doc(column="temp", **{"from": "2024-07-02"}), base_dir=tmp_path)
    at = setpoints_at(compiled, 6 * H)["C1"].temperature_c
    assert at == pytest.approx(float(np.interp(D + 6 * H, elapsed, values)))


def test_replay_continues_into_a_phase_without_temperature(tmp_path: Path) -> None:
    elapsed, values = write_record(tmp_path / "logger.csv")
    data = replay_doc()
    data["phases"].append(
        {"name": "next", "duration": "1d", "programs": {"light": [{"kind": "hold", "value": 1.0}]}}
    )
    data["phases"][0]["programs"]["light"] = [{"kind": "hold", "value": 0.0}]
    compiled = compile_doc(data, base_dir=tmp_path)
    at = setpoints_at(compiled, 1.5 * D)["C1"].temperature_c
    assert at == pytest.approx(float(np.interp(1.5 * D, elapsed, values)))


def test_replay_longer_than_the_record_fails_at_the_series(tmp_path: Path) -> None:
    write_record(tmp_path / "logger.csv", days=1)
    with pytest.raises(SquallError) as info:
        compile_doc(replay_doc(**{"from": "2024-07-01T12:00:00+00:00"}), base_dir=tmp_path)
    assert info.value.field == "phases.0.programs.temperature.0.series"
    assert "does not cover the replay" in info.value.message


def test_bad_replay_rows_name_file_and_line(tmp_path: Path) -> None:
    path = tmp_path / "logger.csv"
    path.write_text(
        "time,temperature_c\n2024-07-01T00:00:00,18.0\n2024-07-01T00:30:00,warm\n",
        encoding="utf-8",
    )
    with pytest.raises(SquallError) as info:
        load_replay_csv(path, None)
    assert (info.value.file, info.value.line, info.value.field) == (str(path), 3, "temperature_c")
    path.write_text(
        "time,temperature_c\n2024-07-01T01:00:00,18.0\n2024-07-01T00:30:00,18.1\n",
        encoding="utf-8",
    )
    with pytest.raises(SquallError, match="run forward in time") as info:
        load_replay_csv(path, None)
    assert info.value.line == 3
    with pytest.raises(SquallError, match="no 'salinity' column"):
        load_replay_csv(path, "salinity")
    with pytest.raises(SquallError, match="cannot read"):
        load_replay_csv(tmp_path / "missing.csv", None)


def seas_of(doy: np.ndarray) -> np.ndarray:
    return 14.0 + 4.0 * np.sin(2 * np.pi * (doy - 110) / 366.0)


def test_climatology_block_follows_seas_from_the_reference_date(tmp_path: Path) -> None:
    doy = np.arange(1, 367)
    pd.DataFrame({"doy": doy, "seas_c": seas_of(doy), "thresh_c": seas_of(doy) + 1.0}).to_csv(
        tmp_path / "clim.csv", index=False
    )
    data = document(
        [{"kind": "climatology", "table": "clim.csv"}],
        duration="10d",
        site={"latitude_deg": 46.9, "longitude_deg": -30.5, "reference_date": "2027-07-20"},
    )
    compiled = compile_doc(data, base_dir=tmp_path)
    channel = compiled.channels["C1"]["temperature_c"]
    # one breakpoint per local noon; 2027-07-20 is day 201 of 2027, day 202 on the leap calendar
    noons = 12 * H + D * np.arange(10)
    assert channel.evaluate(noons) == pytest.approx(seas_of(202 + np.arange(10)), abs=1e-9)
    assert setpoints_at(compiled, D)["C1"].temperature_c == pytest.approx(
        float(np.mean(seas_of(np.array([202, 203])))), abs=1e-9
    )


def test_climatology_block_from_a_series(tmp_path: Path) -> None:
    dates = pd.date_range("2001-01-01", "2010-12-31", freq="D")
    temps = 12 + 5 * np.sin(2 * np.pi * (dates.day_of_year - 100) / 365.25)
    pd.DataFrame({"date": dates.date, "temperature_c": temps}).to_csv(
        tmp_path / "site.csv", index=False
    )
    data = document(
        [{"kind": "climatology", "series": "site.csv", "baseline_years": [2002, 2009]}],
        duration="3d",
        site={"latitude_deg": 46.9, "longitude_deg": -30.5, "reference_date": "2027-02-10"},
    )
    compiled = compile_doc(data, base_dir=tmp_path)
    seas, _ = climatology(dates, temps, baseline_years=(2002, 2009)).at(
        pd.DatetimeIndex(["2027-02-11"])
    )
    assert setpoints_at(compiled, D + 12 * H)["C1"].temperature_c == pytest.approx(float(seas[0]))
    assert math.isfinite(compiled.channels["C2"]["temperature_c"].v.sum())


def test_missing_climatology_file_is_a_user_error(tmp_path: Path) -> None:
    data = document([{"kind": "climatology", "table": "nowhere.csv"}], duration="1d")
    with pytest.raises(SquallError) as info:
        compile_doc(data, base_dir=tmp_path)
    assert info.value.file is not None and info.value.file.endswith("nowhere.csv")
