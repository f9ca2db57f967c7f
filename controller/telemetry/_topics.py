"""The topic layout of squall telemetry: building topics and reading them back.

Rules of this module
--------------------
- Every topic a controller publishes or listens to is built here, and every topic a watcher
  receives is parsed here; nothing else joins topic strings. The layout, under a prefix
  (default ``squall``, one or more levels):

  ====================================================  =========  =======  =========
  topic                                                 direction  QoS      retained
  ====================================================  =========  =======  =========
  ``<prefix>/<controller>/status``                      out        1        yes
  ``<prefix>/<controller>/chamber/<chamber>/sample``    out        0 (1)    no
  ``<prefix>/<controller>/alarm``                       out        1        no
  ``<prefix>/<controller>/event``                       out        1        no
  ``<prefix>/<controller>/tasks``                       out        1        yes
  ``<prefix>/<controller>/cmd``                         in         1        no
  ``<prefix>/<controller>/cmd/result``                  out        1        no
  ====================================================  =========  =======  =========

- Controller ids, chamber ids and prefix levels are single topic levels: letters, digits,
  ``_``, ``.`` and ``-`` only, so they can never contain the separator ``/`` or the
  wildcards ``+`` and ``#``. A watcher subscribes to ``<prefix>/+/#``.
- Parsing never raises on foreign topics: anything that does not fit the layout parses to
  ``None`` so a shared broker can carry other traffic under the same prefix.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from enum import StrEnum

__all__ = [
    "DEFAULT_PREFIX",
    "ID_PATTERN",
    "PREFIX_PATTERN",
    "ParsedTopic",
    "TopicKind",
    "Topics",
    "check_id",
]

#: Topic prefix used when the configuration names none.
DEFAULT_PREFIX = "squall"
#: One topic level naming a controller or chamber (regular expression).
ID_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$"
#: A prefix: one or more such levels joined by ``/`` (regular expression).
PREFIX_PATTERN = r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}(/[A-Za-z0-9][A-Za-z0-9_.-]{0,63}){0,7}$"

_ID = re.compile(ID_PATTERN)
_PREFIX = re.compile(PREFIX_PATTERN)


class TopicKind(StrEnum):
    """What a telemetry topic carries (its last levels)."""

    STATUS = "status"
    """Retained controller status; the last will sets it offline."""
    SAMPLE = "sample"
    """One chamber's sample row of one logged tick."""
    ALARM = "alarm"
    """An alarm raised, cleared or acknowledged."""
    EVENT = "event"
    """A run event (start, phase change, hold, stop...)."""
    TASKS = "tasks"
    """Retained list of the run's operator tasks still to come."""
    COMMAND = "cmd"
    """A remote command sent to the controller."""
    COMMAND_RESULT = "cmd/result"
    """The controller's answer to a remote command."""


def check_id(value: str, what: str) -> str:
    """Return ``value`` if it is a valid single topic level, else raise ValueError.

    Parameters
    ----------
    value
        A controller or chamber id.
    what
        What the id names, for the message (``"controller id"``).

    Returns
    -------
    str
        ``value`` unchanged.
    """
    if not isinstance(value, str) or not _ID.match(value):
        raise ValueError(
            f"{what} {value!r} must be 1-64 letters, digits, '_', '.' or '-', "
            "starting with a letter or digit"
        )
    return value


@dataclass(frozen=True, slots=True, kw_only=True)
class ParsedTopic:
    """A telemetry topic read back.

    Attributes
    ----------
    controller
        Controller id.
    kind
        What the topic carries.
    chamber
        Chamber id of a sample topic, else None.
    """

    controller: str
    kind: TopicKind
    chamber: str | None = None


class Topics:
    """Topic builder and parser for one prefix.

    Parameters
    ----------
    prefix
        Topic prefix: one or more levels of letters, digits, ``_``, ``.``, ``-``.
    """

    def __init__(self, prefix: str = DEFAULT_PREFIX) -> None:
        if not isinstance(prefix, str) or not _PREFIX.match(prefix):
            raise ValueError(
                f"topic prefix {prefix!r} must be levels of letters, digits, '_', '.' or '-' "
                "separated by '/' (no wildcards, no leading or trailing '/')"
            )
        self.prefix = prefix
        self._levels = len(prefix.split("/"))

    def __repr__(self) -> str:
        return f"Topics({self.prefix!r})"

    # ------------------------------------------------------------------ building
    def _of(self, controller: str, kind: TopicKind) -> str:
        """``<prefix>/<controller>/<kind>`` for the per-controller topics."""
        return f"{self.prefix}/{check_id(controller, 'controller id')}/{kind.value}"

    def status(self, controller: str) -> str:
        """Retained status topic of a controller.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.STATUS)

    def sample(self, controller: str, chamber: str) -> str:
        """Sample topic of one chamber of a controller.

        Parameters
        ----------
        controller
            Controller id.
        chamber
            Chamber id.

        Returns
        -------
        str
            The topic.
        """
        return (
            f"{self.prefix}/{check_id(controller, 'controller id')}"
            f"/chamber/{check_id(chamber, 'chamber id')}/sample"
        )

    def alarm(self, controller: str) -> str:
        """Alarm topic of a controller.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.ALARM)

    def event(self, controller: str) -> str:
        """Event topic of a controller.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.EVENT)

    def tasks(self, controller: str) -> str:
        """Retained topic of a controller's operator tasks.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.TASKS)

    def command(self, controller: str) -> str:
        """Topic a controller takes remote commands from.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.COMMAND)

    def command_result(self, controller: str) -> str:
        """Topic a controller answers remote commands on.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic.
        """
        return self._of(controller, TopicKind.COMMAND_RESULT)

    def watch_all(self) -> str:
        """Subscription that receives every controller's telemetry: ``<prefix>/+/#``.

        Returns
        -------
        str
            The topic filter.
        """
        return f"{self.prefix}/+/#"

    def watch_one(self, controller: str) -> str:
        """Subscription that receives one controller's telemetry: ``<prefix>/<id>/#``.

        Parameters
        ----------
        controller
            Controller id.

        Returns
        -------
        str
            The topic filter.
        """
        return f"{self.prefix}/{check_id(controller, 'controller id')}/#"

    # ------------------------------------------------------------------ parsing
    def parse(self, topic: str) -> ParsedTopic | None:
        """Read a received topic.

        Parameters
        ----------
        topic
            The topic a message arrived on.

        Returns
        -------
        ParsedTopic or None
            The controller, kind and chamber; None for a topic outside the layout (another
            prefix, an unknown sub-topic, or an invalid id).
        """
        levels = topic.split("/")
        n = self._levels
        if len(levels) < n + 2 or "/".join(levels[:n]) != self.prefix:
            return None
        controller, rest = levels[n], levels[n + 1 :]
        if not _ID.match(controller):
            return None
        chamber: str | None = None
        if len(rest) == 3 and rest[0] == "chamber" and rest[2] == "sample":
            chamber = rest[1]
            if not _ID.match(chamber):
                return None
            kind = TopicKind.SAMPLE
        else:
            try:
                kind = TopicKind("/".join(rest))
            except ValueError:
                return None
            if kind is TopicKind.SAMPLE:  # "sample" needs its chamber levels
                return None
        return ParsedTopic(controller=controller, kind=kind, chamber=chamber)
