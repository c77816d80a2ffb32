"""State store: checkpoints, a journal of received messages and an outbox, in one SQLite file.

The daemon keeps everything it must not lose across a restart in one SQLite
database in WAL mode:

* **checkpoint** -- a generic ``key -> bytes`` map (estimator, detector and
  alert state, encoded by their owners), saved in one transaction together
  with the journal position it already includes and the time of the save;
* **journal** -- raw MQTT messages received since the last checkpoint, each
  with a sequence number that only ever grows (also across trimming and
  restarts). A message is acknowledged to the broker only once journalled,
  so a crash loses nothing that was acknowledged: on start the daemon loads
  the checkpoint and replays ``journal_after(checkpoint.journal_upto)``;
* **outbox** -- alert messages not yet acknowledged by the broker, with
  stable ids, republished on start.

One worker thread makes every call: the connection keeps :mod:`sqlite3`'s
``check_same_thread`` check, so a call from another thread fails loudly
instead of racing.

Durability. ``synchronous="normal"`` survives a crash of the process (SIGKILL,
out of memory, a bug) with every committed transaction intact; after a power
loss or kernel crash the most recent commits may be rolled back, never torn.
``synchronous="full"`` also keeps every committed transaction across a power
loss, at the price of one more fsync per commit [1]_ [2]_. Either way a
checkpoint is all or nothing.

Local disk only: SQLite's locking and WAL shared memory do not work reliably
on network file systems [2]_ [3]_.

One process per file. Opening takes an exclusive ``flock(2)`` on
``<name>.lock`` (kept open, released by the kernel when the process dies,
also on SIGKILL) and writes the process id into it, so a second daemon
pointed at the same file fails with a :class:`StoreError` naming the holder
instead of sharing the state.

Damage. Opening runs ``PRAGMA quick_check`` [1]_ on a read-only connection,
so nothing is written to a damaged file or its WAL before it is moved aside
(a read-write connection would fold the WAL into the file and delete it on
closing). A file that is not a
database, is reported corrupt by SQLite or fails the check is moved aside,
with its ``-wal`` and ``-shm`` files, to ``<name>.corrupt-<UTC
yyyymmddThhmmssZ>`` (a ``.1``, ``.2``... suffix is added rather than
overwriting an earlier one) and an empty store is started;
:attr:`StateStore.recovered_from` then names the moved file, for the caller
to log loudly and count. Errors that are not damage (permission, read-only,
disk full, locked) are never "recovered" that way: they raise
:class:`StoreError`. The only safe copy of a live store is
:meth:`StateStore.backup` (the SQLite backup API); copying the file with
``cp`` while it is open can produce a corrupt copy [3]_.

Flat files (baselines, exports) are written by :func:`write_atomically`:
temporary file in the same directory, fsync, rename over the target, fsync
of the directory, so a crash leaves either the old or the new content.

References
----------
.. [1] SQLite, "Pragma statements": ``synchronous``, ``journal_mode``,
   ``quick_check``, ``wal_checkpoint``; https://sqlite.org/pragma.html
.. [2] SQLite, "Write-Ahead Logging"; https://sqlite.org/wal.html
.. [3] SQLite, "How To Corrupt An SQLite Database File";
   https://sqlite.org/howtocorrupt.html
.. [4] SQLite, "The SQLite Autoincrement" (sequence numbers never reused);
   https://sqlite.org/autoinc.html
.. [5] fsync(2), Linux man-pages: syncing a file does not sync the directory
   entry; an explicit fsync on the directory is needed for that.
"""

from __future__ import annotations

import errno
import fcntl
import logging
import math
import os
import sqlite3
import stat
import tempfile
from collections.abc import Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, ClassVar, Literal, Self

__all__ = [
    "Checkpoint",
    "JournalEntry",
    "OutboxMessage",
    "StateStore",
    "StoreError",
    "write_atomically",
]

_log = logging.getLogger(__name__)

_BUSY_TIMEOUT_S = 5.0  # waits for an outside reader (e.g. the sqlite3 shell); no peer writes
_DIR_MODE = 0o750
_FILE_MODE = 0o640
_SIDE_FILES = ("-wal", "-shm")  # SQLite's names for the WAL and its shared-memory index [2]

