"""Thin async line transport for a serial port (the optode line): lines out, lines in.

Rules of this module
--------------------
- pyserial opens and configures the port (speed, 8N1, raw, no flow control, exclusive lock
  where the system offers one) and leaves its descriptor non-blocking. After that the
  transport reads with ``loop.add_reader`` on the descriptor and writes with ``os.write``
  (waiting with ``loop.add_writer`` when the output buffer is full): no thread, so it works
  on the virtual-time loop and on a pseudo-terminal alike.
- Received bytes go through :class:`~controller.drivers.LineSplitter`. A line arriving while
  no request waits (an echo, a late reply to an abandoned request) is counted and dropped;
  so is a line that the caller's ``accept`` test rejects (a reply with another tag).
- One request at a time (the optode line protocol: send, wait for the reply, then send the
  next): :meth:`SerialLineTransport.exchange` holds a lock for the whole exchange and gives
  up after its timeout with :class:`~controller.drivers._transport_common.NoReply`.
- A port that vanishes (read error, hang-up) is closed at once; a waiting exchange fails
  with :class:`~controller.drivers._transport_common.LinkUnavailable`, and the next exchange
  opens the port again. Failed opens back off exponentially (the transport refuses at once,
  without touching the device, until the pause is over), so a missing adapter costs nothing.
"""

from __future__ import annotations

import asyncio
import logging
import os
from collections.abc import Callable

import serial

from controller.drivers._codec_optode import LineSplitter
from controller.drivers._transport_common import LinkUnavailable, NoReply

__all__ = ["SerialLineTransport"]

_log = logging.getLogger(__name__)

_READ_CHUNK = 4096


def _wake(future: asyncio.Future[None]) -> None:
    if not future.done():
        future.set_result(None)


