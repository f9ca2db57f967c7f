"""The one clock: virtual time runs ordinary asyncio code without real waiting.

Only the speed-mode checks wait for real, and only tens of milliseconds, because their
whole point is the ratio of virtual to real time.
"""

from __future__ import annotations

import asyncio
import math
import threading
import time
from datetime import UTC, datetime, timedelta, timezone

import pytest

from controller.clock import (
    Clock,
    RealClock,
    VirtualClock,
    VirtualTimeEventLoop,
    run_with_clock,
)

START = datetime(2027, 7, 1, 6, 0, tzinfo=UTC)
WEEK_S = 7 * 24 * 3600.0


def test_both_clocks_satisfy_the_protocol() -> None:
    assert isinstance(RealClock(), Clock)
    assert isinstance(VirtualClock(START), Clock)


def test_a_week_of_sleeps_takes_well_under_a_second() -> None:
    clock = VirtualClock(START)

    async def main(c: Clock) -> float:
        for _ in range(int(WEEK_S // 60)):
            await asyncio.sleep(60)
        return c.now_s()

    wall0 = time.perf_counter()
    end_s = run_with_clock(clock, main)
    wall_s = time.perf_counter() - wall0
    assert end_s == WEEK_S
    assert clock.utc() == START + timedelta(days=7)
    assert wall_s < 1.0


def test_concurrent_sleepers_wake_in_deadline_order_at_their_deadlines() -> None:
    clock = VirtualClock(START)
    woke: list[tuple[str, float]] = []

    async def sleeper(name: str, dt_s: float, c: Clock) -> None:
        await c.sleep(dt_s)
        woke.append((name, c.now_s()))

    async def main(c: Clock) -> None:
        async with asyncio.TaskGroup() as tg:
            for name, dt in [("c", 300.0), ("a", 5.0), ("d", 3600.0), ("b", 60.0)]:
                tg.create_task(sleeper(name, dt, c))

    run_with_clock(clock, main)
    assert woke == [("a", 5.0), ("b", 60.0), ("c", 300.0), ("d", 3600.0)]


def test_asyncio_timeout_fires_at_the_virtual_deadline() -> None:
    clock = VirtualClock(START)

    async def main(c: Clock) -> tuple[float, float]:
        with pytest.raises(TimeoutError):
            async with asyncio.timeout(30):
                await asyncio.sleep(3600)
        fired_s = c.now_s()
        with pytest.raises(TimeoutError):
            await asyncio.wait_for(asyncio.Event().wait(), timeout=12.5)
        return fired_s, c.now_s()

    assert run_with_clock(clock, main) == (30.0, 42.5)


def test_call_later_runs_in_virtual_time() -> None:
    clock = VirtualClock(START)

    async def main(c: Clock) -> float:
        loop = asyncio.get_running_loop()
        done: asyncio.Future[float] = loop.create_future()
        loop.call_later(86_400.0, lambda: done.set_result(c.now_s()))
        return await done

    assert run_with_clock(clock, main) == 86_400.0


def test_utc_maps_clock_time_onto_start_plus_t() -> None:
    start = datetime(2027, 1, 15, 12, 0, tzinfo=timezone(timedelta(hours=10)))
    clock = VirtualClock(start)
    assert clock.start_utc == datetime(2027, 1, 15, 2, 0, tzinfo=UTC)
    assert clock.utc(0) == clock.start_utc
    assert clock.utc(90.5) == datetime(2027, 1, 15, 2, 1, 30, 500_000, tzinfo=UTC)
    assert clock.utc().tzinfo is UTC

    async def main(c: Clock) -> datetime:
        await c.sleep_until(3 * 3600)
        return c.utc()

    assert run_with_clock(clock, main) == datetime(2027, 1, 15, 5, 0, tzinfo=UTC)


def test_periodic_tasks_in_a_task_group_tick_at_exact_multiples_of_their_period() -> None:
    clock = VirtualClock(START)
    ticks: dict[float, list[float]] = {0.1: [], 1.0: [], 7.0: [], 60.0: []}
    horizon_s = 1800.0

    async def periodic(period_s: float, c: Clock) -> None:
        k = 1
        while k * period_s <= horizon_s:
            await c.sleep_until(k * period_s)
            ticks[period_s].append(c.now_s())
            await asyncio.sleep(0.013)  # work that takes time must not shift later ticks
            k += 1

    async def main(c: Clock) -> None:
        async with asyncio.TaskGroup() as tg:
            for period_s in ticks:
                tg.create_task(periodic(period_s, c))

    run_with_clock(clock, main)
    for period_s, times in ticks.items():
        expected = [k * period_s for k in range(1, len(times) + 1)]
        assert times == expected  # exact equality: no drift, no rounding creep
        assert len(times) == math.floor(horizon_s / period_s + 1e-9)


def test_a_jump_lands_exactly_on_the_deadline_even_when_float_sums_would_not() -> None:
    # 93.8595867742349 + (235.6 - 93.8595867742349) != 235.6 in binary floating point,
    # so a loop that merely adds the select timeout would wake one ulp off the tick.
    now_s, deadline_s = 93.8595867742349, 235.6
    assert now_s + (deadline_s - now_s) != deadline_s
    clock = VirtualClock(START)

    async def main(c: Clock) -> float:
        await c.sleep_until(now_s)
        await c.sleep_until(deadline_s)
        return c.now_s()

    assert run_with_clock(clock, main) == deadline_s


def test_virtual_time_resumes_where_the_previous_run_stopped() -> None:
    clock = VirtualClock(START)

    async def hour(c: Clock) -> float:
        await c.sleep(3600)
        return c.now_s()

    assert run_with_clock(clock, hour) == 3600.0
    assert clock.now_s() == 3600.0
    assert run_with_clock(clock, hour) == 7200.0


def test_speed_mode_runs_about_speed_times_real_time() -> None:
    speed = 20.0
    clock = VirtualClock(START, speed=speed)

    async def main(c: Clock) -> tuple[float, float]:
        v0, r0 = c.now_s(), time.perf_counter()
        await c.sleep(1.0)  # 50 ms of real time at 20x
        return c.now_s() - v0, time.perf_counter() - r0

    virtual_s, real_s = run_with_clock(clock, main)
    assert virtual_s >= 1.0
    assert real_s >= 0.045
    assert virtual_s / real_s == pytest.approx(speed, rel=0.25)


def test_speed_mode_scales_the_real_time_source_exactly() -> None:
    # The real time source is a seam (an attribute) so the arithmetic is checked exactly.
    fake_real = [1000.0]
    clock = VirtualClock(START, speed=60.0)
    clock._real_time = lambda: fake_real[0]
    loop = clock.new_event_loop()
    try:
        assert clock.now_s() == 0.0
        fake_real[0] += 2.5
        assert clock.now_s() == 150.0
        assert loop.time() == 150.0
    finally:
        loop.close()
    fake_real[0] += 100.0
    assert clock.now_s() == 150.0  # frozen between runs


def test_sockets_work_on_the_virtual_loop_in_speed_mode() -> None:
    clock = VirtualClock(START, speed=50.0)

    async def main(c: Clock) -> tuple[bytes, float]:
        async def echo(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
            line = await reader.readline()
            writer.write(line.upper())
            await writer.drain()
            writer.close()
            await writer.wait_closed()

        server = await asyncio.start_server(echo, "127.0.0.1", 0)
        port = server.sockets[0].getsockname()[1]
        async with server:
            async with asyncio.timeout(250.0):  # 5 s of real time at 50x
                reader, writer = await asyncio.open_connection("127.0.0.1", port)
                writer.write(b"tide 1.5 m\n")
                await writer.drain()
                reply = await reader.readline()
                writer.close()
                await writer.wait_closed()
        return reply, c.now_s()

    reply, elapsed_s = run_with_clock(clock, main)
    assert reply == b"TIDE 1.5 M\n"
    assert 0.0 < elapsed_s < 250.0


def test_sockets_work_on_the_autojump_loop_when_no_timer_is_pending() -> None:
    clock = VirtualClock(START)

    async def main(c: Clock) -> bytes:
        async def echo(reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
            writer.write((await reader.readline())[-2::-1] + b"\n")
            await writer.drain()
            writer.close()

        server = await asyncio.start_server(echo, "127.0.0.1", 0)
        port = server.sockets[0].getsockname()[1]
        async with server:
            reader, writer = await asyncio.open_connection("127.0.0.1", port)
            writer.write(b"abc\n")
            reply = await reader.readline()
            writer.close()
            await writer.wait_closed()
        return reply

    assert run_with_clock(clock, main) == b"cba\n"
    assert clock.now_s() == 0.0


def test_autojump_waits_for_worker_threads_instead_of_jumping() -> None:
    clock = VirtualClock(START)

    def work() -> int:
        return sum(i * i for i in range(200_000))  # real CPU time in a thread

    async def main(c: Clock) -> tuple[int, float]:
        # Without thread accounting the loop would jump straight to the 1 ms deadline.
        async with asyncio.timeout(0.001):
            result = await asyncio.to_thread(work)
        return result, c.now_s()

    result, at_s = run_with_clock(clock, main)
    assert result == sum(i * i for i in range(200_000))
    assert at_s == 0.0


def test_threads_can_wake_an_autojump_loop_that_has_no_timers() -> None:
    clock = VirtualClock(START)

    async def main(c: Clock) -> str:
        loop = asyncio.get_running_loop()
        got: asyncio.Future[str] = loop.create_future()
        threading.Thread(
            target=lambda: loop.call_soon_threadsafe(got.set_result, "from thread")
        ).start()
        return await got

    assert run_with_clock(clock, main) == "from thread"


def test_real_clock_arithmetic_with_a_pinned_time_source() -> None:
    # RealClock waits through asyncio.sleep; run it on a virtual loop with its time source
    # pinned to that loop's time, so no real waiting happens.
    host = VirtualClock(START)
    real = RealClock(datetime(2027, 3, 1, tzinfo=UTC))
    real._monotonic = host.now_s
    real._t0 = -100.0  # the real clock started 100 s before the host clock

    async def main(_: Clock) -> tuple[float, float, datetime]:
        await real.sleep_until(160.0)
        after_until = real.now_s()
        await real.sleep(15.0)
        await real.sleep_until(0.0)  # past deadline: returns at once
        return after_until, real.now_s(), real.utc()

    after_until, end_s, end_utc = run_with_clock(host, main)
    assert after_until == pytest.approx(160.0)
    assert end_s == pytest.approx(175.0)
    assert end_utc == datetime(2027, 3, 1, 0, 2, 55, tzinfo=UTC)


def test_real_clock_runs_on_a_standard_loop_and_is_monotonic() -> None:
    clock = RealClock()
    assert abs(clock.start_utc - datetime.now(UTC)) < timedelta(seconds=5)

    async def main(c: Clock) -> tuple[bool, float]:
        t0 = c.now_s()
        await c.sleep_until(-1.0)
        await c.sleep(0.0)
        return type(asyncio.get_running_loop()) is not VirtualTimeEventLoop, c.now_s() - t0

    standard, elapsed_s = run_with_clock(clock, main)
    assert standard
    assert 0.0 <= elapsed_s < 1.0


def test_run_with_clock_accepts_any_protocol_clock() -> None:
    class Pinned:
        def now_s(self) -> float:
            return 5.0

        def utc(self, t_s: float | None = None) -> datetime:
            return START

        async def sleep_until(self, t_s: float) -> None:
            return None

        async def sleep(self, dt_s: float) -> None:
            return None

    async def main(c: Clock) -> float:
        await c.sleep(10)
        return c.now_s()

    assert run_with_clock(Pinned(), main) == 5.0


@pytest.mark.parametrize("speed", [-1.0, 0.0, math.nan, math.inf])
def test_bad_speed_is_refused(speed: float) -> None:
    with pytest.raises(ValueError, match="speed"):
        VirtualClock(START, speed=speed)


def test_naive_start_and_negative_grace_are_refused() -> None:
    with pytest.raises(ValueError, match="timezone-aware"):
        VirtualClock(datetime(2027, 1, 1))
    with pytest.raises(ValueError, match="timezone-aware"):
        RealClock(datetime(2027, 1, 1))
    with pytest.raises(ValueError, match="io_grace_s"):
        VirtualClock(START, io_grace_s=-0.1)


@pytest.mark.parametrize("clock", [VirtualClock(START), RealClock(START)], ids=["virtual", "real"])
def test_bad_deadlines_are_refused(clock: Clock) -> None:
    async def main(c: Clock) -> list[str]:
        errors = []
        for bad in (c.sleep_until(math.nan), c.sleep(math.nan), c.sleep(-1.0)):
            with pytest.raises(ValueError) as info:
                await bad
            errors.append(str(info.value))
        return errors

    errors = run_with_clock(clock, main)
    assert [e.split()[0] for e in errors] == ["t_s", "dt_s", "dt_s"]
    with pytest.raises(ValueError, match="t_s"):
        clock.utc(math.inf)


def test_virtual_clock_refuses_to_wait_on_a_foreign_loop() -> None:
    clock = VirtualClock(START)

    async def main() -> None:
        await clock.sleep(1.0)

    with pytest.raises(RuntimeError, match="run_with_clock"):
        asyncio.run(main())


def test_one_clock_drives_one_open_loop() -> None:
    clock = VirtualClock(START)
    loop = clock.new_event_loop()
    try:
        with pytest.raises(RuntimeError, match="another open event loop"):
            clock.new_event_loop()
    finally:
        loop.close()
    clock.new_event_loop().close()  # free again once closed


def test_call_at_calls_back_at_exactly_the_deadline_without_a_task() -> None:
    clock = VirtualClock(START)
    calls: list[tuple[str, float]] = []

    async def main(c: Clock) -> None:
        deadline = 0.1 + 0.2  # not a sum the jumps would land on by themselves
        clock.call_at(deadline, lambda tag: calls.append((tag, c.now_s())), "due")
        clock.call_at(5.0, calls.append, ("cancelled", 5.0)).cancel()
        clock.call_at(-1.0, lambda: calls.append(("past", c.now_s())))
        await c.sleep(10.0)

    run_with_clock(clock, main)
    assert calls == [("past", 0.0), ("due", 0.1 + 0.2)]


def test_nothing_due_now_sees_ready_tasks_and_timers_due_at_this_instant() -> None:
    clock = VirtualClock(START)
    seen: dict[str, bool] = {}

    async def main(c: Clock) -> None:
        loop = asyncio.get_running_loop()
        assert isinstance(loop, VirtualTimeEventLoop)
        seen["alone"] = loop.nothing_due_now()
        task = asyncio.ensure_future(asyncio.sleep(0))  # another task ready to run
        seen["task ready"] = loop.nothing_due_now()
        await task
        seen["task done"] = loop.nothing_due_now()
        handle = loop.call_at(c.now_s(), lambda: None)  # a timer due at this very instant
        seen["timer due now"] = loop.nothing_due_now()
        handle.cancel()
        await asyncio.sleep(0)  # the loop drops the cancelled timer
        later = loop.call_at(c.now_s() + 1.0, lambda: None)  # due later: not now
        seen["timer due later"] = loop.nothing_due_now()
        later.cancel()

    run_with_clock(clock, main)
    assert seen == {
        "alone": True,
        "task ready": False,
        "task done": True,
        "timer due now": False,
        "timer due later": True,
    }


class _TurnCounter(VirtualTimeEventLoop):
    """A virtual-time loop that counts its turns (``_run_once`` calls)."""

    turns = 0

    def _run_once(self) -> None:
        type(self).turns += 1
        super()._run_once()  # type: ignore[misc]


def test_a_sleeper_with_nothing_else_due_wakes_in_its_timer_s_own_turn() -> None:
    clock = VirtualClock(START)
    woke: list[float] = []

    async def main(c: Clock) -> None:
        for k in range(1, 101):
            await c.sleep_until(10.0 * k)
            woke.append(c.now_s())

    _TurnCounter.turns = 0
    clock.new_event_loop = lambda: _TurnCounter(clock)  # type: ignore[method-assign]
    run_with_clock(clock, main)
    assert woke == [10.0 * k for k in range(1, 101)]
    # one turn a wake-up (a future's result would take two), and a few to start and stop
    assert _TurnCounter.turns < 100 + 10


def test_a_sleeper_still_runs_after_what_was_queued_before_its_timer_and_before_the_rest() -> None:
    clock = VirtualClock(START)
    order: list[str] = []

    async def sleeper(c: Clock) -> None:
        await c.sleep_until(5.0)
        order.append("sleeper")

    async def main(c: Clock) -> None:
        loop = asyncio.get_running_loop()
        # due at the same instant: the first timer queues a callback for the next turn, the
        # other one (set after the sleeper's) runs in the same turn as the sleeper's timer
        loop.call_at(5.0, lambda: loop.call_soon(order.append, "queued before"))
        task = asyncio.ensure_future(sleeper(c))
        await asyncio.sleep(0)  # the sleeper sets its timer
        loop.call_at(5.0, order.append, "timer after")
        await task

    run_with_clock(clock, main)
    # with a future's result the sleeper's step would be queued for the next turn: after
    # everything of the timers' turn and after what was queued before it
    assert order == ["timer after", "queued before", "sleeper"]


def test_a_cancelled_sleeper_wakes_through_the_queue_and_leaves_no_timer() -> None:
    clock = VirtualClock(START)
    seen: dict[str, object] = {}

    async def main(c: Clock) -> None:
        loop = asyncio.get_running_loop()

        async def sleeper() -> None:
            try:
                await c.sleep_until(100.0)
            except asyncio.CancelledError as cancelled:
                seen["message"] = cancelled.args
                raise

        task = asyncio.ensure_future(sleeper())
        await asyncio.sleep(0)
        assert loop._next_deadline() == 100.0  # type: ignore[attr-defined]
        task.cancel("stop")
        with pytest.raises(asyncio.CancelledError):
            await task
        seen["now"] = c.now_s()
        seen["timers"] = [h for h in loop._scheduled if not h.cancelled()]  # type: ignore[attr-defined]
        try:
            async with asyncio.timeout(3.0):
                await c.sleep_until(50.0)
        except TimeoutError:
            seen["timeout at"] = c.now_s()

    run_with_clock(clock, main)
    assert seen == {"message": ("stop",), "now": 0.0, "timers": [], "timeout at": 3.0}
