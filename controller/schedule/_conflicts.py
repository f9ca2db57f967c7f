"""Conflict checks of the schedule: pure functions of the rig, the compiled protocols and the
live bookings (no files, no clock, no store).

Rules
-----
- Order of the checks, and of the conflicts returned: time (a chamber booked twice, the rig
  busy), the protocol against the rig (unknown chambers, chamber limits), then resources over
  the set of bookings live at each moment (bath programs, each node's own heater and chiller,
  shared plant, lamp circuit).
- One experiment per rig at a time (v1): any overlap in time with another live experiment of
  the rig is a conflict (:func:`booking_conflicts`). The resource checks are written for any
  number of simultaneous bookings; in v1 the set live beside a new experiment is empty, so
  they judge the experiment's own protocol over its whole time course.
- The physics of the loads and the grid that cannot miss a peak are in
  :mod:`controller.schedule._loads`.
- Every message says what collides and when, in UTC and the rig's local zone
  (``rig.maintenance.timezone``).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from datetime import UTC, datetime, timedelta
from types import SimpleNamespace
from typing import TYPE_CHECKING, Any

import numpy as np
import numpy.typing as npt

from controller.schedule._loads import (
    LampLoad,
    NodeLoad,
    lamp_loads,
    load_grid,
    node_loads,
    sides,
)
from controller.schedule._models import (
    Booking,
    Conflict,
    ConflictKind,
    ResourcePeak,
    chamber_span,
    format_span,
    format_when,
)

if TYPE_CHECKING:
    from controller.protocol import CompiledProtocol
    from controller.rig import Rig

__all__ = [
    "bath_conflicts",
    "booking_conflicts",
    "find_conflicts",
    "power_conflicts",
    "protocol_conflicts",
]

FloatArray = npt.NDArray[np.float64]
_EPS_C = 1e-6


def _utc(epoch_s: float) -> datetime:
    return datetime.fromtimestamp(round(epoch_s), tz=UTC)


def _group_paths(compiled: CompiledProtocol) -> dict[str, str]:
    counters: dict[str, int] = {}
    paths: dict[str, str] = {}
    for chamber, group in compiled.group_of.items():
        index = counters.get(group, 0)
        counters[group] = index + 1
        paths[chamber] = f"groups.{group}.chambers.{index}"
    return paths


def booking_conflicts(candidate: Booking, others: Sequence[Booking], rig: Rig) -> list[Conflict]:
    """A chamber booked twice, or the rig busy with another experiment (v1: one at a time).

    Parameters
    ----------
    candidate
        The experiment being placed (no unit).
    others
        Live experiments of the same rig (the candidate itself excluded) (no unit).
    rig
        The rig (its name and local zone for messages) (no unit).

    Returns
    -------
    list of Conflict
        One per other experiment that overlaps the candidate in time, in time order (no unit).
    """
    zone = rig.maintenance.timezone
    found: list[Conflict] = []
    for other in sorted(others, key=lambda b: (b.start_utc, b.label)):
        if not candidate.overlaps(other):
            continue
        span = format_span(other.start_utc, other.end_utc, zone)
        ids = (other.experiment_id,) if other.experiment_id else ()
        at = max(candidate.start_utc, other.start_utc)
        shared = [c for c in candidate.chambers if c in other.chambers]
        if shared:
            what = (
                f"chamber {shared[0]} is"
                if len(shared) == 1
                else (f"chambers {chamber_span(shared)} are")
            )
            message = f"{what} booked by {other.label} {span}"
            kind = ConflictKind.CHAMBER_BOOKED
        else:
            message = (
                f"rig {rig.name!r} is busy with {other.label} {span} (chambers "
                f"{chamber_span(other.chambers)}); serve runs one experiment per rig at a time — "
                "put both treatments in one protocol"
            )
            kind = ConflictKind.RIG_BUSY
        found.append(Conflict(kind, message, at, experiments=ids))
    return found


def protocol_conflicts(candidate: Booking, rig: Rig) -> list[Conflict]:
    """Chambers the rig lacks, and programs beyond a chamber's limits (time-independent).

    The limits are those ``squall check --rig`` applies (temperature range, ramp rate, PAR,
    flow), through :func:`controller.protocol.check_against_rig`.

    Parameters
    ----------
    candidate
        The experiment, compiled (no unit).
    rig
        The rig (no unit).

    Returns
    -------
    list of Conflict
        Unknown chambers first, then limit errors, each with the protocol field to blame (no unit).
    """
    from controller.protocol import Severity, check_against_rig

    compiled = candidate.compiled
    if compiled is None:
        raise ValueError("protocol_conflicts needs the compiled protocol")
    paths = _group_paths(compiled)
    known = {chamber.id: chamber for chamber in rig.chambers}
    found = [
        Conflict(
            ConflictKind.UNKNOWN_CHAMBER,
            f"chamber {chamber!r} is not in rig {rig.name!r} (it has {', '.join(known)})",
            field=paths[chamber],
        )
        for chamber in compiled.group_of
        if chamber not in known
    ]
    # The rig is shown to check_against_rig once per limit, with the other limits lifted and
    # without baths (judged by bath_conflicts over every live booking): each error it returns
    # is then known to concern that limit, whose first violation can be dated.
    zone = rig.maintenance.timezone
    for limit in _LIMITS:
        view = SimpleNamespace(
            name=rig.name,
            chambers=[
                SimpleNamespace(id=c.id, bath=None, limits=_only(c.limits, limit))
                for c in rig.chambers
            ],
        )
        for finding in check_against_rig(compiled, view):
            if finding.severity is not Severity.ERROR or finding.chamber not in known:
                continue
            message = f"chamber {finding.chamber}: {' '.join(finding.message.split())}"
            t_s = _first_violation(compiled, finding.chamber, known[finding.chamber].limits, limit)
            at = None
            if t_s is not None:
                at = compiled.start_utc + timedelta(seconds=round(t_s))
                message += f"; first at {format_when(at, zone)}"
            found.append(Conflict(ConflictKind.CHAMBER_LIMITS, message, at, finding.field))
    return found


_LIFTED = {
    "min_temperature_c": -math.inf,
    "max_temperature_c": math.inf,
    "max_ramp_c_per_h": math.inf,
    "max_par": math.inf,
    "max_flow_cm_s": math.inf,
}
_LIMITS = ("temperature", "max_ramp_c_per_h", "max_par", "max_flow_cm_s")
"""The limits judged one at a time ("temperature" is the range, both ends)."""


def _only(limits: Any, limit: str) -> SimpleNamespace:
    """The chamber's limits with all but one lifted."""
    keep = ("min_temperature_c", "max_temperature_c") if limit == "temperature" else (limit,)
    return SimpleNamespace(
        **{name: getattr(limits, name) if name in keep else lifted
           for name, lifted in _LIFTED.items()}
    )  # fmt: skip


