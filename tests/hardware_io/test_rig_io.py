"""The rig file's [io] table: links, optode ports, checks with located errors, ports files."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from controller.drivers import RegisterMap, WordOrder
from controller.errors import SquallError
from controller.files import load_model
from controller.rig import Rig
from controller.rig._io import InputCorrection, Parity, RigIo, io_from_ports, resolve_io
from simulator import Rack
from simulator.endpoints import RackServer

from .conftest import START, rig, rig_text, virtual

pytestmark = pytest.mark.timeout(30)

TWO_MODULES = """
[io]
watchdog_timeout_s = 30.0
optode_period_s = 20.0

[[io.modbus]]
name = "module-1"
chambers = ["c1"]
tcp = { host = "192.0.2.11" }

[[io.modbus]]
name = "module-2"
chambers = ["c2"]
rtu = { port = "/dev/ttyUSB0", baud = 38400 }
register_map = { unit_id = 7, word_order = "low-first" }

[io.optodes.c1]
port = "/dev/ttyUSB1"

[io.corrections.c2]
temperature_offset_c = -0.12
par_gain = 1.04
calibrated_on = 2027-06-20
"""


def load(tmp_path: Path, io: str) -> Rig:
    path = tmp_path / "rig.toml"
    path.write_text(rig_text(io=io))
    return load_model(path, Rig)


def test_a_rig_names_one_link_per_module_and_its_optodes(tmp_path: Path) -> None:
    io = load(tmp_path, TWO_MODULES).io
    assert io is not None
    tcp, rtu = io.modbus
    assert tcp.tcp is not None and (tcp.tcp.host, tcp.tcp.port) == ("192.0.2.11", 502)
    assert rtu.rtu is not None and (rtu.rtu.baud, rtu.rtu.parity, rtu.rtu.stop_bits) == (
        38400,
        Parity.EVEN,  # Modbus serial line default (Modbus over serial line v1.02, 2.5.1)
        1,
    )
    assert io.link_chambers(["c1", "c2"]) == [("c1",), ("c2",)]
    # each module holds one chamber at block 0 of its own unit
    layout = RegisterMap.build(["c2"], rtu.register_map)
    assert (layout.block("c2").unit_id, layout.block("c2").base) == (7, 0)
    assert layout.word_order is WordOrder.LOW_FIRST
    assert set(io.optodes) == {"c1"} and io.optodes["c1"].baud == 9600
    assert (io.watchdog_timeout_s, io.optode_period_s, io.optode_timeout_s) == (30.0, 20.0, 1.0)
    fix = io.corrections["c2"]
    assert (fix.temperature_offset_c, fix.temperature_gain, fix.par_gain) == (-0.12, 1.0, 1.04)
    assert str(fix.calibrated_on) == "2027-06-20"


def test_a_single_link_without_a_chamber_list_serves_every_chamber(tmp_path: Path) -> None:
    io = load(tmp_path, '[io]\n[[io.modbus]]\nname = "rack"\ntcp = { host = "h" }\n').io
    assert io is not None and io.link_chambers(["c1", "c2"]) == [("c1", "c2")]
    assert io.watchdog_timeout_s is None  # three tick periods, chosen at run time


@pytest.mark.parametrize(
    ("io", "at", "field", "message"),
    [
        (
            TWO_MODULES.replace('chambers = ["c2"]', 'chambers = ["c3"]'),
            'chambers = ["c3"]',
            "io.modbus.1.chambers",
            "no chamber 'c3'",
        ),
        (
            TWO_MODULES.replace('chambers = ["c2"]', 'chambers = ["c1"]'),
            'chambers = ["c1"]',
            "io.modbus.1.chambers",
            "already on link 'module-1'",
        ),
        (
            TWO_MODULES.replace('chambers = ["c2"]\n', ""),
            "[[io.modbus]]",
            "io.modbus.1.chambers",
            "every link must list its chambers",
        ),
        (
            TWO_MODULES.replace("[io.optodes.c1]", "[io.optodes.c9]"),
            "[io.optodes.c9]",
            "io.optodes.c9",
            "unknown chamber",
        ),
        (
            TWO_MODULES.replace('tcp = { host = "192.0.2.11" }', ""),
            "[[io.modbus]]",
            "io.modbus.0",
            "exactly one of tcp",
        ),
        (
            TWO_MODULES.replace("[io]", '[io]\nfrom_announcement = "sim.json"'),
            "[io]",
            "io",
            "remove [[io.modbus]]",
        ),
        ("[io]\nwatchdog_timeout_s = 0.1\n", "watchdog_timeout_s = 0.1", "io.watchdog", "0.5"),
        (
            TWO_MODULES.replace("[io.corrections.c2]", "[io.corrections.c7]"),
            "[io.corrections.c7]",
            "io.corrections.c7",
            "unknown chamber",
        ),
        (
            TWO_MODULES.replace("par_gain = 1.04", "par_gain = 40"),
            "par_gain = 40",
            "io.corrections.c2.par_gain",
            "less than or equal to 5",
        ),
    ],
)
def test_mistakes_in_the_io_table_are_located(
    tmp_path: Path, io: str, at: str, field: str, message: str
) -> None:
    with pytest.raises(SquallError) as caught:
        load(tmp_path, io)
    error = caught.value
    assert error.field is not None and error.field.startswith(field), error.one_line()
    assert message in error.message, error.one_line()
    assert error.file is not None and error.line is not None
    assert rig_text(io=io).splitlines()[error.line - 1] == at


def test_overlapping_blocks_on_one_link_are_refused(tmp_path: Path) -> None:
    io = (
        '[io]\n[[io.modbus]]\nname = "rack"\ntcp = { host = "h" }\n'
        "[io.modbus.register_map.chambers.c2]\nblock_address = 0\n"
    )
    with pytest.raises(SquallError, match="overlaps chamber c1") as caught:
        load(tmp_path, io)
    assert caught.value.field == "io.modbus.0.register_map.chambers.c2"


def announce(tmp_path: Path) -> dict:
    """Serve the test rig briefly and return what its ports file said."""
    rack = Rack(rig(), seed=1, start_utc=START)
    ports = tmp_path / "sim-ports.json"

    async def body(_clock: object) -> dict:
        async with RackServer(rack) as server:
            await server.stop()
            await server.start(ports_file=ports, extra={"speed": 1.0})
            data = json.loads(ports.read_text())
            await server.stop()
            return data

    return virtual(body)


def test_a_ports_file_becomes_an_explicit_map(tmp_path: Path) -> None:
    data = announce(tmp_path)
    (tmp_path / "sim-ports.json").write_text(json.dumps(data))
    template = RigIo(
        from_announcement="sim-ports.json",
        watchdog_timeout_s=12.0,
        corrections={"c2": InputCorrection(par_gain=1.1)},
    )
    io = resolve_io(template, ["c1", "c2"], base_dir=tmp_path)
    (link,) = io.modbus
    assert link.tcp is not None and link.tcp.port == data["modbus"]["port"]
    assert link.tcp.host == "127.0.0.1"
    layout = RegisterMap.build(link.chambers or [], link.register_map)
    for cid in ("c1", "c2"):
        block = layout.block(cid)
        assert {"unit_id": block.unit_id, "base": block.base} == data["modbus"]["blocks"][cid]
        assert io.optodes[cid].port == data["optodes"][cid]
    assert io.watchdog_timeout_s == 12.0 and io.from_announcement is None
    assert io.corrections["c2"].par_gain == 1.1  # the rig's own settings are kept


def test_a_rig_file_can_point_at_a_ports_file_beside_it(tmp_path: Path) -> None:
    rig_file = load(tmp_path, '[io]\nfrom_announcement = "sim-ports.json"\n')
    assert rig_file.io is not None
    with pytest.raises(SquallError, match="ports file not found") as caught:
        resolve_io(rig_file.io, ["c1", "c2"], base_dir=tmp_path)
    assert caught.value.file == str(tmp_path / "sim-ports.json")
    (tmp_path / "sim-ports.json").write_text("{\n  'modbus': 1\n}\n")
    with pytest.raises(SquallError, match="not JSON") as caught:
        resolve_io(rig_file.io, ["c1", "c2"], base_dir=tmp_path)
    assert caught.value.line == 2


def test_a_ports_file_for_another_rig_is_refused(tmp_path: Path) -> None:
    data = announce(tmp_path)
    with pytest.raises(SquallError, match=r"no block for chamber\(s\) c3") as caught:
        io_from_ports(data, ["c1", "c3"], source="sim-ports.json")
    assert caught.value.file == "sim-ports.json"
    with pytest.raises(SquallError, match="not a simulator ports file") as caught:
        io_from_ports({"modbus": {"host": "127.0.0.1"}}, ["c1"])
    assert caught.value.field == "modbus.port"


def test_an_announcement_of_several_modules_gives_a_link_per_module() -> None:
    """Ten chambers served as modules of eight (``hardware-notes/register-map.md``): two
    links, each with its own module's chambers in rig order, blocks where announced."""
    ids = [f"c{k + 1}" for k in range(10)]
    blocks = {cid: {"unit_id": 1 + k // 8, "base": 16 * (k % 8)} for k, cid in enumerate(ids)}
    modbus = {"host": "127.0.0.1", "port": 5020, "word_order": "high-first", "blocks": blocks}
    data = {"modbus": modbus}
    io = io_from_ports(data, ids)
    assert [link.name for link in io.modbus] == ["simulator-unit-1", "simulator-unit-2"]
    assert [link.chambers for link in io.modbus] == [ids[:8], ids[8:]]
    for link in io.modbus:
        layout = RegisterMap.build(link.chambers or [], link.register_map)
        for cid in link.chambers or []:
            block = layout.block(cid)
            assert {"unit_id": block.unit_id, "base": block.base} == blocks[cid]
