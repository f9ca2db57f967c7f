"""``squall preview PROTOCOL -o plot.png [--csv setpoints.csv] [--start ISO8601] [--step DUR]``.

Rules
-----
- The figure is drawn from the compiled channels' breakpoints (exact, no sampling); the CSV
  holds the setpoints sampled every ``--step`` from 0 to the end inclusive, one row per time
  per chamber (time-major), columns :data:`CSV_COLUMNS`. Times are UTC ISO 8601 as in the
  exported run table; an uncontrolled variable is an empty cell.
- Problems (bad protocol, bad ``--step``, unwritable output) are located
  :class:`~controller.errors.SquallError`; exit 2.
"""

from __future__ import annotations

import argparse
import math
from datetime import timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from controller import __version__
from controller.cli.cmd_check import (
    LoadedProtocol,
    compile_loaded,
    load_protocol,
    parse_start,
    resolve_start,
)
from controller.errors import SquallError

if TYPE_CHECKING:  # heavy imports are deferred so that `squall --help` stays quick
    import pandas as pd

    from controller.plots import PreviewData
    from controller.protocol import Channel, CompiledProtocol

__all__ = [
    "CSV_COLUMNS",
    "FIGURE_SUFFIXES",
    "MAX_CSV_ROWS",
    "default_step",
    "preview_data",
    "register",
    "run",
    "sample_times",
    "setpoint_frame",
    "write_preview",
]

CSV_COLUMNS = (
    "time",
    "elapsed_s",
    "chamber",
    "group",
    "phase",
    "temperature_setpoint_c",
    "par_setpoint",
    "flow_setpoint_cm_s",
)
"""Columns of the setpoints CSV (time UTC ISO 8601; s; °C; µmol photons m-2 s-1; cm s-1)."""

FIGURE_SUFFIXES = (".png", ".pdf", ".svg")
"""Figure formats the preview writes, chosen by the output file's suffix."""

MAX_CSV_ROWS = 5_000_000
"""Largest setpoints CSV written (rows); a smaller --step is refused beyond it."""

_NICE_STEPS_S = (60, 120, 300, 600, 900, 1800, 3600, 7200, 10800, 21600, 43200, 86400)
_TARGET_TIMES = 5000
_CSV_TIME_FORMAT = "%Y-%m-%dT%H:%M:%S.%fZ"
_SETPOINT_COLUMN = {
    "temperature_c": "temperature_setpoint_c",
    "par": "par_setpoint",
    "flow_cm_s": "flow_setpoint_cm_s",
}


def default_step(duration_s: float) -> float:
    """A round sampling step giving at most about 5000 times over the experiment.

    Parameters
    ----------
    duration_s
        Length of the experiment, s.

    Returns
    -------
    float
        Step, s (1 min to 1 d).
    """
    for step in _NICE_STEPS_S:
        if duration_s / step <= _TARGET_TIMES:
            return float(step)
    return float(_NICE_STEPS_S[-1])


def sample_times(duration_s: float, step_s: float) -> np.ndarray:
    """Times from 0 to ``duration_s`` every ``step_s``, the end included.

    Parameters
    ----------
    duration_s
        Length of the experiment, s.
    step_s
        Sampling step, s (> 0).

    Returns
    -------
    numpy.ndarray
        ``ceil(duration_s / step_s) + 1`` times, s; the last one is exactly ``duration_s``.
    """
    n = math.ceil(duration_s / step_s - 1e-9)
    times = np.arange(n + 1, dtype=np.float64) * step_s
    times[-1] = duration_s
    return times


