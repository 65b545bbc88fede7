"""The durable journal: every received message and every engine event, in one SQLite file.

Shell side; the engine never imports this.

Durability: WAL mode with synchronous=FULL, so a commit returns only after the write-ahead
log is fsynced, and every append is one transaction. The service acknowledges a message
to the broker only after `append_messages` has returned.

Threads: a `SqliteJournal` owns one writer connection. Use it from one thread at a time (it may be
created in one thread and used in another); a pruning thread opens its own `SqliteJournal` on the
same file. Reads (`messages_between`, `events_between`, `journal_records`) open a read-only
connection of their own, so they see one consistent snapshot and never take the writer's lock.

The file says what it is: the SQLite header carries APPLICATION_ID, and PRAGMA user_version
the schema version. Any other SQLite file, or a journal from a newer Hourwatch, is refused.
Versioned migrations (`MIGRATIONS`) bring an older journal up to date when the service
opens it; readers never change the file (every version they meet has what they read).
Both are read through SQLite, never with open(): on Linux, closing any descriptor of a file
drops all of the process's POSIX locks on it, the writer connection's included, and another
process closing its own connection could then checkpoint and delete the WAL under the writer.
SQLite's own connections share their locks within a process, so they are safe.

Checkpoints: the writer does not checkpoint inside commits (wal_autocheckpoint=0; that stalled
a commit for 100-800 ms). The owner calls `checkpoint()` between batches instead; see there
for how the WAL is kept bounded when readers hold it back.

Ids (`messages.id`, `events.id`) follow receive/append order and are never reused, even after
pruning (AUTOINCREMENT).
"""

from __future__ import annotations

import base64
import contextlib
import json
import math
import os
import sqlite3
import stat
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Self

from pydantic import ValidationError

from .engine.context import BedContext
from .engine.strictjson import NotJson, validate
from .errors import UserError
from .logfile import BadLine, LogRecord

SCHEMA_VERSION = 3  # the last of MIGRATIONS
APPLICATION_ID = 0x48774A31  # "HwJ1": marks an SQLite file as a Hourwatch journal
SQLITE_HEADER = b"SQLite format 3\x00"
DAY_S = 86400.0
BUSY_TIMEOUT_MS = 5000  # a writer waits this long for another writer (e.g. a prune batch)
DELIVERABLE = ("alarm", "advice")  # event kinds the service must get confirmed by the broker
# A payload that is not UTF-8 cannot be a log-format string as it is: it becomes this marker
# and the bytes in base64. U+FFFE is a Unicode noncharacter, so no meter text starts with it.
BINARY_MARKER = "\ufffebase64:"
MAX_TOPIC = 512  # the JSON Lines log format's limit (daemon/logfile.py)
# A reset WAL file is cut back to this size; a WAL bigger than this has not been reset since
# it grew, so it is also the size past which a stuck checkpoint is forced (see `checkpoint`).
WAL_LIMIT_BYTES = 64 * 1024 * 1024
CHECKPOINT_EVERY_S = 1.0  # `checkpoint()` does its work at most this often by default
CHECKPOINT_STUCK_CALLS = 10  # incomplete PASSIVE checkpoints in a row before forcing one
FORCE_BUSY_MS = 200  # a forced checkpoint waits this long for readers, then gives up
CHECKPOINT_MODES = ("PASSIVE", "FULL", "RESTART", "TRUNCATE")

