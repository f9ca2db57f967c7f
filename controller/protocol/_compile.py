"""The protocol compiler: a validated :class:`Protocol` becomes per-chamber setpoint channels.

Rules
-----
- Pure: the only input besides the protocol is the CSV files it names, read relative to
  ``base_dir``; no clock is read (``start_utc`` is passed in).
- Per group and variable, phases are laid end to end. Within a phase the blocks run in order;
  a block without a duration that is last fills the rest of the phase. When the blocks end
  before the phase does, or a phase does not give the variable, the last block continues:
  hold/step/ramp keep their final value, daily-cycle/daylight/climatology/replay keep running.
  Blocks that last longer than their phase are an error at the program's field path.
- Events overlay the programs of their groups, per variable:

  * temperature: the program plus the SUM of all event anomalies (heatwave +, cold spell -,
    storm cooling -);
  * light: the program times the PRODUCT of all event light factors (storm shading);
  * flow: the LARGEST of the program and every event's flow (storm pulses).

  Overlapping events (a compound event) combine by the same rules, in any order.
- Accuracy: temperature and flow daily cycles within 0.01 (°C, cm s-1); half-sine and
  sun-driven daylight within 0.3 % of the day's peak; storm light factor within 0.001; the
  product of light and factor refined to within 0.1 % of the program's highest PAR. Holds,
  steps, ramps, event anomalies, flow pulses, climatology (linear between local noons) and
  replay (linear between records) are exact.
- Local time: elapsed 0 is ``start_utc``; local clock = UTC + ``utc_offset``. The calendar date
  the experiment represents is ``site.reference_date`` (if given) at the start's local clock
  time, otherwise the start's local date.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import UTC, datetime, time
from pathlib import Path
from types import MappingProxyType
from typing import Any

import numpy as np

from controller.errors import SquallError
from controller.protocol._blocks import VARIABLE_RANGES, Variable
from controller.protocol._channel import Channel, add, concat, constant, maximum, multiply, window
from controller.protocol._compiled import (
    VARIABLE_KEYS,
    CompiledProtocol,
    EventSpan,
    PhaseSpan,
    SamplingMark,
    Source,
)
from controller.protocol._generators import EventEffect, compile_event, seas_channel
from controller.protocol._models import Protocol
from controller.protocol._series import SeriesFiles
from controller.protocol._shapes import (
    DAY_S,
    daily_cycle,
    half_sine_days,
    scenario_utc,
    sun_days,
    sun_scale,
)
from controller.science.light import half_sine_peak_for_dli

__all__ = ["CYCLE_TOL", "LIGHT_TOL_FRACTION", "compile_protocol"]

CYCLE_TOL = 0.01
"""Largest tessellation error of daily cycles, variable's unit (°C or cm s-1)."""
LIGHT_TOL_FRACTION = 0.003
"""Largest tessellation error of daylight curves, fraction of the day's peak PAR."""
PRODUCT_TOL_FRACTION = 0.001
"""Largest error of light x factor products, fraction of the program's highest PAR."""
_EPS = 1e-6


@dataclass
class _Context:
    protocol: Protocol
    files: SeriesFiles
    tod0_s: float
    scenario_start_local: datetime
    scenario_utc0: datetime


@dataclass
class _Running:
    """The block whose shape continues when a program stops early or a phase omits it."""

    block: Any
    anchor_s: float
    where: str
    mean: float | None = None


@dataclass
class _Cursor:
    group: str
    variable: Variable
    t: float = 0.0
    value: float | None = None
    running: _Running | None = None
    pieces: list[Channel] = field(default_factory=list)
    sources: list[Source] = field(default_factory=list)

    def put(self, piece: Channel, where: str) -> None:
        self.pieces.append(piece)
        self.sources.append(
            Source(self.group, VARIABLE_KEYS[self.variable], piece.t_s[0], piece.t_s[-1], where)
        )
        self.value = float(piece.v[-1])
        self.t = float(piece.t_s[-1])


def _seconds(clock: time) -> float:
    return clock.hour * 3600.0 + clock.minute * 60.0


def _check_range(variable: Variable, piece: Channel, where: str) -> None:
    lo, hi, unit = VARIABLE_RANGES[variable]
    if piece.v.min() < lo - 1e-9 or piece.v.max() > hi + 1e-9:
        raise SquallError(
            f"{variable.value} reaches {piece.v.min():.3g}..{piece.v.max():.3g} {unit} here, "
            f"outside {lo:g}..{hi:g} {unit}",
            field=where,
        )