def _first_above(t: FloatArray, v: FloatArray, ceiling: float) -> float | None:
    """First time a piecewise-linear table (times s, values) rises above ``ceiling``, s."""
    over = np.flatnonzero(v > ceiling * (1 + 1e-9) + 1e-12)
    if over.size == 0:
        return None
    k = int(over[0])
    if k == 0 or t[k] == t[k - 1]:
        return float(t[k])
    return float(t[k - 1] + (ceiling - v[k - 1]) / (v[k] - v[k - 1]) * (t[k] - t[k - 1]))


def _first_violation(
    compiled: CompiledProtocol, chamber: str, limits: Any, limit: str
) -> float | None:
    """When a chamber's program first breaks one limit, s from the start (None: never)."""
    channels = compiled.channels[chamber]
    if limit == "temperature":
        channel = channels.get("temperature_c")
        if channel is None:
            return None
        times = [
            _first_above(channel.t_s, channel.v, limits.max_temperature_c),
            _first_above(channel.t_s, -channel.v, -limits.min_temperature_c),
        ]
        found = [x for x in times if x is not None]
        return min(found) if found else None
    if limit == "max_ramp_c_per_h":
        channel = channels.get("temperature_c")
        if channel is None:
            return None
        dt, dv = np.diff(channel.t_s), np.diff(channel.v)
        steep = np.flatnonzero((dt > 0) & (np.abs(dv) > limits.max_ramp_c_per_h / 3600.0 * dt))
        return float(channel.t_s[steep[0]]) if steep.size else None
    channel = channels.get("par" if limit == "max_par" else "flow_cm_s")
    return None if channel is None else _first_above(channel.t_s, channel.v, getattr(limits, limit))


# -- baths -----------------------------------------------------------------------------------


