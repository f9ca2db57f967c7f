"""The schedule store: file and schema, adding, moving, cancelling, state changes, and the
promise that a refusal leaves the store's content exactly as it was."""

from __future__ import annotations

import os
import sqlite3
import stat
import subprocess
import sys
import textwrap
from collections.abc import Callable, Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from controller.errors import SquallError
from controller.schedule import (
    SCHEMA_VERSION,
    ConflictKind,
    Experiment,
    ExperimentState,
    ScheduleConflict,
    ScheduleStore,
)

from ._helpers import START, Group, dump, write_protocol, write_rig

S = ExperimentState


class Clock:
    """A settable clock for history stamps."""

    def __init__(self) -> None:
        self.now = datetime(2027, 6, 1, 9, 0, tzinfo=UTC)

    def __call__(self) -> datetime:
        return self.now


@pytest.fixture
def clock() -> Clock:
    return Clock()


@pytest.fixture
def store(tmp_path: Path, clock: Clock) -> Iterator[ScheduleStore]:
    with ScheduleStore(tmp_path / "runs" / "schedule.sqlite", now=clock) as opened:
        yield opened


@pytest.fixture
def files(tmp_path: Path) -> dict[str, Path]:
    return {
        "rig": write_rig(tmp_path),
        "day": write_protocol(tmp_path, "day.toml", title="One day on S1 and S2"),
        "bath": write_protocol(tmp_path, "bath.toml", groups={"b": Group(["B1", "B2"])}),
        "unknown": write_protocol(tmp_path, "unknown.toml", groups={"a": Group(["S1", "Z9"])}),
        "hot": write_protocol(
            tmp_path,
            "hot.toml",
            groups={"a": Group(["S1"], temperature='{ kind = "hold", value = 40.0 }')},
        ),
    }


def add(
    store: ScheduleStore, files: dict[str, Path], which: str = "day", **kw: object
) -> Experiment:
    args: dict[str, object] = {
        "rig_path": files["rig"],
        "protocol_path": files[which],
        "start_utc": START,
        "owner": "Ana",
    }
    args.update(kw)
    return store.add(**args)  # type: ignore[arg-type]


def refused_unchanged(store: ScheduleStore, action: Callable[[], object]) -> SquallError:
    """Run an action that must be refused; the store's content must not change."""
    before = dump(store.path)
    with pytest.raises(SquallError) as caught:
        action()
    assert dump(store.path) == before
    return caught.value


# -- file ----------------------------------------------------------------------------------


def test_a_new_store_is_private_versioned_and_in_wal_mode(store: ScheduleStore) -> None:
    assert stat.S_IMODE(os.stat(store.path).st_mode) == 0o600
    conn = sqlite3.connect(store.path)
    try:
        assert conn.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
        tables = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
    finally:
        conn.close()
    assert {"experiments", "history"} <= tables


def test_a_file_that_is_not_a_schedule_is_refused_untouched(tmp_path: Path) -> None:
    text = tmp_path / "notes.sqlite"
    text.write_text("not a database at all, just some words\n" * 20)
    with pytest.raises(SquallError, match="is not a squall schedule"):
        ScheduleStore(text)
    assert text.read_text().startswith("not a database")
    other = tmp_path / "other.sqlite"
    conn = sqlite3.connect(other)
    conn.execute("CREATE TABLE t (x)")
    conn.commit()
    conn.close()
    before = dump(other)
    with pytest.raises(SquallError, match="SQLite file but not a squall schedule"):
        ScheduleStore(other)
    assert dump(other) == before
    with pytest.raises(SquallError, match="is a folder"):
        ScheduleStore(tmp_path)


def test_reopening_keeps_what_was_stored(tmp_path: Path, files: dict[str, Path]) -> None:
    path = tmp_path / "s.sqlite"
    with ScheduleStore(path) as first:
        added = add(first, files)
    with ScheduleStore(path) as second:
        assert second.get(added.id) == added


# -- add -----------------------------------------------------------------------------------