class SerialLineTransport:
    """A serial port that exchanges request and reply lines.

    Parameters
    ----------
    port
        Device path, e.g. ``/dev/ttyUSB1`` or a pseudo-terminal (no unit).
    baud
        Line speed, bit/s (a pseudo-terminal ignores it).
    timeout_s
        Default longest wait for a reply, s.
    reopen_backoff_s
        Pause after a failed open before the next try, s; doubles on every further failure.
    reopen_backoff_max_s
        Longest pause between open tries, s.
    """

    def __init__(
        self,
        port: str,
        *,
        baud: int = 9600,
        timeout_s: float = 1.0,
        reopen_backoff_s: float = 1.0,
        reopen_backoff_max_s: float = 60.0,
    ) -> None:
        if baud <= 0:
            raise ValueError(f"baud must be above 0, got {baud!r}")
        if not timeout_s > 0:
            raise ValueError(f"timeout_s must be above 0, got {timeout_s!r}")
        if not 0 <= reopen_backoff_s <= reopen_backoff_max_s:
            raise ValueError("need 0 <= reopen_backoff_s <= reopen_backoff_max_s")
        self.port = port
        self.baud = baud
        self.timeout_s = timeout_s
        self.name = f"serial {port}"
        self._backoff_min_s = reopen_backoff_s
        self._backoff_max_s = reopen_backoff_max_s
        self._backoff_s = reopen_backoff_s
        self._retry_at: float | None = None  # loop time before which no open is tried
        self._serial: serial.Serial | None = None
        self._fd: int | None = None
        self._loop: asyncio.AbstractEventLoop | None = None
        self._splitter = LineSplitter()
        self._waiter: asyncio.Future[bytes] | None = None
        self._accept: Callable[[bytes], bool] | None = None
        self._lock: asyncio.Lock | None = None
        self.opens = 0
        """Times the port was opened, count."""
        self.losses = 0
        """Times the port vanished while open, count."""
        self.discarded = 0
        """Lines received that answered no waiting request, count."""

    # --------------------------------------------------------------- open / close
    @property
    def is_open(self) -> bool:
        """Whether the port is open now (no unit)."""
        return self._fd is not None

    async def open(self) -> None:
        """Open the port (exchanges also open it when needed).

        Raises
        ------
        LinkUnavailable
            The port cannot be opened (missing, busy, not a serial port), or the back-off
            after an earlier failure has not run out yet.
        """
        if self._fd is not None:
            return
        loop = asyncio.get_running_loop()
        if self._retry_at is not None and loop.time() < self._retry_at:
            wait_s = self._retry_at - loop.time()
            raise LinkUnavailable(f"unavailable; next open try in {wait_s:.3g} s", link=self.name)
        port = serial.Serial()
        port.port = self.port
        port.baudrate = self.baud
        port.bytesize = serial.EIGHTBITS
        port.parity = serial.PARITY_NONE
        port.stopbits = serial.STOPBITS_ONE
        port.timeout = 0
        port.write_timeout = 0
        port.exclusive = True
        try:
            port.open()
        except (serial.SerialException, OSError, ValueError) as exc:
            self._retry_at = loop.time() + self._backoff_s
            self._backoff_s = min(max(2.0 * self._backoff_s, 1e-3), self._backoff_max_s)
            raise LinkUnavailable(f"cannot open: {exc}", link=self.name) from None
        self._serial, self._fd, self._loop = port, port.fileno(), loop
        self._splitter = LineSplitter()
        self._retry_at, self._backoff_s = None, self._backoff_min_s
        loop.add_reader(self._fd, self._readable)
        self.opens += 1
        _log.info("%s: open at %d baud", self.name, self.baud)

    def close(self) -> None:
        """Close the port; a waiting exchange fails with :class:`LinkUnavailable`."""
        self._drop(None)

    def _drop(self, reason: str | None) -> None:
        fd, port, loop = self._fd, self._serial, self._loop
        self._fd = self._serial = self._loop = None
        if fd is not None and loop is not None and not loop.is_closed():
            loop.remove_reader(fd)
            loop.remove_writer(fd)
        if port is not None:
            try:
                port.close()
            except (serial.SerialException, OSError):  # already gone
                pass
        if reason is not None:
            self.losses += 1
            _log.warning("%s: port lost (%s); will reopen", self.name, reason)
        waiter = self._waiter
        if waiter is not None and not waiter.done():
            waiter.set_exception(
                LinkUnavailable(f"port closed ({reason or 'closed'})", link=self.name)
            )

    # --------------------------------------------------------------- reading
    def _readable(self) -> None:
        fd = self._fd
        if fd is None:
            return
        try:
            data = os.read(fd, _READ_CHUNK)
        except (BlockingIOError, InterruptedError):
            return
        except OSError as exc:  # EIO: the device or the pty's other end went away
            self._drop(exc.strerror or str(exc))
            return
        if not data:  # readable with no data: hang-up
            self._drop("hang-up")
            return
        for line in self._splitter.feed(data):
            waiter, accept = self._waiter, self._accept
            if waiter is not None and not waiter.done() and (accept is None or accept(line)):
                waiter.set_result(line)
            else:
                self.discarded += 1
                _log.debug("%s: dropped line %r", self.name, line[:40])

    # --------------------------------------------------------------- writing
    async def _write(self, data: bytes) -> None:
        view = memoryview(data)
        while view:
            fd, loop = self._fd, self._loop
            if fd is None or loop is None:
                raise LinkUnavailable("port closed while writing", link=self.name)
            try:
                sent = os.write(fd, view)
            except BlockingIOError:
                sent = 0
            except OSError as exc:
                self._drop(exc.strerror or str(exc))
                raise LinkUnavailable(f"write failed: {exc}", link=self.name) from None
            view = view[sent:]
            if view:  # output buffer full: wait until the port can take more
                ready: asyncio.Future[None] = loop.create_future()
                loop.add_writer(fd, _wake, ready)
                try:
                    await ready
                finally:
                    if self._fd == fd:
                        loop.remove_writer(fd)

    # --------------------------------------------------------------- exchange
    async def exchange(
        self,
        line: bytes,
        *,
        accept: Callable[[bytes], bool] | None = None,
        timeout_s: float | None = None,
    ) -> bytes:
        """Send one request line and return the first reply line that ``accept`` takes.

        Parameters
        ----------
        line
            The request, terminator included (no unit).
        accept
            Test of a received line (terminator removed); lines it rejects are dropped.
            None takes the first line (no unit).
        timeout_s
            Longest wait for the reply, s; default the transport's.

        Returns
        -------
        bytes
            The reply line without its terminator (no unit).

        Raises
        ------
        NoReply
            Nothing acceptable arrived in time.
        LinkUnavailable
            The port could not be opened, or vanished during the exchange.
        """
        limit_s = self.timeout_s if timeout_s is None else timeout_s
        if self._lock is None:
            self._lock = asyncio.Lock()
        async with self._lock:
            await self.open()
            loop = asyncio.get_running_loop()
            waiter: asyncio.Future[bytes] = loop.create_future()
            self._waiter, self._accept = waiter, accept
            try:
                async with asyncio.timeout(limit_s):
                    await self._write(line)
                    return await waiter
            except TimeoutError:
                raise NoReply(f"no reply within {limit_s:g} s", link=self.name) from None
            finally:
                self._waiter = self._accept = None
                if not waiter.done():
                    waiter.cancel()
                elif not waiter.cancelled():
                    waiter.exception()  # mark a loss reported meanwhile as seen
