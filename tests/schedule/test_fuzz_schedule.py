"""Fuzzing ``squall schedule`` in-process: random and malformed times, ids, owners, chamber
lists and protocol snippets. Whatever comes in, the command exits 0 or 2; on 2 it prints one
clear line and no traceback, and the store's content is unchanged.

``FUZZ_EXAMPLES`` (default 40) sets how many examples each test tries.
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
import tempfile
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from controller.cli import main
from controller.schedule import ScheduleStore

from ._helpers import START, Group, dump, protocol_text, write_protocol, write_rig

EXAMPLES = int(os.environ.get("FUZZ_EXAMPLES", "40"))
BUDGET = settings(
    max_examples=EXAMPLES,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)

TEXT = st.text(st.characters(blacklist_categories=("Cs",)), max_size=30)
"""Any text a person could type or paste (surrogates cannot come from a command line)."""

times = st.one_of(
    st.datetimes(
        min_value=START.replace(tzinfo=None) - timedelta(days=3),
        max_value=START.replace(tzinfo=None) + timedelta(days=6),
    ).map(lambda t: t.isoformat(timespec="minutes") + "+01:00"),
    st.datetimes().map(lambda t: t.isoformat()),  # no zone, any year
    st.datetimes().map(lambda t: t.isoformat() + "Z"),  # any year
    st.sampled_from(
        [
            "2027-07-10",
            "2027-07-10T25:00Z",
            "2027-02-30T08:00Z",
            "2027-07-10T08:00+25:00",
            "now",
            "",
            " ",
            "-1",
            "2027-W28-6T08:00Z",
            "2027-07-10T08:00:00.123456+01:00",
        ]
    ),
    TEXT,
)
ids = st.one_of(
    st.sampled_from(["E0001", "e1", "1", "E0002", "E9999", "E", "0", "E-1", "E00000001"]),
    TEXT.filter(lambda s: not s.startswith("-")),
)
owners = st.one_of(st.sampled_from(["Ana", "Bo Lind", "ops@lab"]), TEXT)
chamber_names = st.one_of(
    st.sampled_from(["S1", "S2", "B1", "B2", "C9", "s1"]),
    st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=6),
)
values = st.one_of(
    st.floats(min_value=-5, max_value=45, allow_nan=False).map(lambda v: f"{v:.3f}"),
    st.sampled_from(["nan", "inf", "-inf", '"warm"', "1e400", "[]"]),
)
durations = st.one_of(st.sampled_from(["6h", "1d", "2d", "0s", "-1h", "P1D", "forever", "1h"]),
                      TEXT)  # fmt: skip


@st.composite
def protocols(draw: st.DrawFn) -> str:
    """A small protocol, sometimes broken: odd chambers, values, durations or raw text."""
    chambers = draw(st.lists(chamber_names, min_size=1, max_size=4))
    temperature = f'{{ kind = "hold", value = {draw(values)} }}'
    light = f'{{ kind = "hold", value = {draw(st.sampled_from(["0.0", "300.0", "2000.0"]))} }}'
    text = protocol_text(
        {"a": Group([c.replace('"', "'").replace("\\", "/") for c in chambers],
                    temperature=temperature, light=light)},
        duration=draw(durations).replace('"', "'").replace("\\", "/"),
    )  # fmt: skip
    if draw(st.booleans()) and draw(st.booleans()):
        cut = draw(st.integers(min_value=0, max_value=len(text)))
        text = text[:cut] + draw(TEXT) + text[cut:]
    return text


@pytest.fixture(scope="module")
def base() -> Iterator[dict[str, Path]]:
    """A rig, a protocol and a store holding E0001 (S1, S2 from START for a day)."""
    with tempfile.TemporaryDirectory(prefix="squall-schedule-fuzz-") as name:
        folder = Path(name)
        rig_path = write_rig(folder)
        day = write_protocol(folder, "day.toml")
        store = folder / "base.sqlite"
        with ScheduleStore(store) as opened:
            opened.add(rig_path=rig_path, protocol_path=day, start_utc=START, owner="Ana")
        yield {"folder": folder, "rig": rig_path, "day": day, "store": store}


def check(argv: list[str], store: Path) -> None:
    """Run one command; assert the exit code, the one-line error and an unchanged store."""
    before = dump(store)
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main(argv)
    text = err.getvalue()
    assert code in (0, 2), (argv, code, text)
    assert "Traceback" not in text and "Traceback" not in out.getvalue()
    if code == 2:
        lines = text.strip("\n").split("\n")
        assert len(lines) == 1 and lines[0].startswith("squall: error: "), (argv, text)
        assert len(lines[0]) > len("squall: error: ") + 5
        assert dump(store) == before, argv
    else:
        assert text == "", (argv, text)


@contextlib.contextmanager
def scratch(base: dict[str, Path]) -> Iterator[tuple[Path, Path]]:
    """A copy of the base store and a folder for one example's protocol."""
    with tempfile.TemporaryDirectory(dir=base["folder"]) as name:
        folder = Path(name)
        store = folder / "schedule.sqlite"
        shutil.copy(base["store"], store)
        yield folder, store


@BUDGET
@given(start=times, owner=owners, text=protocols(), dry_run=st.booleans())
def test_fuzz_add_and_check(
    base: dict[str, Path], start: str, owner: str, text: str, dry_run: bool
) -> None:
    with scratch(base) as (folder, store):
        protocol = folder / "p.toml"
        protocol.write_text(text, encoding="utf-8")
        action = ["check"] if dry_run else ["add"]
        argv = ["schedule", *action, str(protocol), "--rig", str(base["rig"]), "--start", start]
        argv += [] if dry_run else ["--owner", owner]
        check([*argv, "--schedule", str(store)], store)


@BUDGET
@given(
    action=st.sampled_from(["show", "move", "cancel"]),
    exp_id=ids,
    start=times,
    reason=owners,
)
def test_fuzz_id_commands(
    base: dict[str, Path], action: str, exp_id: str, start: str, reason: str
) -> None:
    with scratch(base) as (_, store):
        argv = ["schedule", action, exp_id]
        argv += {"show": [], "move": ["--start", start], "cancel": ["--reason", reason]}[action]
        check([*argv, "--schedule", str(store)], store)


@settings(BUDGET, max_examples=max(EXAMPLES // 4, 5))
@given(after=times, text=protocols())
def test_fuzz_suggest(base: dict[str, Path], after: str, text: str) -> None:
    with scratch(base) as (folder, store):
        protocol = folder / "p.toml"
        protocol.write_text(text, encoding="utf-8")
        argv = ["schedule", "suggest", str(protocol), "--rig", str(base["rig"]),
                "--after", after, "--schedule", str(store)]  # fmt: skip
        check(argv, store)
