"""The text plot: glyphs for measured and setpoint lines, closed windows on the axis, exact
widths, and bins that never take samples from outside the time axis."""

from __future__ import annotations

import numpy as np

from controller.storage import AlarmLevel
from controller.tui import PlotData, PlotSeries, draw
from controller.tui._look import alarm_badge, fmt, fmt_age, fmt_duration, fmt_signed


def _text(lines: list[list[tuple[str, str]]]) -> list[str]:
    return ["".join(piece for piece, _ in line) for line in lines]


def _data(span_s: float = 3600.0) -> PlotData:
    t = np.arange(0.0, 3600.0, 60.0)
    measured = 20.0 + np.linspace(0.0, 1.0, t.size)
    closed = (t >= 1200.0) & (t < 2400.0)
    return PlotData(
        title="temperature °C",
        utc_s=t,
        series=(
            PlotSeries("setpoint", np.full(t.size, 20.5), "dash"),
            PlotSeries("measured", measured, "dots"),
        ),
        shaded=closed,
        end_utc_s=3540.0,
        span_s=span_s,
    )


def test_measured_is_braille_setpoint_is_dashes_and_closed_windows_mark_the_axis() -> None:
    lines = _text(draw(_data(), 60, 12))
    assert len(lines) == 12 and all(len(line) == 60 for line in lines)
    body = "".join(lines[1:-2])
    assert any(0x2800 < ord(ch) <= 0x28FF for ch in body)  # braille dots
    assert "╌" in body
    axis = lines[-2]
    marks = axis.index("▀"), axis.rindex("▀")
    # closed from minute 20 to 40 of the hour shown: the middle third of the 53 plot columns
    plot_cols = 60 - 7
    assert abs(marks[0] - 7 - plot_cols / 3) <= 2 and abs(marks[1] - 7 - 2 * plot_cols / 3) <= 2
    assert "-1h" in lines[-1] and "now" in lines[-1]
    assert "⣿ measured" in lines[0] and "╌ setpoint" in lines[0] and "▀ closed" in lines[0]


def test_samples_after_the_right_edge_are_not_drawn() -> None:
    data = _data()
    late = PlotData(
        title=data.title,
        utc_s=np.append(data.utc_s, [7200.0]),
        series=(PlotSeries("measured", np.append(data.series[1].values, [99.0]), "dots"),),
        end_utc_s=3540.0,
        span_s=3600.0,
    )
    top_label = _text(draw(late, 60, 12))[1][:6]
    assert float(top_label) < 25.0  # the 99 at 2 h lies past the axis and sets no range


def test_no_data_draws_an_empty_frame() -> None:
    empty = PlotData(title="O₂", utc_s=np.empty(0), series=(), end_utc_s=0.0, span_s=60.0)
    lines = _text(draw(empty, 40, 6))
    assert "no data in this span" in lines[1 + (6 - 3) // 2] and len(lines) == 6


def test_fixed_width_numbers_and_words_for_states() -> None:
    assert (
        fmt(20.314, 5, 2) == "20.31"
        and fmt(None, 5, 2) == "    -"
        and fmt(123456.0, 4, 1) == "####"
    )
    assert fmt_signed(0.314, 5, 2) == "+0.31" and fmt_signed(-12.34, 5, 2) == "-12.3"
    assert fmt_duration(93784.0) == "1d 02:03" and fmt_duration(3723.0) == "01:02:03"
    assert fmt_age(4.2) == "4 s" and fmt_age(7300.0) == "2 h 01 min"
    assert alarm_badge(None, True) == "·   ok"
    assert alarm_badge(AlarmLevel.TRIP, False) == "■ TRIP"
    assert alarm_badge(AlarmLevel.TRIP, True) == "□ trip"
    assert alarm_badge(AlarmLevel.WARNING, False) == "▲ WARN"