# Primary result codes (the low byte of an extended code) that mean the file is damaged.
_DAMAGE_CODES = frozenset({sqlite3.SQLITE_CORRUPT, sqlite3.SQLITE_NOTADB})
_REASONS = {
    sqlite3.SQLITE_FULL: "the disk is full",
    sqlite3.SQLITE_READONLY: "the file or its directory is read-only",
    sqlite3.SQLITE_PERM: "permission denied",
    sqlite3.SQLITE_CANTOPEN: "the file cannot be opened",
    sqlite3.SQLITE_IOERR: "an I/O error",
    sqlite3.SQLITE_BUSY: "the database is locked by another connection",
    sqlite3.SQLITE_LOCKED: "the database is locked by another connection",
    sqlite3.SQLITE_CORRUPT: "the database file is damaged (restart to move it aside)",
    sqlite3.SQLITE_NOTADB: "the database file is damaged (restart to move it aside)",
}

# Plain rowid tables: checkpoint values of a few KiB are too large for WITHOUT ROWID.
# AUTOINCREMENT keeps journal sequence numbers from ever being reused [4].
_SCHEMA = (
    "CREATE TABLE meta (key TEXT PRIMARY KEY, value)",
    "CREATE TABLE checkpoint (key TEXT PRIMARY KEY, value BLOB NOT NULL)",
    "CREATE TABLE journal (seq INTEGER PRIMARY KEY AUTOINCREMENT,"
    " topic TEXT NOT NULL, payload BLOB NOT NULL, arrival_s REAL NOT NULL)",
    "CREATE TABLE outbox (position INTEGER PRIMARY KEY, id TEXT NOT NULL UNIQUE,"
    " topic TEXT NOT NULL, payload BLOB NOT NULL, qos INTEGER NOT NULL, retain INTEGER NOT NULL)",
    "CREATE TABLE series (position INTEGER PRIMARY KEY, key TEXT NOT NULL, chunk BLOB NOT NULL)",
    "CREATE INDEX series_key ON series (key, position)",
)


class StoreError(OSError):
    """The state store (or a flat file) could not be opened, read or written.

    Parameters
    ----------
    path : str or Path
        The file concerned.
    problem : str
        What failed and why, e.g. ``"saving the checkpoint failed: the disk
        is full (database or disk is full)"``.

    Attributes
    ----------
    path : Path
        As given.
    problem : str
        As given.
    """

    def __init__(self, path: str | Path, problem: str) -> None:
        self.path = Path(path)
        self.problem = problem
        super().__init__(f"{path}: {problem}")


@dataclass(frozen=True)
class OutboxMessage:
    """An MQTT message waiting to be acknowledged by the broker.

    Parameters
    ----------
    id : str
        Stable, unique, non-empty id; adding an id already pending is ignored.
    topic : str
        Topic to publish to (non-empty).
    payload : bytes
        Message body.
    qos : int
        0 or 1.
    retain : bool
        Retain flag.

    Raises
    ------
    ValueError
        If ``id`` or ``topic`` is empty or ``qos`` is not 0 or 1.
    TypeError
        If a field has the wrong type.
    """

    id: str
    topic: str
    payload: bytes
    qos: int
    retain: bool

    def __post_init__(self) -> None:
        for name in ("id", "topic"):
            value = getattr(self, name)
            if not isinstance(value, str) or not value:
                raise ValueError(f"OutboxMessage.{name} must be a non-empty str, got {value!r}")
        _check_bytes(self.payload, f"OutboxMessage {self.id!r} payload")
        if isinstance(self.qos, bool) or self.qos not in (0, 1):
            raise ValueError(f"OutboxMessage {self.id!r} qos must be 0 or 1, got {self.qos!r}")
        if not isinstance(self.retain, bool):
            raise TypeError(
                f"OutboxMessage {self.id!r} retain must be a bool, got {type(self.retain).__name__}"
            )


@dataclass(frozen=True)
class JournalEntry:
    """A raw message as journalled.

    Parameters
    ----------
    seq : int
        Sequence number: strictly increasing, never reused (even after
        trimming or a restart).
    topic : str
        MQTT topic it arrived on.
    payload : bytes
        Message body, unchanged.
    arrival_s : float
        Arrival time given to :meth:`StateStore.append_journal`.
    """

    seq: int
    topic: str
    payload: bytes
    arrival_s: float


@dataclass(frozen=True)
class Checkpoint:
    """The saved checkpoint.

    Parameters
    ----------
    entries : dict of str to bytes
        Every key saved and not removed since, with its latest value.
    journal_upto : int
        Journal sequence number the entries already include (0: none);
        replay ``journal_after(journal_upto)`` on top of them.
    saved_at_s : float or None
        ``now_s`` of the save that wrote it; None if never saved.
    """

    entries: dict[str, bytes]
    journal_upto: int
    saved_at_s: float | None


