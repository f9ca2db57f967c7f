"""The one clock: everything in squall that waits or reads time goes through a :class:`Clock`.

Rules of this module
--------------------
- A clock answers three questions: how long since it started (``now_s``), what UTC wall
  time a clock time is (``utc``), and "wake me at clock time t" (``sleep_until``/``sleep``).
  Code that takes a clock never calls ``time.time``, ``time.monotonic`` or ``datetime.now``.
- :class:`RealClock` is monotonic real time. :class:`VirtualClock` is simulated time that
  lives inside a dedicated event loop (:class:`VirtualTimeEventLoop`) whose ``time()`` *is*
  the virtual time. ``asyncio.sleep``, ``asyncio.timeout``, ``asyncio.wait_for`` and
  ``loop.call_later`` therefore run in virtual time too, and control code needs no change:
  the same code runs for a week of real time or a week of simulated time in seconds.
- Virtual time moves in exactly one place: the loop's selector. When the loop has nothing
  ready and asks the selector to wait ``timeout`` seconds for I/O, the selector first polls
  without blocking; if no I/O is ready it either jumps virtual time straight to the next
  deadline (autojump, ``speed=None``) or really waits ``timeout / speed`` seconds while
  virtual time runs at ``speed`` times real time. With no timer pending (``timeout=None``)
  the selector really blocks, so sockets, pipes and other threads still wake the loop.
- A task waiting in :meth:`VirtualClock.sleep_until` is resumed by the timer itself, inside
  the loop turn the timer fires in, when nothing else is ready or due at that instant (the
  usual way, a future's result, costs one more turn of the loop per wake-up: the task's
  step is queued for the next turn). When anything else is ready or due, the task first
  yields once, so it resumes exactly where the usual way would have put it: after the
  callbacks queued before its timer fired and before those queued after.
- While work submitted through ``loop.run_in_executor`` (and so ``asyncio.to_thread``) is
  still running, an autojumping loop does not jump: a busy thread is a task that is not
  waiting. Threads started any other way, and peers in other processes, run on real time and
  are not seen; the virtual time may jump past their replies (the known limit of any
  virtual-time loop). ``io_grace_s`` gives such peers a little real time before each jump.

The design follows the mock clocks of async test frameworks: the loop only asks the clock,
the clock keeps its real time source as an attribute (``_real_time``) so tests can pin it,
and bad input (negative or zero speed, NaN deadline) raises :class:`ValueError`.
"""

from __future__ import annotations

import asyncio
import math
import selectors
import time
from collections.abc import Awaitable, Callable, Coroutine, Generator, Mapping
from concurrent.futures import Executor
from datetime import UTC, datetime, timedelta
from typing import Any, Protocol, TypeVar, runtime_checkable

__all__ = [
    "Clock",
    "RealClock",
    "VirtualClock",
    "VirtualTimeEventLoop",
    "run_with_clock",
]

T = TypeVar("T")

#: Relative tolerance when snapping an autojump onto the exact next deadline, dimensionless.
_SNAP_REL = 1e-12


@runtime_checkable
class Clock(Protocol):
    """What every clock offers; the control loop, drivers and logger take one of these."""

    def now_s(self) -> float:
        """Seconds since the clock started, monotonic, s."""
        ...

    def utc(self, t_s: float | None = None) -> datetime:
        """Aware UTC wall time of clock time ``t_s`` (s; default now)."""
        ...

    async def sleep_until(self, t_s: float) -> None:
        """Return at clock time ``t_s`` (s), at once if that time has passed."""
        ...

    async def sleep(self, dt_s: float) -> None:
        """Return after ``dt_s`` clock seconds (s)."""
        ...


def _check_time(value: float, name: str) -> float:
    """Return ``value`` as float, raising ValueError when it is NaN or infinite."""
    value = float(value)
    if not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number of seconds, got {value!r}")
    return value


def _check_start(start_utc: datetime) -> datetime:
    """Return ``start_utc`` converted to UTC; refuse naive datetimes."""
    if not isinstance(start_utc, datetime):
        raise TypeError(f"start_utc must be a datetime, got {type(start_utc).__name__}")
    if start_utc.tzinfo is None or start_utc.utcoffset() is None:
        raise ValueError("start_utc must be timezone-aware (for example datetime(..., tzinfo=UTC))")
    return start_utc.astimezone(UTC)