def test_add_stores_a_planned_experiment_with_a_snapshot_and_history(
    store: ScheduleStore, files: dict[str, Path], clock: Clock
) -> None:
    local_start = START.astimezone(ZoneInfo("Etc/GMT-2"))  # a zone two hours east of UTC
    experiment = add(store, files, start_utc=local_start, note="first try")
    assert experiment.id == "E0001"
    assert experiment.state is S.PLANNED
    assert experiment.start_utc == START and experiment.start_utc.tzinfo == UTC
    assert experiment.end_utc == START + timedelta(days=1)
    assert experiment.chambers == ("S1", "S2")
    assert experiment.title == "One day on S1 and S2"
    assert experiment.rig_name == "Test rack"
    assert experiment.rig_path == files["rig"].resolve()
    assert experiment.protocol_path == files["day"].resolve()
    assert experiment.protocol_text == files["day"].read_text()
    import hashlib

    assert experiment.protocol_sha256 == hashlib.sha256(files["day"].read_bytes()).hexdigest()
    assert (experiment.owner, experiment.note, experiment.log_path) == ("Ana", "first try", None)
    [entry] = store.history("E0001")
    assert (entry.time_utc, entry.from_state, entry.to_state, entry.by, entry.reason) == (
        clock.now, None, S.PLANNED, "Ana", "added"
    )  # fmt: skip


def test_ids_are_never_reused(store: ScheduleStore, files: dict[str, Path]) -> None:
    first = add(store, files)
    refused_unchanged(store, lambda: add(store, files))
    store.cancel(first.id, reason="wrong week")
    second = add(store, files)
    third = add(store, files, start_utc=START + timedelta(days=3))
    assert (first.id, second.id, third.id) == ("E0001", "E0002", "E0003")
    assert [e.id for e in store.experiments()] == ["E0001", "E0002", "E0003"]


@pytest.mark.parametrize(
    ("which", "kw", "kind_or_text"),
    [
        ("day", {}, ConflictKind.CHAMBER_BOOKED),
        ("bath", {}, ConflictKind.RIG_BUSY),
        ("unknown", {"start_utc": START + timedelta(days=5)}, ConflictKind.UNKNOWN_CHAMBER),
        ("hot", {"start_utc": START + timedelta(days=5)}, ConflictKind.CHAMBER_LIMITS),
        ("day", {"start_utc": datetime(2027, 7, 20, 8, 0)}, "start: a start time needs a zone"),
        ("day", {"start_utc": datetime(1999, 1, 1, tzinfo=UTC)}, "outside the years"),
        ("day", {"owner": "  "}, "owner: must not be empty"),
        ("day", {"owner": "Ana\nBo"}, "owner: contains the control"),
        ("day", {"note": "x" * 501}, "note: is 501 characters long"),
    ],
    ids=["booked", "busy", "unknown-chamber", "limits", "no-zone", "year", "owner", "newline",
         "note"],
)  # fmt: skip
def test_a_refused_add_changes_nothing(
    store: ScheduleStore,
    files: dict[str, Path],
    which: str,
    kw: dict[str, object],
    kind_or_text: ConflictKind | str,
) -> None:
    add(store, files)
    error = refused_unchanged(store, lambda: add(store, files, which, **kw))
    if isinstance(kind_or_text, ConflictKind):
        assert isinstance(error, ScheduleConflict)
        assert error.conflicts[0].kind is kind_or_text
        assert error.one_line().startswith(f"{files[which].resolve()}")
    else:
        assert kind_or_text in error.one_line()


def test_an_unknown_chamber_is_located_in_the_protocol_file(
    store: ScheduleStore, files: dict[str, Path]
) -> None:
    error = refused_unchanged(store, lambda: add(store, files, "unknown"))
    lines = files["unknown"].read_text().splitlines()
    assert isinstance(error, SquallError) and error.line is not None
    assert "Z9" in lines[error.line - 1]
    assert error.one_line() == (
        f"{files['unknown'].resolve()}:{error.line}: groups.a.chambers.1: refused: chamber 'Z9' "
        "is not in rig 'Test rack' (it has B1, B2, S1, S2)"
    )


def test_a_broken_protocol_or_rig_is_reported_where_it_is_broken(
    store: ScheduleStore, files: dict[str, Path], tmp_path: Path
) -> None:
    broken = tmp_path / "broken.toml"
    broken.write_text(files["day"].read_text().replace('duration = "1d"', 'duration = "soon"'))
    error = refused_unchanged(
        store, lambda: store.add(rig_path=files["rig"], protocol_path=broken, start_utc=START,
                                 owner="Ana")
    )  # fmt: skip
    assert error.file is not None and error.file.endswith("broken.toml")
    assert error.field == "phases.0.duration"
    missing = tmp_path / "nowhere.toml"
    error = refused_unchanged(
        store, lambda: store.add(rig_path=missing, protocol_path=files["day"], start_utc=START,
                                 owner="Ana")
    )  # fmt: skip
    assert error.file is not None and error.file.endswith("nowhere.toml")


