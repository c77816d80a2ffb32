"""State store: round trips across reopen, damage recovery, schema and lock errors, flat files.

Rules that come from SQLite's documentation name the page beside the check:
pragma.html (synchronous, journal_mode, quick_check, max_page_count),
wal.html, fileformat2.html (database header), autoinc.html (sequence numbers),
howtocorrupt.html, backup.html.
"""

import os
import re
import sqlite3
import stat
import struct
import tempfile
import threading
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from arxwatch.daemon.store import (
    Checkpoint,
    JournalEntry,
    OutboxMessage,
    StateStore,
    StoreError,
    write_atomically,
)

T0 = 1_772_366_400.0  # 2026-03-01T12:00:00Z
TOPIC = "larkspur-yard/block-a/ahu-c2/supply-air-temp"
CORRUPT_NAME = re.compile(r"state\.db\.corrupt-\d{8}T\d{6}Z(\.\d+)?")


@pytest.fixture
def db(tmp_path: Path) -> Path:
    """Return a state file path in a directory that does not exist yet."""
    return tmp_path / "var" / "arxwatch" / "state.db"


def message(n: int, payload: bytes = b"{}") -> OutboxMessage:
    return OutboxMessage(f"alert-{n}", f"arxwatch/alerts/block-a/vav-3-{n}", payload, 1, n % 2 == 0)


def rows(n: int, start_s: float = T0) -> list[tuple[str, bytes, float]]:
    return [(TOPIC, f'{{"value": {20 + k}}}'.encode(), start_s + k) for k in range(n)]


def header(path: Path) -> bytes:
    with open(path, "rb") as handle:
        return handle.read(100)


# --- checkpoint ---------------------------------------------------------------------------


def test_fresh_store_has_an_empty_checkpoint(db: Path) -> None:
    with StateStore(db) as store:
        assert store.load_checkpoint() == Checkpoint({}, 0, None)
        assert store.journal_count() == 0
        assert store.outbox_count() == 0
        assert store.recovered_from is None


def test_checkpoint_round_trip_with_removed_keys_and_journal_trimming(db: Path) -> None:
    with StateStore(db) as store:
        assert store.append_journal(rows(5)) == 5
        store.save_checkpoint(
            {"ahu-c2": b"\x00\x01", "vav-3-14": b"v1", "vav-3-15": b""},
            now_s=T0 + 10,
            journal_upto=3,
        )
        assert [e.seq for e in store.journal_after(0)] == [4, 5]
        store.save_checkpoint(
            {"ahu-c2": b"\xff" * 3000}, now_s=T0 + 70, removed=["vav-3-14", "gone"], journal_upto=4
        )
    with StateStore(db) as store:
        assert store.load_checkpoint() == Checkpoint(
            {"ahu-c2": b"\xff" * 3000, "vav-3-15": b""}, 4, T0 + 70
        )
        assert list(store.journal_after(4)) == [JournalEntry(5, TOPIC, b'{"value": 24}', T0 + 4)]
        assert store.journal_count() == 1


def test_journal_upto_must_not_go_back_or_past_the_last_seq(db: Path) -> None:
    with StateStore(db) as store:
        store.append_journal(rows(3))
        store.save_checkpoint({"a": b"1"}, now_s=T0, journal_upto=2)
        with pytest.raises(ValueError, match=r"journal_upto.*\(2\).*\(3\), got 4"):
            store.save_checkpoint({"a": b"2"}, now_s=T0 + 1, journal_upto=4)
        with pytest.raises(ValueError, match=r"journal_upto.*\(2\).*\(3\), got 1"):
            store.save_checkpoint({"a": b"3"}, now_s=T0 + 2, journal_upto=1)
        # Refused saves changed nothing (one transaction, rolled back).
        assert store.load_checkpoint() == Checkpoint({"a": b"1"}, 2, T0)
        assert store.journal_count() == 1


