"""A data source fed by MQTT telemetry: every controller on a broker in one view.

Rules of this module
--------------------
- :class:`BrokerSource` keeps what the telemetry watcher delivers (statuses, samples, alarms,
  events) and builds the same snapshots as the log sources. The app runs :meth:`bridge`
  as a task: it owns the :class:`~controller.telemetry.TelemetryWatcher` and feeds each typed
  update to :meth:`feed`; the app's timer then asks :meth:`poll` for a snapshot as usual.
  Tests call :meth:`feed` directly, without a broker.
- Chambers of different controllers may share ids, so every chamber is shown as
  ``<controller>/<chamber>``, ordered by controller, then in the order its status lists them.
- The run bar summarises the controllers: one controller shows its own phase and progress;
  several show how many are online. A controller whose status says offline (its last will)
  or a lost broker connection makes the view silent.
- History for the detail charts is what arrived while watching (the broker keeps no history),
  at most :data:`HISTORY_POINTS` samples per chamber.
- Operator tasks are the controllers' retained task lists, their chambers named like the
  board's (``<controller>/<chamber>``).
"""

from __future__ import annotations

import math
import time
from collections import deque
from collections.abc import Callable
from typing import TYPE_CHECKING

from controller.storage import IncubationState, SampleRow

from ._fold import AlarmRow, apply_alarms, fold_alarms
from ._snapshot import (
    ChamberState,
    RunMode,
    RunState,
    RunStatus,
    Snapshot,
    TaskEntry,
    Trace,
    finite_or_none,
)
from ._timeline import Timeline

if TYPE_CHECKING:
    from controller.telemetry import TelemetryUpdate, TelemetryWatcher

__all__ = ["HISTORY_POINTS", "BrokerSource"]

HISTORY_POINTS = 20_000
"""Samples kept per chamber for the detail charts, dimensionless."""
_ALARM_ROWS = 5_000


def _state(key: str, row: SampleRow) -> ChamberState:
    return ChamberState(
        chamber=key,
        utc_s=row.utc_s,
        phase=row.phase,
        temperature_c=finite_or_none(row.temperature_c),
        temperature_setpoint_c=finite_or_none(row.temperature_setpoint_c),
        par=finite_or_none(row.par),
        par_setpoint=finite_or_none(row.par_setpoint),
        flow_cm_s=finite_or_none(row.flow_cm_s),
        flow_setpoint_cm_s=finite_or_none(row.flow_setpoint_cm_s),
        o2_umol_l=finite_or_none(row.o2_umol_l),
        o2_sat_pct=finite_or_none(row.o2_sat_pct),
        incubation=IncubationState(row.incubation),
        alarm_code=row.alarm or None,
    )