def test_experiments_on_different_rigs_never_collide(
    store: ScheduleStore, files: dict[str, Path], tmp_path: Path
) -> None:
    add(store, files)
    other_rig = write_rig(tmp_path, "other-rig.toml")
    second = store.add(rig_path=other_rig, protocol_path=files["day"], start_utc=START, owner="Bo")
    assert second.id == "E0002"
    assert [e.id for e in store.experiments(rig_path=other_rig)] == ["E0002"]
    assert [e.id for e in store.experiments(rig_path=files["rig"])] == ["E0001"]


# -- move, cancel --------------------------------------------------------------------------


def test_move_checks_again_and_records_where_from(
    store: ScheduleStore, files: dict[str, Path], clock: Clock
) -> None:
    first = add(store, files)
    second = add(store, files, start_utc=START + timedelta(days=2))
    error = refused_unchanged(store, lambda: store.move(second.id, START + timedelta(hours=20)))
    assert isinstance(error, ScheduleConflict)
    assert error.conflicts[0].kind is ConflictKind.CHAMBER_BOOKED
    assert "booked by E0001" in error.message
    clock.now += timedelta(hours=1)
    moved = store.move(second.id, first.end_utc, by="Bo")
    assert (moved.start_utc, moved.end_utc) == (first.end_utc, first.end_utc + timedelta(days=1))
    last = store.history(second.id)[-1]
    assert (last.from_state, last.to_state, last.by, last.time_utc) == (
        S.PLANNED, S.PLANNED, "Bo", clock.now
    )  # fmt: skip
    assert last.reason == (
        "moved from 2027-07-12T06:00Z (local 2027-07-12T07:00+01:00) to 2027-07-11T06:00Z "
        "(local 2027-07-11T07:00+01:00)"
    )
    # moving onto itself is fine: an experiment does not collide with its old place
    assert store.move(second.id, first.end_utc + timedelta(hours=1)).start_utc == (
        first.end_utc + timedelta(hours=1)
    )


def test_move_and_cancel_refuse_unknown_ids_and_running_experiments(
    store: ScheduleStore, files: dict[str, Path]
) -> None:
    experiment = add(store, files)
    error = refused_unchanged(store, lambda: store.move("E0099", START))
    assert "no experiment 'E0099'" in error.message
    refused_unchanged(store, lambda: store.cancel("nonsense", reason="x"))
    refused_unchanged(store, lambda: store.cancel(experiment.id, reason=" "))
    store.transition(experiment.id, S.PREFLIGHT, reason="due", by="serve")
    store.transition(experiment.id, S.RUNNING, reason="preflight passed", by="serve")
    error = refused_unchanged(store, lambda: store.move(experiment.id, START))
    assert error.message == (
        "refused: E0001 is running; only an experiment that is planned, refused can be moved"
    )
    error = refused_unchanged(store, lambda: store.cancel(experiment.id, reason="stop"))
    assert "stop the run through its controller" in error.message


def test_cancel_frees_the_slot(store: ScheduleStore, files: dict[str, Path]) -> None:
    first = add(store, files)
    cancelled = store.cancel(first.id, reason="storm forecast", by="Ana")
    assert cancelled.state is S.CANCELLED
    entry = store.history(first.id)[-1]
    assert (entry.from_state, entry.to_state, entry.reason) == (
        S.PLANNED, S.CANCELLED, "storm forecast"
    )  # fmt: skip
    assert add(store, files).id == "E0002"
    refused_unchanged(store, lambda: store.cancel(first.id, reason="again"))


# -- states ----------------------------------------------------------------------------------


def test_serve_walks_an_experiment_through_its_states(
    store: ScheduleStore, files: dict[str, Path], tmp_path: Path
) -> None:
    experiment = add(store, files)
    log = tmp_path / "runs" / "E0001.sqlite"
    for to, extra in (
        (S.PREFLIGHT, {}),
        (S.RUNNING, {"log_path": log}),
        (S.HELD, {}),
        (S.RUNNING, {}),
        (S.DONE, {}),
    ):
        current = store.transition(experiment.id, to, reason=f"to {to}", by="serve", **extra)
        assert current.state is to
    assert current.log_path == log
    assert [h.to_state for h in store.history(experiment.id)] == [
        S.PLANNED, S.PREFLIGHT, S.RUNNING, S.HELD, S.RUNNING, S.DONE
    ]  # fmt: skip
    refused_unchanged(store, lambda: store.transition(experiment.id, S.RUNNING, reason="x",
                                                      by="serve"))  # fmt: skip


