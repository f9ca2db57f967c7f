"""Fixtures for the endpoint tests: a small rack served on loopback, and a Modbus client.

Every wait is bounded: clients use short timeouts and tests wrap their bodies in
``asyncio.timeout``. The rack is stepped by the tests (``rack.advance``), never by real time.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import AsyncIterator

import pytest
from pymodbus.client import AsyncModbusTcpClient

from controller.rig import Rig
from simulator import Rack
from simulator.endpoints import RackServer

START = dt.datetime(2025, 6, 1, 6, 0, tzinfo=dt.UTC)
CLIENT_TIMEOUT_S = 0.25
"""How long the Modbus client waits for an answer; silence tests cost this much wall time."""


def small_rig() -> Rig:
    """Two chambers with their own water (invented values, Saltmarrow Lagoon style)."""
    return Rig.model_validate(
        {
            "name": "Saltmarrow bench pair",
            "chambers": [
                {"id": "c1", "water_volume_l": 20.0, "sediment_area_m2": 0.05},
                {"id": "c2", "water_volume_l": 20.0, "sediment_area_m2": 0.05},
            ],
        }
    )


@pytest.fixture
def rack() -> Rack:
    return Rack(small_rig(), seed=3, start_utc=START)


@pytest.fixture
async def server(rack: Rack) -> AsyncIterator[RackServer]:
    async with RackServer(rack) as served:
        yield served


@pytest.fixture
async def client(server: RackServer) -> AsyncIterator[AsyncModbusTcpClient]:
    c = AsyncModbusTcpClient(
        "127.0.0.1", port=server.announcement.port, timeout=CLIENT_TIMEOUT_S, retries=0
    )
    assert await c.connect()
    yield c
    c.close()
