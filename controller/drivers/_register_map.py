"""Where each chamber's block sits: unit id and base address, from a small config.

Rule: chamber k (0-based, rig order) sits at ``first_block_address + k * block_stride`` on
``unit_id`` unless the config overrides it. Blocks start on multiples of 16 so that a block's
coils and discrete inputs fill whole 16-bit words, and no two blocks on one unit share a word.

Blocks that follow each other with no gap (``block_stride = 16``) on one unit form a *run*
(:meth:`RegisterMap.runs`): reserved offsets read 0 and take writes of 0, so one request reads
the cyclic inputs of up to :data:`MAX_RUN_BLOCKS` chambers, and one writes their drives.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Self

from pydantic import Field, model_validator

from controller._model import FileModel
from controller.drivers._codec_modbus import POINTS, point
from controller.drivers._modbus_scalar import BLOCK_SPAN, Point, Table, WordOrder
from controller.errors import SquallError

__all__ = [
    "MAX_RUN_BLOCKS",
    "ChamberBlock",
    "ChamberBlockConfig",
    "RegisterMap",
    "RegisterMapConfig",
]

MAX_RUN_BLOCKS = 8
"""Most blocks one request spans: input registers 0..6 of eight neighbouring blocks are
7 × 16 + 7 = 119 words, within the 125 of one read (Modbus application protocol v1.1b3, 6.4),
and holding registers 0..10 are 7 × 16 + 11 = 123 words, the most one write takes (6.12);
count."""


class ChamberBlockConfig(FileModel):
    """Where one chamber's block lives, overriding the rack-wide layout."""

    unit_id: int | None = Field(
        None, ge=1, le=247, description="Modbus unit (slave) id of the module; no unit."
    )
    block_address: int | None = Field(
        None,
        ge=0,
        le=65535 - BLOCK_SPAN + 1,
        multiple_of=16,
        description="First address of the chamber's block in every table, multiple of 16; no unit.",
    )


class RegisterMapConfig(FileModel):
    """Rack-wide register layout: chamber k (0-based, rig order) sits at
    ``first_block_address + k * block_stride`` on ``unit_id`` unless overridden."""

    unit_id: int = Field(1, ge=1, le=247, description="Default Modbus unit id; no unit.")
    first_block_address: int = Field(
        0, ge=0, le=65520, multiple_of=16, description="Block address of the first chamber."
    )
    block_stride: int = Field(
        32, ge=BLOCK_SPAN, le=4096, multiple_of=16, description="Addresses between blocks."
    )
    word_order: WordOrder = Field(
        WordOrder.HIGH_FIRST, description="Register order of 32-bit values."
    )
    chambers: dict[str, ChamberBlockConfig] = Field(
        default_factory=dict, description="Per-chamber overrides, keyed by chamber id."
    )

    @model_validator(mode="after")
    def _fits(self) -> Self:
        if self.first_block_address + self.block_stride > 65536:
            raise ValueError("first block runs past address 65535")
        return self


@dataclass(frozen=True, kw_only=True)
class ChamberBlock:
    """Where one chamber's block sits: unit id and base address (same in all four tables)."""

    chamber_id: str
    unit_id: int
    base: int

    def address(self, name: str) -> int:
        """Absolute address of a point in this block.

        Parameters
        ----------
        name
            Point name (no unit).

        Returns
        -------
        int
            Modbus protocol address, 0-based, in the point's table (no unit).
        """
        return self.base + point(name).offset