@pytest.mark.parametrize(
    ("path", "to"),
    [
        ((), S.RUNNING),
        ((), S.DONE),
        ((S.PREFLIGHT, S.REFUSED), S.PLANNED),
        ((S.CANCELLED,), S.PLANNED),
        ((S.PREFLIGHT, S.RUNNING), S.CANCELLED),
    ],
)
def test_transitions_outside_the_table_are_refused(
    store: ScheduleStore, files: dict[str, Path], path: tuple[ExperimentState, ...],
    to: ExperimentState,
) -> None:  # fmt: skip
    experiment = add(store, files)
    for step in path:
        store.transition(experiment.id, step, reason="setup", by="serve")
    error = refused_unchanged(
        store, lambda: store.transition(experiment.id, to, reason="try", by="serve")
    )
    assert isinstance(error, ScheduleConflict)
    assert error.conflicts[0].kind is ConflictKind.STATE
    assert f"cannot go from {store.get(experiment.id).state.value} to {to.value}" in error.message


def test_a_refused_experiment_is_planned_again_by_moving_it(
    store: ScheduleStore, files: dict[str, Path]
) -> None:
    experiment = add(store, files)
    store.transition(experiment.id, S.PREFLIGHT, reason="due", by="serve")
    store.transition(experiment.id, S.REFUSED, reason="optode stale", by="serve")
    assert store.experiments(states=[S.PLANNED]) == []
    again = store.move(experiment.id, START + timedelta(days=2), by="Ana")
    assert again.state is S.PLANNED
    assert store.history(experiment.id)[-1].from_state is S.REFUSED


def test_due_and_next_start_look_at_planned_experiments_of_one_rig(
    store: ScheduleStore, files: dict[str, Path]
) -> None:
    assert store.next_start(files["rig"]) is None
    first = add(store, files)
    second = add(store, files, start_utc=START + timedelta(days=2))
    assert store.next_start(files["rig"]) == START
    assert store.due(files["rig"], START - timedelta(seconds=1)) is None
    assert store.due(files["rig"], START + timedelta(days=5)) == first
    store.transition(first.id, S.PREFLIGHT, reason="due", by="serve")
    assert store.due(files["rig"], START + timedelta(days=5)) == second
    assert store.next_start(files["rig"]) == second.start_utc


def test_listing_filters_by_rig_and_state_in_start_order(
    store: ScheduleStore, files: dict[str, Path]
) -> None:
    late = add(store, files, start_utc=START + timedelta(days=4))
    early = add(store, files)
    store.cancel(late.id, reason="no")
    assert [e.id for e in store.experiments()] == [early.id, late.id]
    assert [e.id for e in store.experiments(states=[S.CANCELLED])] == [late.id]
    assert store.experiments(states=[]) == []


# -- two writers -----------------------------------------------------------------------------


def test_two_processes_adding_the_same_slot_get_one_acceptance(
    tmp_path: Path, files: dict[str, Path]
) -> None:
    store_path = tmp_path / "shared.sqlite"
    ScheduleStore(store_path).close()
    script = textwrap.dedent(
        f"""
        import sys
        from datetime import datetime, UTC
        from pathlib import Path
        from controller.schedule import ScheduleStore, ScheduleConflict
        with ScheduleStore(Path({str(store_path)!r})) as store:
            try:
                e = store.add(rig_path=Path({str(files["rig"])!r}),
                              protocol_path=Path({str(files["day"])!r}),
                              start_utc=datetime(2027, 7, 10, 6, tzinfo=UTC), owner=sys.argv[1])
                print("added", e.id)
            except ScheduleConflict as exc:
                print("refused", exc.conflicts[0].kind.value)
        """
    )
    procs = [
        subprocess.Popen([sys.executable, "-c", script, name], stdout=subprocess.PIPE, text=True)
        for name in ("Ana", "Bo")
    ]
    outs = sorted(p.communicate(timeout=120)[0].strip() for p in procs)
    assert outs == ["added E0001", "refused chamber-booked"]
    with ScheduleStore(store_path) as store:
        [only] = store.experiments()
        assert only.id == "E0001"


def test_two_connections_racing_for_one_slot_serialize(
    tmp_path: Path, files: dict[str, Path]
) -> None:
    import threading

    store_path = tmp_path / "shared.sqlite"
    barrier = threading.Barrier(2)
    results: dict[str, str] = {}

    def attempt(owner: str) -> None:
        with ScheduleStore(store_path) as store:
            barrier.wait(timeout=60)
            try:
                results[owner] = add(store, files, owner=owner).id
            except ScheduleConflict as exc:
                results[owner] = exc.conflicts[0].kind.value

    ScheduleStore(store_path).close()
    threads = [threading.Thread(target=attempt, args=(name,)) for name in ("Ana", "Bo")]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join(timeout=120)
    assert sorted(results.values()) == ["E0001", "chamber-booked"]