def _emit(ctx: _Context, cursor: _Cursor, running: _Running, t0: float, t1: float) -> Channel:
    """Shape of a running time-dependent block over ``[t0, t1]``."""
    block, variable = running.block, cursor.variable
    if block.kind == "daily-cycle":
        return daily_cycle(
            block.mean_value,
            block.amplitude_value,
            _seconds(block.warmest_at),
            ctx.tod0_s,
            t0,
            t1,
            CYCLE_TOL,
        )
    if block.kind == "daylight":
        site = ctx.protocol.site
        if block.source == "sun":
            assert site is not None  # validated
            scale = sun_scale(
                ctx.scenario_utc0,
                ctx.tod0_s,
                running.anchor_s,
                site.latitude_deg,
                site.longitude_deg,
                peak=block.peak,
                dli_mol_m2_d=block.dli_mol_m2_d,
            )
            return sun_days(
                scale,
                ctx.scenario_utc0,
                t0,
                t1,
                site.latitude_deg,
                site.longitude_deg,
                LIGHT_TOL_FRACTION,
            )
        sunrise, sunset = _seconds(block.sunrise), _seconds(block.sunset)
        peak = block.peak
        if peak is None:
            peak = _peak_for_dli(block.dli_mol_m2_d, sunset - sunrise)
        return half_sine_days(peak, sunrise, sunset, ctx.tod0_s, t0, t1, LIGHT_TOL_FRACTION)
    if block.kind == "climatology":
        clim = ctx.files.climatology(
            table=block.table,
            series=block.series,
            baseline_years=block.baseline_years,
            percentile=90.0,
            where=f"{running.where}.{'table' if block.table else 'series'}",
        )
        piece = window(seas_channel(clim, ctx.scenario_start_local, t0, t1), t0, t1)
        _check_range(variable, piece, running.where)
        return piece
    if block.kind == "replay":
        return _replay(ctx, running, t0, t1)
    raise AssertionError(f"not a running block: {block.kind}")


def _peak_for_dli(dli: float, length_s: float) -> float:
    """Peak of the tessellated half-sine that delivers ``dli`` exactly (trapezoid of n pieces)."""
    n = max(2, int(np.ceil(np.pi / np.sqrt(8.0 * LIGHT_TOL_FRACTION))))
    n += n % 2
    trapezoid_of_sine = (np.pi / n) / np.tan(np.pi / (2 * n))  # exact integral would be 2
    return half_sine_peak_for_dli(dli, length_s / 3600.0) * 2.0 / trapezoid_of_sine


def _replay(ctx: _Context, running: _Running, t0: float, t1: float) -> Channel:
    block = running.block
    series = ctx.files.replay(block.series, block.column, f"{running.where}.series")
    origin = block.from_
    if origin is None:
        origin_us = series.times[0]
    else:
        if not isinstance(origin, datetime):
            origin = datetime.combine(origin, time())
        if origin.tzinfo is not None:
            origin = origin.astimezone(UTC).replace(tzinfo=None)
        origin_us = np.datetime64(origin, "us")
    rel = (series.times - origin_us).astype(np.float64) / 1e6 + running.anchor_s
    if rel[0] > t0 + _EPS or rel[-1] < t1 - _EPS:
        need = (t1 - running.anchor_s) / DAY_S
        raise SquallError(
            f"the series {block.series!r} does not cover the replay: it needs "
            f"{need:.3g} d of records from {np.datetime_as_string(origin_us, 's')}, but has "
            f"{np.datetime_as_string(series.times[0], 's')} to "
            f"{np.datetime_as_string(series.times[-1], 's')}",
            field=f"{running.where}.series",
        )
    raw = Channel(rel, series.values)
    piece = window(raw, t0, t1)
    if running.mean is None:
        length = max(t1 - t0, _EPS)
        running.mean = float(np.trapezoid(piece.v, piece.t_s) / length) if t1 > t0 else piece.v[0]
    mean = running.mean
    piece = Channel(piece.t_s, mean + block.scale * (piece.v - mean) + block.offset_c)
    _check_range(Variable.TEMPERATURE, piece, running.where)
    return piece


def _block_length(cursor: _Cursor, block: Any, fill_until: float | None, where: str) -> float:
    if block.kind == "ramp":
        if cursor.value is None:
            raise SquallError("a ramp needs a value to start from", field=where)
        change = abs(block.to - cursor.value)
        if block.duration is not None:
            return float(block.duration)
        if block.rate_per_h is not None:
            return change / block.rate_per_h * 3600.0
        return change / block.rate_per_day * DAY_S
    duration = getattr(block, "duration", None)
    if duration is not None:
        return float(duration)
    if fill_until is not None:
        return max(fill_until - cursor.t, 0.0)
    return 0.0  # a step without duration inside a sequence is instant


