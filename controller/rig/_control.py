"""Temperature-loop gains given in the rig file (``[chambers.control]``), e.g. by ``squall tune``.

Rules of this module
--------------------
- The table is optional and additive: a rig without it keeps the gains the runtime derives
  from the rig's thermal description (first-order-plus-dead-time model, SIMC rules).
- Gains belong to a thermal node, as thermal parameters do. A chamber with its own water gives
  them under its own ``[chambers.control]``; the chambers of a shared bath form one loop, so
  every one of them that gives the table must give the same gains (``squall tune --write``
  writes the table to each chamber of the bath). :func:`node_control` returns a node's gains.
- Gains are in the standard (ISA) form u = Kc·(e + (1/Ti)∫e dt + Td·de/dt), with u the
  heater drive in % (negative: cooling) and e in °C, as :class:`~controller.control.PidParams`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import TYPE_CHECKING

from pydantic import Field

from controller._model import FileModel

if TYPE_CHECKING:
    from controller.rig._models import Rig

__all__ = ["ChamberControl", "node_control"]


class ChamberControl(FileModel):
    """Gains of the temperature loop of a chamber's thermal node (``[chambers.control]``)."""

    kc: float = Field(
        gt=0,
        le=1e6,
        description="Controller gain, % heater drive per °C (standard ISA form).",
    )
    ti_s: float = Field(
        gt=0,
        description="Integral time, s (inf for no integral action).",
    )
    td_s: float = Field(0.0, ge=0, le=1e5, description="Derivative time, s (0 for none).")
    period_s: float | None = Field(
        None,
        gt=0,
        le=3600,
        description="Control tick period the gains were tuned for, s (half of it counts as "
        "dead time); absent = not stated.",
    )
    source: str | None = Field(
        None,
        max_length=200,
        description="Where the gains come from, in words (e.g. the tuning run that found them).",
    )

    def same_gains(self, other: ChamberControl) -> bool:
        """Whether two tables give the same gains and tick (``source`` may differ).

        Parameters
        ----------
        other
            The other table (no unit).

        Returns
        -------
        bool
            True when kc (% per °C), ti_s (s), td_s (s) and period_s (s) agree to 1e-9
            relative, dimensionless.
        """

        def close(a: float | None, b: float | None) -> bool:
            if a is None or b is None:
                return a is b
            return a == b or math.isclose(a, b, rel_tol=1e-9)

        return (
            close(self.kc, other.kc)
            and close(self.ti_s, other.ti_s)
            and close(self.td_s, other.td_s)
            and close(self.period_s, other.period_s)
        )


def node_control(rig: Rig, members: Sequence[str]) -> ChamberControl | None:
    """The gains the rig file gives for one thermal node, if any.

    Parameters
    ----------
    rig
        A validated rig (chambers of one bath already agree on their gains; no unit).
    members
        Chamber ids of the node: one chamber with its own water, or chambers of one bath
        (no unit).

    Returns
    -------
    ChamberControl or None
        The node's ``[chambers.control]`` (for a bath: that of any of its chambers, since
        they agree), or None when the rig gives none (no unit).
    """
    if not members:
        raise ValueError("a thermal node has at least one chamber")
    first = rig.chamber(members[0])
    if first.bath is None:
        return first.control
    for chamber in rig.chambers:
        if chamber.bath == first.bath and chamber.control is not None:
            return chamber.control
    return None