class RealClock:
    """Monotonic real time, the clock of a real run.

    Parameters
    ----------
    start_utc
        Wall time at clock time 0, aware datetime; default the UTC time at construction.

    Notes
    -----
    ``now_s`` counts from construction on ``time.monotonic``, the same source that
    asyncio's default event loop uses for ``loop.time()``, so the clock never steps when the
    system wall clock is corrected. ``utc(t)`` is ``start_utc + t``; over weeks it can drift
    from the system's NTP-disciplined wall time by the monotonic clock's rate error.
    """

    def __init__(self, start_utc: datetime | None = None) -> None:
        #: Real time source, s; an attribute so tests can pin it.
        self._monotonic: Callable[[], float] = time.monotonic
        self._t0 = self._monotonic()
        self.start_utc: datetime = (
            datetime.now(UTC) if start_utc is None else _check_start(start_utc)
        )

    def now_s(self) -> float:
        """Seconds since construction.

        Returns
        -------
        float
            Monotonic clock time, s.
        """
        return self._monotonic() - self._t0

    def utc(self, t_s: float | None = None) -> datetime:
        """Wall time of a clock time.

        Parameters
        ----------
        t_s
            Clock time, s; default now.

        Returns
        -------
        datetime
            Aware UTC datetime ``start_utc + t_s``.
        """
        t = self.now_s() if t_s is None else _check_time(t_s, "t_s")
        return self.start_utc + timedelta(seconds=t)

    async def sleep_until(self, t_s: float) -> None:
        """Wait until clock time ``t_s``.

        Parameters
        ----------
        t_s
            Deadline in clock time, s; a past deadline returns after one loop turn.
        """
        t_s = _check_time(t_s, "t_s")
        await asyncio.sleep(max(0.0, t_s - self.now_s()))

    async def sleep(self, dt_s: float) -> None:
        """Wait ``dt_s`` seconds.

        Parameters
        ----------
        dt_s
            Duration, s, not negative.
        """
        dt_s = _check_time(dt_s, "dt_s")
        if dt_s < 0:
            raise ValueError(f"dt_s must not be negative, got {dt_s!r}")
        await asyncio.sleep(dt_s)

    def new_event_loop(self) -> asyncio.AbstractEventLoop:
        """Return a fresh standard asyncio event loop for :func:`run_with_clock`."""
        return asyncio.new_event_loop()