class StateStore:
    """The daemon's SQLite state file: checkpoint, journal and outbox.

    Opening creates missing parent directories (mode 0o750) and the file
    (0o640), takes the per-file process lock, runs ``PRAGMA quick_check``,
    moves a damaged file aside (see the module notes), switches to WAL and
    creates or checks the schema. All methods must be called from the thread
    that opened the store. Use as a context manager or call :meth:`close`.

    Parameters
    ----------
    path : str or Path
        Database file, on a local disk.
    synchronous : {"normal", "full"}
        SQLite ``synchronous`` setting. ``"normal"`` keeps every committed
        transaction across a crash of the process but may lose the latest
        ones on power loss; ``"full"`` keeps them across power loss too, at
        one more fsync per commit.

    Attributes
    ----------
    path : Path
        As given.
    recovered_from : Path or None
        Where a damaged file found at open was moved to; None if none was.

    Raises
    ------
    StoreError
        If the file is in use by another process, has another schema
        version, is a SQLite database of something else, or cannot be
        created, read or written (permission, read-only, disk full...).
    ValueError
        If ``synchronous`` is not ``"normal"`` or ``"full"``.

    References
    ----------
    SQLite, "Pragma statements", https://sqlite.org/pragma.html; "Write-Ahead
    Logging", https://sqlite.org/wal.html.
    """

    SCHEMA_VERSION: ClassVar[int] = 1

    def __init__(
        self, path: str | Path, *, synchronous: Literal["normal", "full"] = "normal"
    ) -> None:
        if synchronous not in ("normal", "full"):
            raise ValueError(f"synchronous must be 'normal' or 'full', got {synchronous!r}")
        self.path = Path(path)
        self.recovered_from: Path | None = None
        self._synchronous = synchronous
        self._conn: sqlite3.Connection | None = None
        try:
            _make_directories(self.path.parent)
        except OSError as exc:
            raise StoreError(self.path, f"cannot create its directory: {exc}") from exc
        self._lock_fd = self._lock()
        try:
            self._conn = self._open()
        except BaseException:
            os.close(self._lock_fd)
            raise

    # ------------------------------------------------------------------ checkpoint

    def save_checkpoint(
        self,
        entries: Mapping[str, bytes],
        *,
        now_s: float,
        removed: Iterable[str] = (),
        journal_upto: int = 0,
        appended: Mapping[str, bytes] | None = None,
        dropped: Iterable[str] = (),
    ) -> None:
        """Save a checkpoint in one transaction: all of it or none of it.

        Upserts ``entries``, deletes the ``removed`` keys, deletes the series
        named in ``dropped``, appends the ``appended`` chunks to their series,
        records ``journal_upto`` and ``now_s``, and deletes the journal rows
        with ``seq <= journal_upto``.

        Parameters
        ----------
        entries : Mapping of str to bytes
            Keys to write; other saved keys keep their values.
        now_s : float
            Time of the save (Unix seconds), returned as
            :attr:`Checkpoint.saved_at_s`.
        removed : Iterable of str
            Keys to delete (unknown keys are ignored).
        appended : Mapping of str to bytes, optional
            A chunk to add at the end of each named series (a series grows
            by a chunk per checkpoint: a baseline window being collected,
            say, saved without rewriting what was saved before).
        dropped : Iterable of str
            Series to delete, before ``appended`` is applied (so a series can
            be dropped and started afresh in one save).
        journal_upto : int
            Last journal sequence number the saved state includes; at least
            the one recorded by the previous save and at most the last one
            :meth:`append_journal` returned.

        Raises
        ------
        ValueError
            If a key is both written and removed, ``now_s`` is not finite, or
            ``journal_upto`` is outside the range above.
        TypeError
            If a key is not a str or a value not bytes, or ``removed`` is a
            single str.
        StoreError
            If the transaction fails (nothing is then changed).
        """
        for key, value in entries.items():
            _check_str(key, "every key of entries")
            _check_bytes(value, f"entries[{key!r}]")
        chunks = dict(appended or {})
        for key, value in chunks.items():
            _check_str(key, "every key of appended")
            _check_bytes(value, f"appended[{key!r}]")
        cut = _keys(dropped, "dropped")
        gone = _keys(removed, "removed")
        both = sorted(gone.intersection(entries))
        if both:
            raise ValueError(f"keys both in entries and in removed: {both[:5]}")
        _check_time(now_s, "now_s")
        _check_count(journal_upto, "journal_upto")
        with self._atomic("saving the checkpoint") as conn:
            previous = _meta(conn, "journal_upto")
            last = _last_seq(conn)
            if not previous <= journal_upto <= last:
                raise ValueError(
                    f"journal_upto must be between the checkpoint's current journal_upto "
                    f"({previous}) and the last journal seq issued ({last}), got {journal_upto}"
                )
            conn.executemany(
                "INSERT INTO checkpoint (key, value) VALUES (?, ?)"
                " ON CONFLICT (key) DO UPDATE SET value = excluded.value",
                entries.items(),
            )
            conn.executemany("DELETE FROM checkpoint WHERE key = ?", [(key,) for key in gone])
            conn.executemany(
                "UPDATE meta SET value = ? WHERE key = ?",
                [(journal_upto, "journal_upto"), (float(now_s), "saved_at_s")],
            )
            conn.execute("DELETE FROM journal WHERE seq <= ?", (journal_upto,))
            conn.executemany("DELETE FROM series WHERE key = ?", [(key,) for key in cut])
            conn.executemany("INSERT INTO series (key, chunk) VALUES (?, ?)", chunks.items())

    def series(self, key: str) -> bytes:
        """Return the chunks of series ``key`` joined in the order they were appended.

        Returns
        -------
        bytes
            Empty for an unknown series.

        Raises
        ------
        StoreError
            If reading fails.
        """
        _check_str(key, "key")
        with self._atomic("reading a series") as conn:
            rows = conn.execute(
                "SELECT chunk FROM series WHERE key = ? ORDER BY position", (key,)
            ).fetchall()
        return b"".join(bytes(chunk) for (chunk,) in rows)

    def series_keys(self) -> list[str]:
        """Return the names of the saved series, sorted.

        Raises
        ------
        StoreError
            If reading fails.
        """
        with self._atomic("listing the series") as conn:
            return [key for (key,) in conn.execute("SELECT DISTINCT key FROM series ORDER BY key")]

    def load_checkpoint(self) -> Checkpoint:
        """Return the saved checkpoint (empty, ``journal_upto`` 0, if never saved).

        Returns
        -------
        Checkpoint
            Entries, journal position and save time, read in one transaction.

        Raises
        ------
        StoreError
            If reading fails.
        """
        with self._atomic("loading the checkpoint") as conn:
            entries = dict(conn.execute("SELECT key, value FROM checkpoint"))
            return Checkpoint(entries, _meta(conn, "journal_upto"), _meta(conn, "saved_at_s"))

    # ------------------------------------------------------------------ journal

    def append_journal(self, entries: Sequence[tuple[str, bytes, float]]) -> int:
        """Journal raw messages in one transaction.

        Parameters
        ----------
        entries : Sequence of (topic, payload, arrival_s)
            Messages in arrival order.

        Returns
        -------
        int
            Sequence number of the last entry written, or the last one ever
            issued when ``entries`` is empty (0 if none).

        Raises
        ------
        TypeError, ValueError
            If an entry is malformed (the message names its index).
        StoreError
            If the transaction fails (nothing is then written).
        """
        rows = []
        for index, entry in enumerate(entries):
            if not isinstance(entry, tuple) or len(entry) != 3:
                raise TypeError(
                    f"entries[{index}] must be a (topic, payload, arrival_s) tuple, got {entry!r}"
                )
            topic, payload, arrival_s = entry
            _check_str(topic, f"entries[{index}] topic")
            _check_bytes(payload, f"entries[{index}] payload")
            _check_time(arrival_s, f"entries[{index}] arrival_s")
            rows.append((topic, payload, float(arrival_s)))
        if not rows:
            with self._atomic("reading the journal") as conn:
                return _last_seq(conn)
        with self._atomic("appending to the journal") as conn:
            conn.executemany(
                "INSERT INTO journal (topic, payload, arrival_s) VALUES (?, ?, ?)", rows
            )
            return _last_seq(conn)

    def journal_after(self, seq: int, *, batch: int = 1000) -> Iterator[JournalEntry]:
        """Iterate over the journal entries with sequence number above ``seq``.

        Entries come in ascending order, read ``batch`` rows at a time (no
        query stays open between batches, so the caller may append or save
        checkpoints while iterating; entries appended meanwhile are
        included).

        Parameters
        ----------
        seq : int
            Start after this sequence number (>= 0), usually
            :attr:`Checkpoint.journal_upto`.
        batch : int
            Rows per query (>= 1).

        Returns
        -------
        Iterator of JournalEntry
            The entries.

        Raises
        ------
        ValueError, TypeError
            If ``seq`` or ``batch`` is not a valid integer (raised at once).
        StoreError
            If the store is closed (at once) or a read fails (while iterating).
        """
        _check_count(seq, "seq")
        _check_count(batch, "batch", minimum=1)
        self._live()
        return self._journal_batches(seq, batch)

    def _journal_batches(self, seq: int, batch: int) -> Iterator[JournalEntry]:
        while True:
            rows = self._fetch(
                "reading the journal",
                "SELECT seq, topic, payload, arrival_s FROM journal"
                " WHERE seq > ? ORDER BY seq LIMIT ?",
                (seq, batch),
            )
            for row in rows:
                yield JournalEntry(*row)
            if len(rows) < batch:
                return
            seq = rows[-1][0]

    def journal_count(self) -> int:
        """Return the number of journal entries kept.

        Returns
        -------
        int
            Entries not yet trimmed by a checkpoint.

        Raises
        ------
        StoreError
            If reading fails.
        """
        count: int = self._fetch("counting the journal", "SELECT count(*) FROM journal")[0][0]
        return count

    # ------------------------------------------------------------------ outbox

    def add_outbox(self, messages: Sequence[OutboxMessage]) -> None:
        """Add messages to the outbox in one transaction.

        A message whose id is already pending is ignored (the first one
        added stays), so adding is idempotent.

        Parameters
        ----------
        messages : Sequence of OutboxMessage
            Messages in the order they should be published.

        Raises
        ------
        TypeError
            If an item is not an :class:`OutboxMessage`.
        StoreError
            If the transaction fails (nothing is then added).
        """
        for index, message in enumerate(messages):
            if not isinstance(message, OutboxMessage):
                raise TypeError(
                    f"messages[{index}] must be an OutboxMessage, got {type(message).__name__}"
                )
        with self._atomic("adding to the outbox") as conn:
            conn.executemany(
                "INSERT INTO outbox (id, topic, payload, qos, retain) VALUES (?, ?, ?, ?, ?)"
                " ON CONFLICT (id) DO NOTHING",
                [(m.id, m.topic, m.payload, m.qos, int(m.retain)) for m in messages],
            )

    def pending_outbox(self, limit: int = 1000) -> list[OutboxMessage]:
        """Return pending outbox messages, oldest first.

        Parameters
        ----------
        limit : int
            Most messages to return (>= 1).

        Returns
        -------
        list of OutboxMessage
            In the order they were added.

        Raises
        ------
        ValueError, TypeError
            If ``limit`` is not an integer >= 1.
        StoreError
            If reading fails.
        """
        _check_count(limit, "limit", minimum=1)
        rows = self._fetch(
            "reading the outbox",
            "SELECT id, topic, payload, qos, retain FROM outbox ORDER BY position LIMIT ?",
            (limit,),
        )
        return [OutboxMessage(i, t, p, q, bool(r)) for i, t, p, q, r in rows]

    def remove_outbox(self, ids: Iterable[str]) -> None:
        """Remove messages from the outbox (unknown ids are ignored), in one transaction.

        Parameters
        ----------
        ids : Iterable of str
            Ids of messages the broker acknowledged.

        Raises
        ------
        TypeError
            If ``ids`` is a single str or holds a non-str.
        StoreError
            If the transaction fails (nothing is then removed).
        """
        gone = _keys(ids, "ids")
        with self._atomic("removing from the outbox") as conn:
            conn.executemany("DELETE FROM outbox WHERE id = ?", [(i,) for i in gone])

    def outbox_count(self) -> int:
        """Return the number of pending outbox messages.

        Returns
        -------
        int
            Messages added and not removed.

        Raises
        ------
        StoreError
            If reading fails.
        """
        count: int = self._fetch("counting the outbox", "SELECT count(*) FROM outbox")[0][0]
        return count

    # ------------------------------------------------------------------ copy, close

    def backup(self, destination: str | Path) -> None:
        """Copy the store to ``destination`` with SQLite's online backup API.

        The copy is written to a temporary file beside ``destination``,
        switched to a single self-contained file (rollback journal mode),
        fsynced and renamed over ``destination``, so an interrupted backup
        never leaves a half-written copy there. Copying the live file by
        other means may produce a corrupt copy.

        Parameters
        ----------
        destination : str or Path
            Target file; its directory must exist. Replaced if present.

        Raises
        ------
        ValueError
            If ``destination`` is the store's own file.
        StoreError
            If the copy fails; the message names ``destination``.

        References
        ----------
        SQLite, "Online Backup API", https://sqlite.org/backup.html;
        "How To Corrupt An SQLite Database File" (backup or restore while a
        transaction is active), https://sqlite.org/howtocorrupt.html.
        """
        target = Path(destination)
        source = self._live()
        if target.resolve() == self.path.resolve():
            raise ValueError(f"destination must differ from the store's own file, got {target}")
        temp = _temporary_beside(target)
        try:
            copy = sqlite3.connect(temp, isolation_level=None)
            try:
                source.backup(copy)
                copy.execute("PRAGMA journal_mode=DELETE")
            finally:
                copy.close()
            _fsync_path(temp)
            os.replace(temp, target)
            _fsync_path(target.parent)
        except (sqlite3.Error, OSError) as exc:
            _discard(temp)
            raise StoreError(target, f"backup of {self.path} failed: {exc}") from exc
        except BaseException:
            _discard(temp)
            raise

    def close(self) -> None:
        """Checkpoint the WAL into the database file, close it and release the lock.

        Runs ``PRAGMA wal_checkpoint(TRUNCATE)`` so the database file alone
        holds everything. Calling it again does nothing.

        Raises
        ------
        StoreError
            If the WAL checkpoint fails (the store is closed all the same;
            the WAL is replayed at the next open).
        """
        conn, self._conn = self._conn, None
        if conn is None:
            return
        try:
            conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        except sqlite3.Error as exc:
            raise self._error("checkpointing the WAL at close", exc) from exc
        finally:
            conn.close()
            os.close(self._lock_fd)  # releases the flock

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # ------------------------------------------------------------------ opening

    def _lock(self) -> int:
        """Take the exclusive per-file process lock; return its descriptor."""
        lock_path = self.path.with_name(self.path.name + ".lock")
        try:
            fd = os.open(lock_path, os.O_RDWR | os.O_CREAT, _FILE_MODE)
        except OSError as exc:
            raise StoreError(self.path, f"cannot open its lock file {lock_path}: {exc}") from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = os.pread(fd, 32, 0).decode("ascii", "replace").strip() or "unknown"
            os.close(fd)
            raise StoreError(
                self.path,
                f"in use by another process (pid {holder}; lock file {lock_path}); "
                "only one daemon may use a state file",
            ) from None
        except OSError as exc:
            os.close(fd)
            raise StoreError(self.path, f"cannot lock {lock_path}: {exc}") from exc
        try:
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode("ascii"), 0)
        except OSError as exc:
            os.close(fd)
            raise StoreError(self.path, f"cannot write its lock file {lock_path}: {exc}") from exc
        return fd

    def _open(self) -> sqlite3.Connection:
        """Connect, moving a damaged file aside once."""
        try:
            return self._connect()
        except _DamagedFile as exc:
            reason = str(exc)
        self.recovered_from = self._move_aside()
        _log.warning(
            "state file %s is damaged (%s); moved it aside to %s and started an empty store",
            self.path,
            reason,
            self.recovered_from,
        )
        try:
            return self._connect()
        except _DamagedFile as exc:
            raise StoreError(self.path, f"a freshly created database is damaged: {exc}") from exc

    def _connect(self) -> sqlite3.Connection:
        """Open and check the file, set WAL and synchronous, create or check the schema.

        Raises
        ------
        _DamagedFile
            If the file is not a database or fails ``quick_check``.
        StoreError
            On any other failure.
        """
        try:
            # Created here, not by SQLite, to get _FILE_MODE; an empty file is an empty database.
            os.close(os.open(self.path, os.O_RDWR | os.O_CREAT, _FILE_MODE))
        except OSError as exc:
            raise StoreError(self.path, f"cannot open the file: {exc}") from exc
        self._check()
        try:
            conn = sqlite3.connect(self.path, timeout=_BUSY_TIMEOUT_S, isolation_level=None)
        except sqlite3.Error as exc:
            raise self._error("opening the store", exc) from exc
        try:
            (mode,) = conn.execute("PRAGMA journal_mode=WAL").fetchone()
            if mode != "wal":
                raise StoreError(
                    self.path,
                    f"cannot use WAL journal mode (SQLite kept {mode!r}); use a local disk",
                )
            # The value comes from a closed, validated set; pragmas take no parameters.
            conn.execute(f"PRAGMA synchronous={self._synchronous.upper()}")
            with _transaction(conn):
                self._prepare_schema(conn)
        except sqlite3.Error as exc:
            conn.close()
            if _primary_code(exc) in _DAMAGE_CODES:
                raise _DamagedFile(str(exc)) from exc
            raise self._error("opening the store", exc) from exc
        except BaseException:
            conn.close()
            raise
        return conn

    def _check(self) -> None:
        """Run ``PRAGMA quick_check`` on a read-only connection.

        Read-only, so nothing is written to a damaged file (or its WAL) before
        it is moved aside: a read-write connection would checkpoint the WAL
        into the file and delete the WAL when it closes.

        Raises
        ------
        _DamagedFile
            If the file is not a database or fails the check.
        StoreError
            On any other failure.
        """
        try:
            conn = sqlite3.connect(
                f"{self.path.absolute().as_uri()}?mode=ro", uri=True, timeout=_BUSY_TIMEOUT_S
            )
        except sqlite3.Error as exc:
            raise self._error("opening the store", exc) from exc
        try:
            problems = [row[0] for row in conn.execute("PRAGMA quick_check")]
        except sqlite3.Error as exc:
            if _primary_code(exc) in _DAMAGE_CODES:
                raise _DamagedFile(str(exc)) from exc
            raise self._error("checking the file", exc) from exc
        finally:
            conn.close()
        if problems != ["ok"]:
            raise _DamagedFile("quick_check: " + "; ".join(problems[:3]))

    def _prepare_schema(self, conn: sqlite3.Connection) -> None:
        """Create the schema in an empty database, or check the version of an existing one."""
        tables = {name for (name,) in conn.execute("SELECT name FROM sqlite_master")}
        if not tables:
            for statement in _SCHEMA:
                conn.execute(statement)
            conn.executemany(
                "INSERT INTO meta (key, value) VALUES (?, ?)",
                [
                    ("schema_version", self.SCHEMA_VERSION),
                    ("journal_upto", 0),
                    ("saved_at_s", None),
                ],
            )
            return
        if "meta" not in tables:
            raise StoreError(
                self.path,
                f"is a SQLite database of something else (tables {sorted(tables)}), "
                "not an arxwatch state store; point the state path at another file",
            )
        row = conn.execute("SELECT value FROM meta WHERE key = 'schema_version'").fetchone()
        found = None if row is None else row[0]
        if found != self.SCHEMA_VERSION:
            raise StoreError(
                self.path,
                f"has state schema version {found}, this release expects "
                f"{self.SCHEMA_VERSION}; move the file aside to start with an empty store, "
                f"or run a release that uses schema version {found}",
            )

    def _move_aside(self) -> Path:
        """Rename the file and its side files to an unused ``.corrupt-<stamp>`` name."""
        stamp = datetime.now(UTC).strftime("%Y%m%dT%H%M%SZ")
        base = f"{self.path.name}.corrupt-{stamp}"
        attempt = 0
        while True:
            name = base if attempt == 0 else f"{base}.{attempt}"
            # We hold the lock, so no other arxwatch process picks a name meanwhile.
            taken = [self.path.with_name(name + suffix) for suffix in ("", *_SIDE_FILES)]
            if not any(os.path.lexists(candidate) for candidate in taken):
                break
            attempt += 1
        try:
            for suffix, target in zip(("", *_SIDE_FILES), taken, strict=True):
                source = self.path.with_name(self.path.name + suffix)
                if os.path.lexists(source):
                    os.rename(source, target)
            _fsync_path(self.path.parent)
        except OSError as exc:
            raise StoreError(self.path, f"is damaged and cannot be moved aside: {exc}") from exc
        return taken[0]

    # ------------------------------------------------------------------ helpers

    def _live(self) -> sqlite3.Connection:
        if self._conn is None:
            raise StoreError(self.path, "the store is closed")
        return self._conn

    @contextmanager
    def _atomic(self, action: str) -> Iterator[sqlite3.Connection]:
        """Run the block in one transaction; translate SQLite errors into StoreError."""
        conn = self._live()
        try:
            with _transaction(conn):
                yield conn
        except sqlite3.Error as exc:
            raise self._error(action, exc) from exc

    def _fetch(self, action: str, sql: str, parameters: tuple[Any, ...] = ()) -> list[Any]:
        conn = self._live()
        try:
            return conn.execute(sql, parameters).fetchall()
        except sqlite3.Error as exc:
            raise self._error(action, exc) from exc

    def _error(self, action: str, exc: sqlite3.Error) -> StoreError:
        reason = _REASONS.get(_primary_code(exc), "an SQLite error")
        return StoreError(self.path, f"{action} failed: {reason} ({exc})")


