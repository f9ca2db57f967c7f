"""The protocol's setpoints on the loop's tick grid, evaluated a chunk of ticks at a time.

Rule: tick k is due at elapsed time k·period, so its setpoints depend only on k. They are
evaluated with the compiled protocol's vectorised :func:`~controller.protocol.sample` for a
chunk of upcoming ticks at once, which costs about as much as one scalar evaluation, and kept
as plain Python lists. Uncontrolled variables (NaN in samples) become ``None``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence

import numpy as np

from controller.protocol import CompiledProtocol, phase_index_at, sample
from controller.runtime._decide import Target

__all__ = ["SetpointTable"]


def _values(array: np.ndarray) -> list[float | None]:
    return [None if math.isnan(v) else v for v in array.tolist()]


class SetpointTable:
    """Setpoints and phase of every protocol chamber at tick k.

    Parameters
    ----------
    compiled
        The compiled protocol.
    chambers
        Chamber ids to evaluate.
    period_s
        Tick period, s.
    chunk_ticks
        Ticks evaluated at once, dimensionless.
    """

    def __init__(
        self,
        compiled: CompiledProtocol,
        chambers: Sequence[str],
        period_s: float,
        chunk_ticks: int = 512,
    ) -> None:
        if chunk_ticks < 1:
            raise ValueError("chunk_ticks must be at least 1")
        self._compiled = compiled
        self._chambers = tuple(chambers)
        self._period_s = float(period_s)
        self._chunk = int(chunk_ticks)
        self._k0 = -(2**62)  # no chunk loaded yet
        self._phases: list[str] = []
        self._columns: dict[str, tuple[list[float | None], ...]] = {}

    def _load(self, k: int) -> None:
        k0 = k - k % self._chunk
        times = (k0 + np.arange(self._chunk, dtype=np.float64)) * self._period_s
        names = [p.name for p in self._compiled.phases]
        self._phases = [names[i] for i in phase_index_at(self._compiled, times).tolist()]
        samples = sample(self._compiled, times)
        self._columns = {
            c: (
                _values(samples[c]["temperature_c"]),
                _values(samples[c]["par"]),
                _values(samples[c]["flow_cm_s"]),
            )
            for c in self._chambers
        }
        self._k0 = k0

    def at(self, k: int) -> tuple[str, Mapping[str, Target]]:
        """Phase and setpoints at tick ``k``.

        Parameters
        ----------
        k
            Tick number, dimensionless, 0 or more (due at elapsed ``k·period_s``).

        Returns
        -------
        tuple
            Phase name, and per chamber its :class:`Target` (°C, µmol photons m⁻² s⁻¹,
            cm s⁻¹; None where uncontrolled).
        """
        if k < 0:
            raise ValueError(f"tick number must not be negative, got {k}")
        if not self._k0 <= k < self._k0 + self._chunk:
            self._load(k)
        i = k - self._k0
        targets = {
            c: Target(temperature_c=cols[0][i], par=cols[1][i], flow_cm_s=cols[2][i])
            for c, cols in self._columns.items()
        }
        return self._phases[i], targets