def _first_difference(
    a: tuple[Booking, str], b: tuple[Booking, str]
) -> tuple[float, float, float | None, float | None] | None:
    """Where two chambers' temperature programs first differ while both run.

    Returns
    -------
    tuple or None
        The first instant they differ (epoch s), an instant where the difference shows (epoch
        s) and both temperatures there (°C, ``None`` = uncontrolled); ``None`` if they agree.
    """
    lo = max(a[0].start_utc, b[0].start_utc).timestamp()
    hi = min(a[0].end_utc, b[0].end_utc).timestamp()
    if lo >= hi:
        return None
    starts, temps = [], []
    for booking, chamber in (a, b):
        assert booking.compiled is not None
        starts.append(booking.start_utc.timestamp())
        temps.append(booking.compiled.channels[chamber].get("temperature_c"))
    if temps[0] is None and temps[1] is None:
        return None
    parts = [np.array([lo, hi])]
    parts += [t0 + temp.t_s for t0, temp in zip(starts, temps, strict=True) if temp is not None]
    grid = np.unique(np.concatenate(parts))
    grid = grid[(grid >= lo) & (grid <= hi)]
    left: list[FloatArray | None] = []
    right: list[FloatArray | None] = []
    for t0, temp in zip(starts, temps, strict=True):
        values = sides(temp, grid - t0) if temp is not None else None
        left.append(values[0] if values is not None else None)
        right.append(values[1] if values is not None else None)
    if left[0] is None or left[1] is None or right[0] is None or right[1] is None:
        shown = [None if r is None else float(r[0]) for r in right]
        return lo, lo, shown[0], shown[1]
    differ_right = np.abs(right[0] - right[1]) > _EPS_C
    differ_left = np.abs(left[0] - left[1]) > _EPS_C
    for k in range(grid.size - 1):
        if differ_right[k]:
            return grid[k], grid[k], float(right[0][k]), float(right[1][k])
        if differ_left[k + 1]:
            return grid[k], grid[k + 1], float(left[0][k + 1]), float(left[1][k + 1])
    return None


def _temperature_text(value: float | None) -> str:
    return "uncontrolled" if value is None else f"{value:.4g} °C"


def bath_conflicts(bookings: Sequence[Booking], rig: Rig) -> list[Conflict]:
    """Chambers of one bath (one body of water) given different temperature programs.

    Parameters
    ----------
    bookings
        Compiled bookings live together, the experiment being placed first; a single
        booking is checked against itself (no unit).
    rig
        The rig (no unit).

    Returns
    -------
    list of Conflict
        At most one per bath: the first chamber whose program departs from that of the
        bath's first chamber, with the first instant they differ.
    """
    zone = rig.maintenance.timezone
    found: list[Conflict] = []
    for bath, members in rig.thermal_nodes().items():
        if rig.chamber(members[0]).bath is None:
            continue
        users = [
            (booking, chamber)
            for booking in bookings
            if booking.compiled is not None
            for chamber in members
            if chamber in booking.compiled.group_of
        ]
        for other in users[1:]:
            difference = _first_difference(users[0], other)
            if difference is None:
                continue
            first, shown, ref_value, value = difference
            (ref_booking, ref_chamber), (booking, chamber) = users[0], other
            same = booking is ref_booking
            names = [
                c if same else f"{c} ({b.label})"
                for b, c in ((ref_booking, ref_chamber), (booking, chamber))
            ]
            when = format_when(_utc(first), zone)
            if shown != first:
                when = f"from {when} (at {format_when(_utc(shown), zone)}: "
            else:
                when = f"at {when} ("
            message = (
                f"chambers {names[0]} and {names[1]} share bath {bath!r} (one body of water) "
                f"but get different temperature programs: {when}{ref_chamber} "
                f"{_temperature_text(ref_value)}, {chamber} {_temperature_text(value)}); put "
                "chambers of one bath in one group or give them the same temperature"
            )
            field = None
            for b, c in ((booking, chamber), (ref_booking, ref_chamber)):
                if b.experiment_id is None and b.compiled is not None:
                    field = _group_paths(b.compiled)[c]
                    break
            ids = tuple(
                dict.fromkeys(b.experiment_id for b in (ref_booking, booking) if b.experiment_id)
            )
            found.append(Conflict(ConflictKind.BATH_PROGRAM, message, _utc(first), field, ids))
            break
    return found


# -- heat and lamp power ---------------------------------------------------------------------


def _over(
    grid: FloatArray, left: FloatArray, right: FloatArray, capacity_w: float
) -> tuple[int, str] | None:
    """First grid instant (index, side) where a load is above capacity, or ``None``."""
    limit = capacity_w * (1 + 1e-9) + 1e-9
    for k in range(grid.size):
        if k > 0 and left[k] > limit:
            return k, "left"
        if k < grid.size - 1 and right[k] > limit:
            return k, "right"
    return None


