"""Fixtures of the runtime tests: rig and protocol files written into the test's folder."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import pytest

from ._sim import Files, protocol_text, rig_text


@pytest.fixture
def files(tmp_path: Path) -> Files:
    """Write a rig and a protocol into the test's folder; return (protocol, rig, log path)."""
    counter = iter(range(1000))

    def make(
        chambers: Sequence[str] = ("B",),
        *,
        room_c: float = 18.0,
        t_min: float = 10.0,
        t_max: float = 26.0,
        initial_c: float = 20.0,
        **protocol: object,
    ) -> tuple[Path, Path, Path]:
        n = next(counter)
        rig = tmp_path / f"rig{n}.toml"
        rig.write_text(
            rig_text(chambers, room_c=room_c, t_min=t_min, t_max=t_max, initial_c=initial_c)
        )
        proto = tmp_path / f"protocol{n}.toml"
        proto.write_text(protocol_text(chambers, **protocol))  # type: ignore[arg-type]
        return proto, rig, tmp_path / f"run{n}.sqlite"

    return make