def _run_block(
    ctx: _Context,
    cursor: _Cursor,
    block: Any,
    where: str,
    phase_end: float,
    phase_name: str,
    fill: bool,
) -> None:
    if block.kind == "repeat":
        start = cursor.t
        for _ in range(block.times):
            for j, inner in enumerate(block.blocks):
                _run_block(ctx, cursor, inner, f"{where}.blocks.{j}", phase_end, phase_name, False)
        cursor.sources.append(
            Source(cursor.group, VARIABLE_KEYS[cursor.variable], start, cursor.t, where)
        )
        return
    t0 = cursor.t
    length = _block_length(cursor, block, phase_end if fill else None, where)
    t1 = t0 + length
    if t1 > phase_end + _EPS:
        raise SquallError(
            f"the blocks of this program run until {t1 / DAY_S:.4g} d after the start, past the "
            f"end of phase {phase_name!r} at {phase_end / DAY_S:.4g} d; shorten the blocks or "
            "lengthen the phase",
            field=where,
        )
    if block.kind == "hold":
        cursor.running = None
        cursor.put(constant(block.value, t0, t1), where)
    elif block.kind == "step":
        cursor.running = None
        cursor.put(constant(block.to, t0, t1), where)
    elif block.kind == "ramp":
        cursor.running = None
        start = cursor.value
        piece = Channel(np.array([t0, t1]), np.array([start, block.to]))
        cursor.put(piece if t1 > t0 else constant(block.to, t0), where)
    else:
        cursor.running = _Running(block, t0, where)
        cursor.put(_emit(ctx, cursor, cursor.running, t0, t1), where)


def _continue(ctx: _Context, cursor: _Cursor, t1: float) -> None:
    if cursor.value is None or t1 <= cursor.t + _EPS:
        return
    if cursor.running is None:
        where = cursor.sources[-1].field
        cursor.put(constant(cursor.value, cursor.t, t1), where)
    else:
        cursor.put(_emit(ctx, cursor, cursor.running, cursor.t, t1), cursor.running.where)


def _program(ctx: _Context, group: str, variable: Variable) -> tuple[Channel | None, list[Source]]:
    cursor = _Cursor(group, variable)
    t = 0.0
    for index, phase in enumerate(ctx.protocol.phases):
        end = t + phase.duration
        blocks, loc = phase.program_for(group, variable)
        if blocks is not None:
            cursor.t = t
            base = ".".join(str(part) for part in ("phases", index, *loc))
            for j, block in enumerate(blocks):
                last = j == len(blocks) - 1
                _run_block(ctx, cursor, block, f"{base}.{j}", end, phase.name, last)
        _continue(ctx, cursor, end)
        t = end
    if not cursor.pieces:
        return None, []
    return concat(cursor.pieces), cursor.sources


def _combine(
    group: str,
    variable: Variable,
    program: Channel | None,
    overlays: list[tuple[Channel, EventSpan]],
) -> Channel | None:
    if not overlays:
        return program
    if program is None:
        span = overlays[0][1]
        raise SquallError(
            f"{span.kind} {span.name!r} changes {variable.value} of group {group!r}, which has "
            f"no {variable.value} program; give the group one",
            field=span.field,
        )
    channels = [program] + [channel for channel, _ in overlays]
    if variable is Variable.TEMPERATURE:
        return add(channels)
    if variable is Variable.LIGHT:
        tol = max(PRODUCT_TOL_FRACTION * float(program.v.max()), 1e-9)
        return multiply(channels, tol)
    return maximum(channels)


def _start(protocol: Protocol, start_utc: datetime | None) -> datetime:
    if start_utc is None:
        if isinstance(protocol.begins, datetime):
            return protocol.begins.astimezone(UTC)
        raise ValueError('start_utc is needed: the protocol begins "on-launch"')
    if start_utc.tzinfo is None:
        raise ValueError("start_utc must be zone-aware")
    return start_utc.astimezone(UTC)


