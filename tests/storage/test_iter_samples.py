"""RunLogReader.iter_samples: the bounded-memory way through a big run log."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
import pytest
from runlog_helpers import make_meta, tick_rows

from controller.errors import SquallError
from controller.storage import RunLogReader, RunLogWriter, SampleRow, frame_dtypes

N_TICKS = 7  # ticks 0, 1, …, 6 s of clock time; 3 chambers each: 21 rows


@pytest.fixture
def log(tmp_path: Path) -> Path:
    path = tmp_path / "run.sqlite"
    with RunLogWriter(path, meta=make_meta(3)) as writer:
        for k in range(N_TICKS):
            writer.append_samples(tick_rows(float(k), closed_chamber=k % 3))
    return path


def _as_text(frame: pd.DataFrame) -> pd.DataFrame:
    """Categorical columns as plain text: chunk categories are those present in the chunk."""
    kinds = {n: str for n, d in frame.dtypes.items() if isinstance(d, pd.CategoricalDtype)}
    return frame.astype(kinds)


def test_chunks_are_consecutive_rows_of_chunk_rows_each(log: Path) -> None:
    with RunLogReader(log) as reader:
        chunks = list(reader.iter_samples(chunk_rows=5))
        whole = reader.samples()
    assert [len(c) for c in chunks] == [5, 5, 5, 5, 1]
    assert [c.index[0] for c in chunks] == [1, 6, 11, 16, 21]
    joined = pd.concat(chunks)
    assert joined.index.name == "seq" and joined.index.tolist() == list(range(1, 22))
    pd.testing.assert_frame_equal(_as_text(joined), _as_text(whole))


def test_a_chunk_size_that_divides_the_rows_leaves_no_empty_chunk(log: Path) -> None:
    with RunLogReader(log) as reader:
        assert [len(c) for c in reader.iter_samples(chunk_rows=7)] == [7, 7, 7]
        assert [len(c) for c in reader.iter_samples(chunk_rows=1000)] == [21]
        assert [len(c) for c in reader.iter_samples(chunk_rows=1)] == [1] * 21


def test_each_chunk_has_the_frame_dtypes(log: Path) -> None:
    dtypes = frame_dtypes(SampleRow)
    with RunLogReader(log) as reader:
        for chunk in reader.iter_samples(chunk_rows=4):
            for name, dtype in dtypes.items():
                if isinstance(dtype, pd.CategoricalDtype) and dtype.categories is None:
                    assert isinstance(chunk[name].dtype, pd.CategoricalDtype), name
                else:
                    assert chunk[name].dtype == dtype, name
            assert str(chunk["time"].dt.tz) == "UTC"


def test_column_selection_keeps_the_order_asked_for(log: Path) -> None:
    with RunLogReader(log) as reader:
        chunks = list(reader.iter_samples(["o2_umol_l", "chamber", "time"], chunk_rows=8))
        single = list(reader.iter_samples("par", chunk_rows=100))
    assert all(list(c.columns) == ["o2_umol_l", "chamber", "time"] for c in chunks)
    joined = pd.concat(chunks)
    # tick_rows: O2 is 250 + i − 0.01 t for chamber index i at clock time t
    assert joined["o2_umol_l"].iloc[:4].tolist() == pytest.approx([250.0, 251.0, 252.0, 249.99])
    assert joined["chamber"].astype(str).iloc[:4].tolist() == ["A1", "A2", "A3", "A1"]
    assert list(single[0].columns) == ["par"]
    assert single[0]["par"].isna().sum() == N_TICKS  # A3 has no PAR reading


def test_chamber_filter_chunks_the_matching_rows(log: Path) -> None:
    with RunLogReader(log) as reader:
        one = list(reader.iter_samples(["t_s"], chamber="A2", chunk_rows=3))
        two = list(reader.iter_samples(["chamber"], chamber=["A1", "A3"], chunk_rows=4))
        expected_two = reader.samples(chamber=["A1", "A3"], columns=["chamber"])
    assert [len(c) for c in one] == [3, 3, 1]
    assert pd.concat(one)["t_s"].tolist() == [float(k) for k in range(N_TICKS)]
    assert pd.concat(one).index.tolist() == [2 + 3 * k for k in range(N_TICKS)]
    assert [len(c) for c in two] == [4, 4, 4, 2]
    assert pd.concat(two).index.tolist() == expected_two.index.tolist()
    assert set(pd.concat(two)["chamber"].astype(str)) == {"A1", "A3"}


def test_time_filter_is_half_open_on_clock_time(log: Path) -> None:
    with RunLogReader(log) as reader:
        chunks = list(reader.iter_samples(["t_s", "chamber"], t_from=2.0, t_to=5.0, chunk_rows=4))
        late = list(reader.iter_samples(["t_s"], chamber="A3", t_from=5.5))
    joined = pd.concat(chunks)
    assert joined["t_s"].tolist() == [2.0] * 3 + [3.0] * 3 + [4.0] * 3
    assert [len(c) for c in chunks] == [4, 4, 1]
    assert pd.concat(late)["t_s"].tolist() == [6.0]


def test_a_filter_that_matches_nothing_yields_no_chunk(log: Path) -> None:
    with RunLogReader(log) as reader:
        assert list(reader.iter_samples(chamber="Z9")) == []
        assert list(reader.iter_samples(t_from=100.0)) == []


def test_empty_log_yields_no_chunk(tmp_path: Path) -> None:
    path = tmp_path / "empty.sqlite"
    RunLogWriter(path, meta=make_meta(2)).close()
    with RunLogReader(path) as reader:
        assert list(reader.iter_samples(chunk_rows=10)) == []
        assert list(reader.iter_samples(["o2_umol_l"], chamber="A1", t_from=0.0)) == []


def test_unknown_column_is_refused_before_any_read_naming_the_column(log: Path) -> None:
    with RunLogReader(log) as reader:
        with pytest.raises(SquallError, match="'tempreature_c'") as caught:
            reader.iter_samples(["time", "tempreature_c"])  # refused at the call, not later
    assert caught.value.field == "columns"
    assert "did you mean 'temperature_c'" in caught.value.message


def test_chunk_rows_below_one_is_a_programming_error(log: Path) -> None:
    with RunLogReader(log) as reader, pytest.raises(ValueError, match="chunk_rows"):
        reader.iter_samples(chunk_rows=0)


def test_rows_committed_after_the_call_are_left_for_the_next_read(tmp_path: Path) -> None:
    path = tmp_path / "live.sqlite"
    writer = RunLogWriter(path, meta=make_meta(3), commit_interval_s=1.0)
    reader = RunLogReader(path)  # a second connection while the writer is active (WAL)
    try:
        for k in range(4):
            writer.append_samples(tick_rows(float(k)))
        writer.append_samples(tick_rows(3.5))  # not yet committed: the interval is 1 s
        assert writer.pending_rows == 3
        chunks = reader.iter_samples(["t_s"], chunk_rows=5)
        first = next(chunks)
        # the writer is not blocked by the half-read iteration: it commits more ticks
        for t in (4.0, 5.0, 5.5):
            writer.append_samples(tick_rows(t))
        rest = list(chunks)
        seen = pd.concat([first, *rest])
        assert seen["t_s"].tolist() == [float(k) for k in range(4) for _ in range(3)]
        assert [len(first), *(len(c) for c in rest)] == [5, 5, 2]
        # a new call sees everything committed by now, the pending tick at 5.5 s excepted
        again = pd.concat(list(reader.iter_samples(["t_s"], chunk_rows=5)))
        assert again["t_s"].tolist() == [t for t in (0, 1, 2, 3, 3.5, 4, 5) for _ in range(3)]
        # last_seq pins the end of the read, e.g. to a row count shown as progress
        pinned = pd.concat(list(reader.iter_samples(["t_s"], chunk_rows=4, last_seq=10)))
        assert pinned.index.tolist() == list(range(1, 11))
    finally:
        reader.close()
        writer.close()


def test_a_reader_closed_mid_iteration_stops_with_an_error(log: Path) -> None:
    reader = RunLogReader(log)
    chunks = reader.iter_samples(chunk_rows=5)
    assert len(next(chunks)) == 5
    reader.close()
    with pytest.raises(RuntimeError, match="closed"):
        next(chunks)
