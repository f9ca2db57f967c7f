"""The views' own look: palette, state symbols and number formats (no textual import).

Rules of this module
--------------------
- Every state is shown by a symbol *and* a word as well as by colour, so the views read the
  same on a monochrome terminal, through a screen reader's text, or to a colour-blind eye:
  a filled shape and an upper-case word mean "needs attention", a hollow shape and a
  lower-case word mean "acknowledged"; ``●`` marks a closed (incubating) chamber, ``○`` an
  open (flushed) one.
- The palette is the project's own ("tidepool": deep water, sea glass, sand, kelp, coral);
  widgets take their colours from here and from the theme built from it in :mod:`._app`.
- Number formats are fixed-width so columns do not jitter as values change.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime

from controller.storage import AlarmLevel, IncubationState

from ._snapshot import ChamberState, RunStatus

__all__ = [
    "PALETTE",
    "alarm_badge",
    "alarm_style",
    "chamber_summary",
    "clock_utc",
    "deviation_style",
    "fmt",
    "fmt_age",
    "fmt_duration",
    "fmt_signed",
    "incubation_badge",
    "status_badge",
]

PALETTE: dict[str, str] = {
    "deep": "#0e1a1d",
    "water": "#132529",
    "shoal": "#1b3338",
    "foam": "#e6e1d3",
    "mist": "#8fa5a3",
    "seaglass": "#4fb3a9",
    "sand": "#f2c572",
    "kelp": "#8cc084",
    "amber": "#f0a04b",
    "coral": "#e0603c",
    "urchin": "#d14b8f",
    "dusk": "#7d8de0",
}
"""Named colours of the tidepool palette (hex RGB)."""

_BADGES = {
    AlarmLevel.WARNING: ("▲ WARN", "△ warn", "amber"),
    AlarmLevel.ALARM: ("◆ ALRM", "◇ alrm", "coral"),
    AlarmLevel.TRIP: ("■ TRIP", "□ trip", "urchin"),
}


def alarm_badge(level: AlarmLevel | None, acked: bool) -> str:
    """Six-character alarm badge: symbol and word.

    Parameters
    ----------
    level
        Worst active alarm level, None when no alarm is active.
    acked
        Whether the active alarms are acknowledged.

    Returns
    -------
    str
        ``"·   ok"`` without alarm; upper case with a filled symbol when it needs attention,
        lower case with a hollow symbol once acknowledged.
    """
    if level is None:
        return "·   ok"
    loud, quiet, _ = _BADGES[level]
    return quiet if acked else loud


def alarm_style(level: AlarmLevel | None, acked: bool) -> str:
    """Rich style of an alarm badge.

    Parameters
    ----------
    level
        Worst active alarm level, None when none.
    acked
        Whether acknowledged.
    """
    if level is None:
        return PALETTE["kelp"]
    colour = PALETTE[_BADGES[level][2]]
    return colour if acked else f"bold {PALETTE['deep']} on {colour}"


def incubation_badge(state: IncubationState | None) -> str:
    """Six-character incubation badge: ``● shut`` (closed), ``○ open`` or ``? ----``.

    Parameters
    ----------
    state
        Incubation state, None when unknown.
    """
    if state is IncubationState.CLOSED:
        return "● shut"
    if state is IncubationState.OPEN:
        return "○ open"
    return "? ----"


def status_badge(status: RunStatus, *, playing: bool = True) -> tuple[str, str]:
    """Symbol + word for the run status, and its rich style.

    Parameters
    ----------
    status
        The run's status.
    playing
        Replay only: whether playback runs (live views pass True).

    Returns
    -------
    tuple of str
        (text, style).
    """
    table = {
        RunStatus.WAITING: ("… waiting", PALETTE["mist"]),
        RunStatus.RUNNING: ("▶ running", PALETTE["kelp"]),
        RunStatus.HELD: ("‖ HELD", f"bold {PALETTE['deep']} on {PALETTE['sand']}"),
        RunStatus.FINISHED: ("■ finished", PALETTE["seaglass"]),
        RunStatus.SILENT: ("? SILENT", f"bold {PALETTE['deep']} on {PALETTE['coral']}"),
    }
    text, style = table[status]
    if status is RunStatus.RUNNING and not playing:
        return "‖ paused", PALETTE["sand"]
    return text, style


def deviation_style(deviation_c: float | None) -> str:
    """Colour of a temperature deviation: quiet within 0.2 °C, amber to 1 °C, coral beyond.

    Parameters
    ----------
    deviation_c
        Measured minus setpoint, °C.

    Notes
    -----
    The bands are a display choice (common practice for water baths holding ±0.2 °C), not a
    control limit; interlocks raise the real alarms.
    """
    if deviation_c is None:
        return PALETTE["mist"]
    size = abs(deviation_c)
    if size < 0.2:
        return PALETTE["foam"]
    if size < 1.0:
        return PALETTE["amber"]
    return f"bold {PALETTE['coral']}"


def fmt(value: float | None, width: int, decimals: int) -> str:
    """Right-aligned fixed-width number, ``-`` when missing, ``#`` when it does not fit.

    Parameters
    ----------
    value
        The number (any unit), or None.
    width
        Characters.
    decimals
        Digits after the point.
    """
    if value is None or not math.isfinite(value):
        return "-".rjust(width)
    text = f"{value:.{decimals}f}"
    if len(text) > width and decimals:
        text = f"{value:.0f}"
    if len(text) > width:
        return "#" * width
    return text.rjust(width)


def fmt_signed(value: float | None, width: int, decimals: int) -> str:
    """Like :func:`fmt` with an explicit sign (``+0.31``).

    Parameters
    ----------
    value
        The number (any unit), or None.
    width
        Characters.
    decimals
        Digits after the point.
    """
    if value is None or not math.isfinite(value):
        return "-".rjust(width)
    if round(value, decimals) == 0:
        value = 0.0  # no "-0.00"
    text = f"{value:+.{decimals}f}"
    if len(text) > width and decimals:
        text = f"{value:+.{max(0, decimals - 1)}f}"
    if len(text) > width:
        text = f"{value:+.0f}"
    if len(text) > width:
        return ("+" if value > 0 else "-") + "#" * (width - 1)
    return text.rjust(width)


def fmt_duration(seconds: float | None) -> str:
    """Compact duration: ``2d 04:13``, ``04:13:07`` under a day, ``-`` when unknown.

    Parameters
    ----------
    seconds
        Duration, s.
    """
    if seconds is None or not math.isfinite(seconds):
        return "-"
    total = int(max(0.0, seconds))
    days, rest = divmod(total, 86400)
    hours, rest = divmod(rest, 3600)
    minutes, secs = divmod(rest, 60)
    if days:
        return f"{days}d {hours:02d}:{minutes:02d}"
    return f"{hours:02d}:{minutes:02d}:{secs:02d}"


def fmt_age(seconds: float | None) -> str:
    """How long ago, briefly: ``4 s``, ``12 min``, ``3 h 05 min``, ``2 d 04 h``.

    Parameters
    ----------
    seconds
        Age, s.
    """
    if seconds is None or not math.isfinite(seconds):
        return "-"
    total = int(max(0.0, seconds))
    if total < 60:
        return f"{total} s"
    if total < 3600:
        return f"{total // 60} min"
    if total < 86400:
        return f"{total // 3600} h {total % 3600 // 60:02d} min"
    return f"{total // 86400} d {total % 86400 // 3600:02d} h"


def clock_utc(utc_s: float | None) -> str:
    """``2027-07-03 14:05 UTC`` for a POSIX time, ``-`` when unknown.

    Parameters
    ----------
    utc_s
        UTC POSIX s.
    """
    if utc_s is None or not math.isfinite(utc_s):
        return "-"
    return datetime.fromtimestamp(utc_s, tz=UTC).strftime("%Y-%m-%d %H:%M UTC")


def chamber_summary(state: ChamberState) -> str:
    """One plain-text line about a chamber (for notifications and screen readers).

    Parameters
    ----------
    state
        The chamber's state.
    """
    return (
        f"{state.chamber}: {alarm_badge(state.alarm_level, state.alarm_acked).strip()}, "
        f"{fmt(state.temperature_c, 5, 2).strip()} °C (set "
        f"{fmt(state.temperature_setpoint_c, 5, 2).strip()}), "
        f"O2 {fmt(state.o2_umol_l, 5, 0).strip()} µmol/L, "
        f"{incubation_badge(state.incubation)}"
    )
