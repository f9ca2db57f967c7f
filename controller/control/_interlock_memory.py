"""One chamber's interlock memory kept in place, for a runtime that evaluates every chamber
every tick.

Rules of this module
--------------------
- :class:`InterlockMemory` walks exactly the states :func:`evaluate_values` walks: the same
  conditions, safety, actions, events and times. Only the bookkeeping differs. A quiet
  chamber that stays quiet (the short way at the top of :func:`evaluate_values`) moves its
  memory in place and builds nothing; every other tick goes through
  :func:`evaluate_values` itself on an :class:`InterlockState`, and the memory takes the
  new state over.
- The immutable :class:`InterlockState` is built only when someone asks for it
  (:attr:`InterlockMemory.state`) and kept until the memory moves again.
- Nothing here reads a clock or does I/O: the caller passes readings and the time.
  ``tests/control/test_fast_paths.py`` walks both forms through random faults and operator
  acknowledgements and compares every state, action and event.
"""

from __future__ import annotations

import math

from controller.control._interlock_config import (
    Actions,
    Condition,
    InterlockEvent,
    InterlockLimits,
    Outputs,
    SafetyState,
)
from controller.control._interlocks import (
    _ALL_CLEAR,
    InterlockState,
    acknowledge,
    evaluate_values,
)

__all__ = ["InterlockMemory"]

_INF = math.inf


