"""Building the MQTT client: the one place that calls ``aiomqtt.Client``.

Rules of this module
--------------------
- Both the publisher and the watcher get their client here, so credentials, TLS, keep-alive
  and the request timeout are applied the same way on both sides.
- MQTT 3.1.1 with a clean session: a controller republishes its retained status on every
  connection, and a watcher resubscribes, so nothing depends on state the broker kept.
- TLS uses the ``mqtts://`` scheme or a :class:`~controller.telemetry.TlsConfig`: the broker's
  certificate is always verified (against ``ca_file`` or the system's authorities); only the
  host-name check can be turned off, for a test broker addressed by IP.
- A client must be made inside the running event loop (aiomqtt binds it to that loop).
  Connecting runs in a worker thread inside aiomqtt, so a slow or silent broker never holds
  up the loop.
- aiomqtt waits for every answer with ``asyncio.wait_for``, which on Python 3.11 can lose a
  cancellation that arrives together with the answer. Every loop that keeps a telemetry task
  alive calls :func:`raise_if_cancelling` before each round, so a stop is never lost.
"""

from __future__ import annotations

import asyncio
import ssl

import aiomqtt

from controller.telemetry._config import BrokerAddress, TlsConfig

__all__ = ["make_client", "raise_if_cancelling"]


def make_client(
    address: BrokerAddress,
    *,
    identifier: str,
    username: str | None = None,
    password: str | None = None,
    tls: TlsConfig | None = None,
    keepalive_s: int = 30,
    timeout_s: float = 5.0,
    will: aiomqtt.Will | None = None,
) -> aiomqtt.Client:
    """An aiomqtt client for ``address``, not yet connected (``async with`` connects).

    Parameters
    ----------
    address
        Broker host, port and scheme; its user and password are used unless ``username`` or
        ``password`` are given.
    identifier
        MQTT client id; the broker disconnects an older client with the same id.
    username
        User name at the broker; default the URL's.
    password
        Password at the broker; default the URL's.
    tls
        TLS settings; without them an ``mqtts://`` address uses the system's authorities.
    keepalive_s
        Keep-alive interval, s.
    timeout_s
        Longest wait for the broker to answer a request (connect, subscribe, QoS 1 publish), s.
    will
        Message the broker publishes if this client's connection is lost without a clean
        disconnect.

    Returns
    -------
    aiomqtt.Client
        The client.
    """
    user = username if username is not None else address.username
    secret = password if password is not None else address.password
    tls_params: aiomqtt.TLSParameters | None = None
    insecure: bool | None = None
    if address.tls or tls is not None:
        tls = tls or TlsConfig()
        tls_params = aiomqtt.TLSParameters(
            ca_certs=str(tls.ca_file) if tls.ca_file is not None else None,
            certfile=str(tls.cert_file) if tls.cert_file is not None else None,
            keyfile=str(tls.key_file) if tls.key_file is not None else None,
            cert_reqs=ssl.CERT_REQUIRED,
        )
        insecure = not tls.check_hostname
    return aiomqtt.Client(
        address.host,
        address.port,
        username=user,
        password=secret if user is not None else None,
        identifier=identifier,
        protocol=aiomqtt.ProtocolVersion.V311,
        clean_session=True,
        will=will,
        keepalive=keepalive_s,
        timeout=timeout_s,
        tls_params=tls_params,
        tls_insecure=insecure,
    )


def raise_if_cancelling() -> None:
    """Raise ``CancelledError`` if the current task was asked to stop.

    On Python 3.11, ``asyncio.wait_for`` (which aiomqtt uses for every request) returns the
    result instead of raising when a cancellation and the answer arrive together, so the
    request was answered but the cancellation is lost. Loops that keep a task alive call
    this before each round so a lost cancellation still ends them.
    """
    task = asyncio.current_task()
    if task is not None and task.cancelling():
        raise asyncio.CancelledError
