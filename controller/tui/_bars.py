"""The run bar (top: run, phase, progress, time left) and the alarm line (bottom).

Rules of this module
--------------------
- Both are plain widgets with one reactive each (the run state, the alarms); they render
  rich text and read nothing else. Status is a symbol and a word besides its colour.
"""

from __future__ import annotations

from rich.text import Text
from textual.reactive import reactive
from textual.widget import Widget

from ._look import (
    PALETTE,
    alarm_badge,
    alarm_style,
    clock_utc,
    fmt_age,
    fmt_duration,
    status_badge,
)
from ._snapshot import AlarmEntry, RunMode, RunState

__all__ = ["AlarmLine", "RunBar", "progress_bar", "speed_text"]


def progress_bar(fraction: float | None, width: int) -> str:
    """A bar of ``width`` cells: ``━`` done, ``╌`` to come (readable without colour).

    Parameters
    ----------
    fraction
        Done, 0..1; None when unknown (an empty bar of ``·``).
    width
        Cells.
    """
    if width <= 0:
        return ""
    if fraction is None:
        return "·" * width
    done = round(max(0.0, min(1.0, fraction)) * width)
    return "━" * done + "╌" * (width - done)


def speed_text(speed: float) -> str:
    """Replay speed as ``×3600`` (or ``×1.5k`` style for large ones).

    Parameters
    ----------
    speed
        Log seconds per real second.
    """
    if speed >= 100_000:
        return f"×{speed / 1000:.0f}k"
    if speed >= 10 or speed == int(speed):
        return f"×{speed:.0f}"
    return f"×{speed:.1f}"


class RunBar(Widget):
    """Two lines: what runs and where it stands; how far along and how long to go."""

    DEFAULT_CSS = """
    RunBar {
        height: 2;
        width: 1fr;
        background: $panel;
    }
    """

    run: reactive[RunState | None] = reactive(None)
    """The run state shown; None before the first snapshot."""

    def render(self) -> Text:
        """Both lines as rich text."""
        run = self.run
        width = self.size.width
        if run is None:
            return Text(" ≋ squall · opening the run log…", style=PALETTE["mist"])
        sand, mist, foam = PALETTE["sand"], PALETTE["mist"], PALETTE["foam"]
        top = Text(no_wrap=True, overflow="ellipsis")
        top.append(" ≋ squall ", style=f"bold {PALETTE['seaglass']}")
        if run.mode is RunMode.REPLAY:
            top.append(f"REPLAY {speed_text(run.speed)} ", style=f"bold {sand}")
        else:
            top.append("LIVE ", style=f"bold {PALETTE['kelp']}")
        status, style = status_badge(run.status, playing=run.playing)
        top.append(status, style=style)
        if run.end_reason:
            top.append(f" ({run.end_reason})", style=mist)
        if run.loading is not None:
            top.append(f"  loading {run.loading * 100:.0f}%", style=f"bold {sand}")
        top.append("  phase ", style=mist)
        top.append(run.phase or "-", style=f"bold {foam}")
        if run.mode is RunMode.LIVE and run.age_s is not None and not run.end_reason:
            top.append(f"  last tick {fmt_age(run.age_s)} ago", style=mist)
        top.append("  ")
        top.append(run.title, style=foam)
        bottom = Text(no_wrap=True, overflow="ellipsis")
        bottom.append(" elapsed ", style=mist)
        bottom.append(fmt_duration(run.elapsed_s), style=f"bold {foam}")
        left = fmt_duration(run.remaining_s)
        pct = "  -%" if run.progress is None else f"{run.progress * 100:3.0f}%"
        tail = f" {pct}  {left} left"
        when = f"  {clock_utc(run.utc_s)}"
        bar_w = max(6, width - len(bottom) - len(tail) - len(when) - 2)
        bottom.append(" " + progress_bar(run.progress, bar_w), style=PALETTE["seaglass"])
        bottom.append(tail, style=foam)
        bottom.append(when, style=mist)
        top.truncate(width)
        bottom.truncate(width)
        return Text("\n").join([top, bottom])


class AlarmLine(Widget):
    """One line: how many alarms need attention, and the newest of them."""

    DEFAULT_CSS = """
    AlarmLine {
        height: 1;
        width: 1fr;
        background: $panel;
    }
    """

    alarms: reactive[tuple[AlarmEntry, ...]] = reactive(())
    """Every alarm of the run, as folded by the source."""

    def render(self) -> Text:
        """The line as rich text."""
        needing = [a for a in self.alarms if a.needs_attention]
        active = [a for a in self.alarms if a.active]
        line = Text(no_wrap=True, overflow="ellipsis")
        if not needing:
            line.append(" ✓ no alarm needs attention", style=PALETTE["kelp"])
            quiet = len(active)
            if quiet:
                line.append(f" · {quiet} active, acknowledged", style=PALETTE["mist"])
            return line
        first = needing[0]
        line.append(f" ⚑ {len(needing)} need attention ", style=f"bold {PALETTE['coral']}")
        line.append(
            alarm_badge(first.level, first.acked), style=alarm_style(first.level, first.acked)
        )
        line.append(f" {first.chamber or 'rig'} {first.code}", style=PALETTE["foam"])
        if len(needing) > 1:
            line.append(f" (+{len(needing) - 1} more)", style=PALETTE["mist"])
        line.append("  a: list", style=PALETTE["mist"])
        return line
