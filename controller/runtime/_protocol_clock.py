"""The protocol clock: elapsed protocol time, which stops while the run is held.

Rules of this module
--------------------
- Protocol time (``elapsed_s``) says where the run stands in the protocol; clock time says
  when. Without holds or skips they advance together. A hold freezes protocol time (the
  setpoints stay what they were), a resume lets it run on from where it stood, and a skip
  sets it to the start of another phase.
- The clock is an anchor: protocol time ``elapsed_s`` at clock time ``t_s``, and whether it
  is held. Between changes, protocol time is ``elapsed_s + (t − t_s)`` while running and
  ``elapsed_s`` while held. Nothing here reads a clock: callers pass the clock time.
- Illegal requests (hold while held, resume while running, a time before the anchor) raise
  ``ValueError`` and change nothing; the control loop turns them into operator errors.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["ProtocolClock", "StartPoint"]


@dataclass(frozen=True, kw_only=True)
class StartPoint:
    """Where a control loop's protocol time starts.

    Attributes
    ----------
    elapsed_s
        Protocol time, s: at the loop's start for a new run (0); for a resumed run, at the
        log's last sample.
    held
        Whether protocol time starts frozen (a run interrupted during a hold).
    last_utc_s
        None for a new run; for a resumed run, UTC of the log's last sample, POSIX s. The
        loop then starts at ``elapsed_s + (its start − last_utc_s)`` (``elapsed_s`` if held)
        and records the gap as an event.
    """

    elapsed_s: float = 0.0
    held: bool = False
    last_utc_s: float | None = None

    def __post_init__(self) -> None:
        if not (math.isfinite(self.elapsed_s) and self.elapsed_s >= 0):
            raise ValueError(f"elapsed_s must be finite and not negative, got {self.elapsed_s!r}")
        if self.last_utc_s is not None and not math.isfinite(self.last_utc_s):
            raise ValueError(f"last_utc_s must be finite, got {self.last_utc_s!r}")

    def elapsed_at(self, utc_s: float) -> float:
        """Protocol time when the loop starts at a wall time.

        Parameters
        ----------
        utc_s
            The loop's start, UTC POSIX s.

        Returns
        -------
        float
            Protocol time, s.
        """
        if self.last_utc_s is None or self.held:
            return self.elapsed_s
        return self.elapsed_s + max(0.0, utc_s - self.last_utc_s)


class ProtocolClock:
    """Elapsed protocol time as a function of clock time.

    Parameters
    ----------
    t_s
        Clock time of the anchor, s.
    elapsed_s
        Protocol time at that clock time, s, 0 or more.
    held
        Whether protocol time starts held (a run interrupted during a hold).
    """

    def __init__(self, t_s: float, elapsed_s: float = 0.0, *, held: bool = False) -> None:
        if not (math.isfinite(t_s) and math.isfinite(elapsed_s) and elapsed_s >= 0):
            raise ValueError(f"bad anchor: clock time {t_s!r} s, protocol time {elapsed_s!r} s")
        self._t_s = float(t_s)
        self._elapsed_s = float(elapsed_s)
        self._held = bool(held)

    @property
    def held(self) -> bool:
        """Whether protocol time is frozen."""
        return self._held

    def elapsed(self, t_s: float) -> float:
        """Protocol time at a clock time.

        Parameters
        ----------
        t_s
            Clock time, s (not before the anchor).

        Returns
        -------
        float
            Protocol time, s.
        """
        if self._held:
            return self._elapsed_s
        return self._elapsed_s + (t_s - self._t_s)

    def clock_time_of(self, elapsed_s: float) -> float:
        """Clock time at which a running protocol clock reaches a protocol time.

        Parameters
        ----------
        elapsed_s
            Protocol time, s.

        Returns
        -------
        float
            Clock time, s; ``inf`` while held (it is never reached).
        """
        if self._held:
            return math.inf
        return self._t_s + (elapsed_s - self._elapsed_s)

    def _check(self, t_s: float) -> None:
        if not (math.isfinite(t_s) and t_s >= self._t_s - 1e-9):
            raise ValueError(f"clock time {t_s!r} s is before the anchor at {self._t_s!r} s")

    def hold(self, t_s: float) -> float:
        """Freeze protocol time.

        Parameters
        ----------
        t_s
            Clock time of the hold, s.

        Returns
        -------
        float
            The protocol time it is frozen at, s.
        """
        self._check(t_s)
        if self._held:
            raise ValueError("the protocol clock is held already")
        self._elapsed_s = self.elapsed(t_s)
        self._t_s = t_s
        self._held = True
        return self._elapsed_s

    def resume(self, t_s: float) -> float:
        """Let protocol time run again from where it stands.

        Parameters
        ----------
        t_s
            Clock time of the resume, s.

        Returns
        -------
        float
            The protocol time it runs on from, s.
        """
        self._check(t_s)
        if not self._held:
            raise ValueError("the protocol clock is not held")
        self._t_s = t_s
        self._held = False
        return self._elapsed_s

    def jump(self, t_s: float, elapsed_s: float) -> None:
        """Set protocol time (a skip); a held clock stays held at the new time.

        Parameters
        ----------
        t_s
            Clock time of the jump, s.
        elapsed_s
            The new protocol time, s, 0 or more.
        """
        self._check(t_s)
        if not (math.isfinite(elapsed_s) and elapsed_s >= 0):
            raise ValueError(f"protocol time must be finite and not negative, got {elapsed_s!r}")
        self._t_s = t_s
        self._elapsed_s = float(elapsed_s)
