"""The protocol's timeline as the views show it, rebuilt from the text stored in the run log.

Rules of this module
--------------------
- The run log stores the protocol text as run; the timeline comes from it, never from a file
  on disk that may have changed since.
- Three depths: :func:`title_only` reads just the title with the standard TOML parser (no
  protocol models, so the first paint does not wait for them); :func:`quick_timeline`
  validates the protocol and lays its phases end to end; :func:`full_timeline` also compiles
  it to place events (heatwaves, storms…) and sampling reminders. Compiling may need CSV
  series next to the protocol file, which a replayed log rarely has: then the quick
  timeline stands. The protocol package is imported inside the functions that need it.
- A protocol that cannot be read at all gives an empty timeline with its duration unknown,
  never an error: the views still show the samples.
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING

from controller.errors import SquallError

if TYPE_CHECKING:
    from controller.protocol import Protocol

__all__ = ["Span", "Timeline", "full_timeline", "quick_timeline", "title_only"]


@dataclass(frozen=True, slots=True, kw_only=True)
class Span:
    """A named stretch of protocol time.

    Attributes
    ----------
    name
        Phase or event name.
    kind
        ``phase``, or the event kind (``heatwave``, ``cold-spell``, ``storm``), or
        ``sampling`` for a reminder (then ``t0_s == t1_s``).
    t0_s, t1_s
        Start and end, s since the protocol's start.
    """

    name: str
    kind: str
    t0_s: float
    t1_s: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Timeline:
    """Phases, events and sampling reminders of the run's protocol.

    Attributes
    ----------
    title
        The protocol's title ("" when unreadable).
    duration_s
        Length of the protocol, s; None when unreadable.
    phases
        Phases end to end, in order.
    events
        Events in time order (empty for a quick timeline).
    sampling
        Sampling reminders in time order (empty for a quick timeline).
    complete
        Whether events and sampling were placed (the protocol compiled).
    note
        Why the timeline is partial, in words ("" when complete).
    """

    title: str
    duration_s: float | None
    phases: tuple[Span, ...] = ()
    events: tuple[Span, ...] = ()
    sampling: tuple[Span, ...] = ()
    complete: bool = False
    note: str = ""

    def phase_at(self, elapsed_s: float) -> Span | None:
        """The phase in force at protocol time ``elapsed_s`` (s); None past the end.

        Parameters
        ----------
        elapsed_s
            Protocol time, s.
        """
        for span in self.phases:
            if span.t0_s <= elapsed_s < span.t1_s:
                return span
        return None


def _read(text: str, name: str) -> Protocol:
    from controller.files import parse_toml, validate_data
    from controller.protocol import Protocol

    return validate_data(parse_toml(text, file=name), Protocol, text=text, file=name)


def title_only(protocol_text: str) -> Timeline:
    """A timeline that knows only the protocol's title (duration unknown), read cheaply.

    Parameters
    ----------
    protocol_text
        The protocol's TOML text as stored in the run log.

    Returns
    -------
    Timeline
        Title (or "" when the text is not TOML), no phases, duration None.
    """
    try:
        title = tomllib.loads(protocol_text).get("title", "")
    except tomllib.TOMLDecodeError:
        title = ""
    return Timeline(
        title=title if isinstance(title, str) else "",
        duration_s=None,
        note="reading the protocol…",
    )


def _phases(protocol: Protocol) -> tuple[Span, ...]:
    spans: list[Span] = []
    t = 0.0
    for phase in protocol.phases:
        spans.append(Span(name=phase.name, kind="phase", t0_s=t, t1_s=t + float(phase.duration)))
        t += float(phase.duration)
    return tuple(spans)


def quick_timeline(protocol_text: str, *, name: str = "protocol (from the run log)") -> Timeline:
    """Phases laid end to end from the protocol text, without compiling.

    Parameters
    ----------
    protocol_text
        The protocol's TOML text as stored in the run log.
    name
        Name used in messages.

    Returns
    -------
    Timeline
        Title, duration and phases; events and sampling empty.
    """
    try:
        protocol = _read(protocol_text, name)
    except SquallError as exc:
        return Timeline(title="", duration_s=None, note=f"protocol unreadable: {exc.message}")
    phases = _phases(protocol)
    return Timeline(
        title=protocol.title,
        duration_s=phases[-1].t1_s if phases else 0.0,
        phases=phases,
        note="events not placed yet",
    )


def full_timeline(
    protocol_text: str,
    start_utc_s: float,
    *,
    base_dir: Path | None = None,
    name: str = "protocol (from the run log)",
) -> Timeline:
    """Phases, events and sampling reminders of the compiled protocol.

    Parameters
    ----------
    protocol_text
        The protocol's TOML text as stored in the run log.
    start_utc_s
        When the run started (elapsed time 0), UTC POSIX s.
    base_dir
        Folder the protocol's CSV series are relative to; default the working folder.
    name
        Name used in messages.

    Returns
    -------
    Timeline
        The complete timeline, or the quick one (with a note) when compiling fails.
    """
    quick = quick_timeline(protocol_text, name=name)
    if quick.duration_s is None:
        return quick
    from controller.protocol import compile_protocol

    try:
        protocol = _read(protocol_text, name)
        compiled = compile_protocol(
            protocol,
            start_utc=datetime.fromtimestamp(start_utc_s, tz=UTC),
            base_dir=base_dir or Path("."),
        )
    except (SquallError, OSError, ValueError) as exc:
        message = exc.message if isinstance(exc, SquallError) else str(exc)
        return Timeline(
            title=quick.title,
            duration_s=quick.duration_s,
            phases=quick.phases,
            note=f"events not placed: {' '.join(message.split())}",
        )
    phases = tuple(
        Span(name=p.name, kind="phase", t0_s=p.t0_s, t1_s=p.t1_s) for p in compiled.phases
    )
    events = tuple(
        Span(name=e.name, kind=e.kind, t0_s=e.t0_s, t1_s=e.t1_s) for e in compiled.events
    )
    sampling = tuple(
        Span(name=s.what, kind="sampling", t0_s=s.t_s, t1_s=s.t_s) for s in compiled.sampling
    )
    return Timeline(
        title=compiled.title,
        duration_s=compiled.duration_s,
        phases=phases,
        events=events,
        sampling=sampling,
        complete=True,
    )