def setpoint_frame(compiled: CompiledProtocol, times: np.ndarray) -> pd.DataFrame:
    """Sampled setpoints of every chamber as a table with :data:`CSV_COLUMNS`.

    Parameters
    ----------
    compiled
        The compiled protocol.
    times
        Sampling times, s from the start.

    Returns
    -------
    pandas.DataFrame
        ``len(times) × chambers`` rows, time-major (every chamber at the first time, then the
        next time ...).
    """
    import pandas as pd

    from controller.protocol import phase_index_at, sample

    chambers = list(compiled.group_of)
    values = sample(compiled, times)
    n_t, n_c = len(times), len(chambers)
    start = pd.Timestamp(compiled.start_utc)
    stamps = (start + pd.to_timedelta(times, unit="s")).tz_convert("UTC")
    phase_names = np.array([p.name for p in compiled.phases], dtype=object)
    frame: dict[str, Any] = {
        "time": np.repeat(stamps.strftime(_CSV_TIME_FORMAT).to_numpy(), n_c),
        "elapsed_s": np.repeat(times, n_c),
        "chamber": np.tile(np.array(chambers, dtype=object), n_t),
        "group": np.tile(np.array([compiled.group_of[c] for c in chambers], dtype=object), n_t),
        "phase": np.repeat(phase_names[phase_index_at(compiled, times)], n_c),
    }
    for key, column in _SETPOINT_COLUMN.items():
        stacked = np.stack([values[c][key] for c in chambers], axis=1) if chambers else None
        frame[column] = (
            stacked.reshape(-1) if stacked is not None else np.empty(0, dtype=np.float64)
        )
    return pd.DataFrame(frame, columns=list(CSV_COLUMNS))


