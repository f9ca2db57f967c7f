"""Event generators and the combination rules (anomalies add, factors multiply, flow max)."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from controller.errors import SquallError
from controller.protocol import sample, setpoints_at
from controller.science.heatwave import climatology

from ._build import compile_doc, two_groups

D = 86400.0
H = 3600.0


def heatwave(**fields: Any) -> dict[str, Any]:
    event = {
        "kind": "heatwave",
        "name": "hw",
        "groups": ["warmed"],
        "starts": "2d",
        "baseline_c": 18.0,
        "threshold_c": 19.5,
        "category": "severe",
        "onset_rate_c_per_day": 1.5,
        "peak_duration": "2d",
        "decline_rate_c_per_day": 0.9,
    }
    event.update(fields)
    return event


def storm(**fields: Any) -> dict[str, Any]:
    event = {
        "kind": "storm",
        "name": "st",
        "groups": ["warmed"],
        "starts": "run",
        "offset": "3d",
        "duration": "2d",
        "kd_rise_per_m": 1.2,
        "ramp": "3h",
    }
    event.update(fields)
    return event


SITE = {"latitude_deg": 46.9, "longitude_deg": -30.5, "depth_m": 1.2}


@pytest.mark.parametrize(
    ("category", "multiple"),
    # Hobday et al. (2018), Oceanography 31(2):162–173: category n starts at n x (thresh - seas)
    [("moderate", 1), ("strong", 2), ("severe", 3), ("extreme", 4)],
)
def test_heatwave_category_sets_the_peak_anomaly(category: str, multiple: int) -> None:
    compiled = compile_doc(two_groups(events=[heatwave(category=category)]))
    anomaly = multiple * (19.5 - 18.0)
    peak = compiled.channels["C1"]["temperature_c"].v.max()
    assert peak == pytest.approx(18.0 + anomaly)
    assert compiled.channels["C3"]["temperature_c"].v.max() == 18.0  # control untouched


def test_heatwave_shape_and_marks_are_golden() -> None:
    compiled = compile_doc(two_groups(events=[heatwave()]))
    channel = compiled.channels["C1"]["temperature_c"]
    # peak 4.5 °C: onset 4.5/1.5 = 3 d, peak 2 d, decline 4.5/0.9 = 5 d, from day 2
    assert channel.t_s.tolist() == [0.0, 2 * D, 5 * D, 7 * D, 12 * D, 20 * D]
    assert channel.v.tolist() == pytest.approx([18.0, 18.0, 22.5, 22.5, 18.0, 18.0])
    assert [(m.name, m.t0_s, m.t1_s) for m in compiled.marks] == [
        ("onset", 2 * D, 5 * D),
        ("peak", 5 * D, 7 * D),
        ("decline", 7 * D, 12 * D),
    ]
    (span,) = compiled.events
    assert (span.name, span.kind, span.groups, span.t0_s, span.t1_s, span.field) == (
        "hw",
        "heatwave",
        ("warmed",),
        2 * D,
        12 * D,
        "events.0",
    )


def test_cold_spell_mirrors_below_the_program() -> None:
    event = heatwave(kind="cold-spell", threshold_c=16.5, category="strong")
    compiled = compile_doc(two_groups(events=[event]))
    assert compiled.channels["C1"]["temperature_c"].v.min() == pytest.approx(18.0 - 2 * 1.5)
    for size in (2.0, -2.0):  # a magnitude either way is applied downward
        event = heatwave(kind="cold-spell", peak_anomaly_c=size)
        del event["category"], event["threshold_c"]
        low = compile_doc(two_groups(events=[event])).channels["C1"]["temperature_c"].v.min()
        assert low == pytest.approx(16.0)


def _write_climatology(path: Path, offset_c: float) -> None:
    doy = np.arange(1, 367)
    seas = 15.0 + 3.0 * np.sin(2 * np.pi * (doy - 100) / 366.0)
    frame = pd.DataFrame({"doy": doy, "seas_c": seas, "thresh_c": seas + offset_c})
    frame.to_csv(path, index=False)


def test_heatwave_from_a_climatology_table_uses_the_start_day(tmp_path: Path) -> None:
    _write_climatology(tmp_path / "clim.csv", 1.2)
    event = heatwave(climatology="clim.csv", category="extreme")
    del event["baseline_c"], event["threshold_c"]
    data = two_groups(events=[event], site={**SITE, "reference_date": "2027-07-20"})
    compiled = compile_doc(data, base_dir=tmp_path)
    assert compiled.channels["C1"]["temperature_c"].v.max() == pytest.approx(18.0 + 4 * 1.2)
    # the baseline follows seas: at local noon of 2027-07-22 (doy 203 on the leap calendar)
    baseline = compiled.baselines["warmed"]
    noon = 2 * D + 12 * H
    expected = 15.0 + 3.0 * math.sin(2 * math.pi * (204 - 100) / 366.0)
    assert baseline.evaluate(np.array([noon]))[0] == pytest.approx(expected)


def test_cold_spell_refuses_a_table_whose_threshold_is_above_the_mean(tmp_path: Path) -> None:
    _write_climatology(tmp_path / "clim.csv", 1.2)
    event = heatwave(kind="cold-spell", climatology="clim.csv", category="moderate")
    del event["baseline_c"], event["threshold_c"]
    with pytest.raises(SquallError) as info:
        compile_doc(two_groups(events=[event]), base_dir=tmp_path)
    assert info.value.field == "events.0.category"
    assert "not below" in info.value.message


def test_heatwave_from_a_series_uses_the_hobday_2016_climatology(tmp_path: Path) -> None:
    dates = pd.date_range("1991-01-01", "2020-12-31", freq="D")
    rng = np.random.default_rng(3)
    temps = 15 + 4 * np.sin(2 * np.pi * dates.day_of_year / 365.25) + rng.normal(0, 0.8, dates.size)
    pd.DataFrame({"date": dates.date, "temperature_c": temps}).to_csv(
        tmp_path / "site.csv", index=False
    )
    event = heatwave(series="site.csv", category="strong", baseline_years=[1991, 2020])
    del event["baseline_c"], event["threshold_c"]
    data = two_groups(events=[event], site={**SITE, "reference_date": "2027-03-01"})
    compiled = compile_doc(data, base_dir=tmp_path)
    # the science package's Hobday et al. (2016) climatology over the same years
    clim = climatology(dates, temps, baseline_years=(1991, 2020))
    seas, thresh = clim.at(pd.DatetimeIndex(["2027-03-03"]))
    expected = 2 * float(thresh[0] - seas[0])
    assert compiled.channels["C1"]["temperature_c"].v.max() == pytest.approx(18.0 + expected)


def test_storm_shading_is_beer_lambert() -> None:
    data = two_groups(events=[storm()], site=SITE)
    compiled = compile_doc(data)
    # Beer–Lambert I(z) = I0·exp(-Kd·z) (Kirk, Light and Photosynthesis in Aquatic
    # Ecosystems, from memory): ΔKd = 1.2 m-1 at z = 1.2 m leaves exp(-1.44) of the light
    middle = setpoints_at(compiled, 4 * D)
    assert middle["C1"].par == pytest.approx(400.0 * math.exp(-1.44), rel=1e-9)
    assert middle["C3"].par == 400.0
    # during the 3 h ramp ΔKd rises linearly: halfway, exp(-0.72), within the stated bound
    halfway = setpoints_at(compiled, 3 * D + 1.5 * H)["C1"].par
    assert halfway == pytest.approx(400.0 * math.exp(-0.72), abs=400.0 * 2e-3)
    t = np.linspace(3 * D, 3 * D + 3 * H, 20_001)
    got = sample(compiled, t)["C1"]["par"]
    truth = 400.0 * np.exp(-1.44 * (t - 3 * D) / (3 * H))
    assert np.max(np.abs(got - truth)) <= 400.0 * 2e-3
    assert setpoints_at(compiled, 5 * D)["C1"].par == 400.0
    assert [m.name for m in compiled.marks] == ["build", "peak", "clear"]


def _pulse_storm(seed: int) -> dict[str, Any]:
    return storm(
        kd_rise_per_m=0.0,
        flow_peak_cm_s=18.0,
        pulse_every="6h",
        pulse_duration="1h",
        gustiness=0.5,
        seed=seed,
        temperature_drop_c=1.5,
    )


def test_storm_flow_pulses_are_seeded_and_bounded() -> None:
    first = compile_doc(two_groups(events=[_pulse_storm(7)], site=SITE))
    again = compile_doc(two_groups(events=[_pulse_storm(7)], site=SITE))
    other = compile_doc(two_groups(events=[_pulse_storm(8)], site=SITE))
    flow = first.channels["C1"]["flow_cm_s"]
    assert flow == again.channels["C1"]["flow_cm_s"]
    assert flow != other.channels["C1"]["flow_cm_s"]
    starts = 3 * D + 6 * H * np.arange(8)
    peaks = flow.evaluate(starts + 0.5 * H)
    assert np.all((peaks >= 9.0) & (peaks <= 18.0)) and np.unique(peaks).size == 8
    u = np.random.default_rng(7).random(8)  # the documented draw: peak·(1 - gustiness·u)
    assert peaks == pytest.approx(18.0 * (1 - 0.5 * u))
    between = flow.evaluate(starts + 3 * H)
    assert np.all(between == 4.0)  # the program's 4 cm s-1 wins between pulses
    assert setpoints_at(first, 4 * D)["C1"].temperature_c == pytest.approx(16.5)


def test_compound_events_combine_by_the_rules_in_any_order() -> None:
    events = [
        heatwave(category=None, peak_anomaly_c=3.0, starts="1d", peak_duration="6d"),
        storm(kd_rise_per_m=0.5, temperature_drop_c=1.0, ramp="0s"),
        storm(
            name="st2",
            offset="3.5d",
            kd_rise_per_m=0.7,
            ramp="0s",
            flow_peak_cm_s=10.0,
            pulse_every="12h",
            pulse_duration="12h",
        ),
        storm(
            name="st3",
            offset="3.5d",
            kd_rise_per_m=0.0,
            ramp="0s",
            flow_peak_cm_s=14.0,
            pulse_every="1d",
            pulse_duration="6h",
        ),
    ]
    del events[0]["category"], events[0]["threshold_c"]
    forward = compile_doc(two_groups(events=events, site={**SITE, "depth_m": 1.0}))
    backward = compile_doc(two_groups(events=events[::-1], site={**SITE, "depth_m": 1.0}))
    for key in ("temperature_c", "par", "flow_cm_s"):
        t = np.linspace(0, 20 * D, 4001)
        assert np.allclose(
            forward.channels["C1"][key].evaluate(t), backward.channels["C1"][key].evaluate(t)
        )
    at = setpoints_at(forward, 4 * D)["C1"]
    # temperature: anomalies add (heatwave +3 at its peak, storm -1)
    assert at.temperature_c == pytest.approx(18.0 + 3.0 - 1.0)
    # light: factors multiply (exp(-0.5) x exp(-0.7), depth 1 m)
    assert at.par == pytest.approx(400.0 * math.exp(-0.5) * math.exp(-0.7))
    # flow: the larger of program (4), st2 (10, all the time) and st3 (14 in its pulse) wins
    assert at.flow_cm_s == pytest.approx(10.0)
    assert setpoints_at(forward, 3.5 * D + 3 * H)["C1"].flow_cm_s == pytest.approx(14.0)
    assert setpoints_at(forward, 6 * D)["C1"].flow_cm_s == pytest.approx(4.0)


def test_event_past_the_end_fails_at_the_event() -> None:
    with pytest.raises(SquallError) as info:
        compile_doc(two_groups(events=[heatwave(starts="15d")]))
    assert info.value.field == "events.0"
    assert "past the end of the experiment" in info.value.message


def test_event_on_an_uncontrolled_variable_fails() -> None:
    data = two_groups(events=[storm()], site=SITE)
    del data["phases"][0]["programs"]["light"]
    with pytest.raises(SquallError) as info:
        compile_doc(data)
    assert info.value.field == "events.0"
    assert "no light program" in info.value.message


def test_combined_temperature_beyond_physics_fails_at_the_event() -> None:
    data = two_groups(
        events=[
            heatwave(
                category=None,
                peak_anomaly_c=19.0,
                onset_rate_c_per_day=19.0,
                decline_rate_c_per_day=19.0,
            )
        ]
    )
    del data["events"][0]["category"], data["events"][0]["threshold_c"]
    data["phases"][0]["programs"]["temperature"] = [{"kind": "hold", "value": 30.0}]
    with pytest.raises(SquallError) as info:
        compile_doc(data)
    assert info.value.field == "events.0"
    assert "beyond the physical limit 40" in info.value.message
