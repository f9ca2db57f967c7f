"""Base class for every pydantic model that defines a file format or a log record.

Rule: file-format models are frozen, forbid unknown keys (so a typo is an error with a
did-you-mean, never silently ignored) and carry a description with the unit on every field.
"""

from __future__ import annotations

from pydantic import BaseModel, ConfigDict

__all__ = ["FileModel"]


class FileModel(BaseModel):
    """Frozen, strict-keyed pydantic model used for protocol, rig and schedule files."""

    model_config = ConfigDict(
        frozen=True,
        extra="forbid",
        validate_default=True,
        populate_by_name=False,
        str_strip_whitespace=True,
    )
