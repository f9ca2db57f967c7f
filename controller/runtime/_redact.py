"""Secrets kept out of run logs: inline broker passwords are redacted from the stored rig text.

Rules of this module
--------------------
- A run log keeps the rig file's text as run, and its group may read it (0640), and the HTML
  report prints it. A broker password written in the rig file (``password = "..."`` in
  ``[telemetry]``, or ``user:password@`` in the broker URL) is replaced by
  :data:`REDACTED` before the text is stored; everything else is kept byte for byte, on the
  same lines, so errors located in ``LOG:rig`` still point at the right line.
- ``password_file`` is the way to keep a password out of the rig file altogether; its path is
  not a secret and is kept.
- A resumed run is compiled from the stored (redacted) text. Its broker credentials come back
  from the rig file it was launched with, when that file still names the same broker and
  controller; otherwise telemetry stays off for the resumed run and the reason is given.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import tomlkit
from tomlkit.exceptions import TOMLKitError

from controller.errors import SquallError
from controller.files import parse_toml, read_text, validate_data
from controller.rig import Rig
from controller.telemetry import BrokerAddress, TelemetryConfig

__all__ = ["REDACTED", "has_redacted_secret", "redact_rig_text", "restore_telemetry"]

REDACTED = "(redacted)"
"""What stands in a stored rig text where a broker password was."""


def _redacted_url(url: str) -> str | None:
    """The broker URL with its password replaced, or None when it carries none."""
    try:
        parts = urlsplit(url.strip())
    except ValueError:
        return None
    if parts.password is None:
        return None
    userinfo, _, hostport = parts.netloc.rpartition("@")
    user = userinfo.split(":", 1)[0]
    return urlunsplit(parts._replace(netloc=f"{user}:{REDACTED}@{hostport}"))


def redact_rig_text(text: str) -> str:
    """A rig file's text with its inline broker passwords replaced by :data:`REDACTED`.

    Parameters
    ----------
    text
        The rig file's text (already validated).

    Returns
    -------
    str
        The same text, on the same lines, without the passwords; the very text when there is
        none to redact.
    """
    try:
        telemetry = tomllib.loads(text).get("telemetry")
    except tomllib.TOMLDecodeError:
        return text
    if not isinstance(telemetry, dict):
        return text
    broker = telemetry.get("broker")
    url = _redacted_url(broker) if isinstance(broker, str) else None
    password = telemetry.get("password")
    if url is None and (password is None or password == REDACTED):
        return text
    try:
        doc = tomlkit.parse(text)
    except TOMLKitError:  # tomllib read it; tomlkit is stricter in rare corners
        return text
    table = doc["telemetry"]
    if password is not None:
        table["password"] = REDACTED  # type: ignore[index]
    if url is not None:
        table["broker"] = url  # type: ignore[index]
    return tomlkit.dumps(doc)


def has_redacted_secret(config: TelemetryConfig) -> bool:
    """Whether a telemetry table read from a stored rig text lost its password.

    Parameters
    ----------
    config
        The ``[telemetry]`` table.

    Returns
    -------
    bool
        True when its password or its URL's password is :data:`REDACTED`.
    """
    secret = config.password.get_secret_value() if config.password is not None else None
    return secret == REDACTED or config.address.password == REDACTED


def restore_telemetry(rig: Rig, rig_path: Path) -> tuple[Rig, str | None]:
    """A resumed run's rig with the broker credentials of the rig file it was launched with.

    Parameters
    ----------
    rig
        The rig read from the run log's (redacted) text.
    rig_path
        The rig file the run was launched with.

    Returns
    -------
    tuple
        The rig to resume with, and why telemetry stays off (None when it is not off, or
        when nothing was redacted).
    """
    stored = rig.telemetry
    if stored is None or not stored.enabled or not has_redacted_secret(stored):
        return rig, None
    why: str | None = None
    try:
        text = read_text(rig_path)
        original = validate_data(parse_toml(text, file=rig_path), Rig, text=text, file=rig_path)
    except SquallError as exc:
        why = f"the rig file it was launched with cannot be read ({exc})"
    else:
        found = original.telemetry
        if found is None or not _same_broker(found, stored):
            why = f"{rig_path} no longer names broker {stored.address} as {stored.controller_id}"
        else:
            return rig.model_copy(update={"telemetry": found}), None
    off = stored.model_copy(update={"enabled": False})
    return rig.model_copy(update={"telemetry": off}), (
        f"telemetry off: the run log keeps no broker password and {why}"
    )


def _same_broker(found: TelemetryConfig, stored: TelemetryConfig) -> bool:
    a: BrokerAddress = found.address
    b: BrokerAddress = stored.address
    return (a.host, a.port, a.tls, found.controller_id) == (
        b.host,
        b.port,
        b.tls,
        stored.controller_id,
    )