_V1 = (
    """CREATE TABLE messages (
        id INTEGER PRIMARY KEY AUTOINCREMENT,  -- receive order
        recv_time REAL NOT NULL,               -- epoch seconds UTC, the service's clock
        topic TEXT NOT NULL,
        payload BLOB NOT NULL,                 -- the bytes as received
        qos INTEGER NOT NULL)""",
    "CREATE INDEX messages_time ON messages (recv_time)",
    # Bed contexts are few: this finds the device binding in force before an export's range.
    "CREATE INDEX messages_context ON messages (id) WHERE topic GLOB '*/context'",
    """CREATE TABLE events (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        time REAL NOT NULL,                    -- the event's own (engine) time
        kind TEXT NOT NULL,
        bed TEXT,
        alarm_id TEXT,
        body TEXT NOT NULL,                    -- JSON object
        delivered_at REAL)                     -- broker confirmed (PUBACK) at this time""",
    "CREATE INDEX events_time ON events (time)",
    "CREATE INDEX events_bed_time ON events (bed, time)",
    """CREATE INDEX events_undelivered ON events (id)
        WHERE delivered_at IS NULL AND kind IN ('alarm', 'advice')""",
)
# The delivery outbox (daemon/notify/store.py), which version 1 journals got on the
# notifier's first start: IF NOT EXISTS, so those migrate as they are.
OUTBOX_TABLES = (
    """CREATE TABLE IF NOT EXISTS deliveries (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        event_id INTEGER NOT NULL,             -- the journaled event this page carries
        alarm_id TEXT NOT NULL,
        state TEXT NOT NULL,
        tier INTEGER NOT NULL,
        reason TEXT NOT NULL,
        event_time REAL NOT NULL,              -- the event's engine time
        channel TEXT NOT NULL,
        recipient TEXT NOT NULL,               -- an address of that channel
        role TEXT NOT NULL,
        status TEXT NOT NULL,                  -- pending, sending, confirmed, cancelled, expired
        attempts INTEGER NOT NULL DEFAULT 0,
        created REAL NOT NULL,                 -- service clock when queued
        next_at REAL NOT NULL,                 -- next attempt not before
        sent_at REAL,                          -- latest attempt began
        done_at REAL,                          -- confirmed, cancelled or expired at
        answer TEXT,                           -- what the channel last answered
        UNIQUE (alarm_id, state, tier, reason, event_time, channel, recipient))""",
    """CREATE INDEX IF NOT EXISTS deliveries_due ON deliveries (channel, next_at)
        WHERE status = 'pending'""",
    "CREATE INDEX IF NOT EXISTS deliveries_alarm ON deliveries (alarm_id)",
    """CREATE TABLE IF NOT EXISTS notify_cursor (
        one INTEGER PRIMARY KEY CHECK (one = 1),
        event_id INTEGER NOT NULL)             -- events up to here have their deliveries""",
    """CREATE TABLE IF NOT EXISTS ack_links (
        token_id TEXT PRIMARY KEY,             -- one acknowledgement link, used once
        alarm_id TEXT NOT NULL,
        recipient TEXT NOT NULL,
        role TEXT NOT NULL,
        used_at REAL NOT NULL)""",
    "CREATE INDEX IF NOT EXISTS events_notify_alarm ON events (id) WHERE kind = 'notify_alarm'",
)
# Engine snapshots (daemon/engine/snapshot.py): a restart loads the newest and feeds only
# the messages after `message_id`; the last few are kept (see save_snapshot).
SNAPSHOT_TABLES = (
    """CREATE TABLE IF NOT EXISTS snapshots (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        taken_at REAL NOT NULL,                -- the engine time of the state
        message_id INTEGER NOT NULL,           -- messages up to this id were fed to it
        body BLOB NOT NULL)                    -- snapshot.encode's bytes""",
)
SNAPSHOTS_KEPT = 3
# (version, what it does, statements): applied in order, each in one transaction with
# its user_version, so a crash leaves a journal at one version or the next.
MIGRATIONS: tuple[tuple[int, str, tuple[str, ...]], ...] = (
    (1, "messages and events", _V1),
    (2, "delivery outbox", OUTBOX_TABLES),
    (3, "engine snapshots", SNAPSHOT_TABLES),
)


@dataclass(frozen=True)
class StoredMessage:
    id: int
    recv_time: float
    topic: str
    payload: bytes
    qos: int


@dataclass(frozen=True)
class Checkpoint:
    """What one `PRAGMA wal_checkpoint` did (frame counts as SQLite reports them)."""

    mode: str
    busy: bool  # a FULL/RESTART/TRUNCATE checkpoint could not finish (readers or a writer)
    wal_frames: int  # frames in the WAL
    checkpointed: int  # of these, copied into the database file
    forced: bool = False  # the fallback after PASSIVE checkpoints kept falling short

    @property
    def complete(self) -> bool:
        return not self.busy and self.checkpointed == self.wal_frames


