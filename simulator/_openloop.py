"""Open-loop programs: a whole schedule of drives integrated at once (and the hand-over of
the rack's state to and from the block integrator).

Rule: running a schedule gives the same trajectories (to rounding) as doing, for every row,
``set_outputs`` on every chamber and ``advance`` to the next switch: the same sub-step grid,
the same dead-time arrivals, the same faults (sensor faults freeze and actuator faults act at
their edges). Time between fault edges is integrated by
:func:`simulator._batch.integrate_block`, except where stepping through the rack itself is
the better way: while a chamber leaks (its volume changes every minute), and where the rows
are long (100 sub-steps or more on average), since the rack's per-segment kernel is already
vectorised over the sub-steps of a segment and then costs less. Nothing here reads a clock or
draws a random number.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from simulator._actuators import effective_drives
from simulator._batch import BlockEnd, BlockStart, integrate_block
from simulator._physics import ageing_factor

if TYPE_CHECKING:
    from simulator._rack import Rack

__all__ = ["OpenLoopRun", "OpenLoopSchedule", "run_open_loop"]

F = NDArray[np.float64]

_EPS_S = 1e-9
_MIN_ROW_S = 1e-6
_STEP_THROUGH_SUBSTEPS = 100  # pieces this long (on average) are cheaper stepped one by one
_ACTUATORS = ("heater_pct", "chiller_pct", "lamp_pct", "pump_pct")


def _drives(value: ArrayLike | None, name: str) -> F | None:
    if value is None:
        return None
    arr = np.array(value, dtype=float)
    if arr.ndim != 2:
        raise ValueError(f"{name} must be a 2-D array (rows × chambers), got shape {arr.shape}")
    if not ((arr >= 0.0) & (arr <= 100.0)).all():
        raise ValueError(f"{name} must lie within 0–100 % everywhere")
    arr.setflags(write=False)
    return arr


@dataclass(frozen=True, slots=True, kw_only=True)
class OpenLoopSchedule:
    """A piecewise-constant drive program for every chamber of a rack.

    Row k holds from ``switch_s[k]`` until ``switch_s[k + 1]`` (the last row until
    ``end_s``); times count from the rack's present when the schedule is run.

    Attributes
    ----------
    switch_s
        When each row takes effect, s, shape ``(K,)``: starts at 0, increases by more than
        1 µs each row.
    end_s
        When the program ends, s (more than 1 µs after the last switch).
    heater_pct, chiller_pct, lamp_pct, pump_pct
        Drives per row and chamber (rig order), %, shape ``(K, N)``; None leaves that
        actuator as commanded before the program.
    """

    switch_s: F
    end_s: float
    heater_pct: F | None = None
    chiller_pct: F | None = None
    lamp_pct: F | None = None
    pump_pct: F | None = None

    def __post_init__(self) -> None:
        switch = np.array(self.switch_s, dtype=float)
        if switch.ndim != 1 or len(switch) == 0:
            raise ValueError("switch_s must be a non-empty 1-D array of times in s")
        if switch[0] != 0.0:
            raise ValueError(f"switch_s must start at 0 s, got {switch[0]!r}")
        end = float(self.end_s)
        bounds = np.append(switch, end)
        if not np.isfinite(bounds).all() or (np.diff(bounds) <= _MIN_ROW_S).any():
            raise ValueError("switch_s and end_s must be finite and increase by more than 1 µs")
        switch.setflags(write=False)
        object.__setattr__(self, "switch_s", switch)
        object.__setattr__(self, "end_s", end)
        for name in _ACTUATORS:
            arr = _drives(getattr(self, name), name)
            if arr is not None and arr.shape[0] != len(switch):
                raise ValueError(f"{name} has {arr.shape[0]} rows, switch_s has {len(switch)}")
            object.__setattr__(self, name, arr)

    @classmethod
    def uniform(
        cls,
        step_s: float,
        *,
        heater_pct: ArrayLike | None = None,
        chiller_pct: ArrayLike | None = None,
        lamp_pct: ArrayLike | None = None,
        pump_pct: ArrayLike | None = None,
    ) -> OpenLoopSchedule:
        """A program whose rows each last ``step_s`` seconds.

        Parameters
        ----------
        step_s
            Length of every row, s (> 1 µs).
        heater_pct, chiller_pct, lamp_pct, pump_pct
            Drives per row and chamber, %, shape ``(K, N)``; at least one is needed.

        Returns
        -------
        OpenLoopSchedule
            Rows at 0, step_s, 2·step_s, …, ending at K·step_s.
        """
        given = [
            np.asarray(a) for a in (heater_pct, chiller_pct, lamp_pct, pump_pct) if a is not None
        ]
        if not given:
            raise ValueError("a schedule needs at least one actuator's drives")
        rows = given[0].shape[0]
        return cls(
            switch_s=np.arange(rows, dtype=float) * step_s,
            end_s=rows * step_s,
            heater_pct=heater_pct,  # type: ignore[arg-type]
            chiller_pct=chiller_pct,  # type: ignore[arg-type]
            lamp_pct=lamp_pct,  # type: ignore[arg-type]
            pump_pct=pump_pct,  # type: ignore[arg-type]
        )


@dataclass(frozen=True, slots=True, kw_only=True)
class OpenLoopRun:
    """The true state at the end of every row of a program.

    Attributes
    ----------
    t_s
        Rack time at the end of each row, s, shape ``(K,)``.
    temperature_c
        Water temperature of each chamber, °C, shape ``(K, N)``.
    o2_umol_l
        Dissolved O2, µmol L⁻¹, shape ``(K, N)``.
    par
        PAR at the community, µmol photons m⁻² s⁻¹, shape ``(K, N)``.
    probe_temperature_c
        The temperature probe's lagged value (before noise, offset and faults), °C.
    optode_o2_umol_l
        The optode's lagged value (before noise, offset, drift and faults), µmol L⁻¹.
    """

    t_s: F
    temperature_c: F
    o2_umol_l: F
    par: F
    probe_temperature_c: F
    optode_o2_umol_l: F


def run_open_loop(rack: Rack, schedule: OpenLoopSchedule) -> OpenLoopRun:
    """Run a schedule on a rack from its present time (see :meth:`simulator.Rack.run_open_loop`).

    Parameters
    ----------
    rack
        The rack; it ends at the schedule's end with the last row commanded.
    schedule
        The program.

    Returns
    -------
    OpenLoopRun
        The state at the end of every row.
    """
    n_ch = len(rack.chamber_ids)
    for name in _ACTUATORS:
        arr = getattr(schedule, name)
        if arr is not None and arr.shape[1] != n_ch:
            raise ValueError(f"{name} has {arr.shape[1]} columns, the rack has {n_ch} chambers")
    rack._sync()
    t_start = rack.t_s
    starts = t_start + schedule.switch_s
    ends = np.append(starts[1:], t_start + schedule.end_s)
    rows_total = len(starts)
    current = rack._act.commands()
    drives = [
        np.broadcast_to(current[q], (rows_total, n_ch))
        if getattr(schedule, name) is None
        else getattr(schedule, name)
        for q, name in enumerate(_ACTUATORS)
    ]
    out = np.empty((5, n_ch, rows_total))
    edges = rack._book.edges(t_start, float(ends[-1]))
    bounds = [t_start, *edges, float(ends[-1])]
    for b0, b1 in itertools.pairwise(bounds):
        first = int(np.searchsorted(starts, b0 + _EPS_S, side="right")) - 1
        last = int(np.searchsorted(starts, b1 - _EPS_S, side="left"))
        rows = slice(first, last)
        piece_t = np.concatenate(([rack.t_s], starts[first + 1 : last], [b1]))
        queued = starts[rows] >= b0 - _EPS_S
        sample_to = np.where(ends[rows] <= b1 + _EPS_S, np.arange(first, last), -1)
        mean_substeps = (b1 - b0) / (len(piece_t) - 1) / rack._p.physics_step_s
        if rack._book.masks.leaking or mean_substeps >= _STEP_THROUGH_SUBSTEPS:
            _step_through(rack, drives, first, piece_t, queued, sample_to, out)
            continue
        eff = effective_drives(rack._p, *(d[rows] for d in drives), rack._book.masks)
        done = integrate_block(
            rack._p, rack._table, rack._bio, _block_start(rack), piece_t, eff, queued,
            sample_to, out,
        )  # fmt: skip
        _block_end(rack, done, np.stack([d[last - 1] for d in drives]), b1)
    return OpenLoopRun(
        t_s=ends,
        temperature_c=out[0].T,
        o2_umol_l=out[1].T,
        par=out[2].T,
        probe_temperature_c=out[3].T,
        optode_o2_umol_l=out[4].T,
    )


def _step_through(
    rack: Rack,
    drives: list[F],
    first: int,
    piece_t: F,
    queued: NDArray[np.bool_],
    sample_to: NDArray[np.intp],
    out: F,
) -> None:
    """Step a block through the rack itself, piece by piece (used while a chamber leaks)."""
    ids = rack.chamber_ids
    for q in range(len(piece_t) - 1):
        if queued[q]:
            row = first + q
            for i, cid in enumerate(ids):
                rack.set_outputs(
                    cid,
                    heater_pct=float(drives[0][row, i]),
                    chiller_pct=float(drives[1][row, i]),
                    lamp_pct=float(drives[2][row, i]),
                    pump_pct=float(drives[3][row, i]),
                )
        rack.advance(float(piece_t[q + 1]) - rack.t_s)
        if sample_to[q] >= 0:
            out[:, :, sample_to[q]] = rack._sample()


def _block_start(rack: Rack) -> BlockStart:
    """The state the open-loop integrator starts a block from (now)."""
    act = rack._act
    key = (act.flow_version, rack._volume_version)
    if key != rack._water_key:  # e.g. volumes changed by a leak that just ended
        rack._new_water(key)
    return BlockStart(
        water=rack._water,
        water_w=act.water_w,
        lines=act.pending(),
        sent_w=act.sent_w(),
        lamp_s=rack._lamp_s(),
        volume_l=rack._volume,
        capacity_j_k=rack._node_capacity,
    )


def _block_end(rack: Rack, done: BlockEnd, cmd: F, t_s: float) -> None:
    """Take over the state the open-loop integrator reached at ``t_s`` (s), then settle."""
    act = rack._act
    energy = act.energy_j(rack._t) + done.heat_j
    heat = rack._heat
    heat.close(
        (np.array(heat.flush_loss_j()) + done.flush_loss_j).tolist(),
        (np.array(heat.excess_k_s) + done.excess_k_s).tolist(),
        heat.span_s + done.span_s,
    )
    act.load(cmd, done.water_w, done.lines, rack._book, energy, t_s)
    rack._t = t_s
    water = done.water
    if np.array_equal(water.warmth, act.lit):
        water = water._replace(warmth=act.lit)
    rack._water = water
    rack._lamp_base_s = np.asarray(done.lamp_s, dtype=float).tolist()
    rack._lamp_since_s = t_s
    rack._lamp_lit = act.lit
    rack._lamp_version = act.lamp_version
    rack._age_steps.clear()
    age = ageing_factor(done.lamp_s / 3600.0, rack._p.ageing_frac_per_1000_h)
    rack._par_warm = np.asarray(np.array(act.new_lamp_par) * age, dtype=float)
    rack._configure_water((act.flow_version, rack._volume_version))
    rack._settle()
