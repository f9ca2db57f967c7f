"""What the async transports share: the retry policy and the typed transport errors.

Rules of this module
--------------------
- A transport call is a bounded number of *attempts*, each under its own timeout, separated
  by exponentially growing pauses (:class:`RetryPolicy`). Nothing waits without a bound.
- A transport raises only :class:`TransportError` subclasses (or ``CancelledError``):
  :class:`NoReply` when the device stayed silent through every attempt,
  :class:`LinkUnavailable` when the connection or port could not be opened,
  :class:`DeviceRefused` when a Modbus device answered with an exception response, and
  :class:`BadReply` when the answer was not the shape that was asked for. They are
  :class:`~controller.errors.RuntimeFailure` subclasses: a device or cable problem, not a
  mistake in a file, so a run that fails on one exits with code 1.
- Pauses use ``asyncio.sleep``, so on a virtual-time loop they cost no real time.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Iterator
from dataclasses import dataclass

from controller.errors import RuntimeFailure

__all__ = [
    "BadReply",
    "DeviceRefused",
    "LinkUnavailable",
    "ModbusExceptionCode",
    "NoReply",
    "RetryPolicy",
    "TransportError",
]


@dataclass(frozen=True, kw_only=True)
class RetryPolicy:
    """How hard a transport tries before it gives up.

    Parameters
    ----------
    timeout_s
        Longest wait for one attempt (connect, or request and reply), s.
    attempts
        Attempts per call, the first included, count (>= 1).
    backoff_s
        Pause before the second attempt, s; each later pause doubles.
    backoff_max_s
        Longest pause between attempts, s.
    """

    timeout_s: float = 0.5
    attempts: int = 3
    backoff_s: float = 0.05
    backoff_max_s: float = 1.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.timeout_s) and self.timeout_s > 0):
            raise ValueError(f"timeout_s must be a finite number above 0, got {self.timeout_s!r}")
        if isinstance(self.attempts, bool) or not isinstance(self.attempts, int):
            raise ValueError(f"attempts must be an integer, got {self.attempts!r}")
        if self.attempts < 1:
            raise ValueError(f"attempts must be 1 or more, got {self.attempts}")
        for name in ("backoff_s", "backoff_max_s"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")

    def pauses(self) -> Iterator[float]:
        """Pauses before attempts 2, 3, ... (``attempts - 1`` of them).

        Returns
        -------
        iterator of float
            Pause lengths, s: ``backoff_s``, doubling, capped at ``backoff_max_s``.
        """
        pause = self.backoff_s
        for _ in range(self.attempts - 1):
            yield min(pause, self.backoff_max_s)
            pause *= 2.0

    @property
    def worst_case_s(self) -> float:
        """Longest a call can take: every attempt timing out plus every pause, s."""
        return self.attempts * self.timeout_s + sum(self.pauses())


class ModbusExceptionCode(enum.IntEnum):
    """Exception codes a Modbus device answers with (Modbus application protocol v1.1b3,
    section 7)."""

    ILLEGAL_FUNCTION = 0x01
    ILLEGAL_ADDRESS = 0x02
    ILLEGAL_VALUE = 0x03
    DEVICE_FAILURE = 0x04
    ACKNOWLEDGE = 0x05
    DEVICE_BUSY = 0x06
    NEGATIVE_ACKNOWLEDGE = 0x07
    MEMORY_PARITY_ERROR = 0x08
    GATEWAY_PATH_UNAVAILABLE = 0x0A
    GATEWAY_TARGET_NO_RESPONSE = 0x0B
    UNKNOWN = 0xFF
    """A code outside the standard list (the raw value is kept in ``DeviceRefused.raw``)."""


class TransportError(RuntimeFailure):
    """A device exchange failed.

    Parameters
    ----------
    message
        What happened (no unit).
    link
        Name of the link (host:port or port path), for messages and logs (no unit).
    """

    def __init__(self, message: str, *, link: str) -> None:
        super().__init__(f"{link}: {message}")
        self.link = link


class NoReply(TransportError):
    """The device did not answer any attempt within its timeout."""


class LinkUnavailable(TransportError):
    """The connection or serial port could not be opened (or was lost and not regained)."""


class BadReply(TransportError):
    """The device answered, but not with what was asked for (wrong length or kind)."""


class DeviceRefused(TransportError):
    """A Modbus device answered with an exception response.

    Parameters
    ----------
    message
        What was asked (no unit).
    link
        Name of the link (no unit).
    raw
        Exception code as received, 0..255 (no unit).
    unit_id
        Modbus unit id asked, 0..247 (no unit).
    function_code
        Function code of the request, 1..127 (no unit).
    address
        First protocol address of the request, 0-based (no unit).
    """

    def __init__(
        self,
        message: str,
        *,
        link: str,
        raw: int,
        unit_id: int,
        function_code: int,
        address: int,
    ) -> None:
        try:
            code = ModbusExceptionCode(raw)
        except ValueError:
            code = ModbusExceptionCode.UNKNOWN
        super().__init__(
            f"{message}: unit {unit_id} refused with exception {raw:02X} ({code.name})",
            link=link,
        )
        self.code = code
        self.raw = raw
        self.unit_id = unit_id
        self.function_code = function_code
        self.address = address