@dataclass(frozen=True)
class StoredEvent:
    id: int
    time: float
    kind: str
    bed: str | None
    alarm_id: str | None
    body: dict[str, object]
    delivered_at: float | None


@dataclass(frozen=True)
class StoredSnapshot:
    id: int
    taken_at: float  # engine time
    message_id: int  # messages up to this id are in it
    body: bytes


class BedFilter:
    """Which journaled messages belong to one bed, decided in receive order.

    Messages carry no bed, so a meter message is kept while its device is bound to the bed,
    following bed contexts the way the engine does: a bed's context binds its `device_ids`
    and releases the ones it no longer lists; another bed's context claiming a device takes
    it away. A device is matched when its id is a whole level of the topic. Kept too: the
    bed's own topics `{prefix}/beds/{bed}/...` and acknowledgements of the bed's alarms
    (alarm ids begin with "{bed}/").

    Limit: only contexts seen in the journal count. If a device moves to another bed
    mid-range, its later messages go with the other bed, but a replay of this bed's export
    still has the device bound (the other bed's context is not in it), so the bed's meter
    looks silent from then on; a context whose payload is invalid binds nothing, as live.
    """

    def __init__(self, bed: str, prefix: str = "hourwatch") -> None:
        root = prefix.rstrip("/")
        self.bed = bed
        self._beds = root + "/beds/"
        self._own = f"{self._beds}{bed}/"
        self._ack = root + "/ack"
        self._owner: dict[str, str] = {}  # device id -> bed it is bound to
        self._mine: frozenset[str] = frozenset()

    def see(self, topic: str, payload: bytes) -> None:
        """Follow a bed context without deciding on it (contexts before the range)."""
        if not topic.startswith(self._beds):
            return
        rest = topic[len(self._beds) :].split("/")
        if len(rest) != 2 or not rest[0] or rest[1] != "context":
            return
        try:
            ctx = validate(BedContext, payload)  # as strictly as the engine reads it
        except (ValidationError, NotJson):
            return  # the engine ignores it too
        bed = rest[0]
        # a meter another bed holds moves only when the context says so (`replaces`)
        wanted = {d for d in ctx.device_ids if self._owner.get(d, bed) == bed or d in ctx.replaces}
        for dev, owner in list(self._owner.items()):
            if owner == bed and dev not in wanted:
                del self._owner[dev]
        for dev in wanted:
            self._owner[dev] = bed
        self._mine = frozenset(d for d, b in self._owner.items() if b == self.bed)

    def keep(self, topic: str, payload: bytes) -> bool:
        if topic.startswith(self._beds):
            self.see(topic, payload)
            return topic.startswith(self._own)
        if topic == self._ack or topic.startswith(self._ack + "/"):  # shared or per user
            return self._my_ack(payload)
        mine = self._mine
        return bool(mine) and any(level in mine for level in topic.split("/"))

    def _my_ack(self, payload: bytes) -> bool:
        try:
            obj = json.loads(payload)
        except (ValueError, RecursionError):
            return False
        alarm = obj.get("alarm_id") if isinstance(obj, dict) else None
        return isinstance(alarm, str) and alarm.startswith(self.bed + "/")