def test_checkpoint_arguments_are_checked(db: Path) -> None:
    with StateStore(db) as store:
        with pytest.raises(TypeError, match=r"entries\['a'\] must be bytes, got str"):
            store.save_checkpoint({"a": "text"}, now_s=T0)  # type: ignore[dict-item]
        with pytest.raises(TypeError, match="every key of entries must be a str, got int 7"):
            store.save_checkpoint({7: b""}, now_s=T0)  # type: ignore[dict-item]
        with pytest.raises(TypeError, match="removed must be an iterable of str, not a single"):
            store.save_checkpoint({}, now_s=T0, removed="ahu-c2")
        with pytest.raises(ValueError, match=r"both in entries and in removed: \['a'\]"):
            store.save_checkpoint({"a": b""}, now_s=T0, removed=["a"])
        with pytest.raises(ValueError, match="now_s must be a finite number of seconds, got nan"):
            store.save_checkpoint({}, now_s=float("nan"))
        with pytest.raises(TypeError, match="journal_upto must be an int, got float"):
            store.save_checkpoint({}, now_s=T0, journal_upto=1.0)  # type: ignore[arg-type]
        assert store.load_checkpoint() == Checkpoint({}, 0, None)


def test_a_failed_checkpoint_changes_nothing_and_names_the_file(db: Path) -> None:
    with StateStore(db) as store:
        store.append_journal(rows(2))
        store.save_checkpoint({"a": b"1", "b": b"1"}, now_s=T0, journal_upto=1)
        # pragma.html#pragma_max_page_count: inserts that need more pages fail with
        # SQLITE_FULL, the same error as a full disk.
        (pages,) = store._conn.execute("PRAGMA page_count").fetchone()  # type: ignore[union-attr]
        store._conn.execute(f"PRAGMA max_page_count = {pages}")  # type: ignore[union-attr]
        with pytest.raises(
            StoreError, match="saving the checkpoint failed: the disk is full"
        ) as err:
            store.save_checkpoint(
                {f"vav-{k}": bytes(4096) for k in range(50)},
                now_s=T0 + 1,
                removed=["b"],
                journal_upto=2,
            )
        assert err.value.path == db
        assert str(db) in str(err.value)
        assert isinstance(err.value, OSError)
        assert store.load_checkpoint() == Checkpoint({"a": b"1", "b": b"1"}, 1, T0)
        assert store.journal_count() == 1
        # The store keeps working once there is room again.
        store._conn.execute("PRAGMA max_page_count = 1073741823")  # type: ignore[union-attr]
        store.save_checkpoint({"c": b"2"}, now_s=T0 + 2, removed=["b"], journal_upto=2)
        assert store.load_checkpoint() == Checkpoint({"a": b"1", "c": b"2"}, 2, T0 + 2)


# Checkpoint saves: (entries, removed keys), over a small key space so keys collide.
KEYS = st.sampled_from([f"block-{b}/vav-{k}" for b in "abcd" for k in range(3)])
SAVES = st.lists(
    st.tuples(
        st.dictionaries(KEYS, st.binary(max_size=64), max_size=6),
        st.frozensets(KEYS, max_size=4),
        st.booleans(),  # reopen the store after this save
    ),
    min_size=1,
    max_size=8,
)


@settings(max_examples=60, deadline=None)
@given(saves=SAVES)
def test_load_returns_the_last_save_merged_with_earlier_keys_not_removed(
    saves: list[tuple[dict[str, bytes], frozenset[str], bool]],
) -> None:
    model: dict[str, bytes] = {}
    with tempfile.TemporaryDirectory() as directory:
        path = Path(directory) / "state.db"
        store = StateStore(path)
        try:
            for n, (entries, removed, reopen) in enumerate(saves):
                removed = removed - entries.keys()
                store.save_checkpoint(entries, now_s=T0 + n, removed=removed)
                model.update(entries)
                for key in removed:
                    model.pop(key, None)
                if reopen:
                    store.close()
                    store = StateStore(path)
                assert store.load_checkpoint() == Checkpoint(model, 0, T0 + n)
        finally:
            store.close()


# --- journal ------------------------------------------------------------------------------


def test_journal_seq_strictly_increases_across_trimming_and_reopen(db: Path) -> None:
    # autoinc.html: with AUTOINCREMENT a rowid is never reused, even after the rows with the
    # largest values were deleted.
    with StateStore(db) as store:
        assert store.append_journal([]) == 0
        assert store.append_journal(rows(3)) == 3
        store.save_checkpoint({}, now_s=T0, journal_upto=3)  # trims every row
        assert store.journal_count() == 0
        assert store.append_journal([]) == 3
    with StateStore(db) as store:
        assert store.append_journal([]) == 3
        assert store.append_journal(rows(2, T0 + 100)) == 5
        seqs = [entry.seq for entry in store.journal_after(0)]
        assert seqs == [4, 5]
        store.save_checkpoint({}, now_s=T0 + 1, journal_upto=5)
    with StateStore(db) as store:
        assert store.append_journal(rows(1)) == 6


