"""``squall schedule``: what people type and see, and one clear line when something is wrong
(with the store left exactly as it was)."""

from __future__ import annotations

from pathlib import Path

import pytest

from controller.cli import main
from controller.schedule import ExperimentState, ScheduleStore

from ._helpers import Group, dump, write_protocol, write_rig


@pytest.fixture
def setup(tmp_path: Path) -> dict[str, Path]:
    return {
        "rig": write_rig(tmp_path),
        "day": write_protocol(tmp_path, "day.toml", title="A day on S1 and S2"),
        "bath": write_protocol(tmp_path, "bath.toml", groups={"b": Group(["B1", "B2"])}),
        "store": tmp_path / "runs" / "schedule.sqlite",
    }


def run(argv: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(argv)
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def add_argv(setup: dict[str, Path], which: str = "day", start: str = "2027-07-10T08:00+02:00",
             owner: str = "Ana") -> list[str]:  # fmt: skip
    return ["schedule", "add", str(setup[which]), "--rig", str(setup["rig"]), "--start", start,
            "--owner", owner, "--schedule", str(setup["store"])]  # fmt: skip


def refused(argv: list[str], setup: dict[str, Path], capsys: pytest.CaptureFixture[str]) -> str:
    """Run a command that must fail with exit 2, one stderr line and the store unchanged."""
    before = dump(setup["store"])
    code, _, err = run(argv, capsys)
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("squall: error: "), err
    assert "Traceback" not in err
    assert dump(setup["store"]) == before
    return lines[0].removeprefix("squall: error: ")


def test_add_list_show_move_cancel(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run([*add_argv(setup), "--note", "pilot run"], capsys)
    assert code == 0
    assert out.startswith("Added E0001 'A day on S1 and S2' (Ana), chambers S1, S2 of rig")
    assert "from 2027-07-10T06:00Z (local 2027-07-10T07:00+01:00)" in out
    code, out, _ = run(["schedule", "list", "--schedule", str(setup["store"])], capsys)
    assert code == 0
    assert "E0001" in out and "planned" in out and "2027-07-10 06:00" in out
    assert "07:00+0100" in out and "A day on S1 and S2" in out
    code, out, _ = run(["schedule", "move", "e1", "--start", "2027-07-12T00:00Z",
                        "--schedule", str(setup["store"])], capsys)  # fmt: skip
    assert code == 0 and out.startswith("Moved E0001")
    code, out, _ = run(["schedule", "cancel", "E0001", "--reason", "storm forecast",
                        "--schedule", str(setup["store"])], capsys)  # fmt: skip
    assert code == 0 and out.startswith("Cancelled E0001") and "cancelled" in out
    code, out, _ = run(["schedule", "list", "--schedule", str(setup["store"])], capsys)
    assert "No live experiments" in out
    code, out, _ = run(["schedule", "list", "--all", "--schedule", str(setup["store"])], capsys)
    assert "cancelled" in out
    code, out, _ = run(["schedule", "show", "1", "--schedule", str(setup["store"])], capsys)
    assert code == 0
    for needle in (
        "E0001: A day on S1 and S2",
        "pilot run",
        "History",
        "added",
        "moved from 2027-07-10T06:00Z",
        "storm forecast",
        "planned",
        "cancelled",
    ):
        assert needle in out, needle  # fmt: skip


def test_check_lists_every_conflict_and_changes_nothing(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    hot = write_protocol(
        tmp_path, "hot.toml",
        groups={"a": Group(["S1"], temperature='{ kind = "hold", value = 38.0 }',
                           light='{ kind = "hold", value = 1500.0 }')},
    )  # fmt: skip
    before = dump(setup["store"])
    argv = ["schedule", "check", str(hot), "--rig", str(setup["rig"]), "--start",
            "2027-07-10T12:00Z", "--schedule", str(setup["store"])]  # fmt: skip
    code, out, err = run(argv, capsys)
    assert code == 2
    assert "3 conflict(s)" in out
    assert "chamber-booked: chamber S1 is booked by E0001" in out
    assert "chamber-limits [phases.0.groups.a.temperature.0, line" in out
    assert "PAR setpoint reaches 1500" in out
    assert err.strip().count("\n") == 0
    assert "(and 2 more; 'squall schedule check' lists them all)" in err
    assert dump(setup["store"]) == before


def test_check_of_a_fitting_experiment_shows_the_peak_loads(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run(["schedule", "check", str(setup["day"]), "--rig", str(setup["rig"]),
                        "--start", "2027-07-10T08:00+02:00", "--schedule",
                        str(setup["store"])], capsys)  # fmt: skip
    assert code == 0
    assert out.startswith("OK: 'A day on S1 and S2' fits on rig 'Test rack'")
    assert "chiller 'cold-loop': peak 0 W of 500 W" in out
    assert not setup["store"].exists()  # a dry run creates no store


def test_overlaps_are_refused_with_what_collides_and_when(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    line = refused(add_argv(setup, "bath", "2027-07-10T20:00Z", "Bo"), setup, capsys)
    assert line == (
        f"{setup['bath'].resolve()}: refused: rig 'Test rack' is busy with E0001 'A day on S1 "
        "and S2' (Ana) from 2027-07-10T06:00Z (local 2027-07-10T07:00+01:00) to "
        "2027-07-11T06:00Z (local 2027-07-11T07:00+01:00) (chambers S1, S2); serve runs one "
        "experiment per rig at a time — put both treatments in one protocol"
    )


def test_an_unknown_chamber_points_at_its_line(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str], tmp_path: Path
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    setup["odd"] = write_protocol(tmp_path, "odd.toml", groups={"a": Group(["S1", "C42"])})
    line = refused(add_argv(setup, "odd", "2027-08-01T00:00Z"), setup, capsys)
    number = next(
        i for i, text in enumerate(setup["odd"].read_text().splitlines(), 1) if "C42" in text
    )
    assert line == (
        f"{setup['odd'].resolve()}:{number}: groups.a.chambers.1: refused: chamber 'C42' is "
        "not in rig 'Test rack' (it has B1, B2, S1, S2)"
    )


@pytest.mark.parametrize(
    ("start", "message"),
    [
        ("2027-07-10T08:00", "--start: '2027-07-10T08:00' has no zone; add one"),
        ("2027-07-10", "--start: '2027-07-10' has no zone"),
        ("tomorrow at 8", "--start: 'tomorrow at 8' is not an ISO 8601 date-time"),
        ("2027-13-40T08:00Z", "is not an ISO 8601 date-time"),
        ("1970-01-01T00:00Z", "--start: 1970-01-01T00:00:00+00:00 is outside the years"),
    ],
)
def test_malformed_times_are_refused(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str], start: str, message: str
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    assert message in refused(add_argv(setup, start=start), setup, capsys)


@pytest.mark.parametrize(
    "argv",
    [
        ["show", "E0042"],
        ["move", "E42", "--start", "2027-09-01T00:00Z"],
        ["cancel", "x; DROP TABLE experiments", "--reason", "oops"],
    ],
    ids=["show", "move", "cancel"],
)
def test_unknown_ids_are_refused(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str], argv: list[str]
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    line = refused(["schedule", *argv, "--schedule", str(setup["store"])], setup, capsys)
    assert line.startswith(f"{setup['store']}: no experiment ")
    assert "ids look like E0001" in line


def test_empty_owner_and_reason_are_refused(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    assert run(add_argv(setup), capsys)[0] == 0
    assert refused(add_argv(setup, owner=" "), setup, capsys) == "--owner: must not be empty"
    line = refused(["schedule", "cancel", "E0001", "--reason", "",
                    "--schedule", str(setup["store"])], setup, capsys)  # fmt: skip
    assert line == "--reason: must not be empty"


def test_reading_commands_do_not_create_the_store(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run(["schedule", "list", "--schedule", str(setup["store"])], capsys)
    assert code == 0 and "does not exist yet" in out
    assert run(["schedule", "show", "E0001", "--schedule", str(setup["store"])], capsys)[0] == 2
    assert not setup["store"].exists()


def test_the_default_store_is_runs_schedule_sqlite(
    setup: dict[str, Path], capsys: pytest.CaptureFixture[str], tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:  # fmt: skip
    monkeypatch.chdir(tmp_path)
    argv = add_argv(setup)[:-2]
    assert run(argv, capsys)[0] == 0
    with ScheduleStore(tmp_path / "runs" / "schedule.sqlite") as store:
        assert [e.state for e in store.experiments()] == [ExperimentState.PLANNED]


def test_every_subcommand_has_help(capsys: pytest.CaptureFixture[str]) -> None:
    for action in ("add", "list", "show", "move", "cancel", "check", "suggest"):
        with pytest.raises(SystemExit) as done:
            main(["schedule", action, "--help"])
        assert done.value.code == 0
        assert "--schedule FILE" in capsys.readouterr().out