class SqliteJournal:
    """The service's journal file (created with its schema when missing or empty)."""

    def __init__(self, path: Path, *, retention_days: float = 30.0, max_bytes: int = 0) -> None:
        if not retention_days > 0:
            raise UserError(f"journal retention must be positive, got {retention_days} days")
        self.path = path
        self.retention_s = retention_days * DAY_S
        self._wal = path.with_name(path.name + "-wal")
        self._next_checkpoint = -math.inf  # monotonic time
        self._stuck = 0  # incomplete checkpoints in a row
        _check_file(path, allow_missing=True)
        try:
            db = sqlite3.connect(
                str(path), isolation_level=None, check_same_thread=False, timeout=5.0
            )
        except sqlite3.Error as exc:
            raise UserError(f"{path}: cannot open journal: {exc}") from None
        try:
            db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            _init_schema(db, path)  # the first read: a file that is not SQLite fails here
            mode = db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise UserError(f"{path}: journal needs WAL mode; this file system gave {mode}")
            db.execute("PRAGMA synchronous = FULL")  # fsync the WAL at every commit
            db.execute(f"PRAGMA journal_size_limit = {WAL_LIMIT_BYTES}")  # a reset WAL shrinks
            db.execute("PRAGMA wal_autocheckpoint = 0")  # no checkpoint inside a commit
        except sqlite3.Error as exc:
            db.close()
            raise _db_error(path, exc, "not a usable journal") from None
        except UserError:
            db.close()
            raise
        self._db = db
        self.limit(max_bytes)

    def limit(self, max_bytes: int) -> None:
        """Cap the database file at about `max_bytes` (0: no cap but the disk's). Past it
        an append fails with SQLITE_FULL, as on a full disk (see `is_full`); rows freed by
        pruning are reused. A cap below the present size holds the file where it is."""
        page = int(self._db.execute("PRAGMA page_size").fetchone()[0])
        pages = max_bytes // page if max_bytes > 0 else 0xFFFFFFFE
        self._db.execute(f"PRAGMA max_page_count = {max(1, pages)}")

    # --- writing ---------------------------------------------------------------
    def append_messages(self, rows: Sequence[tuple[float, str, bytes, int]]) -> list[int]:
        """(recv_time, topic, payload, qos) rows in one transaction, durable on return."""
        return self._insert(
            "INSERT INTO messages (recv_time, topic, payload, qos) VALUES (?, ?, ?, ?)", rows
        )

    def append_events(
        self, rows: Sequence[tuple[float, str, str | None, str | None, dict[str, object]]]
    ) -> list[int]:
        """(time, kind, bed, alarm_id, body) rows in one transaction, durable on return.

        A body must be JSON-serialisable (TypeError before anything is written)."""
        encoded = [(t, kind, bed, alarm, json.dumps(body)) for t, kind, bed, alarm, body in rows]
        return self._insert(
            "INSERT INTO events (time, kind, bed, alarm_id, body) VALUES (?, ?, ?, ?, ?)", encoded
        )

    def _insert(self, sql: str, rows: Sequence[tuple[Any, ...]]) -> list[int]:
        if not rows:
            return []
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            db.executemany(sql, rows)
            last = db.execute("SELECT last_insert_rowid()").fetchone()[0]
            db.execute("COMMIT")
        except BaseException:
            _rollback(db)
            raise
        # one writer inside BEGIN IMMEDIATE and AUTOINCREMENT: the ids are consecutive
        return list(range(last - len(rows) + 1, last + 1))

    def mark_delivered(self, event_ids: Sequence[int], at: float) -> None:
        """The broker confirmed these events; the first confirmation time is kept."""
        if not event_ids:
            return
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            db.executemany(
                "UPDATE events SET delivered_at = ? WHERE id = ? AND delivered_at IS NULL",
                [(at, i) for i in event_ids],
            )
            db.execute("COMMIT")
        except BaseException:
            _rollback(db)
            raise

    def save_snapshot(self, taken_at: float, message_id: int, body: bytes,
                      keep: int = SNAPSHOTS_KEPT) -> int:  # fmt: skip
        """Store an engine snapshot and drop all but the newest `keep`, in one transaction."""
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            cur = db.execute(
                "INSERT INTO snapshots (taken_at, message_id, body) VALUES (?, ?, ?)",
                (taken_at, message_id, body),
            )
            db.execute("DELETE FROM snapshots WHERE id NOT IN "
                       "(SELECT id FROM snapshots ORDER BY id DESC LIMIT ?)", (keep,))  # fmt: skip
            db.execute("COMMIT")
        except BaseException:
            _rollback(db)
            raise
        return int(cur.lastrowid or 0)

    def snapshots(self) -> list[StoredSnapshot]:
        """The stored engine snapshots, newest first."""
        rows = self._db.execute(
            "SELECT id, taken_at, message_id, body FROM snapshots ORDER BY id DESC"
        ).fetchall()
        return [StoredSnapshot(i, t, m, bytes(b)) for i, t, m, b in rows]

    def prune(
        self, now: float, batch: int = 2000, *, pause_s: float = 0.002, max_batches: int = 0
    ) -> int:
        """Delete messages and events older than the retention, `batch` rows per transaction.

        Between batches the write lock is free for `pause_s`, so a writer on another
        connection gets in within about one batch; `max_batches` > 0 stops early, after at
        most that many batches per table (call again later). The limit is per table so that
        each call makes progress on both: a backlog of messages cannot starve the events.
        Undelivered alarms past the retention go too: they are no longer news.
        The file does not shrink; SQLite reuses the freed pages. Returns rows deleted.
        """
        cutoff = now - self.retention_s
        deleted = total = 0
        for table, col in (("messages", "recv_time"), ("events", "time")):
            batches = 0
            while True:
                if total and pause_s > 0:
                    time.sleep(pause_s)
                n = self._delete_batch(table, col, cutoff, batch)
                deleted += n
                batches += 1
                total += 1
                if n < batch or (max_batches and batches >= max_batches):
                    break
        return deleted

    def _delete_batch(self, table: str, col: str, cutoff: float, batch: int) -> int:
        db = self._db
        db.execute("BEGIN IMMEDIATE")
        try:
            cur = db.execute(
                f"DELETE FROM {table} WHERE id IN "
                f"(SELECT id FROM {table} WHERE {col} < ? ORDER BY {col} LIMIT ?)",
                (cutoff, batch),
            )
            db.execute("COMMIT")
        except BaseException:
            _rollback(db)
            raise
        return cur.rowcount

    # --- checkpoints --------------------------------------------------------------
    def checkpoint(
        self, mode: str = "PASSIVE", *, min_interval_s: float = CHECKPOINT_EVERY_S
    ) -> Checkpoint | None:
        """Copy the WAL into the database file; None if skipped (last one < min_interval_s ago).

        Call it between write batches, e.g. at every housekeeping step: the writer never
        checkpoints inside a commit (wal_autocheckpoint=0). PASSIVE waits for nobody, so it
        takes only the copying and one fsync of the database file, and it cannot finish past
        the snapshot of a reader that is still open (an export, another process's review).
        The WAL then keeps growing while such a reader lasts. Bound: after
        CHECKPOINT_STUCK_CALLS (10) incomplete checkpoints in a row, with the WAL file over
        WAL_LIMIT_BYTES (64 MiB), a TRUNCATE checkpoint waits up to FORCE_BUSY_MS (200 ms)
        for the readers and empties the WAL; if they are still there it gives up and tries
        again after another 10 calls (so at most 200 ms of waiting per ~10 s at 1 call/s).
        """
        if mode not in CHECKPOINT_MODES:
            raise ValueError(f"checkpoint mode must be one of {CHECKPOINT_MODES}, got {mode!r}")
        now = time.monotonic()
        if now < self._next_checkpoint:
            return None
        self._next_checkpoint = now + min_interval_s
        result = self._wal_checkpoint(mode)
        if result.complete:
            self._stuck = 0
            return result
        self._stuck += 1
        if self._stuck >= CHECKPOINT_STUCK_CALLS and self.wal_bytes() > WAL_LIMIT_BYTES:
            self._stuck = 0  # success or not: the next forced try is 10 calls away
            result = self._wal_checkpoint("TRUNCATE", busy_ms=FORCE_BUSY_MS)
        return result

    def _wal_checkpoint(self, mode: str, busy_ms: int | None = None) -> Checkpoint:
        db = self._db
        if busy_ms is not None:
            db.execute(f"PRAGMA busy_timeout = {busy_ms}")
        try:
            busy, frames, done = db.execute(f"PRAGMA wal_checkpoint({mode})").fetchone()
        finally:
            if busy_ms is not None:
                db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        return Checkpoint(mode, bool(busy), frames, done, forced=busy_ms is not None)

    def wal_bytes(self) -> int:
        """Size of the WAL file (0 if there is none); stat only, the file is not opened."""
        try:
            return self._wal.stat().st_size
        except OSError:
            return 0

    def size_bytes(self) -> int:
        """The database file plus its WAL (stat only)."""
        total = self.wal_bytes()
        with contextlib.suppress(OSError):
            total += self.path.stat().st_size
        return total

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- reading (the iterators open a read-only connection: a snapshot, no write lock) -
    def undelivered_events(self) -> list[StoredEvent]:
        """Alarm and advice events the broker has not confirmed, oldest first."""
        rows = self._db.execute(
            f"SELECT {_EVENT_COLS} FROM events "
            "WHERE delivered_at IS NULL AND kind IN ('alarm', 'advice') ORDER BY id"
        ).fetchall()
        return [_event(r) for r in rows]

    def messages_between(
        self, t0: float | None, t1: float | None, bed_topics: BedFilter | None = None
    ) -> Iterator[StoredMessage]:
        """Messages with t0 <= recv_time < t1 (None: unbounded) in id (= receive) order;
        with `bed_topics`, only those it keeps."""
        db = _open_reader(self.path)
        return _messages(db, t0, t1, bed_topics)

    def events_between(
        self, t0: float | None, t1: float | None, bed: str | None = None
    ) -> Iterator[StoredEvent]:
        """Events with t0 <= time < t1 (None: unbounded), of one bed if given, in id order."""
        db = _open_reader(self.path)
        return _events(db, t0, t1, bed)

    def alarm_event_keys(self, since: float) -> set[tuple[str, str, str, float]]:
        """(alarm_id, state, reason, time) of journaled alarm events with time >= since."""
        rows = self._db.execute(
            "SELECT alarm_id, body, time FROM events WHERE kind = 'alarm' AND time >= ?",
            (since,),
        )
        keys = set()
        for alarm_id, body, t in rows:
            obj = json.loads(body)
            aid = alarm_id if alarm_id is not None else obj.get("alarm_id")
            keys.add((str(aid), str(obj.get("state", "")), str(obj.get("reason", "")), t))
        return keys