def test_journal_keeps_payload_bytes_and_times(db: Path) -> None:
    raw = bytes(range(256))  # not UTF-8, NUL included
    with StateStore(db) as store:
        store.append_journal([(TOPIC, raw, T0 + 0.125), ("larkspur-yard/ü/+x", b"", 7)])
        assert list(store.journal_after(0)) == [
            JournalEntry(1, TOPIC, raw, T0 + 0.125),
            JournalEntry(2, "larkspur-yard/ü/+x", b"", 7.0),
        ]


def test_journal_after_streams_in_batches(db: Path) -> None:
    with StateStore(db) as store:
        store.append_journal(rows(25))
        queries: list[str] = []
        store._conn.set_trace_callback(queries.append)  # type: ignore[union-attr]
        entries = store.journal_after(7, batch=4)
        first = next(entries)
        assert first.seq == 8
        assert len(queries) == 1  # only the first batch has been read
        store.append_journal(rows(2, T0 + 100))  # appended while iterating: still included
        rest = [entry.seq for entry in entries]
        store._conn.set_trace_callback(None)  # type: ignore[union-attr]
        assert [first.seq, *rest] == list(range(8, 28))
        # 20 rows in batches of 4: five full batches and an empty sixth read.
        assert sum("FROM journal" in q for q in queries) == 6


def test_journal_arguments_are_checked(db: Path) -> None:
    with StateStore(db) as store:
        with pytest.raises(TypeError, match=r"entries\[1\] payload must be bytes, got str"):
            store.append_journal([(TOPIC, b"", T0), (TOPIC, "21.5", T0)])  # type: ignore[list-item]
        with pytest.raises(ValueError, match=r"entries\[0\] arrival_s must be a finite"):
            store.append_journal([(TOPIC, b"", float("inf"))])
        with pytest.raises(TypeError, match=r"entries\[0\] must be a \(topic, payload"):
            store.append_journal([(TOPIC, b"")])  # type: ignore[list-item]
        with pytest.raises(ValueError, match="batch must be >= 1, got 0"):
            store.journal_after(0, batch=0)
        with pytest.raises(ValueError, match="seq must be >= 0, got -1"):
            store.journal_after(-1)
        assert store.journal_count() == 0


# --- outbox -------------------------------------------------------------------------------


def test_outbox_keeps_insertion_order_and_ignores_known_ids_across_reopen(db: Path) -> None:
    with StateStore(db) as store:
        store.add_outbox([message(3), message(1), message(2)])
        store.add_outbox([message(1, b"changed"), message(4), message(4, b"twice")])
        assert store.pending_outbox() == [message(3), message(1), message(2), message(4)]
        store.remove_outbox(["alert-3", "alert-2", "unknown"])
    with StateStore(db) as store:
        assert store.outbox_count() == 2
        store.add_outbox([message(0)])
        assert store.pending_outbox() == [message(1), message(4), message(0)]
        assert store.pending_outbox(limit=2) == [message(1), message(4)]
        store.remove_outbox(m.id for m in store.pending_outbox())
        assert store.outbox_count() == 0


def test_outbox_message_fields_are_checked(db: Path) -> None:
    with pytest.raises(ValueError, match="qos must be 0 or 1, got 2"):
        OutboxMessage("a", "t", b"", 2, False)
    with pytest.raises(ValueError, match="qos must be 0 or 1, got True"):
        OutboxMessage("a", "t", b"", True, False)
    with pytest.raises(ValueError, match="OutboxMessage.id must be a non-empty str"):
        OutboxMessage("", "t", b"", 0, False)
    with pytest.raises(TypeError, match="retain must be a bool, got int"):
        OutboxMessage("a", "t", b"", 0, 1)  # type: ignore[arg-type]
    with pytest.raises(TypeError, match="payload must be bytes, got str"):
        OutboxMessage("a", "t", "{}", 0, False)  # type: ignore[arg-type]
    with StateStore(db) as store:
        with pytest.raises(TypeError, match=r"messages\[0\] must be an OutboxMessage, got tuple"):
            store.add_outbox([("a", "t", b"", 0, False)])  # type: ignore[list-item]
        with pytest.raises(TypeError, match="ids must be an iterable of str, not a single str"):
            store.remove_outbox("alert-1")
        with pytest.raises(ValueError, match="limit must be >= 1, got 0"):
            store.pending_outbox(limit=0)


