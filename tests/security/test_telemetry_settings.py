"""MQTT: TLS settings are checked and applied, remote commands are off unless switched on.

Covered elsewhere (``tests/telemetry``), not repeated: a wrong broker password is refused and
the right one gets in, TLS verifies the broker's certificate against the lab's authority,
commands are refused end to end when disabled and run only for allowed users when enabled,
the recommended broker ACL keeps other users off the command topic, and the table's
mistakes are located. Here, without a broker: what the client is actually given (the
certificate is always verified, even when only the host-name check is turned off; a plain
``mqtt://`` URL really is plain text), that a rig file with a ``[telemetry]`` table but no
``[telemetry.commands]`` takes no commands, and that the gate refuses every command by
default without ever calling the handler.
"""

from __future__ import annotations

import asyncio
import json
import ssl
from pathlib import Path

import aiomqtt
import pytest

from controller.files import load_model
from controller.rig import Rig
from controller.telemetry import (
    BrokerAddress,
    CommandGate,
    CommandName,
    CommandsConfig,
    TelemetryConfig,
    TlsConfig,
)
from controller.telemetry._connect import make_client

REPO = Path(__file__).resolve().parents[2]


def _client(url: str, tls: TlsConfig | None = None) -> aiomqtt.Client:
    """The client squall would connect with (made in a running loop, never connected)."""

    async def build() -> aiomqtt.Client:
        return make_client(BrokerAddress.parse(url), identifier="security-test", tls=tls)

    return asyncio.run(build())


def _tls_context(client: aiomqtt.Client) -> ssl.SSLContext | None:
    """The TLS context the socket would be wrapped with (aiomqtt applies its TLS settings to
    the paho client just before connecting; this does that step and reads the result)."""
    client._set_tls_params()  # type: ignore[attr-defined]
    return client._client._ssl_context  # type: ignore[attr-defined, no-any-return]


def test_mqtts_verifies_the_certificate_and_the_host_name() -> None:
    context = _tls_context(_client("mqtts://broker.lan"))
    assert context is not None
    assert context.verify_mode is ssl.CERT_REQUIRED
    assert context.check_hostname


def test_turning_off_the_host_name_check_still_verifies_the_certificate() -> None:
    client = _client("mqtts://192.0.2.7", TlsConfig(check_hostname=False))
    context = _tls_context(client)
    assert context is not None and context.verify_mode is ssl.CERT_REQUIRED
    assert client._client._tls_insecure is True  # type: ignore[attr-defined]


def test_a_tls_table_turns_tls_on_for_an_mqtt_url() -> None:
    config = TelemetryConfig(broker="mqtt://broker.lan", controller_id="rack-a", tls=TlsConfig())
    assert config.use_tls
    assert _tls_context(_client(config.broker, config.tls)) is not None


def test_a_plain_mqtt_url_is_plain_text() -> None:
    """What the security notes warn about: without mqtts:// or [tls] nothing is encrypted."""
    assert _tls_context(_client("mqtt://broker.lan")) is None
    assert not TelemetryConfig(broker="mqtt://broker.lan", controller_id="rack-a").use_tls


def test_a_client_certificate_needs_its_key() -> None:
    with pytest.raises(ValueError, match="cert_file and key_file go together"):
        TlsConfig(cert_file=Path("client.pem"))


def test_a_rig_with_telemetry_but_no_commands_table_takes_no_commands(tmp_path: Path) -> None:
    rig_text = (REPO / "rigs" / "saltmarrow-rack8.toml").read_text(encoding="utf-8")
    rig_text += (
        '\n[telemetry]\nbroker = "mqtts://broker.lan"\ncontroller_id = "rack-8"\n'
        'username = "rack-8"\npassword_file = "mqtt.pw"\n'
    )
    path = tmp_path / "rig.toml"
    path.write_text(rig_text, encoding="utf-8")
    rig = load_model(path, Rig)
    assert rig.telemetry is not None
    assert rig.telemetry.commands.enabled is False
    assert rig.telemetry.commands.allowed_users == ()


@pytest.mark.parametrize("name", list(CommandName))
def test_the_default_gate_refuses_every_command_and_never_runs_it(name: CommandName) -> None:
    ran: list[object] = []
    logged: list[object] = []
    gate = CommandGate(CommandsConfig(), execute=ran.append, log_command=logged.append)  # type: ignore[arg-type]
    payload = {"v": 1, "id": "r-1", "user": "mira", "command": name.value}
    if name is CommandName.ACKNOWLEDGE:
        payload["code"] = "over_temperature"
    if name is CommandName.NOTE:
        payload["text"] = "sampled C3"
    outcome = gate.handle(json.dumps(payload).encode(), utc_s=1_780_000_000.0)
    assert outcome.command is not None  # it was well-formed: refused for being off
    assert not outcome.accepted and "disabled" in outcome.reason
    assert ran == [] and logged == [outcome]
