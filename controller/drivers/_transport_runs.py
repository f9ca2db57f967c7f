"""The cyclic exchange with a run of neighbouring chamber blocks: one request each way.

Rules of this module
--------------------
- A :class:`BlockRun` is the blocks of one Modbus link and unit that follow each other with
  no gap (:meth:`~controller.drivers.RegisterMap.runs`); a block with no neighbour is a run
  of one. Reads and writes asked for several of its chambers before the exchange starts (the
  control loop reads every chamber concurrently, then writes every chamber concurrently) are
  joined into one exchange (``hardware-notes/register-map.md``, "The controller's cyclic
  exchange"): one read of input registers 0..6 across the run (readings, fault bits and
  contacts), and one write of holding registers 0..10 of every block across the run (reserved
  zeros in between): drives, watchdog timeout, a new watchdog count, safe drives and relay
  bits. Every write thus sets its module up afresh, so a module that lost power (and booted
  with its watchdog off, every safe drive 0) is whole again after the next tick's write.
- When a joined request fails, its blocks are tried again one by one at once, concurrently
  (the link queues them), while the exchange's budget lasts: a *probe*. Blocks that fail
  while their neighbours answer become **suspects**, exchanged with singly (their
  neighbours still jointly) until they answer again, so a silent module costs its
  neighbours nothing but the wait. When every block fails, the link or the whole module is
  down or slow: nothing is learned and the run stays joined, since going block by block
  would only multiply the requests. When the budget cuts a joined request short twice in a
  row (a silent module, or a link too slow for the budget), the next exchange probes. A
  device that refuses the joined read itself is read block by block for good. A busy
  module (tripped watchdog) is fed alone, then written again.
- Every exchange runs under ``budget_s`` and reports, per chamber, a value or the exception
  that stopped it; callers re-raise their own.
- ``CancelledError`` is never caught; the exchange itself is shielded from a caller that
  gives up, so its neighbours still get their answer.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Awaitable, Callable, Mapping, Sequence
from dataclasses import dataclass

from controller.drivers._codec_modbus import (
    CYCLIC_INPUT_WORDS,
    InputBits,
    InputValues,
    RelayBits,
    decode_contact_status,
    decode_input_bits,
    decode_inputs,
    encode_relay_word,
    next_watchdog_count,
    point,
)
from controller.drivers._modbus_scalar import BLOCK_SPAN, WordOrder
from controller.drivers._register_map import MAX_RUN_BLOCKS, ChamberBlock
from controller.drivers._transport_common import (
    DeviceRefused,
    ModbusExceptionCode,
    TransportError,
)
from controller.drivers._transport_modbus import ModbusTransport
from controller.errors import SquallError

__all__ = ["BlockRun", "Readings"]

_log = logging.getLogger(__name__)

Readings = tuple[InputValues, InputBits]
"""What one read of a block gives: its analog inputs and its contacts."""

_FAILURES = (TransportError, SquallError, TimeoutError)
_CONTACTS = 3  # discrete inputs 0..2
_TIMEOUT_OFFSET = point("watchdog_timeout_s").offset
_COUNTER_OFFSET = point("watchdog_counter").offset
_WRITE_WORDS = point("relay_bits").offset + 1  # holding registers 0..10 of a block
_GAP_WORDS = BLOCK_SPAN - _WRITE_WORDS  # reserved holding registers after them
_PROBE_AFTER = 2  # joined requests cut short in a row before the blocks are probed, count
_Outcome = dict[str, object]  # per chamber: a value (True for a write) or an exception


@dataclass(kw_only=True)
class _Block:
    """One chamber block as the controller keeps track of it."""

    chamber: str
    base: int
    safe_words: tuple[int, ...]
    count: int = 0
    """The watchdog count last written (count)."""


class _Batch:
    """Calls joined into one exchange: those made before the exchange starts."""

    def __init__(self) -> None:
        self.started = False
        self.wanted: dict[str, tuple[int, ...]] = {}
        self.task: asyncio.Future[_Outcome] | None = None


def _neighbours(blocks: Sequence[_Block]) -> list[list[_Block]]:
    """Split blocks (ascending base) where a gap opens between two of them."""
    groups: list[list[_Block]] = []
    for b in blocks:
        if groups and b.base == groups[-1][-1].base + BLOCK_SPAN:
            groups[-1].append(b)
        else:
            groups.append([b])
    return groups


def _failed(outcome: object) -> bool:
    return isinstance(outcome, BaseException)


class BlockRun:
    """Neighbouring chamber blocks on one link and unit, exchanged with jointly.

    Parameters
    ----------
    link
        The Modbus link the blocks are reached through (no unit).
    unit_id
        Their unit id, 0..247 (no unit).
    blocks
        The blocks, ascending and without gaps, 1..8 of them (no unit).
    word_order
        Register order of 32-bit values (no unit).
    timeout_word
        The encoded ``watchdog_timeout_s`` written with every feed (no unit).
    safe_words
        Per chamber, the encoded safe drives (holding registers 6..9) (no unit).
    budget_s
        Longest one joined exchange may take, s.
    """

    def __init__(
        self,
        link: ModbusTransport,
        unit_id: int,
        blocks: Sequence[ChamberBlock],
        *,
        word_order: WordOrder,
        timeout_word: int,
        safe_words: Mapping[str, Sequence[int]],
        budget_s: float,
    ) -> None:
        if not 1 <= len(blocks) <= MAX_RUN_BLOCKS:
            raise ValueError(f"a run holds 1..{MAX_RUN_BLOCKS} blocks, got {len(blocks)}")
        first = blocks[0].base
        if any(b.base != first + i * BLOCK_SPAN for i, b in enumerate(blocks)):
            raise ValueError("the blocks of a run must follow each other with no gap")
        self.link = link
        self.unit_id = unit_id
        self.word_order = word_order
        self._timeout_word = timeout_word
        self._budget_s = budget_s
        self._order = tuple(
            _Block(chamber=b.chamber_id, base=b.base, safe_words=tuple(safe_words[b.chamber_id]))
            for b in blocks
        )
        self._blocks = {b.chamber: b for b in self._order}
        self.suspects: set[str] = set()
        """Chambers whose modules failed on their own, after answering neighbours: they are
        exchanged with singly, their neighbours jointly, until they answer again."""
        self._probe = False
        self._cut_short = 0
        self._read_refused = False
        self._batches: dict[str, _Batch] = {}
        self._tasks: set[asyncio.Future[_Outcome]] = set()

    @property
    def chambers(self) -> tuple[str, ...]:
        """The run's chambers, by ascending address (no unit)."""
        return tuple(b.chamber for b in self._order)

    async def aclose(self) -> None:
        """Cancel any exchange still running (at shutdown)."""
        for task in list(self._tasks):
            task.cancel()
        await asyncio.gather(*self._tasks, return_exceptions=True)

    # ------------------------------------------------------------------ set-up
    async def setup(self, chamber: str) -> None:
        """The register map's start-up sequence for one module: read ``watchdog_tripped``,
        then write the watchdog timeout, a first feed and the safe drives in one request
        (holding registers 4..9; drives and relays are left as they are).

        Parameters
        ----------
        chamber
            Chamber id (no unit).

        Raises
        ------
        TransportError
            The module did not take the sequence (each request bounded by the link's policy).
        """
        b = self._blocks[chamber]
        bits = await self.link.read_discrete_inputs(self.unit_id, b.base, _CONTACTS)
        if decode_input_bits(bits, where=f"{chamber}.contacts").watchdog_tripped:
            _log.warning("%s: module found tripped by its watchdog; re-arming", chamber)
        b.count = next_watchdog_count(b.count)
        words = [self._timeout_word, b.count, *b.safe_words]
        await self.link.write_registers(self.unit_id, b.base + _TIMEOUT_OFFSET, words)

    # ------------------------------------------------------------------ joined calls
    async def read(self, chamber: str) -> Readings:
        """One chamber's inputs and contacts, from the run's next joined read.

        Parameters
        ----------
        chamber
            Chamber id (no unit).

        Returns
        -------
        tuple of (InputValues, InputBits)
            Readings (°C, µmol photons m⁻² s⁻¹, cm s⁻¹, %) and contacts (no unit).

        Raises
        ------
        TransportError, SquallError, TimeoutError
            The module did not answer, or answered malformed, within the budget.
        """
        outcome = await self._joined("read", chamber, ())
        if isinstance(outcome, BaseException):
            raise outcome
        return outcome  # type: ignore[return-value]

    async def write(self, chamber: str, drive_words: Sequence[int]) -> None:
        """Drive one module, set its relays, feed its watchdog and set it up, in the run's next
        joined write.

        Parameters
        ----------
        chamber
            Chamber id (no unit).
        drive_words
            Encoded heater, chiller, lamp and pump drives, holding registers 0..3 (no unit).

        Raises
        ------
        TransportError, SquallError, TimeoutError
            The module did not take the write within the budget.
        """
        outcome = await self._joined("write", chamber, tuple(drive_words))
        if isinstance(outcome, BaseException):
            raise outcome

    async def _joined(self, kind: str, chamber: str, words: tuple[int, ...]) -> object:
        batch = self._batches.get(kind)
        if batch is None or batch.started:
            batch = self._batches[kind] = _Batch()
            exchange = self._read_all if kind == "read" else self._write_all
            task = asyncio.ensure_future(exchange(batch))
            self._tasks.add(task)
            task.add_done_callback(self._tasks.discard)
            batch.task = task
        batch.wanted[chamber] = words
        assert batch.task is not None
        outcome = await asyncio.shield(batch.task)
        return outcome[chamber]

    async def _each(
        self,
        groups: Sequence[Sequence[_Block]],
        fn: Callable[[Sequence[_Block]], Awaitable[_Outcome]],
        out: _Outcome,
    ) -> None:
        """Exchange with every group concurrently; note each chamber's value or exception."""

        async def one(group: Sequence[_Block]) -> None:
            try:
                out.update(await fn(group))
            except _FAILURES as exc:
                out.update({b.chamber: exc for b in group})

        async with asyncio.TaskGroup() as tasks:
            for group in groups:
                tasks.create_task(one(group))

    def _groups(self, blocks: Sequence[_Block], *, joined: bool = True) -> list[list[_Block]]:
        """Neighbours jointly, suspects singly; everything singly for a probe."""
        if self._probe or not joined:
            return [[b] for b in blocks]
        trusted = [b for b in blocks if b.chamber not in self.suspects]
        return _neighbours(trusted) + [[b] for b in blocks if b.chamber in self.suspects]

    async def _exchange(
        self,
        blocks: Sequence[_Block],
        fn: Callable[[Sequence[_Block]], Awaitable[_Outcome]],
        out: _Outcome,
        pending: list[_Block],
        *,
        joined: bool = True,
    ) -> bool:
        """Exchange with the blocks; a joined request that failed is retried block by block
        at once (a probe), and what the probe shows is kept (:meth:`_learn`). ``pending``
        holds the blocks whose joined request has no outcome yet; returns whether a device
        refused a joined request outright."""
        groups = self._groups(blocks, joined=joined)
        probing, self._probe = self._probe, False
        pending[:] = [b for g in groups if len(g) > 1 for b in g]  # joined, not yet known
        await self._each(groups, fn, out)
        retry = [b for b in pending if isinstance(out[b.chamber], TransportError)]
        refused = any(isinstance(out[b.chamber], DeviceRefused) for b in retry)
        pending.clear()
        if probing:
            self._learn(blocks, out)
        if retry:
            for b in retry:
                del out[b.chamber]
            pending[:] = retry  # a budget that runs out during the probe leaves a probe due
            await self._each([[b] for b in retry], fn, out)
            pending.clear()
            self._learn(retry, out)
        self.suspects -= {b.chamber for b in blocks if not _failed(out[b.chamber])}
        return refused

    def _learn(self, probed: Sequence[_Block], out: _Outcome) -> None:
        """Blocks that failed while others answered become suspects; when every one failed,
        the link or the whole module is down or slow, and nothing is learned."""
        failed = {b.chamber for b in probed if b.chamber not in out or _failed(out[b.chamber])}
        if failed and len(failed) < len(probed):
            if not failed <= self.suspects:
                _log.info("%s unit %d: %s failed alone; exchanged with singly until they answer",
                          self.link.name, self.unit_id, ", ".join(sorted(failed)))  # fmt: skip
            self.suspects |= failed

    def _settle(self, out: _Outcome, asked: Sequence[_Block], pending: list[_Block]) -> _Outcome:
        """Name a timeout for what never answered; joined requests the budget cut short in
        :data:`_PROBE_AFTER` exchanges in a row leave a probe due for the next one."""
        if any(b.chamber not in out for b in pending):
            self._cut_short += 1  # a slow tick, or a module that never answers: probe on the
            self._probe = self._cut_short >= _PROBE_AFTER  # second, not on a first slow one
        else:
            self._cut_short = 0
        for b in asked:
            out.setdefault(b.chamber, TimeoutError(f"no answer within {self._budget_s:g} s"))
        return out

    # ------------------------------------------------------------------ reads
    async def _read_all(self, batch: _Batch) -> _Outcome:
        batch.started = True
        out: _Outcome = {}
        pending: list[_Block] = []
        try:
            async with asyncio.timeout(self._budget_s):
                joined = not self._read_refused
                if await self._exchange(self._order, self._read_group, out, pending, joined=joined):
                    self._read_refused = True  # e.g. a device that will not read reserved offsets
                    _log.info("%s unit %d refuses joined reads; reading block by block",
                              self.link.name, self.unit_id)  # fmt: skip
        except TimeoutError:
            pass
        return self._settle(out, self._order, pending)

    async def _read_group(self, group: Sequence[_Block]) -> _Outcome:
        count = (len(group) - 1) * BLOCK_SPAN + CYCLIC_INPUT_WORDS
        words = await self.link.read_input_registers(self.unit_id, group[0].base, count)
        out: _Outcome = {}
        for i, b in enumerate(group):
            own = words[i * BLOCK_SPAN : i * BLOCK_SPAN + CYCLIC_INPUT_WORDS]
            try:
                out[b.chamber] = (
                    decode_inputs(own[:6], self.word_order, where=f"{b.chamber}.inputs"),
                    decode_contact_status(own[6], where=f"{b.chamber}.contact_status"),
                )
            except SquallError as exc:  # one module's malformed reply spoils only its own
                out[b.chamber] = exc
        return out

    # ------------------------------------------------------------------ writes
    async def _write_all(self, batch: _Batch) -> _Outcome:
        batch.started = True
        wanted = batch.wanted
        asked = [b for b in self._order if b.chamber in wanted]
        out: _Outcome = {}
        pending: list[_Block] = []

        async def write(group: Sequence[_Block]) -> _Outcome:
            return await self._write_group(group, wanted)

        try:
            async with asyncio.timeout(self._budget_s):
                await self._exchange(asked, write, out, pending)
        except TimeoutError:
            pass
        return self._settle(out, asked, pending)

    def _words(self, b: _Block, drive_words: tuple[int, ...]) -> list[int]:
        """Holding registers 0..10 of a block, with a new watchdog count."""
        heater, chiller, lamp, pump = drive_words[:4]
        relays = RelayBits(heater_on=heater > 0, chiller_on=chiller > 0, lamp_on=lamp > 0,
                           pump_on=pump > 0)  # closed where the drive is above 0  # fmt: skip
        b.count = next_watchdog_count(b.count)
        return [*drive_words, self._timeout_word, b.count, *b.safe_words, encode_relay_word(relays)]

    async def _write_group(
        self, group: Sequence[_Block], wanted: Mapping[str, tuple[int, ...]]
    ) -> _Outcome:
        """One write for neighbouring blocks; block by block if one of them is busy."""
        if len(group) > 1:
            words: list[int] = []
            for i, b in enumerate(group):
                words += self._words(b, wanted[b.chamber])
                if i < len(group) - 1:
                    words += [0] * _GAP_WORDS
            try:
                await self.link.write_registers(self.unit_id, group[0].base, words)
                return {b.chamber: True for b in group}
            except DeviceRefused as exc:
                if exc.code is not ModbusExceptionCode.DEVICE_BUSY:
                    raise
        for b in group:  # alone, or one of them is tripped: each is written by itself
            await self._write_one(b, wanted[b.chamber])
        return {b.chamber: True for b in group}

    async def _write_one(self, b: _Block, drive_words: tuple[int, ...]) -> None:
        """Holding registers 0..10 of one block; a busy module is fed alone, then written."""
        try:
            await self.link.write_registers(self.unit_id, b.base, self._words(b, drive_words))
        except DeviceRefused as exc:
            if exc.code is not ModbusExceptionCode.DEVICE_BUSY:
                raise
            _log.warning("%s: watchdog tripped; feeding, then driving again", b.chamber)
            b.count = next_watchdog_count(b.count)
            await self.link.write_registers(self.unit_id, b.base + _COUNTER_OFFSET, [b.count])
            await self.link.write_registers(self.unit_id, b.base, self._words(b, drive_words))