def _clip(channel: Channel, duration_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Breakpoints of ``channel`` within the experiment, with exact values at both ends."""
    t, v = np.asarray(channel.t_s), np.asarray(channel.v)
    inside = (t > 0.0) & (t < duration_s)
    ends = channel.evaluate(np.array([0.0, duration_s]))
    return (
        np.concatenate(([0.0], t[inside], [duration_s])),
        np.concatenate(([ends[0]], v[inside], [ends[1]])),
    )


def preview_data(loaded: LoadedProtocol, compiled: CompiledProtocol) -> PreviewData:
    """Turn a compiled protocol into what the preview figure draws.

    Parameters
    ----------
    loaded
        The protocol as loaded (labels).
    compiled
        Its compiled form.

    Returns
    -------
    PreviewData
        Lines per group (first chamber, plus replicates that differ), phases, events,
        sampling times and a footnote naming day 0.
    """
    from controller.plots import EventBar, GroupLines, PreviewData
    from controller.protocol import VARIABLE_KEYS

    groups: list[GroupLines] = []
    duration = compiled.duration_s
    for group, role in compiled.roles.items():
        chambers = tuple(c for c, g in compiled.group_of.items() if g == group)
        lines: dict[str, list[tuple[np.ndarray, np.ndarray]]] = {}
        for key in VARIABLE_KEYS.values():
            drawn: list[Channel] = []
            for chamber in chambers:
                channel = compiled.channels[chamber].get(key)
                if channel is None or any(channel == other for other in drawn):
                    continue
                drawn.append(channel)
                lines.setdefault(key, []).append(_clip(channel, duration))
        label = loaded.protocol.groups[group].label or group
        kinds = {e.kind for e in compiled.events if group in e.groups}
        kind = next(iter(kinds)) if len(kinds) == 1 else ("compound" if kinds else None)
        role_name = str(getattr(role, "value", role))
        groups.append(GroupLines(group, label, role_name, chambers, lines, kind))
    offset = compiled.utc_offset
    local = (compiled.start_utc + offset).replace(tzinfo=None)
    sign = "-" if offset < timedelta(0) else "+"
    minutes = abs(int(offset.total_seconds())) // 60
    footnote = (
        f"Day 0 = {local:%Y-%m-%d %H:%M} local time (UTC{sign}{minutes // 60:02d}:"
        f"{minutes % 60:02d}). Setpoints of {loaded.path.name} compiled by squall "
        f"{__version__}. Bands: phases; dotted lines: start and end of each event."
    )
    return PreviewData(
        title=loaded.protocol.title,
        duration_s=duration,
        groups=tuple(groups),
        phases=tuple((p.name, p.t0_s, p.t1_s) for p in compiled.phases),
        events=tuple(
            EventBar(e.name, e.kind, tuple(e.groups), e.t0_s, e.t1_s) for e in compiled.events
        ),
        sampling_s=tuple(s.t_s for s in compiled.sampling),
        footnote=footnote,
    )


def _parse_step(text: str | None, duration_s: float) -> float:
    from controller.protocol import parse_duration

    if text is None:
        return default_step(duration_s)
    try:
        step = float(parse_duration(text))
    except ValueError as exc:
        raise SquallError(str(exc), field="--step") from None
    if not math.isfinite(step) or step < 1.0:
        raise SquallError(f"{text!r} is too short; use a step of at least 1 s", field="--step")
    return step


def _check_output(path: Path, suffixes: tuple[str, ...], what: str) -> None:
    if path.suffix.lower() not in suffixes:
        raise SquallError(
            f"cannot tell the {what} format from {path.name!r}; end the name with "
            f"{', '.join(suffixes)}",
            file=path,
        )
    if not path.parent.is_dir():
        raise SquallError(f"folder {str(path.parent)!r} does not exist", file=path)


def write_preview(
    loaded: LoadedProtocol,
    compiled: CompiledProtocol,
    figure_path: Path,
    csv_path: Path | None = None,
    step_s: float | None = None,
) -> int:
    """Write the figure (and the CSV); return the number of CSV rows written (0 without CSV).

    Parameters
    ----------
    loaded
        The protocol as loaded.
    compiled
        Its compiled form.
    figure_path
        Figure file (.png, .pdf, .svg).
    csv_path
        Setpoints CSV file, or ``None``.
    step_s
        CSV sampling step, s; default :func:`default_step`.

    Returns
    -------
    int
        Rows written to the CSV, excluding the header.
    """
    from controller.plots import render_preview

    _check_output(figure_path, FIGURE_SUFFIXES, "figure")
    if csv_path is not None:
        _check_output(csv_path, (".csv",), "table")
    step = step_s if step_s is not None else default_step(compiled.duration_s)
    times = sample_times(compiled.duration_s, step)
    rows = len(times) * len(compiled.group_of)
    if csv_path is not None and rows > MAX_CSV_ROWS:
        raise SquallError(
            f"a step of {step:g} s gives {rows:,} rows (limit {MAX_CSV_ROWS:,}); use a larger step",
            field="--step",
        )
    try:
        render_preview(preview_data(loaded, compiled), figure_path)
    except OSError as exc:
        raise SquallError(
            f"cannot write the figure: {exc.strerror or exc}", file=figure_path
        ) from None
    if csv_path is None:
        return 0
    frame = setpoint_frame(compiled, times)
    try:
        frame.to_csv(csv_path, index=False, float_format="%.6g", lineterminator="\n")
    except OSError as exc:
        raise SquallError(f"cannot write the table: {exc.strerror or exc}", file=csv_path) from None
    return len(frame)


def run(args: argparse.Namespace) -> int:
    """Run ``squall preview``; return the exit code."""
    start = parse_start(args.start)
    loaded = load_protocol(args.protocol)
    start_utc, _ = resolve_start(loaded.protocol, start)
    compiled = compile_loaded(loaded, start_utc)
    step = _parse_step(args.step, compiled.duration_s)
    rows = write_preview(loaded, compiled, args.output, args.csv, step)
    print(f"wrote {args.output}")
    if args.csv is not None:
        print(f"wrote {args.csv} ({rows} rows: {len(compiled.group_of)} chambers every {step:g} s)")
    return 0


def register(sub: Any) -> None:
    """Add the ``preview`` subcommand to the ``squall`` parser."""
    parser = sub.add_parser(
        "preview",
        help="plot a protocol's setpoints (and write them as CSV)",
        description="Compile a protocol and draw its setpoints: one panel per variable, one "
        "line per group, phases shaded, events marked. Optionally write the sampled "
        "setpoints of every chamber as CSV.",
    )
    parser.add_argument("protocol", type=Path, help="protocol file (TOML)")
    parser.add_argument(
        "-o", "--output", type=Path, required=True, help="figure file (.png, .pdf or .svg)"
    )
    parser.add_argument("--csv", type=Path, default=None, help="also write setpoints to CSV")
    parser.add_argument(
        "--start",
        default=None,
        metavar="ISO8601",
        help="when the run starts, with zone (default as in 'squall check')",
    )
    parser.add_argument(
        "--step",
        default=None,
        metavar="DURATION",
        help="CSV sampling step, e.g. 10min or PT5M (default: a round step giving about "
        "5000 times)",
    )
    parser.set_defaults(handler=run)