class BrokerSource:
    """Chambers of every controller publishing to one MQTT broker.

    Parameters
    ----------
    broker
        Broker URL, ``mqtt://[user[:password]@]host[:port]`` or ``mqtts://...``.
    prefix
        Topic prefix the controllers publish under; default the telemetry default.
    watcher
        A ready watcher to use instead of building one (tests).
    real_clock
        Monotonic real time, s (injected so tests are deterministic).
    silent_after_s
        Real seconds without any sample after which the view shows silent, s.

    Raises
    ------
    SquallError
        A malformed broker URL (one line, field ``--broker``).
    """

    def __init__(
        self,
        broker: str,
        *,
        prefix: str | None = None,
        watcher: TelemetryWatcher | None = None,
        real_clock: Callable[[], float] = time.monotonic,
        silent_after_s: float = 60.0,
    ) -> None:
        if watcher is None:
            from controller.telemetry import TelemetryWatcher

            kw = {} if prefix is None else {"prefix": prefix}
            watcher = TelemetryWatcher(broker, **kw)
        self.watcher = watcher
        self._address = str(watcher.address)
        self._real_clock = real_clock
        self._silent_after_s = float(silent_after_s)
        self._statuses: dict[str, object] = {}
        self._order: dict[str, list[str]] = {}
        self._latest: dict[str, ChamberState] = {}
        self._history: dict[str, deque[tuple[float, float, float, float, float, bool]]] = {}
        self._alarm_rows: deque[AlarmRow] = deque(maxlen=_ALARM_ROWS)
        self._connected: bool | None = None
        self._detail = ""
        self._arrival_s: float | None = None
        self._changed = True
        self._version = 0
        self._last_status: RunStatus | None = None
        self._tasks: dict[str, tuple[TaskEntry, ...]] = {}

    # -- properties -----------------------------------------------------------------------

    @property
    def mode(self) -> RunMode:
        """Always live."""
        return RunMode.LIVE

    @property
    def chambers(self) -> tuple[str, ...]:
        """Every chamber seen so far, as ``<controller>/<chamber>``."""
        keys: list[str] = []
        for controller in sorted(self._order):
            keys += [f"{controller}/{c}" for c in self._order[controller]]
        return tuple(keys)

    @property
    def timeline(self) -> Timeline:
        """Only a title: protocols are not published, phases come with each sample."""
        return Timeline(
            title=self._title(), duration_s=None, note="protocols stay on the controllers"
        )

    def _title(self) -> str:
        n = len(self._order)
        online = sum(1 for s in self._statuses.values() if getattr(s, "online", False))
        where = f"broker {self._address}"
        if self._connected is False:
            return f"{where}: not connected ({self._detail})"
        return f"{where} · {n} controller{'s' if n != 1 else ''}, {online} online"

    # -- feeding --------------------------------------------------------------------------

    def _chamber_key(self, controller: str, chamber: str) -> str:
        known = self._order.setdefault(controller, [])
        if chamber not in known:
            known.append(chamber)
        return f"{controller}/{chamber}"

    def feed(self, update: TelemetryUpdate) -> None:
        """Take one telemetry update into the view's state.

        Parameters
        ----------
        update
            Any update the watcher yields.
        """
        from controller.telemetry import (
            AlarmUpdate,
            ConnectionUpdate,
            SampleUpdate,
            StatusUpdate,
            TasksUpdate,
        )

        self._changed = True
        if isinstance(update, SampleUpdate):
            row = update.sample
            key = self._chamber_key(update.controller, row.chamber)
            self._latest[key] = _state(key, row)
            trail = self._history.setdefault(key, deque(maxlen=HISTORY_POINTS))
            trail.append(
                (
                    row.utc_s,
                    math.nan if row.temperature_c is None else row.temperature_c,
                    math.nan if row.temperature_setpoint_c is None else row.temperature_setpoint_c,
                    math.nan if row.o2_umol_l is None else row.o2_umol_l,
                    math.nan if row.o2_sat_pct is None else row.o2_sat_pct,
                    row.incubation == IncubationState.CLOSED,
                )
            )
            self._arrival_s = self._real_clock()
        elif isinstance(update, StatusUpdate):
            self._statuses[update.controller] = update.status
            for chamber in update.status.chambers:
                self._chamber_key(update.controller, chamber)
        elif isinstance(update, AlarmUpdate):
            record = update.alarm
            key = (
                None
                if record.chamber is None
                else self._chamber_key(update.controller, record.chamber)
            )
            self._alarm_rows.append(
                AlarmRow(
                    utc_s=record.utc_s,
                    action=record.action,
                    level=record.level,
                    code=record.code,
                    reason=record.reason if key else f"{update.controller}: {record.reason}",
                    chamber=key,
                    user=record.user,
                )
            )
        elif isinstance(update, ConnectionUpdate):
            self._connected = update.connected
            self._detail = update.detail
        elif isinstance(update, TasksUpdate):
            cid = update.controller
            self._tasks[cid] = tuple(
                TaskEntry(
                    uid=t.uid,
                    kind=t.kind,
                    title=t.title,
                    start_utc_s=t.start_utc_s,
                    minutes=t.minutes,
                    chambers=tuple(f"{cid}/{c}" for c in t.chambers),
                    detail=t.detail,
                )
                for t in update.tasks.tasks
            )
        else:
            self._changed = False  # events and command results: shown through statuses

    async def bridge(self) -> None:
        """Run the watcher and feed its updates until cancelled (the app's bridge task)."""
        async with self.watcher:
            async for update in self.watcher:
                self.feed(update)

    # -- reading --------------------------------------------------------------------------

    def open(self) -> Snapshot:
        """The first snapshot (usually empty: the watcher connects in the background)."""
        return self._snapshot()

    def poll(self) -> Snapshot | None:
        """A snapshot when updates arrived or the view turned silent, else None."""
        status = self._status()
        if not self._changed and status is self._last_status:
            return None
        return self._snapshot()

    def _age_s(self) -> float | None:
        if self._arrival_s is None:
            return None
        return max(0.0, self._real_clock() - self._arrival_s)

    def _status(self) -> RunStatus:
        states = [getattr(s, "state", None) for s in self._statuses.values()]
        online = [getattr(s, "online", False) for s in self._statuses.values()]
        age = self._age_s()
        if self._connected is False or (states and not all(online)):
            return RunStatus.SILENT
        if not self._latest:
            return RunStatus.WAITING
        if states and all(str(s) in ("finished", "aborted") for s in states):
            return RunStatus.FINISHED
        if any(str(s) == "held" for s in states):
            return RunStatus.HELD
        if age is not None and age > self._silent_after_s:
            return RunStatus.SILENT
        return RunStatus.RUNNING

    def _snapshot(self) -> Snapshot:
        self._changed = False
        self._version += 1
        status = self._status()
        self._last_status = status
        alarms = fold_alarms(self._alarm_rows)
        keys = self.chambers
        states = tuple(
            apply_alarms(self._latest.get(k, ChamberState(chamber=k)), alarms) for k in keys
        )
        single = next(iter(self._statuses.values())) if len(self._statuses) == 1 else None
        newest = max((s.utc_s for s in states if s.utc_s is not None), default=None)
        run = RunState(
            run_id=str(getattr(single, "run_id", None) or "broker"),
            title=self._title()
            if single is None
            else f"{getattr(single, 'protocol', None) or ''} · {self._title()}",
            mode=RunMode.LIVE,
            status=status,
            phase=str(getattr(single, "phase", None) or ""),
            elapsed_s=float(getattr(single, "elapsed_s", None) or 0.0),
            duration_s=getattr(single, "duration_s", None),
            utc_s=newest,
            end_reason=str(getattr(single, "state", "")) if status is RunStatus.FINISHED else "",
            age_s=self._age_s(),
        )
        return Snapshot(run=run, chambers=states, alarms=alarms, version=self._version)

    def history(self, chamber: str, span_s: float) -> Trace:
        """What arrived for one chamber over the last ``span_s`` seconds (s) of its samples.

        Parameters
        ----------
        chamber
            ``<controller>/<chamber>``.
        span_s
            How far back, s.
        """
        trail = list(self._history.get(chamber, ()))
        if not trail:
            return Trace(chamber=chamber)
        import numpy as np

        cols = np.array([t[:5] for t in trail], dtype="float64")
        closed = np.array([t[5] for t in trail], dtype=bool)
        order = np.argsort(cols[:, 0], kind="stable")
        trace = Trace(
            chamber=chamber,
            utc_s=cols[order, 0],
            temperature_c=cols[order, 1],
            temperature_setpoint_c=cols[order, 2],
            o2_umol_l=cols[order, 3],
            o2_sat_pct=cols[order, 4],
            closed=closed[order],
        )
        return trace.window(float(trace.utc_s[-1]), span_s)

    def tasks(self) -> tuple[TaskEntry, ...]:
        """Every controller's published operator tasks, by start time."""
        found = [t for tasks in self._tasks.values() for t in tasks]
        return tuple(sorted(found, key=lambda t: (t.start_utc_s, t.title)))

    def refine_timeline(self) -> Timeline:
        """Nothing to compile: the protocols stay on their controllers."""
        return self.timeline

    def close(self) -> None:
        """Nothing to close here; the bridge task ends the watcher when cancelled."""
