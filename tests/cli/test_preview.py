"""``squall preview``: figure file, setpoints CSV and their failure modes."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest

from controller.cli import main
from controller.cli.cmd_check import compile_loaded, load_protocol, resolve_start
from controller.cli.cmd_preview import (
    CSV_COLUMNS,
    default_step,
    preview_data,
    sample_times,
    setpoint_frame,
)
from controller.plots import DPI, FIGSIZE_IN, EventBar, GroupLines, PreviewData, render_preview
from controller.protocol import sample

from ._png import png_size

REPO = Path(__file__).resolve().parents[2]
STORM = REPO / "protocols" / "storm.toml"
STEPPED = REPO / "protocols" / "stepped-temperature.toml"
EXPECTED_PX = (round(FIGSIZE_IN[0] * DPI), round(FIGSIZE_IN[1] * DPI))


def test_preview_writes_png_and_csv(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    figure, table = tmp_path / "storm.png", tmp_path / "storm.csv"
    argv = ["preview", str(STORM), "-o", str(figure), "--csv", str(table), "--step", "1h"]
    assert main(argv) == 0
    assert png_size(figure) == EXPECTED_PX
    with table.open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert tuple(rows[0]) == CSV_COLUMNS
    assert len(rows) == (12 * 24 + 1) * 8  # 12 d hourly, both ends, 8 chambers
    assert rows[0]["time"] == "2027-08-19T23:00:00.000000Z"  # local midnight at UTC+01:00
    assert [r["chamber"] for r in rows[:8]] == [f"C{k}" for k in range(1, 9)]
    assert {r["phase"] for r in rows} == {"acclimation", "storm", "recovery"}
    last = rows[-1]
    assert (last["chamber"], float(last["elapsed_s"]), last["phase"]) == (
        "C8",
        12 * 86400,
        "recovery",
    )
    out = capsys.readouterr().out
    assert f"wrote {table} ({len(rows)} rows: 8 chambers every 3600 s)" in out


def test_csv_values_are_the_compiled_setpoints(tmp_path: Path) -> None:
    loaded = load_protocol(STORM)
    compiled = compile_loaded(loaded, resolve_start(loaded.protocol, None)[0])
    times = sample_times(compiled.duration_s, 1800.0)
    frame = setpoint_frame(compiled, times)
    expected = sample(compiled, times)
    c6 = frame[frame["chamber"] == "C6"]
    np.testing.assert_allclose(c6["temperature_setpoint_c"], expected["C6"]["temperature_c"])
    np.testing.assert_allclose(c6["par_setpoint"], expected["C6"]["par"])
    np.testing.assert_allclose(c6["flow_setpoint_cm_s"], expected["C6"]["flow_cm_s"])
    # the storm's flow pulses reach the treatment and never the controls
    c1 = frame[frame["chamber"] == "C1"]
    assert c6["flow_setpoint_cm_s"].max() > 10.0
    assert c1["flow_setpoint_cm_s"].max() == pytest.approx(3.0)
    assert set(frame["group"]) == {"calm", "storm"}


def test_sample_times_include_the_end() -> None:
    assert sample_times(3600.0, 1000.0).tolist() == [0.0, 1000.0, 2000.0, 3000.0, 3600.0]
    assert sample_times(3000.0, 1000.0).tolist() == [0.0, 1000.0, 2000.0, 3000.0]


@pytest.mark.parametrize(
    ("duration_d", "step_s"), [(0.5, 60.0), (6, 120.0), (28, 600.0), (400, 7200.0), (1000, 21600.0)]
)
def test_default_step_is_round_and_bounded(duration_d: float, step_s: float) -> None:
    assert default_step(duration_d * 86400) == step_s
    assert duration_d * 86400 / step_s <= 5000


def test_preview_data_draws_replicates_once() -> None:
    loaded = load_protocol(STEPPED)
    compiled = compile_loaded(loaded, resolve_start(loaded.protocol, None)[0])
    data = preview_data(loaded, compiled)
    assert [g.name for g in data.groups] == ["constant", "stepped"]
    stepped = data.groups[1]
    assert stepped.role == "treatment" and stepped.chambers == ("C5", "C6", "C7", "C8")
    assert len(stepped.lines["temperature_c"]) == 1  # identical replicates: one line
    t, v = stepped.lines["temperature_c"][0]
    assert t[0] == 0.0 and t[-1] == compiled.duration_s
    assert v.max() == pytest.approx(30.0) and v.min() == pytest.approx(14.0)
    assert [p[0] for p in data.phases] == ["t14", "t18", "t22", "t26", "t30"]
    assert "Day 0 = " in data.footnote


def test_render_preview_with_one_variable_and_events(tmp_path: Path) -> None:
    t = np.array([0.0, 86400.0, 2 * 86400.0])
    group = GroupLines("g", "G", "treatment", ("A1",), {"temperature_c": [(t, t / 86400 + 10)]})
    control = GroupLines("c", "C", "control", ("A2",), {"temperature_c": [(t, np.full(3, 10.0))]})
    data = PreviewData(
        title="One variable",
        duration_s=2 * 86400.0,
        groups=(group, control),
        phases=(("only", 0.0, 2 * 86400.0),),
        events=(
            EventBar("a", "heatwave", ("g",), 0.0, 86400.0),
            EventBar("b", "storm", ("g",), 3600.0, 7200.0),  # overlaps: second lane
        ),
        sampling_s=(43200.0,),
    )
    for suffix in (".png", ".svg", ".pdf"):
        path = render_preview(data, tmp_path / f"one{suffix}")
        assert path.stat().st_size > 1000
    assert png_size(tmp_path / "one.png") == EXPECTED_PX
    assert (tmp_path / "one.svg").read_text(encoding="utf-8").count("Temperature") >= 1
    assert "PAR" not in (tmp_path / "one.svg").read_text(encoding="utf-8")


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--step", "0.5s"], "--step: '0.5s' is too short"),
        (["--step", "soon"], "--step: "),
        (["--step", "1s"], "--step: a step of 1 s gives"),
    ],
)
def test_bad_step(
    tmp_path: Path, extra: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = ["preview", str(STORM), "-o", str(tmp_path / "p.png"), "--csv", str(tmp_path / "p.csv")]
    assert main([*argv, *extra]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"squall: error: {message}"), err
    assert err.count("\n") == 1


@pytest.mark.parametrize(
    ("name", "message"),
    [
        ("plot.jpeg", "cannot tell the figure format from 'plot.jpeg'"),
        ("missing/plot.png", "folder"),
    ],
)
def test_bad_output_path(
    tmp_path: Path, name: str, message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / name
    assert main(["preview", str(STORM), "-o", str(target)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"squall: error: {target}: ") and message in err
    assert not target.exists()


def test_bad_csv_suffix(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    argv = ["preview", str(STORM), "-o", str(tmp_path / "p.png"), "--csv", str(tmp_path / "p.xls")]
    assert main(argv) == 2
    assert "cannot tell the table format from 'p.xls'" in capsys.readouterr().err


@pytest.mark.parametrize(
    "argv",
    [
        ["preview", str(STORM)],
        ["preview", "-o", "x.png"],
        ["preview", str(STORM), "-o"],
        ["preview", str(STORM), "-o", "x.png", "--width", "3"],
        ["preview", str(STORM), "-o", "x.png", "--csv"],
    ],
)
def test_bad_arguments(argv: list[str], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.startswith("squall: error: squall")
    assert err.count("\n") == 1


def test_styles_tell_roles_apart_without_colour_and_colour_events_by_kind() -> None:
    from controller.plots._preview import _styles

    t = (np.zeros(1), np.zeros(1))
    groups = [
        GroupLines("a", "A", "control", ("C1",), {"temperature_c": [t]}),
        GroupLines("w", "W", "treatment", ("C2",), {"temperature_c": [t]}, "heatwave"),
        GroupLines("c", "C", "treatment", ("C3",), {"temperature_c": [t]}, "cold-spell"),
        GroupLines("b", "B", "control", ("C4",), {"temperature_c": [t]}),
    ]
    styles = _styles(groups)
    line_styles = [str(styles[g.name][1]) for g in groups]
    assert len(set(line_styles)) == 4  # every group has its own dash pattern
    assert styles["a"][1] != "-" and styles["b"][1] != "-"  # controls are never solid
    assert styles["w"][1] == "-"
    red, _, blue = (int(styles["c"][0][k : k + 2], 16) for k in (1, 3, 5))
    assert blue > red  # a cold spell is drawn in a cool colour
    red, _, blue = (int(styles["w"][0][k : k + 2], 16) for k in (1, 3, 5))
    assert red > blue  # a heatwave in a warm one
