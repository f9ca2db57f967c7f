"""Terminal views of runs: ``squall watch`` (live) and ``squall replay``, built on Textual.

Layers, from data to screen:

- Data sources turn a run log into typed, immutable snapshots: :class:`LogSource` follows a
  log as its run writes it (bounded work per poll), :class:`ReplaySource` plays a log back
  with play/pause, speed and seek, :class:`BrokerSource` shows every controller publishing
  MQTT telemetry to a broker. All satisfy :class:`DataSource`. :class:`SyntheticRun` writes
  invented logs for demos, benchmarks and tests.
- :class:`SquallApp` asks its source on a timer and hands each :class:`Snapshot` to the
  screen on top: chamber board, chamber detail with charts, alarm list, protocol timeline,
  operator tasks.
  Widgets hold reactive state and never read data or call drivers.
- Operator commands (hold, resume, abort, acknowledge, note) go through a
  :class:`CommandChannel`; :class:`NoCommands` is the read-only channel and
  :class:`RecordingChannel` a stand-in controller for tests and demos.

Closing a view never stops a run. Names are re-exported lazily (see :mod:`controller._lazy`),
so naming this package does not load Textual.
"""

from typing import TYPE_CHECKING

from controller._lazy import lazy_exports

if TYPE_CHECKING:
    from ._app import LIVE_POLL_S, REPLAY_FRAME_S, THEME, SquallApp
    from ._board import BoardHeader, ChamberBoard, board_columns
    from ._broker import BrokerSource
    from ._commands import (
        Command,
        CommandChannel,
        CommandKind,
        CommandResult,
        NoCommands,
        RecordingChannel,
    )
    from ._detail import SPANS_S, ChamberCard, DetailScreen
    from ._dialogs import ConfirmDialog, HelpDialog, NoteDialog
    from ._plot import PlotData, PlotSeries, TracePlot, draw
    from ._replay import ReplaySource
    from ._screens import AlarmScreen, OverviewScreen, TimelineScreen
    from ._snapshot import (
        AlarmEntry,
        ChamberState,
        RunMode,
        RunState,
        RunStatus,
        Snapshot,
        TaskEntry,
        Trace,
    )
    from ._sources import DataSource, LogSource
    from ._synthetic import SyntheticRun
    from ._tasks_view import TasksScreen, TasksView
    from ._timeline import Span, Timeline, full_timeline, quick_timeline

_NAMES = {
    "AlarmEntry": "_snapshot",
    "AlarmScreen": "_screens",
    "BoardHeader": "_board",
    "BrokerSource": "_broker",
    "ChamberBoard": "_board",
    "ChamberCard": "_detail",
    "ChamberState": "_snapshot",
    "Command": "_commands",
    "CommandChannel": "_commands",
    "CommandKind": "_commands",
    "CommandResult": "_commands",
    "ConfirmDialog": "_dialogs",
    "DataSource": "_sources",
    "DetailScreen": "_detail",
    "HelpDialog": "_dialogs",
    "LIVE_POLL_S": "_app",
    "LogSource": "_sources",
    "NoCommands": "_commands",
    "NoteDialog": "_dialogs",
    "OverviewScreen": "_screens",
    "PlotData": "_plot",
    "PlotSeries": "_plot",
    "REPLAY_FRAME_S": "_app",
    "RecordingChannel": "_commands",
    "ReplaySource": "_replay",
    "RunMode": "_snapshot",
    "RunState": "_snapshot",
    "RunStatus": "_snapshot",
    "SPANS_S": "_detail",
    "Snapshot": "_snapshot",
    "Span": "_timeline",
    "SyntheticRun": "_synthetic",
    "TaskEntry": "_snapshot",
    "TasksScreen": "_tasks_view",
    "TasksView": "_tasks_view",
    "SquallApp": "_app",
    "THEME": "_app",
    "Timeline": "_timeline",
    "TimelineScreen": "_screens",
    "Trace": "_snapshot",
    "TracePlot": "_plot",
    "board_columns": "_board",
    "draw": "_plot",
    "full_timeline": "_timeline",
    "quick_timeline": "_timeline",
}

__getattr__, __dir__ = lazy_exports(__name__, _NAMES)

__all__ = [
    "LIVE_POLL_S",
    "REPLAY_FRAME_S",
    "SPANS_S",
    "THEME",
    "AlarmEntry",
    "AlarmScreen",
    "BoardHeader",
    "BrokerSource",
    "ChamberBoard",
    "ChamberCard",
    "ChamberState",
    "Command",
    "CommandChannel",
    "CommandKind",
    "CommandResult",
    "ConfirmDialog",
    "DataSource",
    "DetailScreen",
    "HelpDialog",
    "LogSource",
    "NoCommands",
    "NoteDialog",
    "OverviewScreen",
    "PlotData",
    "PlotSeries",
    "RecordingChannel",
    "ReplaySource",
    "RunMode",
    "RunState",
    "RunStatus",
    "Snapshot",
    "Span",
    "SquallApp",
    "SyntheticRun",
    "TaskEntry",
    "TasksScreen",
    "TasksView",
    "Timeline",
    "TimelineScreen",
    "Trace",
    "TracePlot",
    "board_columns",
    "draw",
    "full_timeline",
    "quick_timeline",
]
