"""Protocol models: a full file validates; bad files fail at the field to change."""

from __future__ import annotations

import copy
import json
import tomllib
from collections.abc import Callable
from typing import Any

import pytest
from pydantic import ValidationError

from controller.protocol import GroupRole, Protocol

FULL = """
format = "squall-protocol/1"
title = "Strong marine heatwave on eelgrass cores"
notes = "Invented scenario at Saltmarrow Lagoon."
begins = "on-launch"
utc_offset = "+02:00"

[site]
name = "Saltmarrow Lagoon (fictional)"
latitude_deg = 46.9
longitude_deg = -30.5
depth_m = 1.2
salinity = 31.0
reference_date = 2027-07-20

[groups.warmed]
role = "treatment"
chambers = ["C1", "C2", "C3"]
label = "Strong heatwave"

[groups.ambient]
role = "control"
chambers = ["C4", "C5", "C6"]

[[phases]]
name = "acclimation"
duration = "3d"
  [phases.programs]
  temperature = [ { kind = "daily-cycle", mean_c = 18.0, amplitude_c = 0.4, warmest_at = "15:00" } ]
  light = [ { kind = "daylight", sunrise = "06:00", sunset = "21:00", peak = 600.0 } ]
  flow = [ { kind = "hold", value = 4.0 } ]

[[phases]]
name = "exposure"
duration = "13d"
  [phases.groups.warmed]
  temperature = [
    { kind = "ramp", to = 22.0, rate_per_h = 0.05 },
    { kind = "hold", value = 22.0, duration = "5d" },
    { kind = "ramp", to = 18.0, duration = "4d" },
  ]

[[events]]
kind = "heatwave"
name = "summer heatwave"
groups = ["warmed"]
starts = "exposure"
offset = "0d"
baseline_c = 18.0
category = "strong"
threshold_c = 20.0
onset_rate_c_per_day = 1.0
peak_duration = "4d"
decline_rate_c_per_day = 0.8

[[events]]
kind = "storm"
groups = ["warmed"]
starts = "exposure"
offset = "5d"
duration = "2d"
kd_rise_per_m = 1.2
ramp = "3h"
flow_peak_cm_s = 18.0
pulse_every = "6h"
pulse_duration = "1h"
gustiness = 0.3
seed = 7

[[sampling]]
at = "exposure+2d"
what = "nutrient samples from every chamber"
"""


def full() -> dict[str, Any]:
    return tomllib.loads(FULL)


def errors_of(mutate: Callable[[dict[str, Any]], None]) -> list[tuple[tuple[Any, ...], str]]:
    data = full()
    mutate(data)
    with pytest.raises(ValidationError) as info:
        Protocol.model_validate(data)
    return [(tuple(e["loc"]), e["msg"]) for e in info.value.errors()]


def test_full_protocol_validates_with_derived_facts() -> None:
    protocol = Protocol.model_validate(full())
    assert protocol.duration_s == 16 * 86400
    assert protocol.phase_spans()[1] == ("exposure", 3 * 86400, 16 * 86400)
    assert protocol.chambers()["C5"] == "ambient"
    assert protocol.groups["ambient"].role is GroupRole.CONTROL
    assert protocol.resolve_time("exposure+2d") == 5 * 86400
    assert protocol.events[1].offset == 5 * 86400


def test_models_are_frozen() -> None:
    protocol = Protocol.model_validate(full())
    with pytest.raises(ValidationError):
        protocol.title = "changed"  # type: ignore[misc]


def test_dump_and_reload_round_trip() -> None:
    protocol = Protocol.model_validate(full())
    dumped = protocol.model_dump(mode="json", by_alias=True, exclude_none=True)
    assert dumped["phases"][0]["duration"] == "3d"
    assert Protocol.model_validate(dumped) == protocol


