"""hardware-notes/mqtt-topics.md stays true: its field tables match the payload schemas."""

from __future__ import annotations

import re

import pytest
from pydantic import BaseModel

from controller.storage import AlarmRecord, EventRecord, SampleRow, columns_of
from controller.telemetry import (
    CommandResult,
    ControllerStatus,
    RemoteCommand,
    TaskInfo,
    TaskList,
    Topics,
)

from ._helpers import doc_text


def table_fields(heading: str) -> list[str]:
    """First-column names of the table under the ``### heading ...`` section."""
    sections = re.split(r"^### ", doc_text(), flags=re.M)
    section = next(s for s in sections if s.startswith(heading))
    return re.findall(r"^\| `(\w+)` \|", section, flags=re.M)


def model_fields(model: type[BaseModel]) -> list[str]:
    return list(model.model_fields)


@pytest.mark.parametrize(
    ("heading", "fields"),
    [
        ("Sample (", [c.name for c in columns_of(SampleRow)]),
        ("Alarm (", [c.name for c in columns_of(AlarmRecord)]),
        ("Event (", [c.name for c in columns_of(EventRecord)]),
        ("Status (", model_fields(ControllerStatus)),
        ("Command (", model_fields(RemoteCommand)),
        ("Command result", model_fields(CommandResult)),
        ("Task list (", model_fields(TaskList) + model_fields(TaskInfo)),
    ],
)
def test_each_payload_table_lists_the_schema_fields_in_order(
    heading: str, fields: list[str]
) -> None:
    # the record tables leave out "v" and "time", which the text above them explains
    assert table_fields(heading) == fields


def test_the_topic_table_matches_the_topic_builder() -> None:
    topics = Topics("squall")
    built = [
        topics.status("CTL"),
        topics.sample("CTL", "CH"),
        topics.alarm("CTL"),
        topics.event("CTL"),
        topics.tasks("CTL"),
        topics.command("CTL"),
        topics.command_result("CTL"),
    ]
    expected = [
        t.replace("squall/", "<prefix>/", 1)
        .replace("CTL", "<controller>")
        .replace("CH", "<chamber>")
        for t in built
    ]
    documented = re.findall(r"^\| `(<prefix>/[^`]+)` \|", doc_text(), flags=re.M)
    assert documented == expected
    assert topics.watch_all() == "squall/+/#" and "`<prefix>/+/#`" in doc_text()
