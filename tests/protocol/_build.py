"""Small helpers that build protocol mappings in code (as a TOML file would give them)."""

from __future__ import annotations

import copy
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from controller.protocol import CompiledProtocol, Protocol, compile_protocol

START = datetime(2027, 7, 20, 0, 0, tzinfo=UTC)
"""A start at local midnight when utc_offset is +00:00."""


def document(
    temperature: list[dict[str, Any]] | None = None,
    *,
    duration: str = "2d",
    light: list[dict[str, Any]] | None = None,
    flow: list[dict[str, Any]] | None = None,
    **top: Any,
) -> dict[str, Any]:
    """A one-phase, one-group protocol mapping; ``top`` overrides top-level keys."""
    programs: dict[str, Any] = {}
    if temperature is not None:
        programs["temperature"] = temperature
    if light is not None:
        programs["light"] = light
    if flow is not None:
        programs["flow"] = flow
    data: dict[str, Any] = {
        "format": "squall-protocol/1",
        "title": "test protocol",
        "groups": {"a": {"role": "treatment", "chambers": ["C1", "C2"]}},
        "phases": [{"name": "only", "duration": duration, "programs": programs}],
    }
    data.update(copy.deepcopy(top))
    return data


def compile_doc(
    data: dict[str, Any], base_dir: Path = Path("."), start: datetime = START
) -> CompiledProtocol:
    """Validate and compile a protocol mapping."""
    return compile_protocol(Protocol.model_validate(data), start_utc=start, base_dir=base_dir)


def two_groups(**top: Any) -> dict[str, Any]:
    """Warmed (treatment C1, C2) and ambient (control C3) groups holding 18 °C for 20 d."""
    data: dict[str, Any] = {
        "format": "squall-protocol/1",
        "title": "two groups",
        "groups": {
            "warmed": {"role": "treatment", "chambers": ["C1", "C2"]},
            "ambient": {"role": "control", "chambers": ["C3"]},
        },
        "phases": [
            {
                "name": "run",
                "duration": "20d",
                "programs": {
                    "temperature": [{"kind": "hold", "value": 18.0}],
                    "light": [{"kind": "hold", "value": 400.0}],
                    "flow": [{"kind": "hold", "value": 4.0}],
                },
            }
        ],
    }
    data.update(copy.deepcopy(top))
    return data
