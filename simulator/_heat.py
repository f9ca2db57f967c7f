"""Heat bookkeeping of the rack's thermal nodes that only the truth needs, in plain floats.

Rule: the rack adds each segment's ∫(T − T_room)dt per node (from
:meth:`simulator._step.Stepper.step`), closes the epoch and sets the new flushing heat flow
when flows change; everything else is derived on demand. The heat carried out by flushing,
G·∫(T − T_in)dt with G the node's flushing heat flow q·ρ·cp, is folded per stretch of
constant flow ("epoch"): within one, ∫(T − T_in)dt = ∫(T − T_room)dt + (T_room − T_in)·span,
so nothing is summed per step. A control tick changes the pumps (so closes an epoch) every
tick; a handful of nodes are too few for numpy to pay, hence floats, with the very
operations, in the same order, of the array expressions they replace.
"""

from __future__ import annotations

__all__ = ["HeatLedger"]


class HeatLedger:
    """∫(T − T_room)dt of each thermal node since start, and its flushing loss.

    Parameters
    ----------
    nodes
        Number of thermal nodes, dimensionless.
    room_c
        Room temperature, °C.
    inflow_c
        Temperature of the fresh inflow, °C.

    Attributes
    ----------
    excess_k_s
        ∫(T − T_room)dt of each node since start, K s, one value per node.
    span_s
        Simulated time the ledger has been given, s.
    """

    def __init__(self, nodes: int, room_c: float, inflow_c: float) -> None:
        self._room_minus_inflow = room_c - inflow_c
        self.excess_k_s: list[float] = [0.0] * nodes
        self.span_s = 0.0
        self._done_j: list[float] = [0.0] * nodes  # flushing loss of the closed epochs
        self._epoch_excess: list[float] = [0.0] * nodes
        self._epoch_span_s = 0.0
        self._flush_w_k: list[float] = [0.0] * nodes  # G of the open epoch, W K⁻¹

    def add(self, excess_k_s: list[float], span_s: float) -> None:
        """Add one segment: ∫(T − T_room)dt of each node (K s) over ``span_s`` (s)."""
        self.excess_k_s = [a + b for a, b in zip(self.excess_k_s, excess_k_s, strict=True)]
        self.span_s += span_s

    def flush_loss_j(self) -> list[float]:
        """Heat carried out by flushing since start, J, one value per node."""
        span = self.span_s - self._epoch_span_s
        shift = self._room_minus_inflow * span
        return [
            done + g * ((total - before) + shift)
            for done, g, total, before in zip(
                self._done_j, self._flush_w_k, self.excess_k_s, self._epoch_excess, strict=True
            )
        ]

    def close(self, flush_loss_j: list[float], excess_k_s: list[float], span_s: float) -> None:
        """Take over totals computed elsewhere (J, K s and s since start) and open an epoch
        there, at the present flushing heat flow until :meth:`set_flow` says otherwise."""
        self._done_j = list(flush_loss_j)
        self.excess_k_s = list(excess_k_s)
        self.span_s = span_s
        self._epoch_excess = self.excess_k_s
        self._epoch_span_s = span_s

    def new_epoch(self, flush_w_k: list[float]) -> None:
        """Close the open epoch now and open one at the flushing heat flow ``flush_w_k``
        (W K⁻¹): :meth:`close` with the ledger's own totals, then :meth:`set_flow`, without
        copying the totals (this ledger replaces its lists, never changes them in place)."""
        self._done_j = self.flush_loss_j()
        self._epoch_excess = self.excess_k_s
        self._epoch_span_s = self.span_s
        self._flush_w_k = flush_w_k

    def set_flow(self, flush_w_k: list[float]) -> None:
        """The flushing heat flow of the open epoch, W K⁻¹ (from its start on)."""
        self._flush_w_k = flush_w_k
