"""``squall heatwave detect`` and ``squall heatwave design`` from the command line."""

from __future__ import annotations

import csv
import datetime as dt
import json
import tomllib
from pathlib import Path

import numpy as np
import pytest

from controller.cli import main
from controller.cli.cmd_check import compile_loaded, load_protocol, resolve_start
from controller.cli.cmd_heatwave import EVENT_FIELDS, JSON_FORMAT, peak_hold_days
from controller.protocol import ColdSpellEvent, HeatwaveEvent, parse_duration, sample
from controller.science import heatwave as hw

from ._synthetic import make_series, write_series_csv

DAY_S = 86_400.0

PROTOCOL_HEAD = """\
format = "squall-protocol/1"
title = "Designed event in a minimal protocol (invented)"
begins = "on-launch"

[site]
name = "Saltmarrow Lagoon (fictional)"
latitude_deg = 46.9
longitude_deg = -30.5
depth_m = 1.0
salinity = 31.0
reference_date = "{date}"

[groups.treatment]
role = "treatment"
chambers = ["C1", "C2"]

[groups.ambient]
role = "control"
chambers = ["C3", "C4"]

[[phases]]
name = "exposure"
duration = "80d"
  [phases.programs]
  temperature = [ {{ kind = "hold", value = {hold_c} }} ]

"""


@pytest.fixture(scope="module")
def series_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A 30-year invented daily series with injected warm boxes."""
    folder = tmp_path_factory.mktemp("site")
    return write_series_csv(make_series(7, 1991, 2020, n_events=10), folder / "site.csv")


@pytest.fixture(scope="module")
def cold_csv(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A 30-year invented daily series with injected cold boxes."""
    folder = tmp_path_factory.mktemp("cold")
    return write_series_csv(make_series(8, 1991, 2020, n_events=10, cold=True), folder / "cold.csv")


def _run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(argv)
    out, err = capsys.readouterr()
    return code, out, err


def _expected(path: Path, years: tuple[int, int] | None, *, cold: bool) -> list[hw.ExtremeEvent]:
    dates, temps = hw.load_series_csv(path)
    clim = hw.climatology(dates, temps, baseline_years=years, percentile=10.0 if cold else 90.0)
    return hw.detect(dates, temps, clim, cold=cold)


# --- detect ------------------------------------------------------------------------------------


