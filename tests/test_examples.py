"""Every example protocol in protocols/ passes ``squall check`` (also against the example rig)
and renders a preview figure and setpoints CSV."""

from __future__ import annotations

import csv
import math
import struct
from pathlib import Path

import pytest

from controller.cli import main
from controller.cli.cmd_check import load_protocol
from controller.plots import DPI, FIGSIZE_IN

REPO = Path(__file__).resolve().parent.parent
PROTOCOLS = sorted((REPO / "protocols").glob("*.toml"))
RIG = REPO / "rigs" / "saltmarrow-rack8.toml"
SCENARIO = "Saltmarrow Lagoon (fictional)"


def png_size(path: Path) -> tuple[int, int]:
    """Width and height of a PNG file, px (from its IHDR chunk)."""
    head = path.read_bytes()[:24]
    assert head[:8] == b"\x89PNG\r\n\x1a\n" and head[12:16] == b"IHDR", "not a PNG file"
    width, height = struct.unpack(">II", head[16:24])
    return width, height


def test_there_are_at_least_five_examples() -> None:
    names = {p.stem for p in PROTOCOLS}
    assert len(PROTOCOLS) >= 5
    for expected in (
        "strong-heatwave",
        "cold-spell",
        "storm",
        "compound-heatwave-storm",
        "stepped-temperature",
    ):
        assert expected in names


@pytest.mark.parametrize("path", PROTOCOLS, ids=[p.stem for p in PROTOCOLS])
def test_example_passes_check(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(path)]) == 0
    assert "OK: the protocol is valid and compiles." in capsys.readouterr().out


@pytest.mark.skipif(not RIG.exists(), reason="the example rig is not there yet")
@pytest.mark.parametrize("path", PROTOCOLS, ids=[p.stem for p in PROTOCOLS])
def test_example_passes_check_against_the_example_rig(
    path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["check", str(path), "--rig", str(RIG)]) == 0
    assert "OK: no findings against rig" in capsys.readouterr().out


@pytest.mark.parametrize("path", PROTOCOLS, ids=[p.stem for p in PROTOCOLS])
def test_example_is_in_the_invented_scenario_on_chambers_c1_to_c8(path: Path) -> None:
    protocol = load_protocol(path).protocol
    assert protocol.site is not None and protocol.site.name == SCENARIO
    chambers = [c for group in protocol.groups.values() for c in group.chambers]
    assert sorted(chambers) == [f"C{k}" for k in range(1, 9)]
    # C1-C4 share one bath in the example rig: they must be in one group.
    assert (
        len(
            {
                g
                for g, group in protocol.groups.items()
                for c in group.chambers
                if c in {"C1", "C2", "C3", "C4"}
            }
        )
        == 1
    )
    roles = {group.role.value for group in protocol.groups.values()}
    assert roles == {"treatment", "control"}


@pytest.mark.parametrize("path", PROTOCOLS, ids=[p.stem for p in PROTOCOLS])
def test_example_preview_renders(path: Path, tmp_path: Path) -> None:
    figure, table = tmp_path / f"{path.stem}.png", tmp_path / f"{path.stem}.csv"
    argv = ["preview", str(path), "-o", str(figure), "--csv", str(table), "--step", "2h"]
    assert main(argv) == 0
    assert png_size(figure) == (round(FIGSIZE_IN[0] * DPI), round(FIGSIZE_IN[1] * DPI))
    protocol = load_protocol(path).protocol
    with table.open(newline="", encoding="utf-8") as handle:
        reader = csv.reader(handle)
        header = next(reader)
        rows = list(reader)
    assert header == [
        "time",
        "elapsed_s",
        "chamber",
        "group",
        "phase",
        "temperature_setpoint_c",
        "par_setpoint",
        "flow_setpoint_cm_s",
    ]
    times = math.ceil(protocol.duration_s / 7200) + 1
    assert len(rows) == times * 8
    assert {row[4] for row in rows} == {phase.name for phase in protocol.phases}
    for row in rows:
        temperature, par, flow = (float(x) for x in row[5:8])
        assert -2.0 <= temperature <= 40.0 and par >= 0.0 and flow >= 0.0


def test_site_series_is_reproducible_and_marked_invented(tmp_path: Path) -> None:
    import runpy

    script = REPO / "protocols" / "data" / "make_series.py"
    namespace = runpy.run_path(str(script))
    out = tmp_path / "series.csv"
    namespace["write_series"](out)
    shipped = REPO / "protocols" / "data" / "saltmarrow-sst.csv"
    assert out.read_bytes() == shipped.read_bytes()
    text = shipped.read_text(encoding="utf-8")
    assert text.startswith("# INVENTED DEMO DATA")
    data_lines = [line for line in text.splitlines() if line[:1].isdigit()]
    assert len(data_lines) >= 30 * 365
