"""Where a chamber's incubation settings come from: the protocol's [incubation] table, the
rig's, the built-in defaults; and how contradictions are reported."""

from __future__ import annotations

from pathlib import Path

import pytest

from controller.control import IncubationSettings
from controller.errors import SquallError
from controller.runtime import load_run_inputs

from ._rigs import protocol_text, rig_text, write_files

RIG_DEFAULT = """
[incubation]
o2_low_pct = 85.0
flush_s = 600.0
max_closed_s = 5400.0
"""


def settings_of(tmp_path: Path, *, rig_extra: str, incubation: str) -> dict[str, object]:
    protocol, rig, _ = write_files(
        tmp_path,
        rig=rig_text(("L1", "L2"), extra=rig_extra),
        protocol=protocol_text(("L1", "L2"), incubation=incubation),
    )
    return dict(load_run_inputs(protocol, rig).incubation)


def test_without_any_table_no_chamber_cycles(tmp_path: Path) -> None:
    assert settings_of(tmp_path, rig_extra="", incubation="") == {}


def test_the_rig_s_table_alone_switches_the_cycle_on_with_its_settings(tmp_path: Path) -> None:
    found = settings_of(tmp_path, rig_extra=RIG_DEFAULT, incubation="")
    expected = IncubationSettings(o2_low_pct=85.0, flush_s=600.0, max_closed_s=5400.0)
    assert found == {"L1": expected, "L2": expected}


def test_the_protocol_overrides_the_rig_setting_by_setting(tmp_path: Path) -> None:
    table = '\n[incubation]\nchambers = ["L2"]\nflush = "20min"\npinned_to_light = true\n'
    found = settings_of(tmp_path, rig_extra=RIG_DEFAULT, incubation=table)
    assert list(found) == ["L2"]
    assert found["L2"] == IncubationSettings(
        o2_low_pct=85.0, flush_s=1200.0, max_closed_s=5400.0, pinned_to_light=True
    )


def test_the_protocol_can_switch_the_rig_s_cycle_off(tmp_path: Path) -> None:
    table = "\n[incubation]\nenabled = false\n"
    assert settings_of(tmp_path, rig_extra=RIG_DEFAULT, incubation=table) == {}


def test_a_contradiction_between_protocol_and_rig_is_located_in_the_protocol(
    tmp_path: Path,
) -> None:
    table = "\n[incubation]\no2_high_pct = 84.0\n"  # below the rig's low edge of 85 %
    with pytest.raises(SquallError) as info:
        settings_of(tmp_path, rig_extra=RIG_DEFAULT, incubation=table)
    error = info.value
    assert error.file is not None and error.file.endswith("protocol.toml")
    assert error.field == "incubation" and error.line is not None
    assert "the O2 band is empty" in error.message and "rig's defaults" in error.message


def test_a_chamber_outside_the_protocol_is_refused_at_its_field(tmp_path: Path) -> None:
    table = '\n[incubation]\nchambers = ["L9"]\n'
    with pytest.raises(SquallError) as info:
        settings_of(tmp_path, rig_extra="", incubation=table)
    assert info.value.field == "incubation.chambers.0"
    assert "chamber 'L9' is in no group" in info.value.message


def test_a_bad_rig_table_is_located_in_the_rig(tmp_path: Path) -> None:
    bad = "\n[incubation]\nmin_closed_s = 7200.0\nmax_closed_s = 3600.0\n"
    with pytest.raises(SquallError) as info:
        settings_of(tmp_path, rig_extra=bad, incubation="")
    error = info.value
    assert error.file is not None and error.file.endswith("rig.toml")
    assert error.field == "incubation.min_closed_s"
