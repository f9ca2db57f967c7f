"""Short form of the load benchmark (``bench/bench_load.py``) for every test run.

64 chambers (eight shared baths of four and 32 with their own water) for 2 simulated hours at
the 10 s control tick, with 22 faults drawn with a fixed seed (every simulator fault kind
twice). The full form, 30 days, is the benchmark's; this keeps the same checks at a size the
suite can afford (about 20 s):

- the run completes and nothing raises or logs an error with a traceback;
- the faults bite (alarms are raised), yet the run log holds exactly one row per tick and
  chamber and passes ``PRAGMA integrity_check``;
- memory stays flat: between 40 minutes in and the last tick the objects the garbage
  collector tracks grow by less than one per eight rows written in between (a leak of
  anything per row or per chamber-tick would exceed it), and resident memory by under 32 MiB.
"""

from __future__ import annotations

import importlib.util
import random
import sqlite3
import sys
from pathlib import Path
from types import ModuleType
from typing import Any

import pytest

from controller.rig import FaultKind

REPO = Path(__file__).resolve().parents[2]
CHAMBERS = 64
DURATION_S = 2 * 3600.0
PERIOD_S = 10.0
MARK_S = 2400.0


@pytest.fixture(scope="module")
def bench() -> ModuleType:
    """``bench/bench_load.py`` as a module (bench/ is not a package)."""
    spec = importlib.util.spec_from_file_location("bench_load", REPO / "bench" / "bench_load.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while being built
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Where the short load run writes its rig, protocol and log."""
    return tmp_path_factory.mktemp("load")


@pytest.fixture(scope="module")
def report(bench: ModuleType, folder: Path) -> Any:
    """The short load run's :class:`LoadReport` (run once for the module)."""
    return bench.run_load(
        folder,
        chambers=CHAMBERS,
        duration_s=DURATION_S,
        period_s=PERIOD_S,
        faults=2 * len(FaultKind),
        seed=9,
        marks_s=(MARK_S,),
    )


def test_every_fault_kind_is_drawn_and_reproducible(bench: ModuleType) -> None:
    ids = [f"C{n}" for n in range(CHAMBERS)]
    first = bench.draw_faults(random.Random(9), ids, DURATION_S, 2 * len(FaultKind))
    again = bench.draw_faults(random.Random(9), ids, DURATION_S, 2 * len(FaultKind))
    assert first == again
    assert {f["kind"] for f in first} == {kind.value for kind in FaultKind}
    assert all(0.0 <= f["at_s"] <= 0.9 * DURATION_S for f in first)


def test_rig_mixes_bath_and_own_water_chambers(bench: ModuleType) -> None:
    in_bath, own = bench.chamber_ids(CHAMBERS)
    assert len(in_bath) == 32 and len(own) == 32
    assert len(set(in_bath + own)) == CHAMBERS
    text = bench.load_rig_text(CHAMBERS)
    assert text.count("[[baths]]") == 8 and text.count("[[chambers]]") == CHAMBERS


def test_run_completes_without_unhandled_errors(report: Any) -> None:
    assert report.unhandled == []
    assert report.end_reason == "completed"
    assert report.ticks == report.ticks_total == DURATION_S / PERIOD_S


def test_faults_bite_and_the_log_is_complete(report: Any) -> None:
    assert report.alarms > 0
    assert report.rows_expected == CHAMBERS * DURATION_S / PERIOD_S
    assert report.rows_logged == report.rows_expected
    assert report.pairs_missing == 0 and report.pairs_repeated == 0
    assert report.integrity == "ok"
    assert report.log_complete


def test_memory_stays_flat(report: Any) -> None:
    marks = report.marks
    assert [m.elapsed_s for m in marks] == [MARK_S, DURATION_S]
    first, last = marks
    rows_between = CHAMBERS * (last.elapsed_s - first.elapsed_s) / PERIOD_S
    assert last.gc_objects - first.gc_objects < rows_between / 8
    assert last.rss_mib - first.rss_mib < 32.0


def test_completeness_check_sees_a_lost_and_a_doubled_row(
    bench: ModuleType, report: Any, folder: Path, tmp_path: Path
) -> None:
    """The checker itself: a copy of the log with one row gone and another doubled fails."""
    copy = tmp_path / "tampered.sqlite"
    with sqlite3.connect(folder / "load.sqlite") as source, sqlite3.connect(copy) as target:
        source.backup(target)
    with sqlite3.connect(copy) as conn:
        conn.execute("DELETE FROM samples WHERE seq = (SELECT MIN(seq) FROM samples)")
        columns = [row[1] for row in conn.execute("PRAGMA table_info(samples)")][1:]
        listed = ", ".join(columns)
        conn.execute(
            f"INSERT INTO samples ({listed}) SELECT {listed} FROM samples "
            "WHERE seq = (SELECT MAX(seq) FROM samples)"
        )
    checked = bench.LoadReport(chambers=CHAMBERS, faults=[], ticks=report.ticks)
    bench.check_log(copy, checked, [c for ids in bench.chamber_ids(CHAMBERS) for c in ids])
    assert checked.rows_logged == report.rows_expected  # one gone, one doubled
    assert checked.pairs_missing == 1 and checked.pairs_repeated == 1
    assert not checked.log_complete