# --- opening: settings, lock, schema ------------------------------------------------------


@pytest.mark.parametrize(("synchronous", "expected"), [("normal", 1), ("full", 2)])
def test_opens_in_wal_mode_with_the_synchronous_level_asked(
    db: Path, synchronous: str, expected: int
) -> None:
    with StateStore(db, synchronous=synchronous) as store:  # type: ignore[arg-type]
        conn = store._conn
        assert conn is not None
        # pragma.html#pragma_synchronous: NORMAL is 1, FULL is 2.
        assert conn.execute("PRAGMA synchronous").fetchone() == (expected,)
        assert conn.execute("PRAGMA journal_mode").fetchone() == ("wal",)
        assert conn.execute("PRAGMA busy_timeout").fetchone()[0] > 0
    # fileformat2.html, header offsets 18 and 19: read/write versions are 2 for WAL.
    assert header(db)[18:20] == b"\x02\x02"


def test_synchronous_must_be_normal_or_full(db: Path) -> None:
    with pytest.raises(ValueError, match="synchronous must be 'normal' or 'full', got 'off'"):
        StateStore(db, synchronous="off")  # type: ignore[arg-type]
    assert not db.parent.exists()


def test_creates_parent_directories_and_a_private_file(db: Path) -> None:
    umask = os.umask(0o022)
    os.umask(umask)
    with StateStore(db):
        pass
    for directory in (db.parent, db.parent.parent):
        assert stat.S_IMODE(directory.stat().st_mode) == 0o750 & ~umask
    assert stat.S_IMODE(db.stat().st_mode) == 0o640 & ~umask
    # close() ran wal_checkpoint(TRUNCATE) and SQLite removed the WAL at the last close
    # (wal.html, "Persistence of WAL mode"): the file alone holds the data.
    assert not Path(f"{db}-wal").exists()
    assert not Path(f"{db}-shm").exists()


def test_a_second_store_on_the_same_file_is_refused_until_the_first_closes(db: Path) -> None:
    first = StateStore(db)
    try:
        with pytest.raises(StoreError, match=rf"in use by another process \(pid {os.getpid()};"):
            StateStore(db)
        first.save_checkpoint({"a": b"1"}, now_s=T0)  # the first one is unaffected
    finally:
        first.close()
    with StateStore(db) as second:
        assert second.load_checkpoint().entries == {"a": b"1"}


def test_another_schema_version_is_refused_with_both_versions_named(db: Path) -> None:
    with StateStore(db):
        pass
    with sqlite3.connect(db) as conn:
        conn.execute("UPDATE meta SET value = 7 WHERE key = 'schema_version'")
    conn.close()
    with pytest.raises(StoreError, match=r"schema version 7, this release expects 1; move") as err:
        StateStore(db)
    assert str(db) in str(err.value)
    assert db.exists()
    assert not [p for p in db.parent.iterdir() if CORRUPT_NAME.fullmatch(p.name)]
    with pytest.raises(StoreError, match="schema version 7"):  # not "in use": lock released
        StateStore(db)


def test_a_database_of_something_else_is_refused_not_moved(db: Path) -> None:
    db.parent.mkdir(parents=True)
    with sqlite3.connect(db) as conn:
        conn.execute("CREATE TABLE trend (t REAL, value REAL)")
    conn.close()
    with pytest.raises(StoreError, match=r"database of something else \(tables \['trend'\]\)"):
        StateStore(db)
    assert db.exists()


def test_unusable_paths_raise_store_error_naming_the_file(tmp_path: Path) -> None:
    blocker = tmp_path / "block-b"
    blocker.write_bytes(b"")
    with pytest.raises(StoreError, match="block-b/state.db: cannot create its directory"):
        StateStore(blocker / "state.db")
    folder = tmp_path / "state.db"
    folder.mkdir()
    with pytest.raises(StoreError, match="state.db: cannot open the file"):
        StateStore(folder)


