"""The thin layer that reads a run log, streams its samples through the pure analysis, and
collects every result in one :class:`Analysis`.

Rules of this module
--------------------
- This is the only module of ``controller.analysis`` that touches a file. It reads the run
  log through the public API of :class:`~controller.storage.RunLogReader` only:
  :meth:`~controller.storage.RunLogReader.iter_samples` gives chunks of consecutive rows,
  only the columns the analysis needs, so memory stays bounded for month-long 1 Hz logs.
- Time inside the analysis is ``run_s``: seconds since the run's start in UTC, computed from
  each row's UTC time (so resumed runs, whose clock time restarts, line up).
- Protocol groups (treatment/control) come from the protocol text stored in the log,
  validated with the protocol's own :class:`~controller.protocol.Group` model; a log whose
  protocol has no usable groups is analysed without group comparisons (and says so).
- Problems with the log are :class:`~controller.errors.SquallError`; the analysis itself
  never raises on odd data, it flags and notes.
"""

from __future__ import annotations

import math
import tomllib
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from controller import __version__
from controller.errors import SquallError
from controller.storage import RunLogInfo, RunLogReader

from ._metabolism import classify_windows, daily_table, pair_windows, respiration_table
from ._quality import QUALITY_INPUT_COLUMNS, QualityAccumulator
from ._response import (
    GroupSpec,
    group_differences,
    light_response,
    temperature_response,
)
from ._settings import AnalysisSettings
from ._windows import WINDOW_INPUT_COLUMNS, WindowAccumulator, group_rows

__all__ = [
    "READ_COLUMNS",
    "TRACE_COLUMNS",
    "Analysis",
    "analyze_log",
    "groups_from_protocol",
    "read_sample_chunks",
]

READ_COLUMNS = (
    "time",
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
    "incubation",
)
"""Sample columns an analysis reads from the log."""

TRACE_COLUMNS = ("chamber", "run_s", "o2_umol_l", "temperature_c", "temperature_setpoint_c")
"""Columns of the thinned traces kept for plots."""

Progress = Callable[[int, int], None]
"""Called with (rows read, rows to read), dimensionless."""


def read_sample_chunks(
    path: str | Path, columns: Sequence[str] = READ_COLUMNS, chunk_rows: int = 200_000
) -> Iterator[pd.DataFrame]:
    """Read a run log's samples in chunks of consecutive rows, as the analysis reads them.

    Parameters
    ----------
    path
        The run log.
    columns
        Frame column names to read (default :data:`READ_COLUMNS`).
    chunk_rows
        Rows per chunk, dimensionless.

    Yields
    ------
    pandas.DataFrame
        Consecutive chunks of the samples committed when reading began.

    Raises
    ------
    SquallError
        The log cannot be read.
    """
    with RunLogReader(Path(path)) as reader:
        yield from reader.iter_samples(columns, chunk_rows=max(int(chunk_rows), 1))


@dataclass(frozen=True, kw_only=True)
class Analysis:
    """Everything one analysis of a run log found.

    Attributes
    ----------
    log_path
        The log analysed.
    info
        The log's metadata, end and size.
    settings
        Thresholds used.
    software_version
        squall version that made this analysis.
    groups
        Protocol groups found in the log's protocol text.
    chambers
        ``chamber``, ``water_volume_l`` (L), ``sediment_area_m2`` (m²), ``bath``.
    windows
        One row per closed window: its fit, flux and flags (see
        :func:`controller.analysis.classify_windows`) plus ``start_time``/``end_time`` (UTC).
    pairs
        NCP, R and GPP of usable light windows (:func:`controller.analysis.pair_windows`).
    respiration
        R of usable dark windows (:func:`controller.analysis.respiration_table`).
    daily
        Daily metabolism per chamber and phase (:func:`controller.analysis.daily_table`).
    temperature_fits
        Arrhenius fits (:data:`controller.analysis.FIT_COLUMNS`).
    crossings
        Crossing temperatures (:data:`controller.analysis.CROSSING_COLUMNS`).
    light_fits
        Light-response fits (:data:`controller.analysis.LIGHT_COLUMNS`).
    differences
        Treatment minus control per phase (:data:`controller.analysis.DIFFERENCE_COLUMNS`).
    quality
        Run quality per chamber and phase (:func:`controller.analysis.run_quality`).
    traces
        Thinned samples for plots (:data:`TRACE_COLUMNS`; ``run_s`` in s).
    notes
        What the analysis could not do, in words.
    rows_read
        Sample rows read, dimensionless.
    """

    log_path: Path
    info: RunLogInfo
    settings: AnalysisSettings
    software_version: str
    groups: tuple[GroupSpec, ...]
    chambers: pd.DataFrame
    windows: pd.DataFrame
    pairs: pd.DataFrame
    respiration: pd.DataFrame
    daily: pd.DataFrame
    temperature_fits: pd.DataFrame
    crossings: pd.DataFrame
    light_fits: pd.DataFrame
    differences: pd.DataFrame
    quality: pd.DataFrame
    traces: pd.DataFrame
    notes: tuple[str, ...]
    rows_read: int

    @property
    def start(self) -> pd.Timestamp:
        """UTC start of the run (``run_s`` = 0)."""
        return pd.Timestamp(self.info.meta.start_utc_s, unit="s", tz="UTC")

    def times(self, run_s: Sequence[float] | np.ndarray) -> pd.DatetimeIndex:
        """UTC times of ``run_s`` values (s since the run's start)."""
        values = np.asarray(run_s, dtype=float)
        return pd.DatetimeIndex(self.start + pd.to_timedelta(values, unit="s"))