def test_json_schema_describes_fields_with_units() -> None:
    schema = Protocol.model_json_schema()
    text = json.dumps(schema, ensure_ascii=False)
    assert "°C" in text and "cm s-1" in text and "µmol photons m-2 s-1" in text
    storm = schema["$defs"]["StormEvent"]["properties"]
    assert "m-1" in storm["kd_rise_per_m"]["description"]
    assert schema["$defs"]["Phase"]["properties"]["duration"]["type"] == "string"


def _flow_only_later(d: dict[str, Any]) -> None:
    del d["phases"][0]["programs"]["flow"]
    d["phases"][1]["programs"] = {"flow": [{"kind": "hold", "value": 3.0}]}


def _sun_without_site(d: dict[str, Any]) -> None:
    del d["site"]
    del d["events"][1]
    d["phases"][0]["programs"]["light"] = [{"kind": "daylight", "source": "sun", "peak": 500.0}]


# Each case: a change to the full file, the path the error must point at, words of the message.
BAD_CASES: list[tuple[str, Callable[[dict[str, Any]], None], tuple[Any, ...], str]] = [
    (
        "ramp with two speeds",
        lambda d: d["phases"][1]["groups"]["warmed"]["temperature"][0].update(duration="3d"),
        ("phases", 1, "groups", "warmed", "temperature", 0, "duration"),
        "only one of rate_per_h",
    ),
    (
        "ramp without speed",
        lambda d: d["phases"][1]["groups"]["warmed"]["temperature"][0].pop("rate_per_h"),
        ("phases", 1, "groups", "warmed", "temperature", 0),
        "needs one of rate_per_h",
    ),
    (
        "typo in a key",
        lambda d: d["phases"][1]["groups"]["warmed"]["temperature"].__setitem__(
            0, {"kind": "ramp", "to": 22.0, "rate_per_hr": 0.05}
        ),
        ("phases", 1, "groups", "warmed", "temperature", 0, "rate_per_hr"),
        "did you mean 'rate_per_h'",
    ),
    (
        "temperature too hot",
        lambda d: d["phases"][1]["groups"]["warmed"]["temperature"][1].update(value=45.0),
        ("phases", 1, "groups", "warmed", "temperature", 1, "value"),
        "outside -2..40",
    ),
    (
        "negative PAR",
        lambda d: d["phases"][0]["programs"].update(light=[{"kind": "hold", "value": -5.0}]),
        ("phases", 0, "programs", "light", 0, "value"),
        "outside 0..5000",
    ),
    (
        "negative flow",
        lambda d: d["phases"][0]["programs"]["flow"][0].update(value=-1.0),
        ("phases", 0, "programs", "flow", 0, "value"),
        "outside 0..200",
    ),
    (
        "daily cycle swinging below freezing range",
        lambda d: d["phases"][0]["programs"]["temperature"][0].update(amplitude_c=21.0),
        ("phases", 0, "programs", "temperature", 0, "mean_c"),
        "swings over",
    ),
    (
        "daily-cycle for light",
        lambda d: d["phases"][0]["programs"]["light"][0].update(kind="daily-cycle"),
        ("phases", 0, "programs", "light", 0, "kind"),
        "light uses 'daylight'",
    ),
    (
        "unknown block kind",
        lambda d: d["phases"][0]["programs"]["flow"][0].update(kind="pulse"),
        ("phases", 0, "programs", "flow", 0, "kind"),
        "unknown block kind 'pulse'",
    ),
    (
        "zero phase duration",
        lambda d: d["phases"][0].update(duration="0d"),
        ("phases", 0, "duration"),
        "longer than zero",
    ),
    (
        "ambiguous minutes",
        lambda d: d["phases"][0].update(duration="30m"),
        ("phases", 0, "duration"),
        "ambiguous",
    ),
    (
        "phase name twice",
        lambda d: d["phases"][1].update(name="acclimation"),
        ("phases", 1, "name"),
        "used twice",
    ),
    (
        "chamber in two groups",
        lambda d: d["groups"]["ambient"]["chambers"].append("C2"),
        ("groups", "ambient", "chambers", 3),
        "already in group 'warmed'",
    ),
    (
        "event names a missing group",
        lambda d: d["events"][0]["groups"].append("heated"),
        ("events", 0, "groups", 1),
        "no group 'heated'",
    ),
    (
        "phase overrides a missing group",
        lambda d: d["phases"][1]["groups"].update(hot={"flow": [{"kind": "hold", "value": 1}]}),
        ("phases", 1, "groups", "hot"),
        "no group 'hot'",
    ),
    (
        "event starts at an unknown phase",
        lambda d: d["events"][1].update(starts="exposed"),
        ("events", 1, "starts"),
        "neither a phase",
    ),
    (
        "event starts after the end",
        lambda d: d["events"][1].update(offset="20d"),
        ("events", 1, "offset"),
        "after the end",
    ),
    (
        "sampling past the end",
        lambda d: d["sampling"][0].update(at="exposure+30d"),
        ("sampling", 0, "at"),
        "past the end",
    ),
    (
        "both category and peak anomaly",
        lambda d: d["events"][0].update(peak_anomaly_c=3.0),
        ("events", 0, "peak_anomaly_c"),
        "only one of category or peak_anomaly_c",
    ),
    (
        "two baselines",
        lambda d: d["events"][0].update(climatology="clim.csv"),
        ("events", 0, "climatology"),
        "only one of baseline_c, climatology or series",
    ),
    (
        "no baseline",
        lambda d: [d["events"][0].pop(k) for k in ("baseline_c", "threshold_c")],
        ("events", 0),
        "needs one of baseline_c, climatology or series",
    ),
    (
        "category without threshold",
        lambda d: d["events"][0].pop("threshold_c"),
        ("events", 0, "category"),
        "needs threshold_c",
    ),
    (
        "threshold below baseline for a heatwave",
        lambda d: d["events"][0].update(threshold_c=17.0),
        ("events", 0, "threshold_c"),
        "must be above baseline_c",
    ),
    (
        "unknown event kind",
        lambda d: d["events"][0].update(kind="drought"),
        ("events", 0, "kind"),
        "unknown kind 'drought'",
    ),
    (
        "event without kind",
        lambda d: d["events"][0].pop("kind"),
        ("events", 0, "kind"),
        "required",
    ),
    (
        "storm pulses half given",
        lambda d: d["events"][1].pop("pulse_every"),
        ("events", 1, "flow_peak_cm_s"),
        "missing pulse_every",
    ),
    (
        "storm shorter than ramps",
        lambda d: d["events"][1].update(ramp="2d"),
        ("events", 1, "ramp"),
        "shorter than its two ramps",
    ),
    (
        "storm shading without depth",
        lambda d: d["site"].pop("depth_m"),
        ("events", 1, "kd_rise_per_m"),
        "site.depth_m",
    ),
    (
        "gustiness above one",
        lambda d: d["events"][1].update(gustiness=1.5),
        ("events", 1, "gustiness"),
        "less than or equal to 1",
    ),
    (
        "bad utc offset",
        lambda d: d.update(utc_offset="2h"),
        ("utc_offset",),
        "not a UTC offset",
    ),
    (
        "wrong format string",
        lambda d: d.update(format="squall-protocol/9"),
        ("format",),
        "squall-protocol/1",
    ),
    (
        "latitude out of range",
        lambda d: d["site"].update(latitude_deg=95.0),
        ("site", "latitude_deg"),
        "less than or equal to 90",
    ),
    (
        "sunset before sunrise",
        lambda d: d["phases"][0]["programs"]["light"][0].update(sunset="05:00"),
        ("phases", 0, "programs", "light", 0, "sunset"),
        "must come before sunset",
    ),
    (
        "daylight with peak and dli",
        lambda d: d["phases"][0]["programs"]["light"][0].update(dli_mol_m2_d=20.0),
        ("phases", 0, "programs", "light", 0, "dli_mol_m2_d"),
        "only one of peak or dli_mol_m2_d",
    ),
    (
        "middle block without duration",
        lambda d: d["phases"][1]["groups"]["warmed"]["temperature"][1].pop("duration"),
        ("phases", 1, "groups", "warmed", "temperature", 1, "duration"),
        "needs a duration",
    ),
    (
        "variable appears only in a later phase",
        lambda d: _flow_only_later(d),
        ("phases", 1, "programs", "flow"),
        "missing from the first phase",
    ),
    (
        "first block a ramp",
        lambda d: d["phases"][0]["programs"].update(
            flow=[{"kind": "ramp", "to": 3, "duration": "1d"}]
        ),
        ("phases", 0, "programs", "flow", 0),
        "starts with a ramp",
    ),
    (
        "sun daylight without site",
        lambda d: _sun_without_site(d),
        ("phases", 0, "programs", "light", 0, "source"),
        "needs a [site]",
    ),
    (
        "block inside a repeat without duration",
        lambda d: d["phases"][0]["programs"].update(
            flow=[{"kind": "repeat", "times": 3, "blocks": [{"kind": "hold", "value": 2.0}]}]
        ),
        ("phases", 0, "programs", "flow", 0, "blocks", 0, "duration"),
        "inside a repeat needs a duration",
    ),
    (
        "phase name that reads as a time",
        lambda d: d["phases"][0].update(name="3d") or d["events"][0].update(starts="4d"),
        ("phases", 0, "name"),
        "could be read as a time",
    ),
    (
        "repeat of instant steps only",
        lambda d: d["phases"][0]["programs"].update(
            flow=[{"kind": "repeat", "times": 2, "blocks": [{"kind": "step", "to": 2.0}]}]
        ),
        ("phases", 0, "programs", "flow", 0, "blocks"),
        "at least one block that takes time",
    ),
    (
        "duration written as a bare number",
        lambda d: d["phases"][0].update(duration=3),
        ("phases", 0, "duration"),
        "needs a unit",
    ),
    (
        "cold spell threshold above baseline",
        lambda d: d["events"][0].update(kind="cold-spell", threshold_c=20.0),
        ("events", 0, "threshold_c"),
        "must be below baseline_c",
    ),
    (
        "heatwave with a negative peak anomaly",
        lambda d: (
            [d["events"][0].pop(k) for k in ("category", "threshold_c")]
            and d["events"][0].update(peak_anomaly_c=-2.0)
        ),
        ("events", 0, "peak_anomaly_c"),
        "must be positive",
    ),
]