def _peak(left: FloatArray, right: FloatArray) -> tuple[int, float]:
    """Grid index and value of the largest one-sided value (W)."""
    k_left, k_right = int(np.argmax(left)), int(np.argmax(right))
    if left[k_left] > right[k_right]:
        return k_left, float(left[k_left])
    return k_right, float(right[k_right])


def _parts_text(parts: dict[str, float], unit: str = "W") -> str:
    shown = sorted(((-v, k) for k, v in parts.items() if v >= 0.5))
    return ", ".join(f"{k} {-v:.0f} {unit}" for v, k in shown)


class _Evaluated:
    """Loads with their values on the grid, seen from both sides (W)."""

    def __init__(
        self,
        loads: Sequence[NodeLoad | LampLoad],
        grid: FloatArray,
        values: tuple[list[FloatArray], list[FloatArray]] | None = None,
    ) -> None:
        self.loads = list(loads)
        self.grid = grid
        if values is None:
            values = (
                [load.watts(grid, "left") for load in loads],
                [load.watts(grid, "right") for load in loads],
            )
        self.left, self.right = values

    def subset(self, indices: Sequence[int]) -> _Evaluated:
        """The same grid with only some of the loads."""
        return _Evaluated(
            [self.loads[i] for i in indices],
            self.grid,
            ([self.left[i] for i in indices], [self.right[i] for i in indices]),
        )


def _crossing(
    evaluated: _Evaluated,
    shares: Callable[[FloatArray], FloatArray],
    capacity_w: float,
    lo_s: float,
    hi_s: float,
) -> float:
    """First instant in (lo_s, hi_s] (epoch s) where the load passes capacity, by bisection.

    On one piece of the grid every load is linear (or a parabola within tol_w of its chord),
    and Σ max(±P, 0) is convex, so it passes the capacity once on its way up.
    """

    def total(t_s: float) -> float:
        x = np.array([t_s])
        return float(sum(shares(load.watts(x, "right"))[0] for load in evaluated.loads))

    for _ in range(60):
        if hi_s - lo_s < 0.5:
            break
        mid = (lo_s + hi_s) / 2.0
        if total(mid) > capacity_w:
            hi_s = mid
        else:
            lo_s = mid
    return hi_s


def _resource(
    name: str,
    capacity_w: float,
    labels: Sequence[str],
    shares: Callable[[FloatArray], FloatArray],
    evaluated: _Evaluated,
    zone: str,
    kind: ConflictKind,
    ids: tuple[str, ...],
    what: str,
) -> tuple[Conflict | None, ResourcePeak | None]:
    """Judge one resource: ``shares`` maps one load's signed watts to what it asks of it."""
    if not labels:
        return None, None
    grid = evaluated.grid
    left_parts = [shares(w) for w in evaluated.left]
    right_parts = [shares(w) for w in evaluated.right]
    left, right = np.sum(left_parts, axis=0), np.sum(right_parts, axis=0)
    k_peak, peak_w = _peak(left, right)
    peak = ResourcePeak(name, peak_w, capacity_w, _utc(float(grid[k_peak])))
    over = _over(grid, left, right, capacity_w)
    if over is None:
        return None, peak
    k, side = over
    parts_at = left_parts if side == "left" else right_parts
    total = float((left if side == "left" else right)[k])
    breakdown: dict[str, float] = {}
    for label, part in zip(labels, parts_at, strict=True):
        breakdown[label] = breakdown.get(label, 0.0) + float(part[k])
    at = _utc(float(grid[k]))
    first = at
    if side == "left" and right[k - 1] <= capacity_w:
        first = _utc(_crossing(evaluated, shares, capacity_w, grid[k - 1], grid[k]))
    if first < at:
        message = (
            f"{name} would need more than its {capacity_w:.0f} W {what}from "
            f"{format_when(first, zone)}, {total:.0f} W at {format_when(at, zone)}: "
            f"{_parts_text(breakdown)}"
        )
    else:
        message = (
            f"{name} would need {total:.0f} W {what}at {format_when(at, zone)} (capacity "
            f"{capacity_w:.0f} W): {_parts_text(breakdown)}"
        )
    if peak.at_utc != at or peak_w > total + 0.5:
        message += f"; peak {peak_w:.0f} W at {format_when(peak.at_utc, zone)}"
    return Conflict(kind, message, first, experiments=ids), peak


def _load_label(load: NodeLoad | LampLoad, several: bool) -> str:
    name = load.node if isinstance(load, NodeLoad) else load.chamber
    if several and load.booking.experiment_id is not None:
        return f"{name} ({load.booking.experiment_id})"
    return name


