"""The earliest feasible start: after what is booked, in gaps long enough, and a plain "no"
for protocols that fail whenever they run."""

from __future__ import annotations

from datetime import datetime, timedelta
from pathlib import Path

import pytest

from controller.cli import main
from controller.cli.cmd_check import compile_loaded, load_protocol
from controller.schedule import (
    Booking,
    ConflictKind,
    ScheduleStore,
    Suggestion,
    suggest_start,
)

from ._helpers import START, Group, dump, rig, write_protocol, write_rig

DAY = timedelta(days=1)


def live(start: datetime, length: timedelta, number: int, chambers: tuple[str, ...]) -> Booking:
    return Booking(f"E{number:04d} 'x' (y)", f"E{number:04d}", chambers, start, start + length)


def suggest(tmp_path: Path, protocol: Path, bookings: list[Booking], after: datetime) -> Suggestion:
    loaded = load_protocol(protocol)
    first = compile_loaded(loaded, after)
    return suggest_start(
        rig=rig(write_rig(tmp_path)),
        chambers=first.chambers,
        duration_s=first.duration_s,
        live=bookings,
        after_utc=after,
        compile_at=lambda start: compile_loaded(loaded, start),
    )


def test_an_empty_rig_takes_the_experiment_at_once(tmp_path: Path) -> None:
    found = suggest(tmp_path, write_protocol(tmp_path), [], START)
    assert (found.start_utc, found.end_utc, found.tried) == (START, START + DAY, 1)
    assert found.conflicts == () and not found.regardless_of_time
    assert {p.name for p in found.peaks} == {"chiller 'cold-loop'", "the lamp circuit"}


def test_the_suggestion_follows_the_experiment_that_holds_the_rig(tmp_path: Path) -> None:
    booked = [live(START, DAY, 1, ("B1", "B2"))]
    found = suggest(tmp_path, write_protocol(tmp_path), booked, START + timedelta(hours=2))
    assert found.start_utc == START + DAY


@pytest.mark.parametrize(
    ("duration", "expected"),
    [("6h", START + DAY), ("1d", START + 2 * DAY + timedelta(hours=12))],
)
def test_a_gap_is_used_only_when_it_is_long_enough(
    tmp_path: Path, duration: str, expected: datetime
) -> None:
    booked = [
        live(START + DAY + timedelta(hours=12), DAY, 2, ("S1",)),
        live(START, DAY, 1, ("S2",)),
    ]
    protocol = write_protocol(tmp_path, duration=duration)
    found = suggest(tmp_path, protocol, booked, START)
    assert found.start_utc == expected


def test_a_protocol_beyond_the_chambers_limits_fails_at_any_start(tmp_path: Path) -> None:
    protocol = write_protocol(
        tmp_path, groups={"a": Group(["S1"], temperature='{ kind = "hold", value = 38.0 }')}
    )
    found = suggest(tmp_path, protocol, [live(START, DAY, 1, ("S1",))], START)
    assert found.start_utc is None and found.regardless_of_time
    assert found.conflicts[0].kind is ConflictKind.CHAMBER_LIMITS
    assert found.tried == 1


def test_a_latest_start_bounds_the_search(tmp_path: Path) -> None:
    loaded = load_protocol(write_protocol(tmp_path))
    found = suggest_start(
        rig=rig(write_rig(tmp_path)),
        chambers=("S1", "S2"),
        duration_s=86400.0,
        live=[live(START, DAY, 1, ("S1",))],
        after_utc=START,
        compile_at=lambda start: compile_loaded(loaded, start),
        latest_utc=START + timedelta(hours=12),
    )
    assert found.start_utc is None and found.conflicts == () and found.tried == 0


def test_squall_schedule_suggest_proposes_the_first_free_start(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig_path, protocol = write_rig(tmp_path), write_protocol(tmp_path)
    store = tmp_path / "s.sqlite"
    with ScheduleStore(store) as opened:
        opened.add(rig_path=rig_path, protocol_path=protocol, start_utc=START, owner="Ana")
    before = dump(store)
    argv = ["schedule", "suggest", str(protocol), "--rig", str(rig_path),
            "--after", "2027-07-10T10:00+02:00", "--schedule", str(store)]  # fmt: skip
    assert main(argv) == 0
    out = capsys.readouterr().out
    assert "2027-07-11T06:00Z (local 2027-07-11T07:00+01:00)" in out
    assert "--start 2027-07-11T06:00Z" in out
    assert dump(store) == before


def test_squall_schedule_suggest_says_when_no_start_can_help(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol = write_protocol(
        tmp_path, groups={"a": Group(["S1"], light='{ kind = "hold", value = 2000.0 }')}
    )
    argv = ["schedule", "suggest", str(protocol), "--rig", str(write_rig(tmp_path)),
            "--schedule", str(tmp_path / "none.sqlite")]  # fmt: skip
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0
    assert "fails at any start: chamber S1: PAR setpoint reaches 2000" in err
    assert not (tmp_path / "none.sqlite").exists()
