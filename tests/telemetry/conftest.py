"""Fixtures of the telemetry tests: brokers on loopback, TLS files, quick configs.

Every broker listens on 127.0.0.1 only, on an ephemeral port, and is stopped when its test
ends. Which broker runs is decided once (:func:`._brokers.broker_kind`): the real Mosquitto
when installed (CI installs it with ``.ci/mosquitto.sh``), else the in-process amqtt broker.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from pathlib import Path

import pytest

from ._brokers import (
    AmqttBroker,
    BrokerFactory,
    MosquittoBroker,
    TlsFiles,
    broker_kind,
    close_broker,
    make_broker,
    make_tls_files,
)


def pytest_report_header() -> str:
    return f"telemetry tests broker: {broker_kind()}"


@pytest.fixture
def broker_factory(tmp_path: Path) -> Iterator[BrokerFactory]:
    """Start brokers for one test: ``broker_factory(users=..., acl=..., tls=...)``."""
    made: list[MosquittoBroker | AmqttBroker] = []
    counter = iter(range(100))

    def make(
        *,
        users: Mapping[str, str] | None = None,
        acl: str | None = None,
        tls: TlsFiles | None = None,
    ) -> MosquittoBroker | AmqttBroker:
        broker = make_broker(tmp_path / f"broker{next(counter)}", users=users, acl=acl, tls=tls)
        made.append(broker)
        return broker

    yield make
    for broker in made:
        close_broker(broker)


@pytest.fixture
def broker(broker_factory: BrokerFactory) -> MosquittoBroker | AmqttBroker:
    """A started broker that lets anyone in."""
    return broker_factory()


@pytest.fixture(scope="session")
def tls_files(tmp_path_factory: pytest.TempPathFactory) -> TlsFiles:
    """A throw-away certificate authority and a server certificate for 127.0.0.1."""
    files = make_tls_files(tmp_path_factory.mktemp("tls"))
    if files is None:
        pytest.skip("the openssl command is needed to make test certificates")
    return files
