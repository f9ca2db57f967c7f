"""Simulated controllers that publish: ``squall run --sim --speed N`` on threads of the test.

:class:`SimController` writes a rig file with a ``[telemetry]`` table and a protocol, runs the
protocol on a simulated rack at ``speed`` times real time in a thread of its own (its own
event loop, exactly as ``squall run`` wires it: :func:`telemetry_link` and its runner), and
records for every tick when it happened in real time and how late it started. A test stops
it with :meth:`SimController.abort` (the operator hook, called in the run's own loop).
"""

from __future__ import annotations

import asyncio
import contextlib
import threading
import time
from collections.abc import Awaitable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from controller.runtime import ControlLoop, RunSettings, RunSummary, SimulatedRun, TickStatus
from controller.runtime._operator import OperatorError
from controller.runtime._telemetry_link import TelemetryLink, telemetry_link

#: Wall time of the simulated runs' start (an invented date).
RUN_START = datetime(2027, 7, 1, 6, 0, tzinfo=UTC)


def rig_text(chambers: Sequence[str], telemetry: str) -> str:
    """A small simulated rig with the given chambers and ``[telemetry]`` table text."""
    parts = [
        'name = "Saltmarrow Lagoon telemetry rack"\n',
        "[sim]\nroom_temperature_c = 18.0\nphysics_step_s = 5.0\nseed = 3\n",
    ]
    for chamber in chambers:
        parts.append(
            f'[[chambers]]\nid = "{chamber}"\nwater_volume_l = 8.0\nsediment_area_m2 = 0.03\n'
            "salinity = 30.0\n[chambers.sim.thermal]\nua_w_k = 8.0\nheater_max_w = 400.0\n"
            "chiller_max_w = 300.0\ndead_time_s = 10.0\n"
        )
    parts.append(telemetry)
    return "\n".join(parts)


def protocol_text(chambers: Sequence[str], duration: str) -> str:
    """A one-phase protocol holding 20 °C on ``chambers`` for ``duration``."""
    names = ", ".join(f'"{c}"' for c in chambers)
    return (
        'format = "squall-protocol/1"\n'
        'title = "Telemetry rehearsal"\n'
        f'begins = "{RUN_START.isoformat()}"\n'
        'utc_offset = "+00:00"\n\n'
        f'[groups.all]\nrole = "treatment"\nchambers = [{names}]\n\n'
        f'[[phases]]\nname = "hold"\nduration = "{duration}"\n'
        "  [phases.programs]\n"
        '  temperature = [ { kind = "hold", value = 20.0 } ]\n'
    )


def telemetry_table(url: str, controller_id: str, *, extra: str = "") -> str:
    """A ``[telemetry]`` table for a test broker, with back-offs fit for a fast clock."""
    return (
        f'[telemetry]\nbroker = "{url}"\ncontroller_id = "{controller_id}"\n'
        "reconnect_min_s = 3.0\nreconnect_max_s = 15.0\ntimeout_s = 30.0\n"
        "status_interval_s = 30.0\n" + extra
    )


@dataclass(frozen=True, slots=True)
class Tick:
    """One tick as the test saw it.

    Attributes
    ----------
    real_s
        Monotonic real time when the tick reported, s.
    k
        Tick number.
    offset_s
        Tick start minus ``k`` periods, clock s (its lateness plus a constant).
    utc_s
        UTC wall time of the tick (its samples' ``utc_s``), POSIX s.
    """

    real_s: float
    k: int
    offset_s: float
    utc_s: float