def test_calls_from_another_thread_fail_loudly(db: Path) -> None:
    errors: list[BaseException] = []
    with StateStore(db) as store:

        def save() -> None:
            try:
                store.save_checkpoint({"a": b""}, now_s=T0)
            except BaseException as exc:  # collected for the assertion below
                errors.append(exc)

        worker = threading.Thread(target=save)
        worker.start()
        worker.join()
        assert len(errors) == 1
        assert isinstance(errors[0], StoreError)
        assert "thread" in str(errors[0])
        assert store.load_checkpoint().saved_at_s is None


def test_close_is_idempotent_and_a_closed_store_refuses_calls(db: Path) -> None:
    store = StateStore(db)
    store.close()
    store.close()
    for call in (
        store.load_checkpoint,
        store.journal_count,
        lambda: store.journal_after(0),
        lambda: store.add_outbox([message(1)]),
        lambda: store.backup(db.with_name("copy.db")),
    ):
        with pytest.raises(StoreError, match="state.db: the store is closed"):
            call()


# --- damaged files ------------------------------------------------------------------------


def moved_files(directory: Path) -> list[Path]:
    return sorted(p for p in directory.iterdir() if CORRUPT_NAME.fullmatch(p.name))


def test_garbage_is_moved_aside_with_its_wal_and_a_fresh_store_started(db: Path) -> None:
    db.parent.mkdir(parents=True)
    garbage = os.urandom(3000)
    db.write_bytes(garbage)
    Path(f"{db}-wal").write_bytes(b"left over")
    with StateStore(db) as store:
        assert store.recovered_from is not None
        assert moved_files(db.parent) == [store.recovered_from]
        assert store.recovered_from.read_bytes() == garbage
        # SQLite looks for the WAL beside the database under "<name>-wal" (wal.html).
        assert Path(f"{store.recovered_from}-wal").read_bytes() == b"left over"
        assert store.load_checkpoint() == Checkpoint({}, 0, None)
        store.save_checkpoint({"a": b"1"}, now_s=T0)
    with StateStore(db) as store:
        assert store.recovered_from is None
        assert store.load_checkpoint().entries == {"a": b"1"}


