"""``squall export``: the contract run table in Parquet and CSV."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from runlog_helpers import make_meta, tick_rows

from controller.cli import main
from controller.errors import SquallError
from controller.storage import EXPORT_COLUMNS, RunLogReader, RunLogWriter, export

# The exported run table's columns, copied from /work/shared/DESIGN.md (contract).
CONTRACT = [
    "time",
    "elapsed_s",
    "chamber",
    "phase",
    "temperature_c",
    "temperature_setpoint_c",
    "par",
    "par_setpoint",
    "flow_cm_s",
    "flow_setpoint_cm_s",
    "o2_umol_l",
    "o2_sat_pct",
    "heater_pct",
    "chiller_pct",
    "lamp_pct",
    "pump_pct",
    "incubation",
    "alarm",
]


@pytest.fixture
def log(tmp_path: Path) -> Path:
    path = tmp_path / "run.sqlite"
    with RunLogWriter(path, meta=make_meta(3)) as writer:
        for k in range(12):
            writer.append_samples(
                tick_rows(
                    0.5 * k,
                    phase="baseline" if k < 6 else "heatwave",
                    alarm_chamber=0 if k in (7, 8) else None,
                    closed_chamber=2 if k >= 4 else None,
                )
            )
    return path


def test_export_columns_are_the_contract() -> None:
    assert list(EXPORT_COLUMNS) == CONTRACT


def _expected(log: Path) -> pd.DataFrame:
    with RunLogReader(log) as reader:
        return reader.samples().reset_index(drop=True)


def test_parquet_reads_back_with_pandas(log: Path, tmp_path: Path) -> None:
    out = tmp_path / "table.parquet"
    assert export(log, out) == 36
    table = pd.read_parquet(out)
    expected = _expected(log)
    assert list(table.columns) == CONTRACT
    assert str(table["time"].dt.tz) == "UTC"
    assert (table["time"] == expected["time"]).all()
    np.testing.assert_array_equal(table["temperature_c"], expected["temperature_c"])
    assert table["par"].isna().sum() == 12  # chamber A3 has no PAR reading
    assert table["chamber"].tolist() == expected["chamber"].astype(str).tolist()
    assert set(table["incubation"]) == {"open", "closed"}
    assert table["alarm"].tolist().count("over_temperature") == 2
    assert table["alarm"].tolist().count("") == 34  # empty, not null, when no alarm
    assert set(table["phase"]) == {"baseline", "heatwave"}


def test_csv_reads_back_with_pandas(log: Path, tmp_path: Path) -> None:
    out = tmp_path / "table.csv"
    assert export(log, out) == 36
    text = out.read_text()
    assert text.splitlines()[0] == ",".join(CONTRACT)
    for junk in ("nan", "None", "<NA>", "NaT"):
        assert junk not in text
    table = pd.read_csv(out, keep_default_na=False, na_values={"par": [""]})
    expected = _expected(log)
    assert list(table.columns) == CONTRACT
    times = pd.to_datetime(table["time"], utc=True, format="ISO8601")
    assert (times == expected["time"]).all()
    assert table["time"].iloc[3] == "2026-05-28T20:26:40.500000Z"  # second tick, A1
    np.testing.assert_allclose(table["o2_umol_l"], expected["o2_umol_l"])
    assert table["par"].isna().sum() == 12
    assert table["alarm"].tolist().count("") == 34
    assert set(table["incubation"]) == {"open", "closed"}


def test_chunked_export_equals_one_piece(log: Path, tmp_path: Path) -> None:
    whole, pieces = tmp_path / "whole.parquet", tmp_path / "pieces.parquet"
    export(log, whole)
    seen: list[tuple[int, int]] = []
    export(log, pieces, chunk_rows=7, progress=lambda done, total: seen.append((done, total)))
    pd.testing.assert_frame_equal(pd.read_parquet(whole), pd.read_parquet(pieces))
    assert seen == [(7, 36), (14, 36), (21, 36), (28, 36), (35, 36), (36, 36)]


def test_export_while_the_run_writes_holds_the_committed_rows(tmp_path: Path) -> None:
    path, out = tmp_path / "live.sqlite", tmp_path / "live.csv"
    with RunLogWriter(path, meta=make_meta(3), commit_interval_s=1.0) as writer:
        for k in range(4):  # commits at t = 1 s; the tick at 1.5 s is pending
            writer.append_samples(tick_rows(0.5 * k))
        assert export(path, out) == 9
        assert writer.pending_rows == 3


def test_empty_log_exports_the_header(tmp_path: Path) -> None:
    path = tmp_path / "empty.sqlite"
    RunLogWriter(path, meta=make_meta()).close()
    export(path, tmp_path / "e.parquet")
    export(path, tmp_path / "e.csv")
    assert list(pd.read_parquet(tmp_path / "e.parquet").columns) == CONTRACT
    assert (tmp_path / "e.csv").read_text() == ",".join(CONTRACT) + "\n"


def test_other_extensions_and_missing_folders_are_refused(log: Path, tmp_path: Path) -> None:
    with pytest.raises(SquallError, match=r"\.xlsx.*FILE\.parquet or FILE\.csv"):
        export(log, tmp_path / "table.xlsx")
    with pytest.raises(SquallError, match="folder does not exist"):
        export(log, tmp_path / "nowhere" / "table.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.sqlite", "run.sqlite.lock"]


def test_cli_export(log: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "cli.parquet"
    assert main(["export", str(log), "-o", str(out)]) == 0
    assert f"wrote 36 rows to {out}" in capsys.readouterr().out
    assert list(pd.read_parquet(out).columns) == CONTRACT

    assert main(["export", str(log), "-o", str(tmp_path / "x.json")]) == 2
    assert "x.json: cannot export to '.json'" in capsys.readouterr().err
    bad = tmp_path / "bad.sqlite"
    bad.write_text("not a log")
    assert main(["export", str(bad), "-o", str(tmp_path / "y.csv")]) == 2
    assert f"{bad}: not a squall run log" in capsys.readouterr().err
    assert not (tmp_path / "y.csv").exists()
    assert main(["export", str(log)]) == 2  # -o is required