def groups_from_protocol(text: str) -> tuple[tuple[GroupSpec, ...], str | None]:
    """Treatment and control groups named by a protocol's text.

    Parameters
    ----------
    text
        Protocol file text (TOML).

    Returns
    -------
    (groups, note)
        The groups that validate as protocol groups, and a note when the text has none or
        cannot be read (None otherwise).
    """
    from controller.protocol import Group

    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        return (), f"protocol text is not valid TOML ({exc}); no group comparisons"
    raw = data.get("groups")
    if not isinstance(raw, dict) or not raw:
        return (), "the protocol names no groups; no treatment-versus-control comparisons"
    groups: list[GroupSpec] = []
    skipped: list[str] = []
    for name, table in raw.items():
        try:
            group = Group.model_validate(table)
        except (ValueError, SquallError):
            skipped.append(str(name))
            continue
        groups.append(
            GroupSpec(
                name=str(name),
                role=group.role.value,
                chambers=tuple(group.chambers),
                label=group.label or str(name),
            )
        )
    note = f"protocol groups not understood: {', '.join(skipped)}" if skipped else None
    return tuple(groups), note


def _run_seconds(times: pd.Series, start: pd.Timestamp) -> np.ndarray:
    """Seconds since ``start`` of tz-aware UTC times, s."""
    return np.asarray((times - start).dt.total_seconds().to_numpy(dtype=float))


class _Traces:
    """Every k-th sample of each chamber, for plots."""

    def __init__(self, stride: int) -> None:
        self._stride = max(int(stride), 1)
        self._seen: dict[str, int] = {}
        self._parts: list[pd.DataFrame] = []

    def update(self, frame: pd.DataFrame) -> None:
        keep = np.zeros(len(frame), dtype=bool)
        for chamber, rows in group_rows(frame["chamber"]):
            count = self._seen.get(chamber, 0)
            keep[rows[(np.arange(len(rows)) + count) % self._stride == 0]] = True
            self._seen[chamber] = count + len(rows)
        part = frame.loc[keep, list(TRACE_COLUMNS)].copy()
        part["chamber"] = part["chamber"].astype(str)
        self._parts.append(part)

    def frame(self) -> pd.DataFrame:
        if not self._parts:
            return pd.DataFrame(columns=list(TRACE_COLUMNS))
        return pd.concat(self._parts, ignore_index=True)