def test_a_truncated_database_is_moved_aside(db: Path) -> None:
    with StateStore(db) as store:
        store.save_checkpoint({f"vav-3-{k}": os.urandom(1000) for k in range(200)}, now_s=T0)
    whole = db.read_bytes()
    db.write_bytes(whole[: len(whole) // 2])
    with StateStore(db) as store:
        assert store.recovered_from is not None
        assert store.recovered_from.read_bytes() == whole[: len(whole) // 2]
        assert store.load_checkpoint() == Checkpoint({}, 0, None)


def test_a_file_failing_quick_check_is_moved_aside(db: Path) -> None:
    with StateStore(db) as store:
        store.save_checkpoint({"a": b"1"}, now_s=T0)
    damaged = bytearray(db.read_bytes())
    # fileformat2.html: header offset 36 is the total number of freelist pages. A count with
    # no freelist trunk page opens fine but quick_check reports it (pragma.html#pragma_quick_check).
    damaged[36:40] = struct.pack(">I", 5)
    db.write_bytes(bytes(damaged))
    with sqlite3.connect(db) as conn:
        assert conn.execute("PRAGMA quick_check").fetchall() != [("ok",)]
    conn.close()
    with StateStore(db) as store:
        assert store.recovered_from is not None
        assert store.recovered_from.read_bytes() == bytes(damaged)
        assert store.load_checkpoint().entries == {}


def test_moving_aside_never_overwrites_an_earlier_corrupt_file(db: Path) -> None:
    db.parent.mkdir(parents=True)
    db.write_bytes(b"first damage" * 100)
    with StateStore(db) as store:
        first = store.recovered_from
    db.write_bytes(b"second damage" * 100)
    with StateStore(db) as store:
        second = store.recovered_from
    db.write_bytes(b"third damage" * 100)
    with StateStore(db) as store:
        third = store.recovered_from
    assert first is not None and second is not None and third is not None
    assert len({first, second, third}) == 3
    assert moved_files(db.parent) == sorted([first, second, third])
    assert first.read_bytes() == b"first damage" * 100
    assert second.read_bytes() == b"second damage" * 100
    assert third.read_bytes() == b"third damage" * 100


# --- backup -------------------------------------------------------------------------------


def test_backup_is_a_complete_self_contained_copy(db: Path, tmp_path: Path) -> None:
    copy = tmp_path / "copy.db"
    copy.write_bytes(b"an older backup")
    with StateStore(db) as store:
        store.append_journal(rows(4))
        store.save_checkpoint({"ahu-c2": b"\x01" * 5000}, now_s=T0, journal_upto=2)
        store.add_outbox([message(1)])
        store.backup(copy)  # while the store is open, WAL not checkpointed
        store.save_checkpoint({"ahu-c2": b"later"}, now_s=T0 + 1, journal_upto=2)
    assert not Path(f"{copy}-wal").exists()
    # fileformat2.html offsets 18-19: 1 = rollback journal, so the copy is one file.
    assert header(copy)[18:20] == b"\x01\x01"
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".copy.db")] == []
    with StateStore(copy) as restored:
        assert restored.load_checkpoint() == Checkpoint({"ahu-c2": b"\x01" * 5000}, 2, T0)
        assert [e.seq for e in restored.journal_after(0)] == [3, 4]
        assert restored.pending_outbox() == [message(1)]


def test_backup_refuses_its_own_file_and_reports_the_destination(db: Path, tmp_path: Path) -> None:
    with StateStore(db) as store:
        with pytest.raises(ValueError, match="destination must differ"):
            store.backup(db.parent / ".." / "arxwatch" / "state.db")
        with pytest.raises(StoreError, match="missing/copy.db: cannot create a temporary file"):
            store.backup(tmp_path / "missing" / "copy.db")


# --- write_atomically ---------------------------------------------------------------------


def leftovers(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir() if p.name.endswith(".tmp"))


def test_write_atomically_replaces_content_and_keeps_the_mode(tmp_path: Path) -> None:
    umask = os.umask(0o022)
    os.umask(umask)
    target = tmp_path / "ahu-c2.baseline.json"
    write_atomically(target, b'{"version": 1}')
    assert target.read_bytes() == b'{"version": 1}'
    assert stat.S_IMODE(target.stat().st_mode) == 0o640 & ~umask
    target.chmod(0o604)
    write_atomically(str(target), b'{"version": 2}')
    assert target.read_bytes() == b'{"version": 2}'
    assert stat.S_IMODE(target.stat().st_mode) == 0o604
    assert leftovers(tmp_path) == []


def test_write_atomically_leaves_old_content_and_no_temp_file_on_failure(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    target = tmp_path / "ahu-c2.baseline.json"
    target.write_bytes(b"old")

    def fail(src: object, dst: object) -> None:
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "replace", fail)
    with pytest.raises(StoreError, match="ahu-c2.baseline.json: writing failed: .*No space") as err:
        write_atomically(target, b"new")
    assert isinstance(err.value.__cause__, OSError)
    assert target.read_bytes() == b"old"
    assert leftovers(tmp_path) == []


def test_write_atomically_checks_its_arguments(tmp_path: Path) -> None:
    with pytest.raises(TypeError, match="data must be bytes, got str"):
        write_atomically(tmp_path / "x.json", "{}")  # type: ignore[arg-type]
    with pytest.raises(StoreError, match="nowhere/x.json: cannot create a temporary file"):
        write_atomically(tmp_path / "nowhere" / "x.json", b"{}")
    assert list(tmp_path.iterdir()) == []


def test_series_grow_by_chunks_within_checkpoints_and_drop(tmp_path: Path) -> None:
    path = tmp_path / "state.db"
    with StateStore(path) as store:
        store.save_checkpoint({}, now_s=1.0, appended={"learn/a": b"ab", "learn/b": b"x"})
        store.save_checkpoint({}, now_s=2.0, appended={"learn/a": b"cd"})
        assert store.series("learn/a") == b"abcd"
        assert store.series_keys() == ["learn/a", "learn/b"]
        # dropped first, then the new chunk: a series restarted in one save
        store.save_checkpoint(
            {}, now_s=3.0, dropped=["learn/a", "nothing"], appended={"learn/a": b"z"}
        )
    with StateStore(path) as store:
        assert store.series("learn/a") == b"z"
        assert store.series("learn/b") == b"x"
        assert store.series("unknown") == b""
        with pytest.raises(TypeError):
            store.save_checkpoint({}, now_s=4.0, dropped="learn/a")