@pytest.mark.parametrize(
    ("mutate", "loc", "words"),
    [case[1:] for case in BAD_CASES],
    ids=[case[0] for case in BAD_CASES],
)
def test_bad_protocols_point_at_the_field(
    mutate: Callable[[dict[str, Any]], None], loc: tuple[Any, ...], words: str
) -> None:
    found = errors_of(mutate)
    assert any(where == loc and words in m for where, m in found), found


def test_cold_spell_accepts_negative_or_positive_magnitude() -> None:
    for size in (-2.5, 2.5):
        data = full()
        event = data["events"][0]
        event.update(kind="cold-spell", peak_anomaly_c=size)
        del event["category"], event["threshold_c"]
        assert Protocol.model_validate(data).events[0].peak_anomaly_c == size


def test_begins_accepts_a_zoned_datetime_but_not_a_naive_one() -> None:
    data = full()
    data["begins"] = "2027-06-01T08:00:00+02:00"
    assert Protocol.model_validate(data).begins.utcoffset().total_seconds() == 7200  # type: ignore[union-attr]
    data["begins"] = "2027-06-01T08:00:00"
    with pytest.raises(ValidationError) as info:
        Protocol.model_validate(data)
    assert info.value.errors()[0]["loc"][0] == "begins"


def test_input_is_not_modified_by_validation() -> None:
    data = full()
    before = copy.deepcopy(data)
    Protocol.model_validate(data)
    assert data == before