def _heating(w: FloatArray) -> FloatArray:
    return np.maximum(w, 0.0)


def _cooling(w: FloatArray) -> FloatArray:
    return np.maximum(-w, 0.0)


def power_conflicts(
    candidate: Booking, others: Sequence[Booking], rig: Rig
) -> tuple[list[Conflict], list[ResourcePeak]]:
    """Heat demand beyond a node's own heater or chiller or a shared plant's capacity, and
    lamp power beyond the lamp circuit's budget, while the candidate runs.

    Parameters
    ----------
    candidate
        The experiment being placed, compiled (no unit).
    others
        Compiled bookings live at some moment of the candidate's span (v1: none).
    rig
        The rig: thermal nodes, ``plants``, ``power.lamp_budget_w`` (no unit).

    Returns
    -------
    tuple of (list of Conflict, list of ResourcePeak)
        Conflicts (nodes, then plants, then lamps), and the peak load on each plant and on
        the lamp circuit (no unit).
    """
    from controller.rig import PlantKind

    zone = rig.maintenance.timezone
    bookings = [candidate, *(o for o in others if o.overlaps(candidate))]
    several = len(bookings) > 1
    ids = tuple(b.experiment_id for b in bookings if b.experiment_id is not None)
    lo, hi = candidate.start_utc.timestamp(), candidate.end_utc.timestamp()
    thermal = node_loads(bookings, rig)
    lamps = lamp_loads(bookings, rig)
    evaluated = _Evaluated(thermal, load_grid(thermal, lo, hi))
    conflicts: list[Conflict] = []
    peaks: list[ResourcePeak] = []
    for node in dict.fromkeys(load.node for load in thermal):
        mine = [i for i, load in enumerate(thermal) if load.node == node]
        first = thermal[mine[0]]
        noun = f"bath {node!r}" if first.is_bath else f"chamber {node}"
        sub = evaluated.subset(mine)
        labels = [_load_label(thermal[i], several) for i in mine]
        for shares, capacity, what, unit in (
            (_heating, first.heater_max_w, "of heating ", "heater"),
            (_cooling, first.chiller_max_w, "of cooling ", "chiller"),
        ):
            conflict, _ = _resource(
                f"{noun}'s own {unit}", capacity, labels, shares, sub, zone,
                ConflictKind.NODE_CAPACITY, ids, what,
            )  # fmt: skip
            if conflict is not None:
                conflicts.append(conflict)
    for plant in rig.plants:
        served = [i for i, load in enumerate(thermal) if load.node in plant.serves]
        sub = evaluated.subset(served)
        shares = _heating if plant.kind is PlantKind.HEATER else _cooling
        conflict, peak = _resource(
            f"{plant.kind.value} {plant.id!r}", plant.capacity_w,
            [_load_label(thermal[i], several) for i in served], shares, sub, zone,
            ConflictKind.PLANT_CAPACITY, ids, "",
        )  # fmt: skip
        conflicts += [conflict] if conflict is not None else []
        peaks += [peak] if peak is not None else []
    budget = rig.power.lamp_budget_w
    if budget is not None and lamps:
        conflict, peak = _resource(
            "the lamp circuit", budget, [_load_label(x, several) for x in lamps],
            lambda w: w, _Evaluated(lamps, load_grid(lamps, lo, hi)), zone,
            ConflictKind.LAMP_BUDGET, ids, "",
        )  # fmt: skip
        conflicts += [conflict] if conflict is not None else []
        peaks += [peak] if peak is not None else []
    return conflicts, peaks


def find_conflicts(
    candidate: Booking, others: Sequence[Booking], rig: Rig
) -> tuple[list[Conflict], list[ResourcePeak]]:
    """Every reason the candidate cannot go where it is asked to, in the order of the rules.

    Parameters
    ----------
    candidate
        The experiment being placed, compiled (no unit).
    others
        The rig's other live experiments (compiled where resource checks need them).
    rig
        The rig (no unit).

    Returns
    -------
    tuple of (list of Conflict, list of ResourcePeak)
        Conflicts (empty = accepted) and the peak loads on shared resources (no unit).
    """
    conflicts = booking_conflicts(candidate, others, rig)
    conflicts += protocol_conflicts(candidate, rig)
    together = [o for o in others if o.compiled is not None and o.overlaps(candidate)]
    conflicts += bath_conflicts([candidate, *together], rig)
    power, peaks = power_conflicts(candidate, together, rig)
    return conflicts + power, peaks
