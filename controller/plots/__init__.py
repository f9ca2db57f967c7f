"""Figures: the protocol preview (and, later, run and analysis plots)."""

from controller.plots._preview import (
    DPI,
    FIGSIZE_IN,
    PANELS,
    EventBar,
    GroupLines,
    PreviewData,
    render_preview,
)

__all__ = [
    "DPI",
    "FIGSIZE_IN",
    "PANELS",
    "EventBar",
    "GroupLines",
    "PreviewData",
    "render_preview",
]
