"""A cold replay paints at once and answers keys while the rest of the log loads in a worker.

The source's loader is held at a gate (its chunk reads wait for the test), so the log is
"slow" for as long as the test wants, without any real-time sleep; the worker must then
bring in every row and the run bar must stop saying it loads.
"""

from __future__ import annotations

import asyncio
import threading
from pathlib import Path
from typing import Any

from controller.tui import HelpDialog, OverviewScreen, ReplaySource, SquallApp
from controller.tui._bars import RunBar
from controller.tui._logfile import LogFile
from controller.tui._replay import LOAD_CHUNK_ROWS

from .conftest import MakeSynthetic

WAIT_S = 20.0
"""Longest real wait for the loader thread, s."""
NEVER = 3600.0
"""Poll period: the test polls itself."""


class GatedReplay(ReplaySource):
    """A replay whose background chunk reads wait until the test opens the gate."""

    def __init__(self, path: Path, **kw: Any) -> None:
        super().__init__(path, **kw)
        self.gate = threading.Event()
        self.waiting = threading.Event()
        self.loader_reads = 0

    def _read_chunk(self, log: LogFile, since: int, limit: int) -> list[tuple[Any, ...]]:
        if threading.current_thread() is not threading.main_thread():
            self.loader_reads += 1
            self.waiting.set()
            if not self.gate.wait(WAIT_S):
                raise TimeoutError("the test never opened the gate")
        return super()._read_chunk(log, since, limit)


async def test_a_cold_replay_paints_and_answers_keys_before_the_log_is_in(
    synthetic: MakeSynthetic,
) -> None:
    run = synthetic(chambers=8, period_s=60.0, duration_s=7 * 86400.0)
    run.run_ticks(3000)  # 24 000 rows: more than one background chunk
    run.finish()
    total = 8 * 3000
    assert total > LOAD_CHUNK_ROWS
    source = GatedReplay(run.writer.path, speed=60.0)
    app = SquallApp(source, poll_s=NEVER, refine_timeline=False)
    async with app.run_test(size=(80, 24)) as pilot:
        await pilot.pause()
        # painted from the first chunk, with the load under way and said so
        assert app.snapshot is not None and len(app.snapshot.chambers) == 8
        assert await asyncio.to_thread(source.waiting.wait, WAIT_S)
        app.poll_now()
        await pilot.pause()
        assert source.loading and source.loaded_rows == 2000
        bar = app.screen.query_one(RunBar).render().plain
        assert "loading 8%" in bar  # 2000 of 24 000 rows
        # keys are handled while the loader is held: pause, help and back
        await pilot.press("space")
        assert not source.playing
        await pilot.press("question_mark")
        await pilot.pause()
        assert isinstance(app.screen, HelpDialog)
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, OverviewScreen)
        assert source.loading and source.loaded_rows == 2000  # still nothing more read
        source.gate.set()
        await app.workers.wait_for_complete()
        await pilot.pause()
        assert not source.loading and source.loaded_rows == total
        assert source.loader_reads >= 2  # in chunks, not one read
        assert app.snapshot.run.loading is None
        assert "loading" not in app.screen.query_one(RunBar).render().plain
        await pilot.press("greater_than_sign")  # the whole log is there to seek to
        assert app.snapshot.run.elapsed_s == 2999 * 60.0