class VirtualClock:
    """Simulated time: jumps to the next deadline, or runs at ``speed`` times real time.

    Parameters
    ----------
    start_utc
        Wall time at clock time 0, aware datetime.
    speed
        ``None`` for autojump (virtual time jumps to the next deadline as soon as no task
        can run and no I/O is ready); otherwise virtual seconds per real second, finite and
        greater than 0 (``speed=60`` runs an hour in a minute; real I/O keeps working).
    io_grace_s
        Autojump only: real time to wait for I/O before each jump, s, default 0. A few
        milliseconds let peers outside the loop (a pseudo-terminal, another process) answer
        before the virtual time moves on; every jump then costs that much real time.

    Notes
    -----
    The virtual time advances only while the clock's event loop runs (see
    :func:`run_with_clock`); between runs it stands still, and a second run continues
    where the first stopped. ``sleep_until`` and ``sleep`` must be awaited inside that loop.
    """

    def __init__(
        self,
        start_utc: datetime,
        speed: float | None = None,
        *,
        io_grace_s: float = 0.0,
    ) -> None:
        if speed is not None:
            speed = float(speed)
            if not math.isfinite(speed) or speed <= 0:
                raise ValueError(
                    f"speed must be a finite number above 0, or None for autojump; got {speed!r}"
                )
        io_grace_s = _check_time(io_grace_s, "io_grace_s")
        if io_grace_s < 0:
            raise ValueError(f"io_grace_s must not be negative, got {io_grace_s!r}")
        self.start_utc: datetime = _check_start(start_utc)
        self.speed: float | None = speed
        self.io_grace_s: float = io_grace_s
        #: Real time source, s; an attribute so tests can pin it.
        self._real_time: Callable[[], float] = time.monotonic
        self._base_s = 0.0  # virtual time at the anchor, s
        self._anchor_real_s: float | None = None  # real time at the anchor (speed mode), s
        self._loop: VirtualTimeEventLoop | None = None

    # -- reading time ---------------------------------------------------------------------

    def now_s(self) -> float:
        """Virtual seconds since the clock started.

        Returns
        -------
        float
            Virtual clock time, s.
        """
        if self.speed is None or self._anchor_real_s is None:
            return self._base_s
        return self._base_s + self.speed * (self._real_time() - self._anchor_real_s)

    def utc(self, t_s: float | None = None) -> datetime:
        """Wall time of a virtual clock time.

        Parameters
        ----------
        t_s
            Virtual clock time, s; default now.

        Returns
        -------
        datetime
            Aware UTC datetime ``start_utc + t_s``.
        """
        t = self.now_s() if t_s is None else _check_time(t_s, "t_s")
        return self.start_utc + timedelta(seconds=t)

    # -- waiting --------------------------------------------------------------------------

    def _own_loop(self) -> VirtualTimeEventLoop:
        loop = asyncio.get_running_loop()
        if loop is not self._loop:
            raise RuntimeError(
                "a VirtualClock can only wait inside its own event loop; "
                "start the program with run_with_clock(clock, main)"
            )
        return self._loop

    async def sleep_until(self, t_s: float) -> None:
        """Wait until virtual time ``t_s``; wakes at exactly ``t_s`` in autojump mode.

        Parameters
        ----------
        t_s
            Deadline in virtual clock time, s; a past deadline returns after one loop turn.
        """
        t_s = _check_time(t_s, "t_s")
        loop = self._own_loop()
        if t_s <= self.now_s():
            await asyncio.sleep(0)
            return
        await _TimerWake(loop, t_s)

    async def sleep(self, dt_s: float) -> None:
        """Wait ``dt_s`` virtual seconds.

        Parameters
        ----------
        dt_s
            Duration, virtual s, not negative.
        """
        dt_s = _check_time(dt_s, "dt_s")
        if dt_s < 0:
            raise ValueError(f"dt_s must not be negative, got {dt_s!r}")
        self._own_loop()
        await asyncio.sleep(dt_s)

    def call_at(
        self, t_s: float, callback: Callable[..., object], *args: Any
    ) -> asyncio.TimerHandle:
        """Call ``callback(*args)`` at virtual time ``t_s``, exactly as :meth:`sleep_until`
        wakes, without a task (the callback must not block; it runs in the clock's loop).

        Parameters
        ----------
        t_s
            Virtual clock time, s; a past time calls at the next loop turn.
        callback
            The function to call; its return value is ignored.
        *args
            Its arguments.

        Returns
        -------
        asyncio.TimerHandle
            Cancel it to call nothing.
        """
        return self._own_loop().call_at(_check_time(t_s, "t_s"), callback, *args)

    def new_event_loop(self) -> VirtualTimeEventLoop:
        """Return a new event loop running on this clock's virtual time."""
        return VirtualTimeEventLoop(self)

    # -- used by the loop -----------------------------------------------------------------

    def _attach(self, loop: VirtualTimeEventLoop) -> None:
        if self._loop is not None and not self._loop.is_closed():
            raise RuntimeError("this VirtualClock already drives another open event loop")
        self._loop = loop
        self._anchor_real_s = self._real_time()

    def _detach(self, loop: VirtualTimeEventLoop) -> None:
        if self._loop is loop:
            self._base_s = self.now_s()
            self._anchor_real_s = None
            self._loop = None

    def _jump(self, timeout_s: float, next_deadline_s: float | None) -> None:
        """Advance autojump time by ``timeout_s``, landing exactly on the next deadline."""
        now = self._base_s
        target = now + timeout_s
        if next_deadline_s is not None and next_deadline_s <= target + _SNAP_REL * max(
            1.0, abs(target)
        ):
            target = next_deadline_s  # exact: a tick due at k*period wakes at k*period
        self._base_s = max(now, target)


