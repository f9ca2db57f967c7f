"""The protocol's setpoints on the loop's tick grid, evaluated a chunk of ticks at a time.

Rules of this module
--------------------
- Setpoints are evaluated with the compiled protocol's vectorised
  :func:`~controller.protocol.sample` for a chunk of upcoming ticks at once, which costs
  about as much as one scalar evaluation, and kept as one :class:`Target` per chamber and
  tick, built with the chunk. Chambers and ticks with the same setpoints share one (it is
  immutable): a group's chambers follow one program, and a hold repeats itself. Uncontrolled
  variables (NaN in samples) become ``None``.
- The chunk is a grid of protocol times ``origin + j·period``. Without holds or skips tick k
  is due at protocol time k·period (:meth:`SetpointTable.at`); a hold, a skip or a resumed
  run moves the protocol clock off that grid, and :meth:`SetpointTable.at_elapsed` starts a
  new grid at the first time that is not on the current one (a held clock asks for the same
  time again and again, which is the new grid's first point).
- :class:`Lookahead` answers what the incubation cycle needs to know about the schedule:
  protocol time until each chamber's light next switches, and until the phase ends.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from controller.control import light_change_times
from controller.protocol import CompiledProtocol, phase_index_at, sample
from controller.runtime._decide import Target

__all__ = ["Lookahead", "SetpointTable"]

#: Largest distance of a protocol time from a grid point that still counts as on it, s.
_ON_GRID_S = 1e-6


class SetpointTable:
    """Setpoints and phase of every protocol chamber at tick k.

    Parameters
    ----------
    compiled
        The compiled protocol.
    chambers
        Chamber ids to evaluate.
    period_s
        Tick period, s.
    chunk_ticks
        Ticks evaluated at once, dimensionless.
    """

    def __init__(
        self,
        compiled: CompiledProtocol,
        chambers: Sequence[str],
        period_s: float,
        chunk_ticks: int = 512,
    ) -> None:
        if chunk_ticks < 1:
            raise ValueError("chunk_ticks must be at least 1")
        self._compiled = compiled
        self._chambers = tuple(chambers)
        self._period_s = float(period_s)
        self._chunk = int(chunk_ticks)
        self._k0 = -(2**62)  # no chunk loaded yet
        self._origin_s = 0.0  # protocol time of grid point 0, s
        self._phases: list[str] = []
        # per tick of the chunk, per chamber; rebuilt with the chunk (the next chunk, or a
        # hold, skip or resume moving protocol time off the grid), never kept past it
        self._targets: list[tuple[Target, ...]] = []

    def _load(self, k: int, origin_s: float = 0.0) -> None:
        k0 = k - k % self._chunk
        times = origin_s + (k0 + np.arange(self._chunk, dtype=np.float64)) * self._period_s
        names = [p.name for p in self._compiled.phases]
        self._phases = [names[i] for i in phase_index_at(self._compiled, times).tolist()]
        samples = sample(self._compiled, times)
        n = len(self._chambers)
        if n == 0:
            self._targets = [()] * self._chunk
        else:
            # (chamber, tick, [°C, PAR, cm/s]); equal bit patterns share one Target (so 0.0
            # and -0.0 stay apart), NaN (uncontrolled) becomes None
            grid = np.stack(
                [
                    np.stack([samples[c][q] for q in ("temperature_c", "par", "flow_cm_s")], -1)
                    for c in self._chambers
                ]
            ).astype(np.float64, copy=False)
            bits = grid.reshape(-1, 3).view(np.int64)
            order = np.lexsort(bits.T[::-1])
            ordered = bits[order]
            first = np.empty(len(order), dtype=bool)  # the first of each run of equal rows
            first[0] = True
            np.any(ordered[1:] != ordered[:-1], axis=1, out=first[1:])
            index = np.empty(len(order), dtype=np.int64)
            index[order] = np.cumsum(first) - 1
            unique = ordered[first]
            made = []
            for t, par, flow in unique.view(np.float64).tolist():
                made.append(
                    Target(
                        temperature_c=None if math.isnan(t) else t,
                        par=None if math.isnan(par) else par,
                        flow_cm_s=None if math.isnan(flow) else flow,
                    )
                )
            by_tick = index.reshape(n, self._chunk).T.tolist()
            self._targets = [tuple(map(made.__getitem__, row)) for row in by_tick]
        self._k0 = k0
        self._origin_s = origin_s

    def at_elapsed(self, elapsed_s: float) -> tuple[str, Mapping[str, Target]]:
        """Phase and setpoints at any protocol time.

        Parameters
        ----------
        elapsed_s
            Protocol time, s from the protocol's start, 0 or more.

        Returns
        -------
        tuple
            As :meth:`at`.
        """
        if not (math.isfinite(elapsed_s) and elapsed_s >= 0):
            raise ValueError(f"protocol time must be finite and not negative, got {elapsed_s}")
        j = round((elapsed_s - self._origin_s) / self._period_s)
        on_grid = abs(self._origin_s + j * self._period_s - elapsed_s) <= _ON_GRID_S
        if not (on_grid and self._k0 <= j < self._k0 + self._chunk):
            self._load(0, elapsed_s)
            j = 0
        return self._row(j)

    def at(self, k: int) -> tuple[str, Mapping[str, Target]]:
        """Phase and setpoints at tick ``k``.

        Parameters
        ----------
        k
            Tick number, dimensionless, 0 or more (due at elapsed ``k·period_s``).

        Returns
        -------
        tuple
            Phase name, and per chamber its :class:`Target` (°C, µmol photons m⁻² s⁻¹,
            cm s⁻¹; None where uncontrolled).
        """
        if k < 0:
            raise ValueError(f"tick number must not be negative, got {k}")
        if self._origin_s != 0.0 or not self._k0 <= k < self._k0 + self._chunk:
            self._load(k)
        return self._row(k)

    def _row(self, k: int) -> tuple[str, Mapping[str, Target]]:
        i = k - self._k0
        return self._phases[i], dict(zip(self._chambers, self._targets[i], strict=True))


class Lookahead:
    """When the light next switches (per chamber) and when the phase ends, from any time.

    Parameters
    ----------
    compiled
        The compiled protocol.
    chambers
        Chamber ids to answer for.
    light_threshold_par
        PAR setpoint above which it is light, by chamber, µmol photons m⁻² s⁻¹.
    """

    def __init__(
        self,
        compiled: CompiledProtocol,
        chambers: Sequence[str],
        light_threshold_par: Mapping[str, float],
    ) -> None:
        self._changes: dict[str, np.ndarray] = {}
        for chamber in chambers:
            channel = compiled.channels.get(chamber, {}).get("par")
            if channel is None:  # uncontrolled light: always dark, never switches
                self._changes[chamber] = np.empty(0)
            else:
                self._changes[chamber] = light_change_times(
                    channel.t_s, channel.v, light_threshold_par.get(chamber, 0.0)
                )
        self._phase_ends = np.array([p.t1_s for p in compiled.phases], dtype=np.float64)

    def light_change_in_s(self, chamber: str, elapsed_s: float) -> float:
        """Protocol time until the chamber's light next switches, s (``inf`` if never).

        Parameters
        ----------
        chamber
            Chamber id.
        elapsed_s
            Protocol time now, s.

        Returns
        -------
        float
            Seconds of protocol time to the next switch strictly after ``elapsed_s``.
        """
        times = self._changes[chamber]
        i = int(np.searchsorted(times, elapsed_s, side="right"))
        return float(times[i] - elapsed_s) if i < times.size else math.inf

    def phase_ends_in_s(self, elapsed_s: float) -> float:
        """Protocol time until the phase in force ends, s.

        Parameters
        ----------
        elapsed_s
            Protocol time now, s.

        Returns
        -------
        float
            Seconds to the end of the phase containing ``elapsed_s`` (0 at or after the
            protocol's end).
        """
        i = int(np.searchsorted(self._phase_ends, elapsed_s, side="right"))
        return float(self._phase_ends[i] - elapsed_s) if i < self._phase_ends.size else 0.0
