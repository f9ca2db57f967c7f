"""Telemetry settings: the ``[telemetry]`` table of a rig file, and broker URLs.

Rules of this module
--------------------
- :class:`TelemetryConfig` is a :class:`~controller._model.FileModel` (frozen, unknown keys
  refused) so a rig file can carry it as ``[telemetry]`` with ``[telemetry.tls]`` and
  ``[telemetry.commands]``. Everything is checked when the file is read: the broker URL, ids,
  the prefix, TLS files given in pairs, and the conditions for remote commands.
- Remote commands are off by default. Turning them on needs a broker that authenticates
  (``username`` set, so the broker can refuse strangers and restrict who may write the
  command topic) and an allow-list of users; a command naming anyone else is refused.
- Broker URLs are ``mqtt://[user[:password]@]host[:port]`` (plain TCP, default port 1883)
  or ``mqtts://...`` (TLS, default port 8883); user and password are percent-decoded.
  :class:`BrokerAddress` is what both the publisher and the watcher connect to.
- Secrets: a password may be given in the URL, as ``password`` or, better, as
  ``password_file`` (first line of the file). :meth:`TelemetryConfig.credentials` reads the
  file when connecting; a file that cannot be read is a located :class:`SquallError`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Self
from urllib.parse import unquote, urlsplit

from pydantic import Field, SecretStr, field_validator, model_validator

from controller._model import FileModel
from controller.errors import SquallError
from controller.telemetry._topics import DEFAULT_PREFIX, ID_PATTERN, PREFIX_PATTERN

__all__ = ["BrokerAddress", "CommandsConfig", "TelemetryConfig", "TlsConfig"]

_SCHEMES = {"mqtt": (False, 1883), "mqtts": (True, 8883)}


@dataclass(frozen=True, slots=True, kw_only=True)
class BrokerAddress:
    """Where a broker listens, and how to log in.

    Attributes
    ----------
    host
        Host name or IP address.
    port
        TCP port, 1-65535.
    tls
        Whether the connection uses TLS (``mqtts://``).
    username
        User name from the URL, if any.
    password
        Password from the URL, if any.
    """

    host: str
    port: int
    tls: bool = False
    username: str | None = None
    password: str | None = None

    @classmethod
    def parse(cls, url: str, *, field: str | None = None) -> BrokerAddress:
        """Read a broker URL.

        Parameters
        ----------
        url
            ``mqtt://[user[:password]@]host[:port]`` or ``mqtts://...``.
        field
            Where the URL came from, for the error (``--broker``, ``telemetry.broker``).

        Returns
        -------
        BrokerAddress
            The address; the default port of the scheme when none is given.

        Raises
        ------
        SquallError
            For another scheme, a missing host, a bad port, or a path, query or fragment.
        """
        try:
            parts = urlsplit(url.strip())
            port = parts.port
        except ValueError as exc:
            raise SquallError(f"broker URL {url!r}: {exc}", field=field) from None
        if parts.scheme not in _SCHEMES:
            raise SquallError(
                f"broker URL {url!r} must start with mqtt:// or mqtts://", field=field
            )
        if not parts.hostname:
            raise SquallError(f"broker URL {url!r} names no host", field=field)
        if parts.path not in ("", "/") or parts.query or parts.fragment:
            raise SquallError(
                f"broker URL {url!r} must not have a path, query or fragment", field=field
            )
        tls, default_port = _SCHEMES[parts.scheme]
        if port == 0:
            raise SquallError(f"broker URL {url!r}: port must be 1-65535", field=field)
        return cls(
            host=parts.hostname,
            port=port or default_port,
            tls=tls,
            username=unquote(parts.username) if parts.username else None,
            password=unquote(parts.password) if parts.password is not None else None,
        )

    def __str__(self) -> str:
        """The URL without the password (safe to log)."""
        user = f"{self.username}@" if self.username else ""
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"{'mqtts' if self.tls else 'mqtt'}://{user}{host}:{self.port}"


class TlsConfig(FileModel):
    """TLS settings of the broker connection (``[telemetry.tls]``)."""

    ca_file: Path | None = Field(
        None,
        description="PEM file of the certificate authority that signed the broker's "
        "certificate; default the system's trusted authorities.",
    )
    cert_file: Path | None = Field(
        None, description="PEM client certificate, for brokers that require one."
    )
    key_file: Path | None = Field(None, description="PEM private key of the client certificate.")
    check_hostname: bool = Field(
        True,
        description="Check that the broker's certificate names the host connected to; turn "
        "off only for a test broker addressed by IP.",
    )

    @model_validator(mode="after")
    def _pair(self) -> Self:
        if (self.cert_file is None) != (self.key_file is None):
            raise ValueError("cert_file and key_file go together: give both or neither")
        return self

    def resolved(self, base_dir: Path | None) -> TlsConfig:
        """These settings with relative file paths made relative to ``base_dir``.

        A rig file's paths are relative to the rig file's folder (as ``password_file`` is),
        never to the folder the controller happens to be started from.

        Parameters
        ----------
        base_dir
            The rig file's folder; None keeps the paths as written.

        Returns
        -------
        TlsConfig
            A copy whose ``ca_file``, ``cert_file`` and ``key_file`` are absolute or
            relative to ``base_dir``.
        """
        if base_dir is None:
            return self
        update = {
            name: base_dir / path
            for name in ("ca_file", "cert_file", "key_file")
            if (path := getattr(self, name)) is not None and not path.is_absolute()
        }
        return self.model_copy(update=update) if update else self


class CommandsConfig(FileModel):
    """Remote commands through the broker (``[telemetry.commands]``); off by default."""

    enabled: bool = Field(
        False, description="Accept hold, resume, abort, acknowledge and note from the broker."
    )
    allowed_users: tuple[str, ...] = Field(
        (),
        description="Users whose commands are accepted; every other user is refused. The "
        "broker must also let only these users write the command topic.",
    )

    @model_validator(mode="after")
    def _users(self) -> Self:
        if self.enabled and not self.allowed_users:
            raise ValueError("remote commands need at least one user in allowed_users")
        return self


class TelemetryConfig(FileModel):
    """MQTT telemetry of one controller (the ``[telemetry]`` table of a rig file)."""

    enabled: bool = Field(True, description="Publish telemetry; false keeps the table but stops.")
    broker: str = Field(
        description="Broker URL: mqtt://host[:port] (default port 1883) or mqtts://host[:port] "
        "(TLS, default port 8883); user and password may be given in it."
    )
    controller_id: str = Field(
        pattern=ID_PATTERN,
        description="This controller's id in topics; unique among the controllers on a broker.",
    )
    prefix: str = Field(
        DEFAULT_PREFIX,
        pattern=PREFIX_PATTERN,
        description="First topic level(s) of every topic.",
    )
    username: str | None = Field(None, min_length=1, description="User name at the broker.")
    password: SecretStr | None = Field(None, description="Password at the broker.")
    password_file: Path | None = Field(
        None, description="File whose first line is the password (kept out of the rig file)."
    )
    tls: TlsConfig | None = Field(
        None, description="TLS settings; mqtts:// URLs use TLS with defaults without it."
    )
    commands: CommandsConfig = Field(default_factory=CommandsConfig)
    buffer_samples: int = Field(
        2000,
        ge=10,
        le=1_000_000,
        description="Sample rows kept while the broker is away; the oldest go first when "
        "full, dimensionless.",
    )
    buffer_records: int = Field(
        10000,
        ge=100,
        le=1_000_000,
        description="Alarm and event records kept while the broker is away (a memory guard "
        "only: records are never dropped for samples), dimensionless.",
    )
    sample_qos: int = Field(0, ge=0, le=1, description="MQTT QoS of sample messages (0 or 1).")
    status_interval_s: float = Field(
        30.0, ge=1, le=3600, description="Status is re-published at least this often, s."
    )
    keepalive_s: int = Field(30, ge=5, le=3600, description="MQTT keep-alive interval, s.")
    timeout_s: float = Field(
        5.0, gt=0, le=120, description="Longest wait for the broker to answer one request, s."
    )
    reconnect_min_s: float = Field(
        1.0, gt=0, le=600, description="First wait before reconnecting to a lost broker, s."
    )
    reconnect_max_s: float = Field(
        60.0, gt=0, le=3600, description="Longest wait between reconnection attempts, s."
    )

    @field_validator("broker")
    @classmethod
    def _url(cls, value: str) -> str:
        try:
            BrokerAddress.parse(value)
        except SquallError as exc:
            raise ValueError(exc.message) from None
        return value

    @model_validator(mode="after")
    def _consistent(self) -> Self:
        url = BrokerAddress.parse(self.broker)
        if url.username is not None and self.username is not None:
            raise ValueError("give the user name once: in the broker URL or as username")
        given = [
            url.password is not None,
            self.password is not None,
            self.password_file is not None,
        ]
        if sum(given) > 1:
            raise ValueError("give the password once: in the URL, as password or password_file")
        if self.reconnect_max_s < self.reconnect_min_s:
            raise ValueError("reconnect_max_s must not be below reconnect_min_s")
        if self.commands.enabled and url.username is None and self.username is None:
            raise ValueError(
                "remote commands need an authenticated broker connection: set username "
                "(and let the broker refuse anonymous clients)"
            )
        return self

    @property
    def address(self) -> BrokerAddress:
        """The broker address (without credentials given outside the URL)."""
        return BrokerAddress.parse(self.broker, field="telemetry.broker")

    @property
    def use_tls(self) -> bool:
        """Whether to connect with TLS (an ``mqtts://`` URL or a ``[telemetry.tls]`` table)."""
        return self.address.tls or self.tls is not None

    def credentials(self, base_dir: Path | None = None) -> tuple[str | None, str | None]:
        """User name and password to log in with.

        Parameters
        ----------
        base_dir
            Folder that a relative ``password_file`` is relative to (the rig file's);
            default the working folder.

        Returns
        -------
        tuple of (str or None, str or None)
            User name and password.

        Raises
        ------
        SquallError
            When the password file cannot be read or is empty.
        """
        url = self.address
        user = url.username if url.username is not None else self.username
        if url.password is not None:
            return user, url.password
        if self.password is not None:
            return user, self.password.get_secret_value()
        if self.password_file is None:
            return user, None
        path = self.password_file
        if base_dir is not None and not path.is_absolute():
            path = base_dir / path
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            raise SquallError(
                f"cannot read the password file: {exc.strerror or exc}",
                file=path,
                field="telemetry.password_file",
            ) from None
        lines = text.splitlines()
        password = lines[0].strip() if lines else ""
        if not password:
            raise SquallError(
                "the password file is empty", file=path, field="telemetry.password_file"
            )
        return user, password