def analyze_log(
    path: str | Path,
    settings: AnalysisSettings | None = None,
    *,
    chunk_rows: int = 200_000,
    trace_points: int = 4000,
    progress: Progress | None = None,
) -> Analysis:
    """Analyse a run log: window fits, metabolism, temperature and light responses, quality.

    Parameters
    ----------
    path
        The run log (it may still be being written: rows committed when the analysis starts
        are analysed).
    settings
        Thresholds; default :class:`AnalysisSettings`.
    chunk_rows
        Sample rows read at a time, dimensionless (bounds memory).
    trace_points
        About this many samples per chamber are kept for plots, dimensionless.
    progress
        Called after each chunk with (rows read, rows to read).

    Returns
    -------
    Analysis
        Every result table.

    Raises
    ------
    SquallError
        The log cannot be read, or ``settings.blank`` names no chamber of the run.
    """
    settings = settings or AnalysisSettings()
    path = Path(path)
    with RunLogReader(path) as reader:
        info = reader.info()
        meta = info.meta
        chambers = pd.DataFrame(
            [
                {
                    "chamber": c.chamber,
                    "water_volume_l": c.water_volume_l,
                    "sediment_area_m2": c.sediment_area_m2,
                    "bath": c.bath,
                }
                for c in meta.chambers
            ],
            columns=["chamber", "water_volume_l", "sediment_area_m2", "bath"],
        )
        if settings.blank is not None and settings.blank not in set(chambers["chamber"]):
            known = ", ".join(chambers["chamber"]) or "none"
            raise SquallError(
                f"blank chamber {settings.blank!r} is not a chamber of this run (chambers: "
                f"{known})",
                file=path,
                field="blank",
            )
        start = pd.Timestamp(meta.start_utc_s, unit="s", tz="UTC")
        raw_windows = reader.windows()
        windows_in = pd.DataFrame(
            {
                "chamber": raw_windows["chamber"].astype(str).to_numpy(),
                "light": raw_windows["light"].astype(str).to_numpy(),
                "start_s": _run_seconds(raw_windows["start_time"], start),
                "end_s": _run_seconds(raw_windows["end_time"], start),
                "end_reason": raw_windows["end_reason"].astype(str).to_numpy(),
            }
        )
        alarms = reader.alarms()
        alarms = alarms.assign(run_s=_run_seconds(alarms["time"], start))
        last = reader.last_rowid()
        per_chamber = last / max(len(chambers), 1)
        traces = _Traces(math.ceil(per_chamber / max(trace_points, 1)))
        win_acc = WindowAccumulator(windows_in, settings.settle_s)
        quality_acc = QualityAccumulator(settings)
        done = 0
        if progress is not None:
            progress(0, last)
        chunks = reader.iter_samples(
            READ_COLUMNS, chunk_rows=max(int(chunk_rows), 1), last_seq=last
        )
        for frame in chunks:
            frame["run_s"] = _run_seconds(frame["time"], start)
            win_acc.update(frame[list(WINDOW_INPUT_COLUMNS)])
            quality_acc.update(frame[list(QUALITY_INPUT_COLUMNS)])
            traces.update(frame)
            done += len(frame)
            if progress is not None:
                progress(int(frame.index[-1]), last)  # row id reached; the last chunk ends at last
    groups, group_note = groups_from_protocol(meta.protocol_text)
    notes = [group_note] if group_note else []
    windows = classify_windows(win_acc.table(), chambers, settings)
    windows.insert(5, "start_time", start + pd.to_timedelta(windows["start_s"], unit="s"))
    windows.insert(6, "end_time", start + pd.to_timedelta(windows["end_s"], unit="s"))
    if windows.empty:
        notes.append("the log holds no closed incubation windows: no metabolism was computed")
    pairs = pair_windows(windows, settings)
    resp = respiration_table(windows)
    daily = daily_table(pairs, quality_acc.photoperiods(), settings.photoperiod_h)
    fits, crossings = temperature_response(pairs, resp, groups, settings)
    light = light_response(pairs, groups, settings)
    differences = group_differences(pairs, resp, groups, settings.confidence)
    quality = quality_acc.table(alarms, windows)
    if not quality.empty:
        quality.insert(2, "start_time", start + pd.to_timedelta(quality["start_s"], unit="s"))
        quality.insert(3, "end_time", start + pd.to_timedelta(quality["end_s"], unit="s"))
    unpaired = int((pairs["dark_window"] < 0).sum()) if not pairs.empty else 0
    if unpaired:
        notes.append(
            f"{unpaired} light window(s) had no dark window of the same chamber and phase "
            f"within {settings.match_tol_c:g} °C: NCP only, no GPP"
        )
    return Analysis(
        log_path=path,
        info=info,
        settings=settings,
        software_version=__version__,
        groups=groups,
        chambers=chambers,
        windows=windows,
        pairs=pairs,
        respiration=resp,
        daily=daily,
        temperature_fits=fits,
        crossings=crossings,
        light_fits=light,
        differences=differences,
        quality=quality,
        traces=traces.frame(),
        notes=tuple(notes),
        rows_read=done,
    )