class SimController:
    """One simulated controller publishing telemetry, run in a thread.

    Parameters
    ----------
    folder
        Where its rig, protocol and run log go.
    controller_id
        Its id on the broker.
    telemetry
        The ``[telemetry]`` table text.
    speed
        Simulated seconds per real second.
    chambers
        Its chambers.
    duration
        Protocol length (the runs are normally aborted before).
    period_s
        Control tick period, s.
    """

    def __init__(
        self,
        folder: Path,
        controller_id: str,
        telemetry: str,
        *,
        speed: float,
        chambers: Sequence[str] = ("A1", "A2"),
        duration: str = "1d",
        period_s: float = 10.0,
    ) -> None:
        folder.mkdir(parents=True, exist_ok=True)
        (folder / "rig.toml").write_text(rig_text(chambers, telemetry))
        (folder / "protocol.toml").write_text(protocol_text(chambers, duration))
        self.controller_id = controller_id
        self.speed = speed
        self.period_s = period_s
        self.log_path = folder / "run.sqlite"
        self.run = SimulatedRun.prepare(
            folder / "protocol.toml",
            folder / "rig.toml",
            self.log_path,
            speed=speed,
            settings=RunSettings(period_s=period_s),
        )
        link = telemetry_link(
            self.run.inputs.rig.telemetry,
            clock=self.run.clock,
            run_id=self.run.writer.meta.run_id,
            protocol=self.run.inputs.compiled.title,
            chambers=tuple(self.run.plan.chambers),
            duration_s=self.run.inputs.compiled.duration_s,
            period_s=period_s,
            base_dir=folder,
        )
        assert link is not None
        self.link: TelemetryLink = link
        self.ticks: list[Tick] = []
        self.summary: RunSummary | None = None
        self.error: BaseException | None = None
        self.started = threading.Event()
        self._aio: asyncio.AbstractEventLoop | None = None
        self._loop: ControlLoop | None = None
        self._task: asyncio.Task[object] | None = None
        #: What the last :meth:`abort` did in the run's loop (for a join that times out).
        self.abort_outcome = "no abort asked"
        self._thread = threading.Thread(target=self._body, name=controller_id, daemon=True)

    # ------------------------------------------------------------------ thread
    def _progress(self, status: TickStatus) -> None:
        utc_s = status.utc.timestamp()
        offset_s = utc_s - RUN_START.timestamp() - status.tick * self.period_s
        self.ticks.append(Tick(time.monotonic(), status.tick, offset_s, utc_s))

    def _body(self) -> None:
        def runner(loop: ControlLoop) -> Awaitable[RunSummary]:
            self._aio = asyncio.get_running_loop()
            self._task = asyncio.current_task()
            self._loop = loop
            self.started.set()
            return self.link.runner()(loop)

        try:
            self.summary = self.run.run(loop=self.run.loop(progress=self._progress), runner=runner)
        except BaseException as exc:  # reported by join()
            self.error = exc
        finally:
            self.started.set()

    def start(self) -> None:
        """Start the run in its thread."""
        self._thread.start()

    def abort(self, user: str = "test") -> None:
        """Abort the run through its operator hook, in the run's own event loop; a run
        that cannot take an abort yet (still starting) is cancelled instead."""
        aio, loop, main = self._aio, self._loop, self._task
        if aio is None or loop is None or main is None or not self._thread.is_alive():
            return

        def stop() -> None:
            try:
                loop.abort(user)
                self.abort_outcome = "aborted"
            except OperatorError as refused:  # stopping or ended: leave it; starting: cancel
                state = loop.status()["state"]
                self.abort_outcome = f"refused in state {state}: {refused}"
                if state == "starting":
                    main.cancel()  # the shutdown path still makes every chamber safe
                    self.abort_outcome += "; cancelled instead"

        with contextlib.suppress(RuntimeError):  # its event loop closed meanwhile
            aio.call_soon_threadsafe(stop)

    def join(self, timeout_s: float = 30.0) -> RunSummary | None:
        """Wait for the run's end; its summary, or None when it was cancelled.

        Raises
        ------
        AssertionError
            The run did not end in time.
        Exception
            What else ended the run.
        """
        self._thread.join(timeout_s)
        if self._thread.is_alive():
            loop = self._loop
            try:
                state = "not started" if loop is None else loop.status()["state"]
            except Exception as error:  # read from another thread: only for the message
                state = f"unreadable ({error!r})"
            raise AssertionError(
                f"{self.controller_id} did not stop within {timeout_s} s "
                f"(run state {state}; abort: {self.abort_outcome})"
            )
        if isinstance(self.error, asyncio.CancelledError):
            return None
        if self.error is not None:
            raise self.error
        return self.summary

    def lateness_s(self, since_s: float = -1.0, until_s: float = float("inf")) -> list[float]:
        """Real-time lateness of the ticks reported in ``[since_s, until_s)``, s.

        The lateness of a tick is its start's offset from the tick grid, less the smallest
        offset of the run (so the first, on-time ticks are 0), divided by the speed.
        """
        ticks = list(self.ticks)
        if not ticks:
            return []
        base = min(t.offset_s for t in ticks)
        return [(t.offset_s - base) / self.speed for t in ticks if since_s <= t.real_s < until_s]