def compile_protocol(
    protocol: Protocol,
    *,
    start_utc: datetime | None = None,
    base_dir: Path = Path("."),
    rig: Any = None,
) -> CompiledProtocol:
    """Compile a validated protocol into per-chamber setpoint channels (pure).

    Parameters
    ----------
    protocol
        The validated protocol.
    start_utc
        When elapsed time 0 is (zone-aware); default the protocol's ``begins`` datetime.
    base_dir
        Folder the protocol's CSV paths are relative to (the protocol file's folder).
    rig
        Optional :class:`controller.rig.Rig`; when given, :func:`check_against_rig` runs and
        its findings are attached.

    Returns
    -------
    CompiledProtocol
        Channels per chamber and variable (°C, µmol photons m-2 s-1, cm s-1), spans, marks.

    Raises
    ------
    SquallError
        With the protocol field path: blocks longer than their phase, events past the end,
        CSV series that do not cover what is asked, values outside physical ranges.
    """
    start = _start(protocol, start_utc)
    local = start.replace(tzinfo=None) + protocol.utc_offset
    tod0 = (local - datetime.combine(local.date(), time())).total_seconds()
    reference = protocol.site.reference_date if protocol.site else None
    scenario_local = datetime.combine(reference or local.date(), local.time())
    ctx = _Context(
        protocol,
        SeriesFiles(Path(base_dir)),
        tod0,
        scenario_local,
        scenario_utc(scenario_local, protocol.utc_offset),
    )
    duration = protocol.duration_s
    phases = tuple(PhaseSpan(name, t0, t1) for name, t0, t1 in protocol.phase_spans())

    programs: dict[str, dict[Variable, Channel | None]] = {}
    sources: list[Source] = []
    for group in protocol.groups:
        programs[group] = {}
        for variable in Variable:
            channel, found = _program(ctx, group, variable)
            programs[group][variable] = channel
            sources += found

    effects: list[EventEffect] = []
    depth = protocol.site.depth_m if protocol.site else None
    for index, event in enumerate(protocol.events):
        t0 = protocol.resolve_time(event.starts) + event.offset
        name = event.name or f"{event.kind} {index + 1}"
        span = EventSpan(name, event.kind, tuple(event.groups), t0, t0, f"events.{index}")
        effect = compile_event(
            event,
            span,
            files=ctx.files,
            scenario_start_local=scenario_local,
            duration_s=duration,
            depth_m=depth,
        )
        effects.append(effect)

    combined: dict[str, dict[str, Channel]] = {}
    baselines: dict[str, Channel] = {}
    for group in protocol.groups:
        mine = [e for e in effects if group in e.span.groups]
        overlays = {
            Variable.TEMPERATURE: [(e.anomaly, e.span) for e in mine if e.anomaly is not None],
            Variable.LIGHT: [(e.factor, e.span) for e in mine if e.factor is not None],
            Variable.FLOW: [(e.flow, e.span) for e in mine if e.flow is not None],
        }
        combined[group] = {}
        for variable in Variable:
            channel = _combine(group, variable, programs[group][variable], overlays[variable])
            for _, span in overlays[variable]:
                sources.append(
                    Source(group, VARIABLE_KEYS[variable], span.t0_s, span.t1_s, span.field)
                )
            if channel is not None:
                combined[group][VARIABLE_KEYS[variable]] = channel
        firsts = [e.baseline for e in mine if e.baseline is not None]
        if firsts:
            baselines[group] = firsts[0]

    compiled = CompiledProtocol(
        title=protocol.title,
        start_utc=start,
        utc_offset=protocol.utc_offset,
        scenario_start_local=scenario_local,
        duration_s=duration,
        phases=phases,
        events=tuple(e.span for e in effects),
        marks=tuple(sorted((m for e in effects for m in e.marks), key=lambda m: m.t0_s)),
        sampling=tuple(
            SamplingMark(protocol.resolve_time(s.at), s.what, f"sampling.{i}")
            for i, s in enumerate(protocol.sampling)
        ),
        group_of=MappingProxyType(protocol.chambers()),
        roles=MappingProxyType({name: g.role for name, g in protocol.groups.items()}),
        channels=MappingProxyType(
            {
                chamber: MappingProxyType(combined[group])
                for chamber, group in protocol.chambers().items()
            }
        ),
        programs=MappingProxyType(
            {
                group: MappingProxyType(
                    {VARIABLE_KEYS[v]: c for v, c in channels.items() if c is not None}
                )
                for group, channels in programs.items()
            }
        ),
        baselines=MappingProxyType(baselines),
        sources=tuple(sources),
    )
    _check_combined(compiled)
    if rig is not None:
        from controller.protocol._derived import check_against_rig

        compiled = replace(compiled, findings=tuple(check_against_rig(compiled, rig)))
    return compiled


def _check_combined(compiled: CompiledProtocol) -> None:
    lo, hi, unit = VARIABLE_RANGES[Variable.TEMPERATURE]
    for group, channels in ((g, compiled.channels[c]) for c, g in compiled.group_of.items()):
        channel = channels.get("temperature_c")
        if channel is None:
            continue
        for bad, limit in ((channel.v > hi + 1e-9, hi), (channel.v < lo - 1e-9, lo)):
            if np.any(bad):
                t = float(channel.t_s[np.argmax(bad)])
                where = compiled.source_at(group, "temperature_c", t)
                raise SquallError(
                    f"with its events, group {group!r} would reach "
                    f"{float(channel.v[np.argmax(bad)]):.3g} {unit} at {t / DAY_S:.3g} d, beyond "
                    f"the physical limit {limit:g} {unit}",
                    field=where,
                )