_EVENT_COLS = "id, time, kind, bed, alarm_id, body, delivered_at"


def _rollback(db: sqlite3.Connection) -> None:
    """Undo a failed transaction. SQLite has already rolled back after some errors (a
    full disk: SQLITE_FULL), and a second ROLLBACK would hide the first error."""
    if db.in_transaction:
        db.execute("ROLLBACK")


def is_full(exc: BaseException) -> bool:
    """The journal's disk (or its size cap) is full: SQLite says SQLITE_FULL."""
    return (
        isinstance(exc, sqlite3.OperationalError)
        and getattr(exc, "sqlite_errorcode", None) == sqlite3.SQLITE_FULL
    )


def _event(r: tuple[Any, ...]) -> StoredEvent:
    return StoredEvent(r[0], r[1], r[2], r[3], r[4], json.loads(r[5]), r[6])


def _check_file(path: Path, *, allow_missing: bool) -> None:
    """Exists and is a regular file. Only stat: opening the file here would drop this
    process's locks on it (see the module docstring); SQLite itself tells what is inside."""
    try:
        st = path.stat()
    except FileNotFoundError:
        if allow_missing:
            return
        raise UserError(f"{path}: no such file") from None
    except OSError as exc:
        raise UserError(f"{path}: cannot read: {exc.strerror}") from None
    if not stat.S_ISREG(st.st_mode):
        raise UserError(f"{path}: not a file")