class _DamagedFile(Exception):
    """Internal: the file is not a usable database (message: what SQLite reported)."""


@contextmanager
def _transaction(conn: sqlite3.Connection) -> Iterator[None]:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``, rolled back on any exception."""
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield
        conn.execute("COMMIT")
    except BaseException:
        # After some errors SQLite has already rolled back; if ROLLBACK itself fails the
        # error to report is still the one that broke the transaction.
        if conn.in_transaction:
            with suppress(sqlite3.Error):
                conn.execute("ROLLBACK")
        raise


def _primary_code(exc: sqlite3.Error) -> int:
    """Primary result code of an SQLite error; -1 for errors raised by Python's module itself."""
    code: int | None = getattr(exc, "sqlite_errorcode", None)
    return -1 if code is None else code & 0xFF


def _meta(conn: sqlite3.Connection, key: str) -> Any:
    return conn.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()[0]


def _last_seq(conn: sqlite3.Connection) -> int:
    """Last journal seq ever issued (0 if none): AUTOINCREMENT's own counter [4]."""
    row = conn.execute("SELECT seq FROM sqlite_sequence WHERE name = 'journal'").fetchone()
    return 0 if row is None else int(row[0])


def _check_str(value: object, what: str) -> None:
    if not isinstance(value, str):
        raise TypeError(f"{what} must be a str, got {type(value).__name__} {value!r}")


