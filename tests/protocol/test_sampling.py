"""Protocol sampling times: chambers and time set aside, defaults, located refusals."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

import pytest
from pydantic import ValidationError

from controller.cli import main
from controller.files import load_model
from controller.protocol import Protocol
from controller.protocol._models import Sampling

REPO = Path(__file__).resolve().parents[2]
COMPOUND = REPO / "protocols" / "compound-heatwave-storm.toml"

BASE = """
format = "squall-protocol/1"
title = "Sampling times on a short hold"

[groups.warm]
role = "treatment"
chambers = ["C1", "C2"]

[groups.cool]
role = "control"
chambers = ["C3"]

[[phases]]
name = "settle"
duration = "1d"
  [phases.programs]
  temperature = [ { kind = "hold", value = 18.0 } ]

[[phases]]
name = "warm"
duration = "2d"
"""


def _protocol(sampling: str) -> Protocol:
    return Protocol.model_validate(tomllib.loads(BASE + sampling))


def _errors(sampling: str) -> list[tuple[tuple[Any, ...], str]]:
    with pytest.raises(ValidationError) as info:
        _protocol(sampling)
    return [(tuple(e["loc"]), e["msg"]) for e in info.value.errors()]


def test_defaults_are_every_chamber_and_fifteen_minutes() -> None:
    protocol = _protocol('[[sampling]]\nat = "warm+12h"\nwhat = "water"\n')
    sample = protocol.sampling[0]
    assert sample.chambers is None
    assert sample.minutes == 15.0
    assert protocol.resolve_time(sample.at) == 36 * 3600.0


def test_chambers_minutes_and_iso_durations_are_kept() -> None:
    protocol = _protocol(
        '[[sampling]]\nat = "P1DT6H"\nwhat = "cores"\nchambers = ["C3", "C1"]\nminutes = 40\n'
        '[[sampling]]\nat = "2d 3h"\nwhat = "water"\n'
    )
    first, second = protocol.sampling
    assert first.chambers == ["C3", "C1"]
    assert first.minutes == 40.0
    assert protocol.resolve_time(first.at) == 30 * 3600.0
    assert protocol.resolve_time(second.at) == 51 * 3600.0


def test_unknown_chamber_is_refused_at_its_index() -> None:
    errors = _errors('[[sampling]]\nat = "1d"\nwhat = "water"\nchambers = ["C1", "C9"]\n')
    assert len(errors) == 1
    loc, message = errors[0]
    assert loc == ("sampling", 0, "chambers", 1)
    assert "'C9' is in no group" in message and "C1, C2, C3" in message


def test_chamber_listed_twice_is_refused() -> None:
    errors = _errors('[[sampling]]\nat = "1d"\nwhat = "water"\nchambers = ["C2", "C2"]\n')
    assert errors[0][0] == ("sampling", 0, "chambers", 1)
    assert "listed twice" in errors[0][1]


@pytest.mark.parametrize(
    ("minutes", "fragment"), [("0", "greater than 0"), ("2000", "less than or equal")]
)
def test_time_set_aside_must_be_positive_and_under_a_day(minutes: str, fragment: str) -> None:
    errors = _errors(f'[[sampling]]\nat = "1d"\nwhat = "water"\nminutes = {minutes}\n')
    assert errors[0][0] == ("sampling", 0, "minutes")
    assert fragment in errors[0][1]


def test_sampling_past_the_end_is_refused_but_the_end_itself_is_allowed() -> None:
    assert _protocol('[[sampling]]\nat = "3d"\nwhat = "last water"\n').sampling[0].at == "3d"
    errors = _errors('[[sampling]]\nat = "warm+2d 1h"\nwhat = "too late"\n')
    assert errors[0][0] == ("sampling", 0, "at")
    assert "past the end of the experiment (3 d)" in errors[0][1]


def test_unknown_chamber_in_a_file_is_located_at_its_line(tmp_path: Path) -> None:
    path = tmp_path / "p.toml"
    path.write_text(
        BASE + '\n[[sampling]]\nat = "1d"\nwhat = "water"\nchambers = ["C7"]\n', encoding="utf-8"
    )
    from controller.errors import SquallError

    with pytest.raises(SquallError) as info:
        load_model(path, Protocol)
    text = str(info.value)
    assert "sampling.0.chambers.0" in text
    line = int(text.split(":")[1])
    assert path.read_text(encoding="utf-8").splitlines()[line - 1].startswith("chambers")


def test_check_refuses_a_sampling_time_after_the_end(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    path = tmp_path / "p.toml"
    path.write_text(BASE + '\n[[sampling]]\nat = "4d"\nwhat = "water"\n', encoding="utf-8")
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0
    assert "sampling.0.at" in err and "past the end" in err


def test_schema_describes_the_new_fields() -> None:
    schema = Protocol.model_json_schema()["$defs"]["Sampling"]["properties"]
    assert "minutes" in schema["minutes"]["description"]
    assert "default every chamber" in schema["chambers"]["description"]
    assert Sampling.model_fields["minutes"].default == 15.0


def test_example_protocol_declares_sampling_with_chambers_and_minutes() -> None:
    protocol = load_model(COMPOUND, Protocol)
    assert len(protocol.sampling) == 3
    last = protocol.sampling[-1]
    assert last.chambers is not None and "C3" not in last.chambers
    assert [s.minutes for s in protocol.sampling] == [45.0, 45.0, 30.0]
    assert protocol.resolve_time(last.at) == (4 + 18 + 5) * 86400.0