def _db_error(path: Path, exc: sqlite3.Error, what: str) -> UserError:
    if exc.sqlite_errorcode == sqlite3.SQLITE_NOTADB:
        return UserError(f"{path}: not a Hourwatch journal (not an SQLite database)")
    return UserError(f"{path}: {what}: {exc}")


def _identify(db: sqlite3.Connection, path: Path) -> bool:
    """True if a Hourwatch journal we can read; False if a new, empty database."""
    app = db.execute("PRAGMA application_id").fetchone()[0]
    version = db.execute("PRAGMA user_version").fetchone()[0]
    if app == APPLICATION_ID:
        if version > SCHEMA_VERSION:
            raise UserError(
                f"{path}: journal schema {version} is newer than this Hourwatch reads "
                f"({SCHEMA_VERSION}); use a newer Hourwatch"
            )
        return bool(version > 0)
    empty = db.execute("SELECT count(*) FROM sqlite_master").fetchone()[0] == 0
    if app == 0 and version == 0 and empty:
        return False
    raise UserError(f"{path}: not a Hourwatch journal (an SQLite database of something else)")


def _version(db: sqlite3.Connection) -> int:
    return int(db.execute("PRAGMA user_version").fetchone()[0])


def _init_schema(db: sqlite3.Connection, path: Path) -> None:
    """Create the journal, or migrate it to SCHEMA_VERSION, one version per transaction."""
    if _identify(db, path) and _version(db) == SCHEMA_VERSION:
        return
    for version, _what, statements in MIGRATIONS:
        db.execute("BEGIN IMMEDIATE")  # another process may be migrating at the same moment
        try:
            current = _version(db) if _identify(db, path) else 0
            if current < version:
                for sql in statements:
                    db.execute(sql)
                if version == 1:
                    db.execute(f"PRAGMA application_id = {APPLICATION_ID}")
                db.execute(f"PRAGMA user_version = {version}")
            db.execute("COMMIT")
        except BaseException:
            _rollback(db)
            raise


