"""``squall run``: a shortened example protocol on the example rig with --sim --speed max,
and the one-line refusals."""

from __future__ import annotations

import gc
import re
from datetime import UTC, datetime
from pathlib import Path

import pytest
from rich.console import Console

from controller.cli import main
from controller.cli.cmd_run import DEFAULT_PERIOD_S, _Bar, parse_speed
from controller.errors import SquallError
from controller.protocol import format_duration
from controller.runtime import RunSettings, TickStatus
from controller.storage import RunEndReason, RunLogReader

START = "2027-08-20T04:00:00+00:00"


def shortened_storm(repo_root: Path, folder: Path, hours: int = 2) -> Path:
    """The storm example cut to its acclimation phase, ``hours`` long."""
    text = (repo_root / "protocols" / "storm.toml").read_text(encoding="utf-8")
    head, first, _rest = text.partition("\n[[phases]]")
    phase, _, _ = _rest.partition("\n[[phases]]")
    phase = re.sub(r'duration = "3d"', f'duration = "{hours}h"', phase, count=1)
    assert f'duration = "{hours}h"' in phase, "the storm example changed: adapt this test"
    path = folder / "storm-short.toml"
    path.write_text(head + first + phase, encoding="utf-8")
    return path


def test_squall_run_sim_speed_max_writes_a_finished_readable_log(
    repo_root: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol = shortened_storm(repo_root, tmp_path)
    log = tmp_path / "storm.sqlite"
    rig = repo_root / "rigs" / "saltmarrow-rack8.toml"
    args = ["run", str(protocol), "--rig", str(rig), "--sim", "--speed", "max"]
    code = main([*args, "--log", str(log), "--start", START])
    out = capsys.readouterr()
    assert code == 0, out.err
    assert out.out.strip().splitlines()[-1] == f"log: {log}"
    with RunLogReader(log) as reader:
        info = reader.info()
        samples = reader.samples()
    assert info.end is not None and info.end.end_reason is RunEndReason.COMPLETED
    assert info.samples == 8 * 2 * 3600 // 10  # 8 chambers, one row per 10 s tick for 2 h
    assert set(samples.chamber) == {f"C{i}" for i in range(1, 9)}
    assert samples.time.iloc[0].isoformat() == START
    # a second run must not overwrite the first one's log
    code = main([*args, "--log", str(log), "--start", START])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert "refusing to overwrite" in err and str(log) in err


def test_without_sim_a_rig_without_an_io_table_is_refused_before_anything_is_written(
    repo_root: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol = shortened_storm(repo_root, tmp_path)
    rig = repo_root / "rigs" / "saltmarrow-rack8.toml"
    code = main(["run", str(protocol), "--rig", str(rig), "--log", str(tmp_path / "x.sqlite")])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert f"{rig}" in err and "io: the rig has no [io] table" in err
    assert not (tmp_path / "x.sqlite").exists()
    assert not rig.with_name(rig.name + ".lock").exists()  # refused before locking the rig


def test_a_bad_protocol_is_one_located_line_and_no_log(
    repo_root: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    protocol = shortened_storm(repo_root, tmp_path)
    protocol.write_text(
        protocol.read_text(encoding="utf-8").replace("mean_c = 19.5", "mean_c = 'warm'")
    )
    rig = repo_root / "rigs" / "saltmarrow-rack8.toml"
    log = tmp_path / "bad.sqlite"
    code = main(["run", str(protocol), "--rig", str(rig), "--sim", "--log", str(log)])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1
    assert re.search(rf"{re.escape(str(protocol))}:\d+: ", err)
    assert not log.exists()


@pytest.mark.parametrize(
    ("option", "value", "needle"),
    [("--speed", "fast", "--speed"), ("--speed", "-2", "--speed"), ("--start", "July", "--start")],
)
def test_bad_options_are_one_line(
    repo_root: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    option: str,
    value: str,
    needle: str,
) -> None:
    protocol = shortened_storm(repo_root, tmp_path)
    rig = repo_root / "rigs" / "saltmarrow-rack8.toml"
    code = main(["run", str(protocol), "--rig", str(rig), "--sim", option, value])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and needle in err


def test_speed_is_max_or_a_positive_factor() -> None:
    assert parse_speed("max") is None and parse_speed("MAX") is None
    assert parse_speed("60") == 60.0 and parse_speed("0.5") == 0.5
    for bad in ("0", "-1", "nan", "inf", "quick"):
        with pytest.raises(SquallError):
            parse_speed(bad)


def test_the_default_period_is_the_runtimes() -> None:
    assert DEFAULT_PERIOD_S == RunSettings().period_s


def test_the_progress_bar_shows_phase_simulated_time_and_alarms() -> None:
    console = Console(record=True, force_terminal=True, width=160)
    bar = _Bar(console)
    status = TickStatus(
        tick=360,
        ticks_total=720,
        elapsed_s=3600.0,
        duration_s=7200.0,
        phase="acclimation",
        utc=datetime(2027, 8, 20, 5, 0, tzinfo=UTC),
        alarms={"C6": "sensor-stale"},
    )
    with bar.progress:
        bar(status)
    text = console.export_text()
    assert "acclimation" in text
    assert "2027-08-20 05:00 UTC" in text and f"+{format_duration(3600.0)}" in text
    assert "C6: sensor-stale" in text
    assert "━" in text  # the bar itself


def test_the_progress_bar_skips_ticks_between_redraws_but_never_a_change() -> None:
    console = Console(record=True, force_terminal=True, width=160)
    bar = _Bar(console)
    wall = [100.0]
    bar._monotonic = lambda: wall[0]

    def tick(k: int, phase: str = "acclimation", alarms: dict[str, str] | None = None) -> float:
        bar(
            TickStatus(
                tick=k,
                ticks_total=10,
                elapsed_s=10.0 * k,
                duration_s=100.0,
                phase=phase,
                utc=datetime(2027, 8, 20, 5, 0, tzinfo=UTC),
                alarms=alarms or {},
            )
        )
        assert bar.task is not None
        return bar.progress.tasks[0].completed

    with bar.progress:
        assert tick(0) == 0.0
        assert tick(1) == 0.0  # the same wall-clock instant, nothing new: skipped
        assert tick(2, alarms={"C6": "e-stop"}) == 20.0  # an alarm is shown at once
        assert tick(3, alarms={"C6": "e-stop"}) == 20.0
        assert tick(4, phase="storm", alarms={"C6": "e-stop"}) == 40.0  # so is a new phase
        wall[0] += 2 * bar.every_s
        assert tick(5, phase="storm", alarms={"C6": "e-stop"}) == 50.0  # time to redraw
        assert tick(9, phase="storm", alarms={"C6": "e-stop"}) == 90.0  # the last tick


def test_the_run_keeps_start_up_objects_out_of_the_collector_and_hands_them_back(
    repo_root: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from controller.runtime import SimulatedRun

    protocol = shortened_storm(repo_root, tmp_path, hours=1)
    rig = repo_root / "rigs" / "saltmarrow-rack8.toml"
    frozen_during: list[int] = []
    real_run = SimulatedRun.run

    def run(self: SimulatedRun, *args: object, **kwargs: object) -> object:
        frozen_during.append(gc.get_freeze_count())
        return real_run(self, *args, **kwargs)  # type: ignore[arg-type]

    monkeypatch.setattr(SimulatedRun, "run", run)
    assert gc.get_freeze_count() == 0
    code = main(
        ["run", str(protocol), "--rig", str(rig), "--sim", "--log", str(tmp_path / "f.sqlite")]
    )
    assert code == 0
    # the protocol, plan and modules built before the run: frozen while it runs ...
    assert len(frozen_during) == 1 and frozen_during[0] > 10_000
    assert gc.get_freeze_count() == 0  # ... and collectable again afterwards