class _TimerWake:
    """What a task waiting for a virtual time awaits: a future-like object (asyncio's
    duck-typed future protocol, as a task sees it) whose timer resumes the task directly.

    The task's step runs inside the timer's own loop turn, not queued for the next one, and
    then yields once more unless the loop has nothing else ready or due at that instant
    (:meth:`VirtualTimeEventLoop.nothing_due_now`), so everything that would have run before
    the task still does. A cancellation (from anywhere) wakes the task the usual way, through
    the loop's queue.

    Parameters
    ----------
    loop
        The clock's running loop.
    t_s
        Virtual time to wake at, s.
    """

    _asyncio_future_blocking = False  # the protocol's marker (asyncio.isfuture)

    def __init__(self, loop: VirtualTimeEventLoop, t_s: float) -> None:
        self._loop = loop
        self._state = 0  # 0 waiting, 1 woken, 2 cancelled
        self._cancel_message: Any = None
        self._callbacks: list[tuple[Callable[[Any], object], Any]] = []
        self._handle = loop.call_at(t_s, self._fire)

    def get_loop(self) -> VirtualTimeEventLoop:
        """The loop the timer runs in."""
        return self._loop

    def done(self) -> bool:
        """Whether the timer fired or the wait was cancelled."""
        return self._state != 0

    def cancelled(self) -> bool:
        """Whether the wait was cancelled."""
        return self._state == 2

    def result(self) -> None:
        """None once woken; raises CancelledError if cancelled, InvalidStateError if waiting."""
        if self._state == 2:  # as an asyncio future: the cancel's message, if any
            message = self._cancel_message
            raise asyncio.CancelledError() if message is None else asyncio.CancelledError(message)
        if self._state == 0:
            raise asyncio.InvalidStateError("the wait has not ended")

    def exception(self) -> BaseException | None:
        """None (a timer has no error); raises as :meth:`result` does when cancelled."""
        self.result()
        return None

    def add_done_callback(self, fn: Callable[[Any], object], *, context: Any = None) -> None:
        """Call ``fn(self)`` when the wait ends (at once, through the loop, if it has)."""
        if self._state != 0:
            self._loop.call_soon(fn, self, context=context)
        else:
            self._callbacks.append((fn, context))

    def remove_done_callback(self, fn: Callable[[Any], object]) -> int:
        """Forget every pending ``fn``; return how many, dimensionless."""
        kept = [(f, c) for f, c in self._callbacks if f != fn]
        removed = len(self._callbacks) - len(kept)
        self._callbacks = kept
        return removed

    def cancel(self, msg: Any = None) -> bool:
        """End the wait as cancelled; the waiting task is woken through the loop's queue."""
        if self._state != 0:
            return False
        self._state = 2
        self._cancel_message = msg
        self._handle.cancel()
        callbacks, self._callbacks = self._callbacks, []
        for fn, context in callbacks:
            self._loop.call_soon(fn, self, context=context)
        return True

    def _fire(self) -> None:
        """The timer: end the wait and run the waiting task's step right here."""
        if self._state != 0:
            return
        self._state = 1
        callbacks, self._callbacks = self._callbacks, []
        for fn, context in callbacks:
            if context is None:
                fn(self)
            else:
                context.run(fn, self)

    def __await__(self) -> Generator[Any, None, None]:
        if self._state == 0:
            self._asyncio_future_blocking = True
            try:
                yield self
            finally:
                self._handle.cancel()  # a task closed while waiting leaves no timer
        self.result()
        if not self._loop.nothing_due_now():
            yield  # as asyncio.sleep(0): let what is ready or due now run first