def _open_reader(path: Path) -> sqlite3.Connection:
    _check_file(path, allow_missing=False)
    uri = path.resolve().as_uri() + "?mode=ro"
    try:
        db = sqlite3.connect(uri, uri=True, isolation_level=None, check_same_thread=False)
    except sqlite3.Error as exc:
        raise UserError(f"{path}: cannot read journal: {exc}") from None
    try:
        db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        if not _identify(db, path):  # the first read: a file that is not SQLite fails here
            raise UserError(f"{path}: not a Hourwatch journal (an empty SQLite database)")
    except sqlite3.Error as exc:
        db.close()
        raise _db_error(path, exc, "cannot read journal") from None
    except UserError:
        db.close()
        raise
    return db


def _range(col: str, t0: float | None, t1: float | None) -> tuple[str, list[Any]]:
    if t0 is None and t1 is None:
        return "", []
    # both bounds always, so the planner takes the time index even for an open range
    lo = -math.inf if t0 is None else t0
    hi = math.inf if t1 is None else t1
    return f" WHERE {col} >= ? AND {col} < ?", [lo, hi]


def _messages(
    db: sqlite3.Connection, t0: float | None, t1: float | None, flt: BedFilter | None
) -> Iterator[StoredMessage]:
    try:
        db.execute("BEGIN")  # one snapshot for the binding before t0 and the range itself
        if flt is not None and t0 is not None:
            for topic, payload in db.execute(
                "SELECT topic, payload FROM messages "
                "WHERE topic GLOB '*/context' AND recv_time < ? ORDER BY id",
                (t0,),
            ):
                flt.see(topic, payload)
        where, params = _range("recv_time", t0, t1)
        rows = db.execute(
            f"SELECT id, recv_time, topic, payload, qos FROM messages{where} ORDER BY id", params
        )
        for mid, t, topic, payload, qos in rows:
            if flt is None or flt.keep(topic, payload):
                yield StoredMessage(mid, t, topic, payload, qos)
    finally:
        db.close()


def _events(
    db: sqlite3.Connection, t0: float | None, t1: float | None, bed: str | None
) -> Iterator[StoredEvent]:
    try:
        where, params = _range("time", t0, t1)
        if bed is not None:
            where = (where + " AND" if where else " WHERE") + " bed = ?"
            params.append(bed)
        for r in db.execute(f"SELECT {_EVENT_COLS} FROM events{where} ORDER BY id", params):
            yield _event(r)
    finally:
        db.close()


def _application_id(path: Path) -> int | None:
    """The header's application id, read by a read-only SQLite connection (never open(),
    so this is safe beside a live writer in the same process); None for a missing or empty
    file; sqlite3.DatabaseError (SQLITE_NOTADB) for a file that is not SQLite."""
    try:
        st = path.stat()
    except OSError:
        return None
    if not stat.S_ISREG(st.st_mode) or st.st_size == 0:
        return None  # an empty file would read as an empty database
    db = sqlite3.connect(path.resolve().as_uri() + "?mode=ro", uri=True)
    try:
        return int(db.execute("PRAGMA application_id").fetchone()[0])
    finally:
        db.close()