def _check_bytes(value: object, what: str) -> None:
    if not isinstance(value, bytes):
        raise TypeError(f"{what} must be bytes, got {type(value).__name__}")


def _check_time(value: object, what: str) -> None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ValueError(f"{what} must be a finite number of seconds, got {value!r}")


def _check_count(value: object, what: str, minimum: int = 0) -> None:
    if isinstance(value, bool) or not isinstance(value, int):
        raise TypeError(f"{what} must be an int, got {type(value).__name__} {value!r}")
    if value < minimum:
        raise ValueError(f"{what} must be >= {minimum}, got {value}")


def _keys(values: Iterable[str], what: str) -> set[str]:
    if isinstance(values, str):
        raise TypeError(f"{what} must be an iterable of str, not a single str ({values!r})")
    keys = set(values)
    for key in keys:
        _check_str(key, f"every item of {what}")
    return keys


def _make_directories(directory: Path) -> None:
    """Create ``directory`` and its missing parents, each with mode 0o750 (less the umask)."""
    missing = []
    while not directory.exists():
        missing.append(directory)
        directory = directory.parent
    if not directory.is_dir():
        raise NotADirectoryError(errno.ENOTDIR, os.strerror(errno.ENOTDIR), str(directory))
    for path in reversed(missing):
        path.mkdir(mode=_DIR_MODE, exist_ok=True)


