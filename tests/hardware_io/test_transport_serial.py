"""The serial line transport against the simulator's optode ptys and a scripted fake device.

Virtual time (see conftest): a silent optode costs its reply timeout in virtual seconds only.
"""

from __future__ import annotations

import asyncio
import os
import tty
from collections.abc import Callable
from pathlib import Path

import pytest

from controller.clock import VirtualClock
from controller.drivers import (
    Measurement,
    OptodeCommand,
    OptodeRequest,
    decode_reply,
    encode_reply,
    encode_request,
)
from controller.drivers._transport_common import LinkUnavailable, NoReply
from controller.drivers._transport_serial import SerialLineTransport
from simulator import Fault, FaultKind, Rack
from simulator.endpoints import RackServer

from .conftest import START, rig, virtual

pytestmark = pytest.mark.timeout(30)


def sample(tag: int) -> bytes:
    return encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=tag))


def data_line(tag: int, o2_umol_l: float = 250.0) -> bytes:
    return encode_reply(
        Measurement(
            tag=tag, o2_umol_l=o2_umol_l, o2_sat_pct=98.5, temperature_c=20.0, phase_deg=31.0
        )
    )


def tag_is(tag: int) -> Callable[[bytes], bool]:
    return lambda line: decode_reply(line).tag == tag


def test_a_sample_reaches_the_emulated_optode_and_back() -> None:
    rack = Rack(rig(), seed=3, start_utc=START)

    async def body(clock: VirtualClock) -> None:
        async with RackServer(rack) as server:
            line = SerialLineTransport(server.announcement.optodes["c1"], timeout_s=1.0)
            reply = decode_reply(await line.exchange(sample(5), accept=tag_is(5)))
            assert isinstance(reply, Measurement) and reply.tag == 5
            # optode noise 0.3 µmol/L (rig default); 2 decimals on the wire
            assert reply.o2_umol_l == pytest.approx(rack.truth("c1").optode_o2_umol_l, abs=2.0)
            assert line.opens == 1 and line.is_open
            line.close()
            assert not line.is_open

    virtual(body)


def test_a_silent_optode_is_no_reply_after_its_timeout() -> None:
    rack = Rack(rig(), seed=3, start_utc=START)

    async def body(clock: VirtualClock) -> None:
        async with RackServer(rack) as server:
            line = SerialLineTransport(server.announcement.optodes["c2"], timeout_s=1.0)
            rack.inject(Fault(kind=FaultKind.COMM_TIMEOUT, chamber="c2", at_s=rack.t_s))
            t0 = clock.now_s()
            with pytest.raises(NoReply, match="within 1 s"):
                await line.exchange(sample(1))
            assert clock.now_s() - t0 == pytest.approx(1.0, abs=1e-6)
            rack.clear_faults(FaultKind.COMM_TIMEOUT)
            reply = decode_reply(await line.exchange(sample(2), accept=tag_is(2)))
            assert reply.tag == 2 and line.opens == 1
            line.close()

    virtual(body)


def test_stray_lines_are_dropped_and_a_reply_may_come_in_pieces() -> None:
    async def body(clock: VirtualClock) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        loop = asyncio.get_running_loop()
        requests: list[bytes] = []

        def device() -> None:  # answers a late reply first, then its own in two pieces
            requests.append(os.read(master, 4096))
            own = data_line(7)
            os.write(master, data_line(6) + own[:20])
            loop.call_later(0.2, os.write, master, own[20:])

        line = SerialLineTransport(os.ttyname(slave), timeout_s=1.0)
        await line.open()
        os.write(master, b"garbage before any request\r\n")
        await asyncio.sleep(0.05)  # the stray line arrives while nothing waits
        loop.add_reader(master, device)
        try:
            got = await line.exchange(sample(7), accept=tag_is(7))
        finally:
            loop.remove_reader(master)
            line.close()
            os.close(master)
            os.close(slave)
        assert requests == [sample(7)]
        assert decode_reply(got) == decode_reply(data_line(7))
        assert line.discarded == 2  # the stray line and the tag-6 reply

    virtual(body)


def test_a_vanished_port_is_reopened_when_it_comes_back(tmp_path: Path) -> None:
    rack = Rack(rig(), seed=3, start_utc=START)
    link = tmp_path / "optode-c1"  # as a udev rule gives a stable name to an adapter

    async def body(clock: VirtualClock) -> None:
        async with RackServer(rack) as server:
            emulator = server.optodes["c1"]
            link.symlink_to(server.announcement.optodes["c1"])
            line = SerialLineTransport(str(link), timeout_s=1.0, reopen_backoff_s=2.0)
            assert decode_reply(await line.exchange(sample(1), accept=tag_is(1))).tag == 1
            emulator.close()  # the adapter is unplugged
            link.unlink()
            with pytest.raises(LinkUnavailable):
                await line.exchange(sample(2))
            assert line.losses == 1 and not line.is_open
            with pytest.raises(LinkUnavailable, match="cannot open"):
                await line.exchange(sample(3))
            t_fail = clock.now_s()
            link.symlink_to(emulator.open())  # plugged in again, under the same name
            with pytest.raises(LinkUnavailable, match="next open try"):
                await line.exchange(sample(4))  # still backing off: the port is not touched
            assert line.opens == 1
            await clock.sleep_until(t_fail + 2.0)
            reply = decode_reply(await line.exchange(sample(5), accept=tag_is(5)))
            assert isinstance(reply, Measurement) and reply.tag == 5
            assert line.opens == 2
            line.close()

    virtual(body)


def test_failed_opens_back_off_exponentially_up_to_a_cap(tmp_path: Path) -> None:
    missing = tmp_path / "no-such-adapter"

    async def body(clock: VirtualClock) -> None:
        line = SerialLineTransport(str(missing), reopen_backoff_s=1.0, reopen_backoff_max_s=3.0)
        tries: list[float] = []
        t0 = clock.now_s()
        while clock.now_s() - t0 < 12.0:
            try:
                await line.exchange(sample(1))
            except LinkUnavailable as exc:
                if "cannot open" in str(exc):
                    tries.append(clock.now_s() - t0)
            await clock.sleep(0.25)
        assert tries == pytest.approx([0.0, 1.0, 3.0, 6.0, 9.0])  # pauses 1, 2, 3, 3 s

    virtual(body)


def test_bad_settings_are_refused() -> None:
    with pytest.raises(ValueError):
        SerialLineTransport("/dev/null", baud=0)
    with pytest.raises(ValueError):
        SerialLineTransport("/dev/null", timeout_s=0.0)
    with pytest.raises(ValueError):
        SerialLineTransport("/dev/null", reopen_backoff_s=5.0, reopen_backoff_max_s=1.0)
