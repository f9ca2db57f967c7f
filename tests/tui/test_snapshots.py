"""Snapshot tests of the main screens at 80×24: overview, chamber detail, alarm list.

The screens are exported as SVG (``App.export_screenshot``) and compared with the files in
``snapshots/``. The data is fixed (an invented log with a seeded generator and a fixed start,
clocks that do not move), so a difference means the view changed. pytest-textual-snapshot
pins syrupy 4.8, which needs pytest < 9, so it cannot be installed beside this project's
pytest; this is the same idea in a few lines.

After a deliberate change, look at the new screens and regenerate:
``SQUALL_UPDATE_SNAPSHOTS=1 pytest tests/tui/test_snapshots.py``. Snapshots depend on the
Textual version (pinned for that reason)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from controller.storage import AlarmLevel
from controller.tui import AlarmScreen, DetailScreen, LogSource, SquallApp

from .conftest import MakeSynthetic

SNAPSHOTS = Path(__file__).with_name("snapshots")
UPDATE = os.environ.get("SQUALL_UPDATE_SNAPSHOTS") == "1"
SIZE = (80, 24)


def check_snapshot(app: SquallApp, name: str, tmp_path: Path) -> None:
    """Compare the current screen with ``snapshots/<name>.svg`` (or rewrite it)."""
    svg = app.export_screenshot(title=f"squall {name}")
    expected = SNAPSHOTS / f"{name}.svg"
    if UPDATE:
        SNAPSHOTS.mkdir(exist_ok=True)
        expected.write_text(svg, encoding="utf-8")
        return
    if not expected.exists():
        pytest.fail(f"no snapshot {expected}; create it with SQUALL_UPDATE_SNAPSHOTS=1")
    if svg != expected.read_text(encoding="utf-8"):
        actual = tmp_path / f"{name}.svg"
        actual.write_text(svg, encoding="utf-8")
        pytest.fail(
            f"screen {name!r} differs from {expected}; compare with {actual} and, if the "
            "change is wanted, regenerate with SQUALL_UPDATE_SNAPSHOTS=1"
        )


def fixed(t: float) -> object:
    return lambda: t


@pytest.fixture
def app(synthetic: MakeSynthetic) -> SquallApp:
    """A finished invented run of eight chambers: one trip, one warning acknowledged."""
    run = synthetic("fixed", chambers=8, period_s=120.0, duration_s=2 * 86400.0, seed=11)
    run.run_ticks(500)
    run.raise_alarm("C05", "over-temperature", AlarmLevel.TRIP, "26.2 °C at or above 26.0 °C")
    run.run_ticks(40)
    run.raise_alarm("C02", "low-flow", AlarmLevel.WARNING, "flow 1.4 cm/s below 2.0 cm/s")
    run.run_ticks(20)
    run.finish()
    source = LogSource(run.writer.path, real_clock=fixed(50.0), wall_clock=fixed(0.0))  # type: ignore[arg-type]
    return SquallApp(source, poll_s=3600.0, refine_timeline=False)


async def test_overview_screen(app: SquallApp, tmp_path: Path) -> None:
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("down", "down")
        await pilot.pause()
        check_snapshot(app, "overview", tmp_path)


async def test_detail_screen(app: SquallApp, tmp_path: Path) -> None:
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("down", "down", "down", "down", "enter")
        await pilot.pause()
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert isinstance(app.screen, DetailScreen) and app.screen.loaded
        check_snapshot(app, "detail", tmp_path)


async def test_alarm_screen(app: SquallApp, tmp_path: Path) -> None:
    async with app.run_test(size=SIZE) as pilot:
        await pilot.press("a")
        await pilot.pause()
        assert isinstance(app.screen, AlarmScreen) and len(app.screen.alarms) == 2
        check_snapshot(app, "alarms", tmp_path)
