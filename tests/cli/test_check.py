"""``squall check``: summary on good input; one located line and exit 2 on bad input."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pytest

from controller.cli import main
from controller.cli.cmd_check import load_protocol, parse_start, resolve_start
from controller.errors import SquallError

REPO = Path(__file__).resolve().parents[2]
HEATWAVE = REPO / "protocols" / "strong-heatwave.toml"
STORM = REPO / "protocols" / "storm.toml"
RIG = REPO / "rigs" / "saltmarrow-rack8.toml"


def _copy(tmp_path: Path, source: Path, edit: tuple[str, str] | None = None) -> Path:
    """Copy a protocol (and its data folder) to tmp_path, applying one text replacement."""
    text = source.read_text(encoding="utf-8")
    if edit is not None:
        assert edit[0] in text, edit[0]
        text = text.replace(edit[0], edit[1], 1)
    data = tmp_path / "data"
    data.mkdir(exist_ok=True)
    series = source.parent / "data" / "saltmarrow-sst.csv"
    (data / series.name).write_bytes(series.read_bytes())
    target = tmp_path / source.name
    target.write_text(text, encoding="utf-8")
    return target


def test_summary_names_groups_phases_events_and_metrics(
    capsys: pytest.CaptureFixture[str],
) -> None:
    assert main(["check", str(HEATWAVE)]) == 0
    out = capsys.readouterr().out
    for expected in (
        "Strong marine heatwave on eelgrass cores",
        "8 chambers · 3 phases · 1 event · total 28d",
        "Start 2027-07-10 00:00 local (UTC+01:00)",
        "ambient",
        "C1–C4",
        "C5–C8",
        "acclimation",
        "+22d",
        "strong heatwave",
        "DHD",
        "OK: the protocol is valid and compiles.",
    ):
        assert expected in out, expected


def test_summary_numbers_match_the_compiled_protocol(
    capsys: pytest.CaptureFixture[str],
) -> None:
    from controller.cli.cmd_check import compile_loaded
    from controller.protocol import summarize

    loaded = load_protocol(HEATWAVE)
    compiled = compile_loaded(loaded, resolve_start(loaded.protocol, None)[0])
    summary = summarize(compiled)
    assert main(["check", str(HEATWAVE)]) == 0
    out = capsys.readouterr().out
    treated = summary["C5"]
    assert f"{treated.peak_temperature_c:.1f}" in out
    assert f"{treated.degree_heating_days:.1f}" in out
    assert treated.degree_heating_days > 10  # a strong heatwave heats well above the controls
    assert summary["C1"].degree_heating_days == 0.0


def test_check_with_rig_reports_no_findings(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(STORM), "--rig", str(RIG)]) == 0
    assert "OK: no findings against rig 'Saltmarrow Lagoon rack 8'" in capsys.readouterr().out


def test_rig_error_findings_exit_2_with_located_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = _copy(tmp_path, STORM, ("flow_peak_cm_s = 20.0", "flow_peak_cm_s = 60.0"))
    assert main(["check", str(path), "--rig", str(RIG)]) == 2
    captured = capsys.readouterr()
    assert "Findings against rig" in captured.out
    assert "error [C5]" in captured.out
    err = captured.err.strip()
    assert err.count("\n") == 0
    assert err.startswith(f"squall: error: {path}:")
    assert "refused by rig 'Saltmarrow Lagoon rack 8'" in err
    line = int(err.split(":")[3])
    assert path.read_text(encoding="utf-8").splitlines()[line - 1].startswith("[[events]]")


def test_bath_shared_by_two_temperature_programs_is_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # C4 moves into the storm group, whose water cools: C1-C4 share one bath in the rig.
    path = _copy(
        tmp_path, STORM, ('chambers = ["C1", "C2", "C3", "C4"]', 'chambers = ["C1", "C2", "C3"]')
    )
    path.write_text(
        path.read_text(encoding="utf-8").replace(
            'chambers = ["C5", "C6", "C7", "C8"]', 'chambers = ["C4", "C5", "C6", "C7", "C8"]'
        ),
        encoding="utf-8",
    )
    assert main(["check", str(path), "--rig", str(RIG)]) == 2
    out = capsys.readouterr().out
    assert "share bath" in out


# name: ((old, new) text edit, text marking the line to blame, expected "field: message")
BAD_EDITS = {
    "enum": (
        ('category = "strong"', 'category = "strnog"'),
        "strnog",
        "events.0.category: Input should be 'moderate', 'strong', 'severe' or 'extreme' "
        "(got 'strnog'); did you mean 'strong'?",
    ),
    "duration": (
        ('peak_duration = "7d"', 'peak_duration = "7 parsecs"'),
        "parsecs",
        "events.0.peak_duration: duration '7 parsecs': unknown unit 'parsecs'",
    ),
    "unknown-key": (
        ('[[phases]]\nname = "recovery"', '[[phases]]\nnme = "recovery"'),
        "nme =",
        "phases.2.nme: unknown key 'nme'; did you mean 'name'?",
    ),
    "negative-flow": (
        ("value = 4.0", "value = -4.0"),
        "value = -4.0",
        "phases.0.programs.flow.0.value: ",
    ),
    "negative-duration": (
        ('duration = "18d"', 'duration = "-18d"'),
        '"-18d"',
        "phases.1.duration: ",
    ),
    "missing-csv": (
        ('series = "data/saltmarrow-sst.csv"\nbaseline', 'series = "data/absent.csv"\nbaseline'),
        "absent.csv",
        "events.0.series: cannot read the file",
    ),
}


@pytest.mark.parametrize(("edit", "marker", "expected"), BAD_EDITS.values(), ids=BAD_EDITS.keys())
def test_bad_protocol_is_one_located_line(
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    edit: tuple[str, str],
    marker: str,
    expected: str,
) -> None:
    path = _copy(tmp_path, HEATWAVE, edit)
    lines = path.read_text(encoding="utf-8").splitlines()
    line = next(k for k, text in enumerate(lines, start=1) if marker in text)
    assert main(["check", str(path)]) == 2
    captured = capsys.readouterr()
    assert captured.out == ""
    err = captured.err
    assert err.startswith(f"squall: error: {path}:{line}: {expected}"), err
    assert err.count("\n") == 1


def test_missing_protocol_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    absent = tmp_path / "absent.toml"
    assert main(["check", str(absent)]) == 2
    assert capsys.readouterr().err == f"squall: error: {absent}: file not found\n"


def test_bad_rig_file_is_located_in_the_rig(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rig = tmp_path / "rig.toml"
    rig.write_text(
        'name = "r"\n\n[[chambers]]\nid = "C1"\nwater_volume_l = -3\nsediment_area_m2 = 0.1\n',
        "utf-8",
    )
    assert main(["check", str(HEATWAVE), "--rig", str(rig)]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"squall: error: {rig}:5: chambers.0.water_volume_l: ")


def test_start_option(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(HEATWAVE), "--start", "2027-06-01T08:00:00+02:00"]) == 0
    assert "Start 2027-06-01 07:00 local (UTC+01:00); --start" in capsys.readouterr().out


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("tomorrow", "--start: 'tomorrow' is not an ISO 8601 date-time"),
        ("2027-06-01T08:00:00", "--start: '2027-06-01T08:00:00' has no zone"),
    ],
)
def test_bad_start_is_refused(text: str, message: str, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(HEATWAVE), "--start", text]) == 2
    assert capsys.readouterr().err.startswith(f"squall: error: {message}")


def test_resolve_start_prefers_option_then_begins_then_reference_date() -> None:
    protocol = load_protocol(HEATWAVE).protocol
    explicit = datetime(2030, 1, 1, tzinfo=UTC)
    assert resolve_start(protocol, explicit) == (explicit, "--start")
    start, why = resolve_start(protocol, None)
    assert start == datetime(2027, 7, 9, 23, 0, tzinfo=UTC)  # local midnight at UTC+01:00
    assert "reference_date" in why
    begins = protocol.model_copy(update={"begins": datetime(2031, 5, 5, 6, tzinfo=UTC)})
    assert resolve_start(begins, None)[0] == datetime(2031, 5, 5, 6, tzinfo=UTC)


def test_parse_start_accepts_z_suffix() -> None:
    assert parse_start("2027-07-01T00:00:00Z") == datetime(2027, 7, 1, tzinfo=UTC)
    assert parse_start(None) is None
    with pytest.raises(SquallError):
        parse_start("")


@pytest.mark.parametrize(
    "argv",
    [
        ["check"],
        ["check", str(HEATWAVE), "--frobnicate"],
        ["check", str(HEATWAVE), "--rig"],
        ["check", str(HEATWAVE), "extra.toml"],
        ["check", ""],
        ["chekc", str(HEATWAVE)],
    ],
)
def test_bad_arguments_exit_2_with_one_line(
    argv: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(argv) == 2
    captured = capsys.readouterr()
    assert captured.err.startswith("squall: error: ")
    assert captured.err.count("\n") == 1


def test_real_process_prints_one_line_and_exits_2(tmp_path: Path) -> None:
    import subprocess
    import sys

    path = _copy(tmp_path, HEATWAVE, ("title = ", "titel = "))
    result = subprocess.run(
        [sys.executable, "-m", "controller", "check", str(path)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert result.returncode == 2
    assert result.stdout == ""
    assert result.stderr == (
        f"squall: error: {path}:3: titel: unknown key 'titel'; did you mean 'title'?\n"
    )
