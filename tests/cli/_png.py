"""Read the size of a PNG file from its header (no image library needed)."""

from __future__ import annotations

import struct
from pathlib import Path

__all__ = ["PNG_SIGNATURE", "png_size"]

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_size(path: Path) -> tuple[int, int]:
    """Width and height in pixels of a PNG file; raise ``ValueError`` if it is not a PNG."""
    head = Path(path).read_bytes()[:24]
    if head[:8] != PNG_SIGNATURE or head[12:16] != b"IHDR":
        raise ValueError(f"{path} is not a PNG file")
    width, height = struct.unpack(">II", head[16:24])
    return width, height