def test_detect_writes_metadata_and_events_as_json(
    series_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_json = tmp_path / "events.json"
    code, out, err = _run(
        ["heatwave", "detect", str(series_csv), "--json", str(out_json), "--baseline-years",
         "1991", "2020"],
        capsys,
    )  # fmt: skip
    assert (code, err) == (0, "")
    doc = json.loads(out_json.read_text(encoding="utf-8"))
    assert doc["format"] == JSON_FORMAT
    assert doc["kind"] == "heatwave"
    assert doc["series"] == str(series_csv)
    assert doc["baseline_years"] == [1991, 2020]
    assert doc["percentile"] == 90.0
    assert "Hobday et al. (2016)" in doc["method"] and "Hobday et al. (2018)" in doc["method"]
    assert (doc["series_first_date"], doc["series_last_date"]) == ("1991-01-01", "2020-12-31")
    assert doc["series_days"] == 10958 and doc["missing_days"] == 0
    assert (doc["min_duration_days"], doc["max_gap_days"]) == (5, 2)
    expected = _expected(series_csv, (1991, 2020), cold=False)
    assert len(doc["events"]) == len(expected) >= 10
    for got, want in zip(doc["events"], expected, strict=True):
        assert list(got)[: len(EVENT_FIELDS)] == list(EVENT_FIELDS)
        assert got == want.to_json_dict()
    # The table numbers the events and names the first one's dates.
    assert f"{len(expected)} marine heatwaves" in out
    assert expected[0].start.isoformat() in out and "category" in out


def test_detect_defaults_to_every_year_and_notes_a_short_baseline(
    series_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_json = tmp_path / "e.json"
    code, out, _ = _run(["heatwave", "detect", str(series_csv), "--json", str(out_json)], capsys)
    assert code == 0
    assert json.loads(out_json.read_text())["baseline_years"] == [1991, 2020]
    assert "recommend" not in out  # 30 years: no note
    code, out, _ = _run(
        ["heatwave", "detect", str(series_csv), "--baseline-years", "2000", "2009"], capsys
    )
    assert code == 0
    assert "baseline spans 10 years" in " ".join(out.split())


def test_detect_writes_csv_with_the_fixed_columns_first(
    series_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_csv = tmp_path / "events.csv"
    code, _, _ = _run(
        ["heatwave", "detect", str(series_csv), "--csv", str(out_csv), "--min-days", "7",
         "--max-gap", "0"],
        capsys,
    )  # fmt: skip
    assert code == 0
    with out_csv.open(newline="") as handle:
        rows = list(csv.DictReader(handle))
    dates, temps = hw.load_series_csv(series_csv)
    clim = hw.climatology(dates, temps)
    want = hw.detect(dates, temps, clim, min_duration_days=7, max_gap_days=0)
    assert len(rows) == len(want) > 0
    assert list(rows[0])[: len(EVENT_FIELDS)] == list(EVENT_FIELDS)
    assert all(int(r["duration_days"]) >= 7 for r in rows)
    assert [r["start"] for r in rows] == [e.start.isoformat() for e in want]
    assert float(rows[0]["intensity_max_c"]) == pytest.approx(want[0].intensity_max_c, rel=1e-12)


def test_detect_cold_spells(
    cold_csv: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_json = tmp_path / "cold.json"
    code, out, _ = _run(
        ["heatwave", "detect", str(cold_csv), "--cold", "--json", str(out_json)], capsys
    )
    assert code == 0
    doc = json.loads(out_json.read_text())
    assert (doc["kind"], doc["percentile"]) == ("cold-spell", 10.0)
    assert "Schlegel et al. (2017)" in doc["method"]
    assert len(doc["events"]) >= 10
    assert all(
        e["intensity_max_c"] < 0 and e["intensity_cumulative_c_days"] < 0 for e in doc["events"]
    )
    assert all(e["rate_onset_c_per_day"] >= 0 for e in doc["events"])
    assert doc["events"] == [e.to_json_dict() for e in _expected(cold_csv, None, cold=True)]
    assert "cold spells" in out


# --- design ------------------------------------------------------------------------------------


def _block(text: str) -> dict[str, object]:
    events = tomllib.loads(text)["events"]
    assert len(events) == 1
    return dict(events[0])


def _compile_with(block: str, folder: Path, *, date: str, hold_c: float = 18.0) -> object:
    """Paste a block into a minimal protocol in ``folder``, check it and compile it."""
    path = folder / "designed.toml"
    path.write_text(PROTOCOL_HEAD.format(date=date, hold_c=hold_c) + block, encoding="utf-8")
    assert main(["check", str(path)]) == 0
    loaded = load_protocol(path)
    start, _ = resolve_start(loaded.protocol, None)
    return compile_loaded(loaded, start)


def _temperature(compiled: object, chamber: str) -> tuple[np.ndarray, np.ndarray]:
    t = np.arange(0.0, 80 * DAY_S, 600.0)
    return t, sample(compiled, t)[chamber]["temperature_c"]  # type: ignore[arg-type]


def test_design_from_a_category_on_constants_compiles_to_its_size(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The cold-spell example of the protocol format: 2 x (20 - 18) = 4 °C above 18 °C.
    code, out, _ = _run(
        ["heatwave", "design", "--category", "strong", "--baseline-c", "18", "--threshold-c",
         "20", "--onset-rate", "1", "--peak-duration", "4d", "--decline-rate", "0.8",
         "--groups", "treatment", "--starts", "exposure"],
        capsys,
    )  # fmt: skip
    assert code == 0
    block = _block(out)
    assert block == {
        "kind": "heatwave",
        "name": "strong heatwave",
        "groups": ["treatment"],
        "starts": "exposure",
        "baseline_c": 18.0,
        "threshold_c": 20.0,
        "category": "strong",
        "onset_rate_c_per_day": 1.0,
        "peak_duration": "4d",
        "decline_rate_c_per_day": 0.8,
    }
    HeatwaveEvent.model_validate(block)
    assert "4.00 °C" in out and "13.00 d in all" in out
    compiled = _compile_with(out, tmp_path, date="2027-07-10")
    t, temp = _temperature(compiled, "C1")
    assert temp.max() == pytest.approx(22.0)
    hot = t[temp >= 22.0 - 1e-9]
    assert hot[-1] - hot[0] == pytest.approx(4 * DAY_S, abs=600.0)  # the 4-day hold
    assert np.all(_temperature(compiled, "C3")[1] == 18.0)  # controls untouched


def test_design_cold_spell_with_an_explicit_size(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_file = tmp_path / "block.toml"
    code, out, _ = _run(
        ["heatwave", "design", "--cold", "--peak-anomaly-c", "3", "--baseline-c", "10",
         "--onset-rate", "1", "--peak-duration", "P2DT12H", "--decline-rate", "0.5",
         "--name", "late frost", "-o", str(out_file)],
        capsys,
    )  # fmt: skip
    assert code == 0 and "wrote the cold-spell block" in out
    block = _block(out_file.read_text())
    assert block["kind"] == "cold-spell" and block["peak_anomaly_c"] == -3.0
    assert block["name"] == "late frost"
    assert parse_duration(str(block["peak_duration"])) == 2.5 * DAY_S
    ColdSpellEvent.model_validate(block)
    compiled = _compile_with(out_file.read_text(), tmp_path, date="2027-01-18", hold_c=10.0)
    assert _temperature(compiled, "C2")[1].min() == pytest.approx(7.0)


def test_design_on_a_series_takes_the_size_of_the_calendar_day(
    series_csv: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    folder = series_csv.parent
    out_file = folder / "strong.toml"
    code, _, _ = _run(
        ["heatwave", "design", "--category", "severe", "--series", str(series_csv),
         "--baseline-years", "1991", "2020", "--date", "2027-08-01", "--onset-rate", "0.5",
         "--peak-duration", "5d", "--decline-rate", "0.5", "-o", str(out_file)],
        capsys,
    )  # fmt: skip
    assert code == 0
    text = out_file.read_text()
    block = _block(text)
    assert block["series"] == series_csv.as_posix()
    assert block["baseline_years"] == [1991, 2020] and block["category"] == "severe"
    dates, temps = hw.load_series_csv(series_csv)
    seas, thresh = hw.climatology(dates, temps, baseline_years=(1991, 2020)).at(["2027-08-01"])
    size = 3 * float(thresh[0] - seas[0])  # category III: 3 x (thresh - seas), Hobday et al. 2018
    assert f"{size:.2f} °C" in text
    compiled = _compile_with(text, folder, date="2027-08-01")
    assert _temperature(compiled, "C1")[1].max() == pytest.approx(18.0 + size, abs=1e-9)


def test_design_without_a_date_gives_the_range_over_the_year(
    series_csv: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = _run(
        ["heatwave", "design", "--category", "moderate", "--series", str(series_csv),
         "--onset-rate", "0.5", "--peak-duration", "5d", "--decline-rate", "0.5"],
        capsys,
    )  # fmt: skip
    assert code == 0
    clim = hw.climatology(*hw.load_series_csv(series_csv))
    spread = clim.thresh_c - clim.seas_c
    assert f"{spread.min():.2f} to {spread.max():.2f} °C" in " ".join(out.split())
    HeatwaveEvent.model_validate(_block(out))


def _hold_of(event: hw.ExtremeEvent, clim: hw.Climatology) -> tuple[float, float, float]:
    """Designed size, threshold distance and peak hold (d) for a detected heatwave."""
    seas, thresh = clim.at([event.start])
    spread = float(thresh[0] - seas[0])
    size = hw.CATEGORY_MULTIPLES[event.category.value] * spread
    onset = round(event.rate_onset_c_per_day, 3)
    decline = round(event.rate_decline_c_per_day, 3)
    return size, spread, peak_hold_days(event.duration_days, size, spread, onset, decline)


def test_design_from_a_detected_event(
    series_csv: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    events = _expected(series_csv, (1991, 2020), cold=False)
    clim = hw.climatology(*hw.load_series_csv(series_csv), baseline_years=(1991, 2020))
    # The event above category I with the longest peak hold shows the hold's rule best.
    numbers = [i + 1 for i, e in enumerate(events) if e.category != "moderate"]
    number = max(numbers, key=lambda n: _hold_of(events[n - 1], clim)[2])
    picked = events[number - 1]
    size, spread, hold_d = _hold_of(picked, clim)
    assert hold_d > 1.0
    folder = series_csv.parent / "protocols"
    folder.mkdir(exist_ok=True)
    out_file = folder / "from-event.toml"
    monkeypatch.chdir(series_csv.parent)  # relative paths, as a user types them
    code, _, _ = _run(
        ["heatwave", "design", "--series", series_csv.name, "--baseline-years", "1991", "2020",
         "--from-event", str(number), "-o", "protocols/from-event.toml"],
        capsys,
    )  # fmt: skip
    assert code == 0
    text = out_file.read_text()
    block = _block(text)
    # Written beside the protocol, the series is named relative to it.
    assert block["series"] == "../site.csv"
    assert (folder / str(block["series"])).resolve() == series_csv.resolve()
    assert block["category"] == picked.category.value
    assert block["onset_rate_c_per_day"] == round(picked.rate_onset_c_per_day, 3)
    assert block["decline_rate_c_per_day"] == round(picked.rate_decline_c_per_day, 3)
    assert f"{picked.start} to {picked.end}" in " ".join(text.split())
    # The peak hold makes the designed event spend the detected event's days past the threshold.
    assert parse_duration(str(block["peak_duration"])) == round(hold_d * 24) * 3600.0
    compiled = _compile_with(text, folder, date=picked.start.isoformat())
    temp = _temperature(compiled, "C1")[1]
    above_days = np.count_nonzero(temp - 18.0 >= spread) * 600.0 / DAY_S
    assert above_days == pytest.approx(picked.duration_days, abs=1 / 24 + 600.0 / DAY_S)
    assert temp.max() - 18.0 == pytest.approx(size, abs=1e-9)


def test_design_from_a_detected_cold_spell(
    cold_csv: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    events = _expected(cold_csv, None, cold=True)
    code, out, _ = _run(
        ["heatwave", "design", "--series", str(cold_csv), "--cold", "--from-event", "2",
         "--onset-rate", "0.25", "--peak-duration", "2d"],
        capsys,
    )  # fmt: skip
    assert code == 0
    block = _block(out)
    ColdSpellEvent.model_validate(block)
    assert block["kind"] == "cold-spell"
    assert block["category"] == events[1].category.value
    assert block["onset_rate_c_per_day"] == 0.25 and block["peak_duration"] == "2d"  # given
    assert block["decline_rate_c_per_day"] == round(events[1].rate_decline_c_per_day, 3)


def test_peak_hold_days_formula() -> None:
    # 2.0 °C peak, threshold 0.5 °C from the climatology: 1.5 °C above it, 3 d up and 1.5 d down.
    assert peak_hold_days(10, 2.0, 0.5, 0.5, 1.0) == pytest.approx(10 - 3 - 1.5)
    assert peak_hold_days(6, 0.4, 0.5, 0.5, 1.0) == 6.0  # never past the threshold: no ramps
    assert peak_hold_days(2, 4.0, 0.5, 0.5, 0.5) < 0


# --- bad input ---------------------------------------------------------------------------------


BAD_SERIES = "date,temperature_c\n2020-01-01,10.0\n2020-01-02,warm\n"


@pytest.mark.parametrize(
    ("argv", "says"),
    [
        (["detect", "{missing}"], "cannot read the file"),
        (["detect", "{bad}"], "bad.csv:3: temperature_c: 'warm' is not a number"),
        (["detect", "{site}", "--baseline-years", "1980", "2000"], "--baseline-years: baseline"),
        (["detect", "{site}", "--baseline-years", "2001", "1999"], "--baseline-years"),
        (["detect", "{site}", "--min-days", "0"], "--min-days"),
        (["detect", "{site}", "--max-gap", "-1"], "--max-gap"),
        (["detect", "{site}", "--min-days", "five"], "not a whole number"),
        (["detect", "{site}", "--json", "{tmp}/no/such/dir/e.json"], "cannot write the file"),
        (["detect"], "required"),
        (["design", "--series", "{site}", "--from-event", "999"], "--from-event: "),
        (["design", "--from-event", "1", "--baseline-c", "18"], "--from-event needs --series"),
        (["design", "--category", "strong", "--peak-anomaly-c", "2", "--baseline-c", "18"],
         "not allowed with"),
        (["design", "--category", "strong", "--series", "{site}", "--baseline-c", "18"],
         "not allowed with"),
        (["design", "--category", "huge", "--baseline-c", "18"], "invalid choice"),
        (["design", "--category", "strong", "--baseline-c", "18", "--onset-rate", "1",
          "--peak-duration", "2d", "--decline-rate", "1"], "--threshold-c"),
        (["design", "--peak-anomaly-c", "2", "--threshold-c", "20", "--series", "{site}"],
         "--threshold-c goes with --baseline-c"),
        (["design", "--peak-anomaly-c", "2", "--baseline-c", "18", "--baseline-years", "1991",
          "2000"], "--baseline-years goes with --series"),
        (["design", "--peak-anomaly-c", "2", "--baseline-c", "18", "--peak-duration", "2d",
          "--decline-rate", "1"], "--onset-rate is required"),
        (["design", "--baseline-c", "18", "--onset-rate", "1"], "give a size"),
        (["design", "--peak-anomaly-c", "2", "--onset-rate", "1"], "give a baseline"),
        (["design", "--peak-anomaly-c", "2", "--baseline-c", "18", "--onset-rate", "-1",
          "--peak-duration", "2d", "--decline-rate", "1"], "--onset-rate"),
        (["design", "--peak-anomaly-c", "2", "--baseline-c", "18", "--onset-rate", "1",
          "--peak-duration", "two days", "--decline-rate", "1"], "--peak-duration"),
        (["design", "--peak-anomaly-c", "25", "--baseline-c", "18", "--onset-rate", "1",
          "--peak-duration", "2d", "--decline-rate", "1"], "--peak-anomaly-c"),
        (["design", "--category", "strong", "--baseline-c", "10", "--threshold-c", "12",
          "--cold", "--onset-rate", "1", "--peak-duration", "2d", "--decline-rate", "1"],
         "--threshold-c: threshold_c 12 °C must be below baseline_c"),
        (["design", "--category", "strong", "--series", "{site}", "--date", "2027-02-30",
          "--onset-rate", "1", "--peak-duration", "2d", "--decline-rate", "1"], "--date"),
    ],
)  # fmt: skip
def test_bad_input_is_one_line_and_exit_2(
    argv: list[str],
    says: str,
    series_csv: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text(BAD_SERIES, encoding="utf-8")
    names = {"missing": tmp_path / "none.csv", "bad": bad, "site": series_csv, "tmp": tmp_path}
    code, out, err = _run(["heatwave", *(arg.format(**names) for arg in argv)], capsys)
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("squall: error: ")
    assert says in lines[0]
    assert "Traceback" not in err


def test_an_event_touching_the_series_start_needs_its_onset_rate(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # A series that starts inside a heatwave whose first day is its peak: the onset rate
    # measured from the first day is 0 (the authors' reference code at the series start).
    series = make_series(11, 1991, 2020, n_events=4, at_ends=True)
    temps = series.temps.copy()
    temps[0] += 3.0  # the first day is the hottest of the opening box
    path = tmp_path / "edge.csv"
    write_series_csv(type(series)(series.dates, temps, series.injected), path)
    events = _expected(path, None, cold=False)
    assert events[0].start == dt.date(1991, 1, 1) and events[0].rate_onset_c_per_day == 0.0
    code, _, err = _run(["heatwave", "design", "--series", str(path), "--from-event", "1"], capsys)
    assert code == 2 and "give --onset-rate" in err
    code, out, _ = _run(
        ["heatwave", "design", "--series", str(path), "--from-event", "1", "--onset-rate", "0.4"],
        capsys,
    )
    assert code == 0 and _block(out)["onset_rate_c_per_day"] == 0.4