def _temporary_beside(target: Path) -> Path:
    """Create an empty, uniquely named hidden file in ``target``'s directory."""
    try:
        fd, name = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".tmp")
    except OSError as exc:
        raise StoreError(target, f"cannot create a temporary file beside it: {exc}") from exc
    os.close(fd)
    return Path(name)


def _fsync_path(path: Path) -> None:
    """Fsync a file or a directory by name (a directory's fsync persists renames in it [5])."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _discard(path: Path) -> None:
    with suppress(FileNotFoundError):
        path.unlink()


def write_atomically(path: str | Path, data: bytes) -> None:
    """Replace a flat file's content so that a crash leaves the old or the new content.

    Writes ``data`` to a temporary file in the same directory, fsyncs it,
    renames it over ``path`` with :func:`os.replace`, then fsyncs the
    directory so the rename itself is durable [5]_. The temporary file is
    removed if anything fails. An existing file's permission bits are kept;
    a new file gets 0o640 (less the umask).

    Parameters
    ----------
    path : str or Path
        Target file; its directory must exist.
    data : bytes
        The new content.

    Raises
    ------
    TypeError
        If ``data`` is not bytes.
    StoreError
        If writing, syncing or renaming fails; the message names ``path``.

    References
    ----------
    .. [5] fsync(2), Linux man-pages.
    """
    target = Path(path)
    _check_bytes(data, "data")
    temp = _temporary_beside(target)
    try:
        try:
            mode = stat.S_IMODE(target.stat().st_mode)
        except FileNotFoundError:
            mode = _FILE_MODE
        with open(temp, "wb") as handle:
            os.fchmod(handle.fileno(), mode)
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temp, target)
        _fsync_path(target.parent)
    except OSError as exc:
        _discard(temp)
        raise StoreError(target, f"writing failed: {exc}") from exc
    except BaseException:
        _discard(temp)
        raise