class InterlockMemory:
    """The interlocks of one chamber with their memory kept in place.

    Parameters
    ----------
    limits
        Thresholds and policies (validated when they were built).
    state
        State to start from, default ``InterlockState()``.

    Attributes
    ----------
    safety
        Overall state after the latest evaluation or acknowledgement.
    actions
        The actions decided by the latest evaluation or acknowledgement; None before any.
    force
        ``actions.force``: outputs to apply instead of the controller's (% each), or None.
    alarm
        ``actions.alarm``: the most severe holding condition, or None.

    Notes
    -----
    The thresholds the short way reads are copied from ``limits`` once, here; ``limits`` is
    frozen and :attr:`limits` cannot be replaced, so the copies cannot go stale. The state
    built by :attr:`state` is kept until the memory moves: every evaluation and
    acknowledgement replaces or drops it, so it never shows an older memory.
    """

    __slots__ = (
        "_anchor_c",
        "_anchor_s",
        "_comm_ok_s",
        "_conditions",
        "_epsilon_c",
        "_frozen_after_s",
        "_frozen_ref_c",
        "_frozen_since_s",
        "_healthy_seen",
        "_last_t_s",
        "_limits",
        "_max_c",
        "_max_rate_c_per_h",
        "_min_c",
        "_quiet",
        "_rate_window_s",
        "_reply_s",
        "_started_s",
        "_state",
        "actions",
        "alarm",
        "force",
        "safety",
    )

    def __init__(self, limits: InterlockLimits, state: InterlockState | None = None) -> None:
        self._limits = limits
        self._min_c, self._max_c = limits.min_temperature_c, limits.max_temperature_c
        self._epsilon_c = limits.frozen_epsilon_c
        self._frozen_after_s = limits.frozen_after_s
        self._rate_window_s = limits.rate_window_s
        self._max_rate_c_per_h = limits.max_rate_c_per_h
        self._take(InterlockState() if state is None else state)

    @property
    def limits(self) -> InterlockLimits:
        """Thresholds and policies (read-only)."""
        return self._limits

    @property
    def state(self) -> InterlockState:
        """The memory as an :class:`InterlockState` (condition states, safety, times in s)."""
        state = self._state
        if state is None:
            # only the short way drops the kept state, and it leaves a quiet memory: nothing
            # holds, a healthy evaluation was seen; every field given, none to validate
            # (as _interlocks._remember builds its states)
            state = object.__new__(InterlockState)
            object.__setattr__(
                state,
                "__dict__",
                {
                    "conditions": _ALL_CLEAR,
                    "safety": self.safety,
                    "started_s": self._started_s,
                    "last_t_s": self._last_t_s,
                    "last_reply_s": self._reply_s,
                    "frozen_ref_c": self._frozen_ref_c,
                    "frozen_since_s": self._frozen_since_s,
                    "rate_anchor_c": self._anchor_c,
                    "rate_anchor_s": self._anchor_s,
                    "last_comm_ok_s": self._comm_ok_s,
                    "healthy_seen": True,
                    "actions": self.actions,
                },
            )
            self._state = state
        return state

    def _take(self, state: InterlockState) -> None:
        """Make ``state`` the memory (and keep it as the state to show)."""
        self._state = state
        self._conditions = state.conditions
        self.safety: SafetyState = state.safety
        self._started_s = state.started_s
        self._last_t_s = state.last_t_s
        self._reply_s = state.last_reply_s
        self._frozen_ref_c = state.frozen_ref_c
        self._frozen_since_s = state.frozen_since_s
        self._anchor_c = state.rate_anchor_c
        self._anchor_s = state.rate_anchor_s
        self._comm_ok_s = state.last_comm_ok_s
        self._healthy_seen = state.healthy_seen
        actions = state.actions
        self.actions: Actions | None = actions
        self.force: Outputs | None = None if actions is None else actions.force
        self.alarm: Condition | None = None if actions is None else actions.alarm
        # the short way's precondition, as evaluate_values tests it (and a previous
        # evaluation to compare t_s with)
        self._quiet = (
            state.conditions is _ALL_CLEAR
            and state.healthy_seen
            and actions is not None
            and state.last_t_s is not None
        )

    def evaluate(
        self,
        temperature_c: float | None,
        level_ok: bool | None,
        comm_ok: bool | None,
        e_stop: bool | None,
        t_s: float,
    ) -> tuple[InterlockEvent, ...]:
        """Evaluate one tick, as :func:`evaluate_values`, and keep the outcome.

        Parameters
        ----------
        temperature_c
            Probe reading, °C, or None (no reply).
        level_ok
            Level switch, dimensionless, as :attr:`Readings.level_ok`.
        comm_ok
            Device exchange, dimensionless, as :attr:`Readings.comm_ok`.
        e_stop
            Emergency stop, dimensionless, as :attr:`Readings.e_stop`.
        t_s
            Clock time, s, finite and not before the previous evaluation.

        Returns
        -------
        tuple of InterlockEvent
            The events (raised, cleared, latched, safety changed) with their reasons; the new
            safety and actions are in :attr:`safety`, :attr:`actions`, :attr:`force` and
            :attr:`alarm`.

        Raises
        ------
        ValueError
            ``t_s`` is not finite or is before the previous evaluation; nothing is changed.
        """
        # The short way of evaluate_values, written on the memory (see the reasons there):
        # a quiet chamber, t_s finite and not before the previous evaluation (NaN fails),
        # the devices answered, level not low, E-stop not pressed, the probe inside the
        # temperature limits, and then neither frozen nor moving too fast.
        if (
            self._quiet
            and self._last_t_s <= t_s < _INF  # type: ignore[operator]  # set when quiet
            and comm_ok
            and level_ok is not False
            and not e_stop
            and temperature_c is not None
            and self._min_c < temperature_c < self._max_c  # NaN fails
        ):
            frozen_ref, frozen_since = self._frozen_ref_c, self._frozen_since_s
            if frozen_ref is None or abs(temperature_c - frozen_ref) > self._epsilon_c:
                frozen_ref, frozen_since = temperature_c, t_s
            anchor_s = self._anchor_s
            renew = anchor_s is None or t_s - anchor_s >= self._rate_window_s
            anchor_c = self._anchor_c
            fast = (
                renew
                and anchor_s is not None
                and anchor_c is not None
                and abs((temperature_c - anchor_c) / (t_s - anchor_s) * 3600.0)
                >= self._max_rate_c_per_h
            )
            if not fast and t_s - frozen_since < self._frozen_after_s:  # type: ignore[operator]
                if renew:
                    self._anchor_c, self._anchor_s = temperature_c, t_s
                self._frozen_ref_c, self._frozen_since_s = frozen_ref, frozen_since
                if self._started_s is None:
                    self._started_s = t_s
                self._last_t_s = self._reply_s = self._comm_ok_s = t_s
                self._state = None  # the memory moved: a state is built again when asked
                return ()
        new, _, events = evaluate_values(
            self.state, temperature_c, level_ok, comm_ok, e_stop, self._limits, t_s
        )
        self._take(new)
        return events

    def acknowledge(self, condition: Condition, t_s: float) -> tuple[InterlockEvent, ...]:
        """Acknowledge one latching condition (an operator action), as :func:`acknowledge`.

        Parameters
        ----------
        condition
            The condition acknowledged.
        t_s
            Clock time, s.

        Returns
        -------
        tuple of InterlockEvent
            The acknowledgement event(s).

        Raises
        ------
        IllegalInterlockEvent
            Nothing to acknowledge; the memory is unchanged.
        """
        new, _, events = acknowledge(self.state, condition, self._limits, t_s)
        self._take(new)
        return events
