"""``squall analyze``: the files it writes, what they hold, and how it refuses bad input."""

from __future__ import annotations

import contextlib
import csv
import io
import json
import re
from dataclasses import dataclass
from pathlib import Path

import pytest

from controller.analysis import JSON_FORMAT
from controller.cli import main

from .conftest import TruthLog

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@dataclass(frozen=True)
class Outputs:
    code: int
    out: str
    err: str
    folder: Path


@pytest.fixture(scope="module")
def outputs(truth_log: TruthLog, tmp_path_factory: pytest.TempPathFactory) -> Outputs:
    """One full ``squall analyze`` run writing every kind of output."""
    folder = tmp_path_factory.mktemp("analyze")
    argv = [
        "analyze",
        str(truth_log.path),
        "--json",
        str(folder / "result.json"),
        "--csv",
        str(folder / "windows.csv"),
        "--plots",
        str(folder / "figures"),
        "--report",
        str(folder / "report.html"),
        "--settle",
        "4min",
    ]
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    return Outputs(code=code, out=out.getvalue(), err=err.getvalue(), folder=folder)


def test_analyze_succeeds_quietly_and_summarises(outputs: Outputs) -> None:
    assert outputs.code == 0
    assert outputs.err == ""  # no progress bar off a terminal
    assert "80 closed windows (0 flagged)" in outputs.out
    assert re.search(r"ambient: R overtakes GPP at 2\d\.\d °C", outputs.out)
    assert f"wrote {outputs.folder / 'report.html'}" in outputs.out


def test_json_holds_every_table_and_the_provenance(outputs: Outputs, truth_log: TruthLog) -> None:
    doc = json.loads((outputs.folder / "result.json").read_text(encoding="utf-8"))
    assert doc["format"] == JSON_FORMAT
    for key in (
        "run", "analysis", "groups", "chambers", "windows", "pairs", "respiration", "daily",
        "temperature_fits", "crossings", "light_fits", "differences", "quality", "notes",
    ):  # fmt: skip
        assert key in doc
    meta = truth_log.analysis.info.meta
    assert doc["run"]["protocol_sha256"] == meta.protocol_sha256
    assert doc["run"]["rig_name"] == "Saltmarrow test rack"
    assert doc["analysis"]["settings"]["settle_s"] == 240.0
    assert len(doc["windows"]) == 80
    first = doc["windows"][0]
    assert first["start_time"].endswith("Z") and first["flags"] == ""
    assert {g["name"] for g in doc["groups"]} == {"ambient", "treated"}
    assert {c["unit"] for c in doc["crossings"]} >= {"ambient", "treated"}


def test_csv_tables_are_written_beside_the_windows_table(outputs: Outputs) -> None:
    with (outputs.folder / "windows.csv").open(newline="", encoding="utf-8") as handle:
        rows = list(csv.DictReader(handle))
    assert len(rows) == 80
    for column in (
        "chamber",
        "light",
        "slope_umol_l_h",
        "flux_umol_m2_h",
        "flags",
        "gpp_umol_m2_h",
    ):
        assert column in rows[0]
    for table in ("daily", "temperature-fits", "crossings", "light-fits", "differences", "quality"):
        assert (outputs.folder / f"windows-{table}.csv").stat().st_size > 0


def test_plots_are_png_figures(outputs: Outputs) -> None:
    names = sorted(p.name for p in (outputs.folder / "figures").iterdir())
    assert names == ["o2-traces.png", "temperature-response.png", "temperature-tracking.png"]
    for name in names:
        assert (outputs.folder / "figures" / name).read_bytes()[:8] == PNG_SIGNATURE


def test_report_is_self_contained_with_hash_protocol_and_escaped_text(
    outputs: Outputs, truth_log: TruthLog
) -> None:
    text = (outputs.folder / "report.html").read_text(encoding="utf-8")
    meta = truth_log.analysis.info.meta
    assert meta.protocol_sha256 in text
    assert text.count("data:image/png;base64,") == 3
    assert not re.search(r"""(src|href)=["']https?:""", text)
    # the protocol's group label "Ambient <control>" is shown as text, never as markup
    assert "Ambient &lt;control&gt;" in text
    assert "<control>" not in text
    assert "Saltmarrow test rack" in text
    assert "Analysed by squall" in text


@pytest.mark.parametrize(
    "content", [b"not a run log at all\n", b"SQLite format 3\x00" + b"\x00" * 200]
)
def test_a_file_that_is_not_a_log_is_one_line_exit_2(
    tmp_path: Path, content: bytes, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = tmp_path / "bad.sqlite"
    bad.write_bytes(content)
    assert main(["analyze", str(bad), "--json", str(tmp_path / "out.json")]) == 2
    err = capsys.readouterr().err
    assert err.startswith("squall: error: ") and err.count("\n") == 1
    assert "Traceback" not in err
    assert not (tmp_path / "out.json").exists()


def test_a_missing_log_is_exit_2(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["analyze", str(tmp_path / "nowhere.sqlite")]) == 2
    assert "no such run log" in capsys.readouterr().err


@pytest.mark.parametrize(
    ("option", "value", "message"),
    [
        ("--settle", "5m", "--settle"),
        ("--settle", "soon", "--settle"),
        ("--band-c", "-0.5", "--band-c"),
        ("--photoperiod-h", "30", "--photoperiod-h"),
        ("--blank", "Z9", "blank"),
    ],
)
def test_bad_options_are_refused_before_writing(
    truth_log: TruthLog,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    option: str,
    value: str,
    message: str,
) -> None:
    out = tmp_path / "out.json"
    assert main(["analyze", str(truth_log.path), option, value, "--json", str(out)]) == 2
    err = capsys.readouterr().err
    assert message in err and err.count("\n") == 1
    assert not out.exists()


def test_an_output_in_a_missing_folder_is_refused(
    truth_log: TruthLog, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    target = tmp_path / "no" / "such" / "report.html"
    assert main(["analyze", str(truth_log.path), "--report", str(target)]) == 2
    assert "--report" in capsys.readouterr().err


class _Terminal(io.StringIO):
    """A stand-in for stderr that says it is a terminal."""

    def isatty(self) -> bool:
        return True


def test_a_terminal_gets_a_progress_bar_on_stderr(
    truth_log: TruthLog, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    terminal = _Terminal()
    monkeypatch.setattr("sys.stderr", terminal)
    assert main(["analyze", str(truth_log.path)]) == 0
    assert "analysing" in terminal.getvalue()
    assert "analysing" not in capsys.readouterr().out  # stdout keeps only the summary