@dataclass(frozen=True, kw_only=True)
class RegisterMap:
    """All chamber blocks of a rack and the word order of its 32-bit values."""

    blocks: tuple[ChamberBlock, ...]
    word_order: WordOrder = WordOrder.HIGH_FIRST

    @classmethod
    def build(
        cls,
        chamber_ids: Iterable[str],
        config: RegisterMapConfig | None = None,
        *,
        where: str = "register_map",
    ) -> RegisterMap:
        """Lay out one block per chamber.

        Parameters
        ----------
        chamber_ids
            Chamber ids in rig order (no unit).
        config
            Layout and overrides; ``None`` uses the defaults the simulator serves (no unit).
        where
            Field-path prefix named in errors (no unit).

        Returns
        -------
        RegisterMap
            The map (no unit).
        """
        config = config or RegisterMapConfig()
        ids = list(chamber_ids)
        if not ids:
            raise SquallError("a register map needs at least one chamber", field=where)
        unknown = sorted(set(config.chambers) - set(ids))
        if unknown:
            raise SquallError(
                f"override for unknown chamber(s) {', '.join(unknown)}",
                field=f"{where}.chambers.{unknown[0]}",
            )
        blocks: list[ChamberBlock] = []
        taken: dict[tuple[int, int], str] = {}
        for k, chamber_id in enumerate(ids):
            override = config.chambers.get(chamber_id, ChamberBlockConfig())
            unit = override.unit_id if override.unit_id is not None else config.unit_id
            base = (
                override.block_address
                if override.block_address is not None
                else config.first_block_address + k * config.block_stride
            )
            field = f"{where}.chambers.{chamber_id}"
            if base + BLOCK_SPAN - 1 > 0xFFFF:
                raise SquallError(f"block at {base} runs past address 65535", field=field)
            for word in range(base // 16, (base + BLOCK_SPAN - 1) // 16 + 1):
                other = taken.get((unit, word))
                if other is not None:
                    raise SquallError(
                        f"block at unit {unit} address {base} overlaps chamber {other}",
                        field=field,
                    )
                taken[(unit, word)] = chamber_id
            blocks.append(ChamberBlock(chamber_id=chamber_id, unit_id=unit, base=base))
        return cls(blocks=tuple(blocks), word_order=config.word_order)

    @property
    def chamber_ids(self) -> tuple[str, ...]:
        """Chamber ids in rig order (no unit)."""
        return tuple(b.chamber_id for b in self.blocks)

    @property
    def unit_ids(self) -> tuple[int, ...]:
        """Distinct unit ids, ascending (no unit)."""
        return tuple(sorted({b.unit_id for b in self.blocks}))

    def block(self, chamber_id: str) -> ChamberBlock:
        """The block of one chamber.

        Parameters
        ----------
        chamber_id
            Chamber id (no unit).

        Returns
        -------
        ChamberBlock
            Its unit id and base address (no unit).
        """
        for b in self.blocks:
            if b.chamber_id == chamber_id:
                return b
        raise SquallError(f"chamber {chamber_id!r} has no register block", field=chamber_id)

    def blocks_on(self, unit_id: int) -> tuple[ChamberBlock, ...]:
        """Blocks served by one unit id, by ascending base address.

        Parameters
        ----------
        unit_id
            Modbus unit id (no unit).

        Returns
        -------
        tuple of ChamberBlock
            The blocks (no unit).
        """
        return tuple(sorted((b for b in self.blocks if b.unit_id == unit_id), key=lambda b: b.base))

    def blocks_touched(self, unit_id: int, first: int, count: int) -> tuple[ChamberBlock, ...]:
        """Blocks whose address span meets ``first .. first + count - 1`` on a unit.

        Parameters
        ----------
        unit_id
            Modbus unit id (no unit).
        first
            First address of a request, 0-based (no unit).
        count
            Number of addresses, >= 1 (count).

        Returns
        -------
        tuple of ChamberBlock
            The blocks a request reaches (no unit).
        """
        last = first + count - 1
        return tuple(
            b
            for b in self.blocks_on(unit_id)
            if b.base <= last and first <= b.base + BLOCK_SPAN - 1
        )

    def runs(self, max_blocks: int = MAX_RUN_BLOCKS) -> tuple[tuple[ChamberBlock, ...], ...]:
        """Blocks grouped into runs: neighbours on one unit with no gap between them.

        Parameters
        ----------
        max_blocks
            Longest run, >= 1 (count); a longer row of neighbours is cut into several runs.

        Returns
        -------
        tuple of tuple of ChamberBlock
            Every block in exactly one run, by unit and ascending address (no unit).
        """
        if max_blocks < 1:
            raise ValueError(f"max_blocks must be 1 or more, got {max_blocks}")
        runs: list[list[ChamberBlock]] = []
        for unit in self.unit_ids:
            current: list[ChamberBlock] = []
            for b in self.blocks_on(unit):
                if (
                    current
                    and b.base == current[-1].base + BLOCK_SPAN
                    and len(current) < max_blocks
                ):
                    current.append(b)
                    continue
                if current:
                    runs.append(current)
                current = [b]
            if current:
                runs.append(current)
        return tuple(tuple(run) for run in runs)

    def locate(self, table: Table, unit_id: int, address: int) -> tuple[ChamberBlock, Point] | None:
        """Which block and point an address belongs to.

        Parameters
        ----------
        table
            Modbus table (no unit).
        unit_id
            Modbus unit id (no unit).
        address
            Protocol address, 0-based (no unit).

        Returns
        -------
        tuple of (ChamberBlock, Point) or None
            The block and the point whose words include ``address``, or None if unmapped
            (no unit).
        """
        for b in self.blocks_on(unit_id):
            offset = address - b.base
            if not 0 <= offset < BLOCK_SPAN:
                continue
            for p in POINTS:
                if p.table is table and p.offset <= offset < p.offset + max(p.word_count, 1):
                    return b, p
            return None
        return None
