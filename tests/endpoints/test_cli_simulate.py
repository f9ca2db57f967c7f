"""``squall simulate``: argument checks, and one real serve-until-Ctrl-C round trip."""

from __future__ import annotations

import asyncio
import json
import signal
import socket
import sys
from pathlib import Path

import pytest
import serial
from pymodbus.client import AsyncModbusTcpClient

from controller.cli import main
from controller.cli.cmd_simulate import check_host
from controller.drivers import (
    Measurement,
    OptodeCommand,
    OptodeRequest,
    decode_inputs,
    decode_reply,
    encode_request,
)
from controller.errors import SquallError

RIG_TOML = """\
name = "Saltmarrow bench pair"

[[chambers]]
id = "c1"
water_volume_l = 20.0
sediment_area_m2 = 0.05

[[chambers]]
id = "c2"
water_volume_l = 20.0
sediment_area_m2 = 0.05
"""


@pytest.fixture
def rig_file(tmp_path: Path) -> Path:
    path = tmp_path / "rig.toml"
    path.write_text(RIG_TOML, encoding="utf-8")
    return path


@pytest.mark.parametrize("host", ["127.0.0.1", "127.0.0.53", "::1", "localhost"])
def test_loopback_hosts_are_allowed(host: str) -> None:
    assert check_host(host, allow_non_loopback=False) == host


@pytest.mark.parametrize("host", ["0.0.0.0", "192.168.1.20", "::"])
def test_other_hosts_need_explicit_permission(host: str) -> None:
    with pytest.raises(SquallError, match="not a loopback address") as info:
        check_host(host, allow_non_loopback=False)
    assert info.value.field == "--host"
    assert check_host(host, allow_non_loopback=True) == host


def test_host_names_other_than_localhost_are_refused() -> None:
    with pytest.raises(SquallError, match="not an IP address"):
        check_host("lab-rack.example", allow_non_loopback=True)


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--host", "10.0.0.7"], "--host: --host 10.0.0.7 is not a loopback address"),
        (["--speed", "0"], "--speed: --speed must be a positive number"),
        (["--speed", "nan"], "--speed: --speed must be a positive number"),
        (["--port", "70000"], "--port: --port 70000 outside 0..65535"),
        (["--seed", "-1"], "--seed: --seed must be 0 or more"),
        (["--ports-file", "/no/such/folder/ports.json"], "folder /no/such/folder does not exist"),
    ],
)
def test_bad_arguments_exit_2_with_the_field(
    rig_file: Path, extra: list[str], message: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["simulate", "--rig", str(rig_file), *extra]) == 2
    assert message in capsys.readouterr().err


def test_bad_rig_file_is_located(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(RIG_TOML.replace("sediment_area_m2 = 0.05\n", "sediment_area_m2 = -1\n", 1))
    assert main(["simulate", "--rig", str(bad)]) == 2
    err = capsys.readouterr().err
    assert f"{bad}:" in err and "sediment_area_m2" in err


def test_busy_port_is_a_clear_error(rig_file: Path, capsys: pytest.CaptureFixture[str]) -> None:
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        busy = taken.getsockname()[1]
        assert main(["simulate", "--rig", str(rig_file), "--port", str(busy)]) == 2
    err = capsys.readouterr().err
    assert f"--port: cannot serve Modbus on 127.0.0.1:{busy}" in err


async def test_serves_until_ctrl_c(rig_file: Path, tmp_path: Path) -> None:
    ports = tmp_path / "ports.json"
    proc = await asyncio.create_subprocess_exec(
        sys.executable,
        "-m",
        "controller",
        "simulate",
        "--rig",
        str(rig_file),
        "--port",
        "0",
        "--speed",
        "20",
        "--ports-file",
        str(ports),
        stdout=asyncio.subprocess.PIPE,
        stderr=asyncio.subprocess.PIPE,
    )
    assert proc.stdout is not None
    try:
        async with asyncio.timeout(90.0):  # bounded: a cold start imports numpy, gsw, pymodbus
            lines: list[bytes] = []
            while not lines or not lines[-1].startswith(b"serving"):
                line = await proc.stdout.readline()
                assert line, f"simulate exited early: {(await proc.communicate())[1]!r}"
                lines.append(line)
            assert b"simulating rig 'Saltmarrow bench pair' at 20x" in lines[0]
            data = json.loads(ports.read_text(encoding="utf-8"))
            client = AsyncModbusTcpClient(
                data["modbus"]["host"], port=data["modbus"]["port"], timeout=2.0, retries=0
            )
            assert await client.connect()
            c2 = data["modbus"]["blocks"]["c2"]
            assert (c2["unit_id"], c2["base"]) == (1, 16)  # modules of eight, no gap
            reply = await client.read_input_registers(c2["base"], count=6, device_id=1)
            client.close()
            assert decode_inputs(reply.registers).level_pct == pytest.approx(100.0)
            with serial.Serial(data["optodes"]["c2"], 9600, timeout=2.0) as port:
                port.write(encode_request(OptodeRequest(command=OptodeCommand.SAMPLE, tag=42)))
                answer = decode_reply(await asyncio.to_thread(port.readline))
            assert isinstance(answer, Measurement) and answer.tag == 42
            proc.send_signal(signal.SIGINT)
            _, err = await proc.communicate()
            assert proc.returncode == 0, err
            assert b"stopped" in err
            assert not ports.exists()
    finally:
        if proc.returncode is None:
            proc.kill()
            await proc.wait()
