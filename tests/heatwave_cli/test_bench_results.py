"""``bench/run``'s runner (bench/_results.py): RESULT lines, running a benchmark, the report.

(It lives beside the heatwave CLI tests because the same task wrote both.)
"""

from __future__ import annotations

import datetime as dt
import importlib.util
import sys
from pathlib import Path
from types import ModuleType

import pytest

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def results() -> ModuleType:
    spec = importlib.util.spec_from_file_location("bench_results", REPO / "bench" / "_results.py")
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while being built
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize(
    ("line", "measured", "goal", "met"),
    [
        ("RESULT: sample / numpy.interp time | 1.42x | <= 3x", "1.42x", "<= 3x", True),
        ("RESULT: writer / bare insert rate | 0.41x | >= 0.5x", "0.41x", ">= 0.5x", False),
        ("  RESULT: ramp RMS error | 0.031 °C | ≤ 0.05 °C | 1 °C/h ramp", "0.031 °C", "≤ 0.05 °C",
         True),
        ("RESULT: overshoot | 2.5e-1 °C | < 0.2 °C", "2.5e-1 °C", "< 0.2 °C", False),
        ("RESULT: peak memory | 512 MiB", "512 MiB", "", None),
        ("RESULT: iae ratio | n/a | <= 1.2x", "n/a", "<= 1.2x", None),
    ],
)  # fmt: skip
def test_result_lines_are_read_and_judged(
    results: ModuleType, line: str, measured: str, goal: str, met: bool | None
) -> None:
    parsed = results.parse_result_line(line)
    assert (parsed.measured, parsed.goal, parsed.met) == (measured, goal, met)


def test_other_lines_are_not_results(results: ModuleType) -> None:
    assert results.parse_result_line("ratio sample / numpy.interp: 1.42x (goal <= 3x)") is None
    note = results.parse_result_line("RESULT: ramp | 0.03 °C | <= 0.05 °C | 1 °C/h")
    assert (note.figure, note.note) == ("ramp", "1 °C/h")


def test_the_real_benchmarks_are_discovered(results: ModuleType) -> None:
    names = [path.stem for path in results.discover()]
    assert names == sorted(names) and "bench_compile" in names
    assert all(name.startswith("bench_") for name in names)


def test_a_benchmark_runs_and_its_report_quotes_it(results: ModuleType, tmp_path: Path) -> None:
    good = tmp_path / "bench_good.py"
    good.write_text(
        "import sys\nprint('rows/s 1000')\nprint('RESULT: speed ratio | 2.0x | <= 3x')\n"
        "print('quick' if '--quick' in sys.argv else 'full')\n"
    )
    bad = tmp_path / "bench_bad.py"
    bad.write_text("import sys\nprint('half way')\nsys.exit('broken: ratio goal <= 3x')\n")
    ran_good = results.run_bench(good, python=sys.executable, quick=True, timeout_s=60)
    ran_bad = results.run_bench(bad, python=sys.executable, quick=True, timeout_s=60)
    assert ran_good.ok and ran_good.argv[-1] == "--quick" and "quick" in ran_good.stdout
    assert ran_good.results[0].met is True
    assert ran_good.peak_rss_mib is not None and ran_good.peak_rss_mib > 1
    assert (ran_bad.ok, ran_bad.exit_code, ran_bad.argv) == (False, 1, [str(bad)])
    text = results.render(
        [ran_good, ran_bad],
        machine=results.machine_description(),
        command="bench/run --quick",
        started_utc=dt.datetime(2027, 7, 10, 8, 0, tzinfo=dt.UTC),
        total_s=75.0,
    )
    assert "Produced by `bench/run --quick` on 2027-07-10 08:00 UTC in 1 min 15 s" in text
    assert "| CPU |" in text and "| Python |" in text and "numpy " in text
    assert "| bench_good | speed ratio | 2.0x | <= 3x | met |" in text
    assert "| bench_bad | run | exit 1 | exit 0 | **failed** |" in text
    assert "```text\nrows/s 1000\nRESULT: speed ratio | 2.0x | <= 3x\nquick\n```" in text
    assert "broken: ratio goal <= 3x" in text  # the failing one's standard error
    assert "- **bench_bad**" in text  # no RESULT line: its goal lines are quoted