class _VirtualTimeSelector(selectors.BaseSelector):
    """A real selector whose ``select(timeout)`` is where virtual time moves."""

    def __init__(self) -> None:
        self._inner = selectors.DefaultSelector()
        self.loop: VirtualTimeEventLoop | None = None

    def register(self, fileobj: Any, events: int, data: Any = None) -> selectors.SelectorKey:
        return self._inner.register(fileobj, events, data)

    def unregister(self, fileobj: Any) -> selectors.SelectorKey:
        return self._inner.unregister(fileobj)

    def modify(self, fileobj: Any, events: int, data: Any = None) -> selectors.SelectorKey:
        return self._inner.modify(fileobj, events, data)

    def get_map(self) -> Mapping[Any, selectors.SelectorKey]:
        return self._inner.get_map()

    def close(self) -> None:
        self._inner.close()

    def select(self, timeout: float | None = None) -> list[tuple[selectors.SelectorKey, int]]:
        loop = self.loop
        if loop is None or timeout is None or timeout <= 0:
            # Something is ready, or no timer is pending: plain real I/O wait.
            return self._inner.select(timeout)
        clock = loop.clock
        if clock.speed is not None:
            # Virtual time flows at speed x real time by itself; just wait scaled.
            return self._inner.select(timeout / clock.speed)
        events = self._inner.select(clock.io_grace_s)
        if events:
            return events
        if loop._executor_jobs > 0:
            # A worker thread is busy: that task is not waiting, so time must not jump.
            return self._inner.select(None)
        clock._jump(timeout, loop._next_deadline())
        return []


class VirtualTimeEventLoop(asyncio.SelectorEventLoop):
    """An asyncio selector event loop whose ``time()`` is a :class:`VirtualClock`'s time.

    Parameters
    ----------
    clock
        The virtual clock this loop runs on; one open loop per clock.
    """

    def __init__(self, clock: VirtualClock) -> None:
        selector = _VirtualTimeSelector()
        self.clock = clock
        self._executor_jobs = 0
        super().__init__(selector)
        clock._attach(self)
        selector.loop = self

    def time(self) -> float:
        """Virtual clock time, s (the loop's timers are scheduled on it)."""
        return self.clock.now_s()

    def run_in_executor(
        self, executor: Executor | None, func: Callable[..., T], *args: Any
    ) -> asyncio.Future[T]:
        """Run ``func`` in a thread; an autojumping loop does not jump while it runs."""
        future = super().run_in_executor(executor, func, *args)
        self._executor_jobs += 1
        future.add_done_callback(self._executor_job_done)
        return future

    def _executor_job_done(self, _future: asyncio.Future[Any]) -> None:
        self._executor_jobs -= 1

    def nothing_due_now(self) -> bool:
        """Whether nothing else would run if the calling task yielded now: no callback is
        ready (another task woken, a future's callbacks) and no timer falls due at the
        present virtual time. A task may then go on at once instead of ``await
        asyncio.sleep(0)`` and let nothing due at this instant happen after it. (Sockets
        are not polled: at virtual time their data has no instant of its own.)

        Returns
        -------
        bool
            True when a yield would only come straight back, dimensionless.
        """
        if self._ready:  # type: ignore[attr-defined]
            return False
        scheduled = self._scheduled  # type: ignore[attr-defined]
        # the loop runs every timer whose deadline is before now + its clock resolution
        return not scheduled or scheduled[0].when() >= self.time() + self._clock_resolution

    def _next_deadline(self) -> float | None:
        """Virtual time of the earliest pending timer, s, or None."""
        scheduled = self._scheduled  # type: ignore[attr-defined]
        if scheduled and not scheduled[0].cancelled():
            return float(scheduled[0].when())
        return None

    def close(self) -> None:
        """Close the loop and freeze the clock's virtual time where it is."""
        try:
            super().close()
        finally:
            self.clock._detach(self)


def run_with_clock(clock: Clock, main: Callable[[Clock], Awaitable[T]]) -> T:
    """Run ``main(clock)`` to completion on an event loop that fits the clock.

    Parameters
    ----------
    clock
        The clock; a :class:`VirtualClock` gets a :class:`VirtualTimeEventLoop`, any clock
        with a ``new_event_loop()`` method gets that loop, others a standard asyncio loop.
    main
        Async function taking the clock and returning the program's result.

    Returns
    -------
    T
        What ``main`` returned.
    """
    factory = getattr(clock, "new_event_loop", None)

    async def _entry() -> T:
        return await main(clock)

    coro: Coroutine[Any, Any, T] = _entry()
    with asyncio.Runner(loop_factory=factory) as runner:
        return runner.run(coro)