def is_journal(path: Path) -> bool:
    """An existing Hourwatch journal (of any schema version)? Never raises, never creates."""
    try:
        return _application_id(path) == APPLICATION_ID
    except (OSError, sqlite3.Error):
        return False


def is_sqlite(path: Path) -> bool:
    """A non-empty SQLite file (a journal or another database), as SQLite itself reads it.
    False for anything else, e.g. a JSON Lines log, or a file this process may not read;
    True when SQLite knows the file but cannot read it just now (e.g. a WAL database in a
    read-only folder): opening it as a journal then says why."""
    if not os.access(path, os.R_OK):
        return False
    try:
        return _application_id(path) is not None
    except sqlite3.Error as exc:
        return exc.sqlite_errorcode != sqlite3.SQLITE_NOTADB
    except OSError:
        return False


# --- the journal as log records ----------------------------------------------------------
def _finite(text: str) -> float:
    f = float(text)
    if not math.isfinite(f):  # 1e999: the log format (strict JSON) cannot hold it
        raise ValueError(text)
    return f


def _no_constant(text: str) -> float:
    raise ValueError(text)  # NaN / Infinity: keep such a payload as text


def log_payload(raw: bytes) -> dict[str, Any] | str:
    """A journaled payload in the JSON Lines log format: a JSON object when the bytes are
    one that strict JSON can write back unchanged, else the UTF-8 text, else (not UTF-8)
    BINARY_MARKER + base64 of the bytes.

    Text that is not kept as an object reaches the engine as text, which parses it as it
    parses bytes live, so a replay decides as the service did. The one difference: a
    non-UTF-8 payload, rejected live as bad encoding, is rejected in a replay as a bad
    payload (the marker is never a valid reading).
    """
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        return BINARY_MARKER + base64.b64encode(raw).decode("ascii")
    if not text.lstrip().startswith("{"):
        return text
    try:
        obj = json.loads(text, parse_float=_finite, parse_constant=_no_constant)
    except (ValueError, RecursionError):
        return text
    if not isinstance(obj, dict):
        return text
    if "\\u" in text:  # an escaped lone surrogate cannot be written back as strict JSON
        try:
            json.dumps(obj, ensure_ascii=False).encode("utf-8")
        except UnicodeEncodeError:
            return text
    return obj


def journal_items(
    path: Path,
    t0: float | None = None,
    t1: float | None = None,
    bed: str | None = None,
    *,
    prefix: str = "hourwatch",
) -> Iterator[tuple[int, LogRecord] | BadLine]:
    """As `journal_records`, plus a BadLine (line_no = message id) for each message the
    log format cannot hold (an empty topic or one over 512 characters). Opens the file at
    once: a missing file or one that is not a journal raises UserError here."""
    db = _open_reader(path)
    flt = BedFilter(bed, prefix) if bed is not None else None
    return _items(_messages(db, t0, t1, flt))


def _items(messages: Iterator[StoredMessage]) -> Iterator[tuple[int, LogRecord] | BadLine]:
    for m in messages:
        if not 0 < len(m.topic) <= MAX_TOPIC:
            yield BadLine(m.id, f"topic of {len(m.topic)} characters (log format: 1..512)")
            continue
        # model_construct: every field is built to the model's types right here
        rec = LogRecord.model_construct(
            time=datetime.fromtimestamp(m.recv_time, UTC),  # microseconds, as a log holds
            topic=m.topic,
            payload=log_payload(m.payload),
        )
        yield m.id, rec


def journal_records(
    path: Path,
    t0: float | None = None,
    t1: float | None = None,
    bed: str | None = None,
    *,
    prefix: str = "hourwatch",
) -> Iterator[tuple[int, LogRecord]]:
    """Journaled messages with t0 <= receive time < t1 as log records, in receive order.

    The int is the message id. With `bed`, only that bed's messages (see BedFilter). The
    payload follows `log_payload`; the time is the receive time to the microsecond.
    Messages the log format cannot hold are skipped (`journal_items` reports them)."""
    items = journal_items(path, t0, t1, bed, prefix=prefix)
    return (item for item in items if not isinstance(item, BadLine))
