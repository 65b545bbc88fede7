"""The PostgreSQL journal: the same semantics as the SQLite journal (daemon/journal.py),
in a database a hospital already runs, backs up and replicates.

- Durability: every write is one transaction; a commit returns once PostgreSQL has flushed
  its WAL (synchronous_commit, the server's default, must stay on).
- Schema: versioned migrations (`MIGRATIONS`), applied at open in one transaction under an
  advisory lock, recorded in `hourwatch_schema`. A database of something else, or of a
  newer Hourwatch, is refused; readers (replay, explain, export) never migrate.
- Ids follow append order: only the active instance writes messages (one worker thread),
  and event inserts take a transaction lock (`EVENTS_LOCK`), so an event id is never
  committed after a higher one: the notifier's cursor (daemon/notify/store_pg.py) can
  follow events by id as it does in SQLite.
- Fencing: opened with a `FenceToken`, every write transaction first reads the group's
  lease row FOR SHARE and refuses (`Fenced`, nothing written) unless it still carries the
  token. A takeover's UPDATE of that row waits for a write in progress and a write after
  it sees the new token, so a paused former active writes nothing once it is replaced.
  A session left idle inside a transaction (a process paused mid-write) is ended by the
  server after IDLE_IN_TX_MS, so it cannot hold that row lock against a takeover.
- Pruning deletes in small batches; MVCC means ingest never waits for it.

Threads: a connection pool; any thread may call any method.
"""

from __future__ import annotations

import functools
import json
import math
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any, Self

import psycopg
from psycopg_pool import ConnectionPool

from .errors import UserError
from .journal import (
    DAY_S,
    SNAPSHOTS_KEPT,
    BedFilter,
    Checkpoint,
    StoredEvent,
    StoredMessage,
    StoredSnapshot,
)
from .journal_api import Fenced, FenceToken, PgUrl, pg_password
from .logfile import BadLine, LogRecord

MIGRATION_LOCK = 0x48774A31  # advisory lock key while migrating ("HwJ1")
EVENTS_LOCK = 0x48774A32  # event inserts one at a time: ids commit in order
IDLE_IN_TX_MS = 5000
CONNECT_TIMEOUT_S = 5
OUR_TABLES = ("messages", "events", "deliveries", "notify_cursor", "ack_links", "annotation",
              "ha_lease", "ha_takeovers", "snapshots")  # fmt: skip

_V1 = (
    """CREATE TABLE messages (
        id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,  -- receive order
        recv_time DOUBLE PRECISION NOT NULL,   -- epoch seconds UTC, the service's clock
        topic TEXT NOT NULL,
        payload BYTEA NOT NULL,                -- the bytes as received
        qos SMALLINT NOT NULL,
        lease_token BIGINT)                    -- written under this lease (NULL: none)""",
    "CREATE INDEX messages_time ON messages (recv_time)",
    "CREATE INDEX messages_context ON messages (id) WHERE topic LIKE '%/context'",
    """CREATE TABLE events (
        id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        time DOUBLE PRECISION NOT NULL,        -- the event's own (engine) time
        kind TEXT NOT NULL,
        bed TEXT,
        alarm_id TEXT,
        body TEXT NOT NULL,                    -- JSON object, as the SQLite journal keeps it
        delivered_at DOUBLE PRECISION,         -- broker confirmed (PUBACK) at this time
        lease_token BIGINT)""",
    "CREATE INDEX events_time ON events (time)",
    "CREATE INDEX events_bed_time ON events (bed, time)",
    """CREATE INDEX events_undelivered ON events (id)
        WHERE delivered_at IS NULL AND kind IN ('alarm', 'advice')""",
)
_V2 = (
    """CREATE TABLE deliveries (
        id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        event_id BIGINT NOT NULL,
        alarm_id TEXT NOT NULL,
        state TEXT NOT NULL,
        tier INTEGER NOT NULL,
        reason TEXT NOT NULL,
        event_time DOUBLE PRECISION NOT NULL,
        channel TEXT NOT NULL,
        recipient TEXT NOT NULL,
        role TEXT NOT NULL,
        status TEXT NOT NULL,
        attempts INTEGER NOT NULL DEFAULT 0,
        created DOUBLE PRECISION NOT NULL,
        next_at DOUBLE PRECISION NOT NULL,
        sent_at DOUBLE PRECISION,
        done_at DOUBLE PRECISION,
        answer TEXT,
        UNIQUE (alarm_id, state, tier, reason, event_time, channel, recipient))""",
    "CREATE INDEX deliveries_due ON deliveries (channel, next_at) WHERE status = 'pending'",
    "CREATE INDEX deliveries_alarm ON deliveries (alarm_id)",
    """CREATE TABLE notify_cursor (
        one INTEGER PRIMARY KEY CHECK (one = 1),
        event_id BIGINT NOT NULL)""",
    """CREATE TABLE ack_links (
        token_id TEXT PRIMARY KEY,
        alarm_id TEXT NOT NULL,
        recipient TEXT NOT NULL,
        role TEXT NOT NULL,
        used_at DOUBLE PRECISION NOT NULL)""",
    "CREATE INDEX events_notify_alarm ON events (id) WHERE kind = 'notify_alarm'",
)
_V3 = (  # reviewers' verdicts (daemon/review/verdicts.py), beside the journal they judge
    """CREATE TABLE annotation (
        alarm_id     TEXT PRIMARY KEY,
        bed          TEXT NOT NULL,
        rule         TEXT NOT NULL,
        span_start   DOUBLE PRECISION NOT NULL,
        span_end     DOUBLE PRECISION,
        actionable   BOOLEAN NOT NULL,
        note         TEXT,
        annotated_at TEXT NOT NULL)""",
)
_V4 = (  # the active/standby lease (daemon/ha.py)
    """CREATE TABLE ha_lease (
        grp TEXT PRIMARY KEY,                  -- one group per client id and journal
        token BIGINT NOT NULL,                 -- the fencing token: +1 at every takeover
        holder TEXT NOT NULL,                  -- instance name (host:pid by default)
        holder_pid INTEGER NOT NULL,           -- the holder's lease connection ...
        holder_since TIMESTAMPTZ NOT NULL,     -- ... and its start (a pid can be reused)
        acquired_at TIMESTAMPTZ NOT NULL,
        renewed_at TIMESTAMPTZ NOT NULL,
        expires_at TIMESTAMPTZ NOT NULL)""",
    """CREATE TABLE ha_takeovers (
        id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        grp TEXT NOT NULL,
        token BIGINT NOT NULL,
        holder TEXT NOT NULL,
        previous TEXT,
        why TEXT NOT NULL,                     -- first, expired, connection_gone
        at TIMESTAMPTZ NOT NULL DEFAULT clock_timestamp())""",
)
_V5 = (  # engine snapshots (daemon/engine/snapshot.py; as the SQLite journal's)
    """CREATE TABLE snapshots (
        id BIGINT GENERATED ALWAYS AS IDENTITY PRIMARY KEY,
        taken_at DOUBLE PRECISION NOT NULL,    -- the engine time of the state
        message_id BIGINT NOT NULL,            -- messages up to this id were fed to it
        body BYTEA NOT NULL,
        lease_token BIGINT)""",
)
MIGRATIONS: tuple[tuple[int, str, tuple[str, ...]], ...] = (
    (1, "messages and events", _V1),
    (2, "delivery outbox", _V2),
    (3, "annotations", _V3),
    (4, "active/standby lease", _V4),
    (5, "engine snapshots", _V5),
)
SCHEMA_VERSION = MIGRATIONS[-1][0]


def connect(url: PgUrl, *, autocommit: bool = True) -> psycopg.Connection[Any]:
    """One connection (password from the environment; see journal_api.pg_password)."""
    try:
        return psycopg.connect(url.url, autocommit=autocommit, password=pg_password(),
                               connect_timeout=CONNECT_TIMEOUT_S)  # fmt: skip
    except psycopg.Error as exc:
        raise UserError(f"{url}: cannot connect: {_first_line(exc)}") from None


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def schema_version(conn: psycopg.Connection[Any], url: PgUrl) -> int:
    """0 for an empty database; the journal's version; UserError for anything else."""
    found = conn.execute("SELECT to_regclass('hourwatch_schema') IS NOT NULL").fetchone()
    if found is None or not found[0]:
        ours = conn.execute(
            "SELECT count(*) FROM pg_tables WHERE schemaname = current_schema() "
            "AND tablename = ANY(%s)", (list(OUR_TABLES),)).fetchone()  # fmt: skip
        if ours is not None and ours[0]:
            raise UserError(f"{url}: not a Hourwatch journal (tables without a schema version)")
        return 0
    row = conn.execute("SELECT max(version) FROM hourwatch_schema").fetchone()
    version = int(row[0]) if row is not None and row[0] is not None else 0
    if version > SCHEMA_VERSION:
        raise UserError(f"{url}: journal schema {version} is newer than this Hourwatch reads "
                        f"({SCHEMA_VERSION}); use a newer Hourwatch")  # fmt: skip
    return version


def migrate(conn: psycopg.Connection[Any], url: PgUrl) -> list[int]:
    """Bring the database to SCHEMA_VERSION; the versions applied now."""
    applied = []
    with conn.transaction():
        conn.execute("SELECT pg_advisory_xact_lock(%s)", (MIGRATION_LOCK,))
        current = schema_version(conn, url)
        if current == 0:
            conn.execute("""CREATE TABLE hourwatch_schema (
                version INTEGER PRIMARY KEY,
                name TEXT NOT NULL,
                applied_at TIMESTAMPTZ NOT NULL DEFAULT clock_timestamp())""")
        for version, name, statements in MIGRATIONS:
            if version <= current:
                continue
            for sql in statements:
                conn.execute(sql)
            conn.execute("INSERT INTO hourwatch_schema (version, name) VALUES (%s, %s)",
                         (version, name))  # fmt: skip
            applied.append(version)
    return applied


def check_fence(conn: psycopg.Connection[Any], fence: FenceToken | None) -> None:
    """Inside a write transaction: still the lease's holder? Locks the row until commit."""
    if fence is None:
        return
    row = conn.execute("SELECT token FROM ha_lease WHERE grp = %s FOR SHARE",
                       (fence.group,)).fetchone()  # fmt: skip
    if row is None or int(row[0]) != fence.token:
        now = None if row is None else int(row[0])
        raise Fenced(f"lease of group {fence.group!r} now has token {now}, "
                     f"this instance wrote under {fence.token}")  # fmt: skip


def make_pool(url: PgUrl, size: int, name: str) -> ConnectionPool[Any]:
    def configure(conn: psycopg.Connection[Any]) -> None:
        conn.execute(f"SET idle_in_transaction_session_timeout = {IDLE_IN_TX_MS}")

    pool: ConnectionPool[Any] = ConnectionPool(
        url.url, min_size=1, max_size=max(2, size), name=name, open=False, configure=configure,
        kwargs={"autocommit": True, "password": pg_password(),
                "connect_timeout": CONNECT_TIMEOUT_S},
    )  # fmt: skip
    try:
        pool.open(wait=True, timeout=CONNECT_TIMEOUT_S * 2)
    except Exception as exc:  # PoolTimeout: the server is not reachable or refuses us
        pool.close()
        raise UserError(f"{url}: cannot connect: {_first_line(exc)}") from None
    return pool


class PostgresJournal:
    """The service's journal in PostgreSQL (created or migrated at open)."""

    def __init__(self, url: PgUrl, *, retention_days: float = 30.0,
                 fence: FenceToken | None = None, pool_size: int = 4) -> None:  # fmt: skip
        if not retention_days > 0:
            raise UserError(f"journal retention must be positive, got {retention_days} days")
        self.url = url
        self.path = url  # where callers show a journal's place
        self.retention_s = retention_days * DAY_S
        self.fence = fence
        with connect(url) as conn:
            migrate(conn, url)
        self.pool = make_pool(url, pool_size, "hourwatch-journal")

    # --- writing ---------------------------------------------------------------
    def _write(self, fn: Callable[[psycopg.Connection[Any]], Any]) -> Any:
        with self.pool.connection() as conn, conn.transaction():
            check_fence(conn, self.fence)
            return fn(conn)

    def append_messages(self, rows: Sequence[tuple[float, str, bytes, int]]) -> list[int]:
        """(recv_time, topic, payload, qos) rows in one transaction, durable on return."""
        if not rows:
            return []
        cols = ([r[0] for r in rows], [r[1] for r in rows], [bytes(r[2]) for r in rows],
                [r[3] for r in rows])  # fmt: skip
        token = self.fence.token if self.fence else None

        def tx(conn: psycopg.Connection[Any]) -> list[int]:
            cur = conn.execute(
                "INSERT INTO messages (recv_time, topic, payload, qos, lease_token) "
                "SELECT t, tp, p, q, %s FROM unnest(%s::float8[], %s::text[], %s::bytea[], "
                "%s::int2[]) WITH ORDINALITY AS r(t, tp, p, q, n) ORDER BY n RETURNING id",
                (token, *cols))  # fmt: skip
            return sorted(int(r[0]) for r in cur.fetchall())

        out: list[int] = self._write(tx)
        return out

    def append_events(
        self, rows: Sequence[tuple[float, str, str | None, str | None, dict[str, object]]]
    ) -> list[int]:
        """(time, kind, bed, alarm_id, body) rows in one transaction, durable on return."""
        if not rows:
            return []
        bodies = [json.dumps(r[4]) for r in rows]  # TypeError before anything is written
        cols = ([r[0] for r in rows], [r[1] for r in rows], [r[2] for r in rows],
                [r[3] for r in rows], bodies)  # fmt: skip
        token = self.fence.token if self.fence else None

        def tx(conn: psycopg.Connection[Any]) -> list[int]:
            conn.execute("SELECT pg_advisory_xact_lock(%s)", (EVENTS_LOCK,))
            cur = conn.execute(
                "INSERT INTO events (time, kind, bed, alarm_id, body, lease_token) "
                "SELECT t, k, b, a, j, %s FROM unnest(%s::float8[], %s::text[], %s::text[], "
                "%s::text[], %s::text[]) WITH ORDINALITY AS r(t, k, b, a, j, n) ORDER BY n "
                "RETURNING id", (token, *cols))  # fmt: skip
            return sorted(int(r[0]) for r in cur.fetchall())

        out: list[int] = self._write(tx)
        return out

    def mark_delivered(self, event_ids: Sequence[int], at: float) -> None:
        if not event_ids:
            return
        self._write(lambda c: c.execute(
            "UPDATE events SET delivered_at = %s WHERE id = ANY(%s) AND delivered_at IS NULL",
            (at, list(event_ids))))  # fmt: skip

    def save_snapshot(self, taken_at: float, message_id: int, body: bytes,
                      keep: int = SNAPSHOTS_KEPT) -> int:  # fmt: skip
        """As SqliteJournal.save_snapshot (fenced: a replaced active stores none)."""
        token = self.fence.token if self.fence else None

        def tx(conn: psycopg.Connection[Any]) -> int:
            row = conn.execute(
                "INSERT INTO snapshots (taken_at, message_id, body, lease_token) "
                "VALUES (%s, %s, %s, %s) RETURNING id",
                (taken_at, message_id, body, token)).fetchone()  # fmt: skip
            conn.execute("DELETE FROM snapshots WHERE id NOT IN (SELECT id FROM snapshots "
                         "ORDER BY id DESC LIMIT %s)", (keep,))  # fmt: skip
            return int(row[0]) if row is not None else 0

        out: int = self._write(tx)
        return out

    def snapshots(self) -> list[StoredSnapshot]:
        with self.pool.connection() as conn:
            rows = conn.execute("SELECT id, taken_at, message_id, body FROM snapshots "
                                "ORDER BY id DESC").fetchall()  # fmt: skip
        return [StoredSnapshot(int(i), float(t), int(m), bytes(b)) for i, t, m, b in rows]

    def prune(self, now: float, batch: int = 2000, *, pause_s: float = 0.002,
              max_batches: int = 0) -> int:  # fmt: skip
        """As SqliteJournal.prune: rows older than the retention, `batch` per transaction."""
        cutoff = now - self.retention_s
        deleted = total = 0
        for table, col in (("messages", "recv_time"), ("events", "time")):
            batches = 0
            while True:
                if total and pause_s > 0:
                    time.sleep(pause_s)
                sql = (f"DELETE FROM {table} WHERE id IN (SELECT id FROM {table} "
                       f"WHERE {col} < %s ORDER BY {col} LIMIT %s)")  # fmt: skip
                n = int(self._write(functools.partial(_delete, sql=sql, args=(cutoff, batch))))
                deleted += n
                batches += 1
                total += 1
                if n < batch or (max_batches and batches >= max_batches):
                    break
        return deleted

    def checkpoint(self, mode: str = "PASSIVE", *,
                   min_interval_s: float = 1.0) -> Checkpoint | None:  # fmt: skip
        return None  # the server checkpoints its own WAL

    def size_bytes(self) -> int:
        with self.pool.connection() as conn:
            row = conn.execute("SELECT pg_database_size(current_database())").fetchone()
        return int(row[0]) if row is not None else 0

    def close(self) -> None:
        self.pool.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- reading -------------------------------------------------------------------
    def undelivered_events(self) -> list[StoredEvent]:
        with self.pool.connection() as conn:
            rows = conn.execute(
                f"SELECT {_EVENT_COLS} FROM events WHERE delivered_at IS NULL "
                "AND kind IN ('alarm', 'advice') ORDER BY id").fetchall()  # fmt: skip
        return [_event(r) for r in rows]

    def messages_between(
        self, t0: float | None, t1: float | None, bed_topics: BedFilter | None = None
    ) -> Iterator[StoredMessage]:
        return _messages(self.pool.getconn(), self.pool.putconn, t0, t1, bed_topics)

    def events_between(self, t0: float | None, t1: float | None,
                       bed: str | None = None) -> Iterator[StoredEvent]:  # fmt: skip
        return _events(self.pool.getconn(), self.pool.putconn, t0, t1, bed)

    def alarm_event_keys(self, since: float) -> set[tuple[str, str, str, float]]:
        with self.pool.connection() as conn:
            rows = conn.execute("SELECT alarm_id, body, time FROM events WHERE kind = 'alarm' "
                                "AND time >= %s", (since,)).fetchall()  # fmt: skip
        keys = set()
        for alarm_id, body, t in rows:
            obj = json.loads(body)
            aid = alarm_id if alarm_id is not None else obj.get("alarm_id")
            keys.add((str(aid), str(obj.get("state", "")), str(obj.get("reason", "")), float(t)))
        return keys


def _delete(conn: psycopg.Connection[Any], sql: str, args: tuple[float, int]) -> int:
    return conn.execute(sql, args).rowcount


_EVENT_COLS = "id, time, kind, bed, alarm_id, body, delivered_at"
Release = Callable[[psycopg.Connection[Any]], None]


def _event(r: Sequence[Any]) -> StoredEvent:
    return StoredEvent(int(r[0]), float(r[1]), r[2], r[3], r[4], json.loads(r[5]),
                       None if r[6] is None else float(r[6]))  # fmt: skip


def _range(col: str, t0: float | None, t1: float | None) -> tuple[str, list[Any]]:
    if t0 is None and t1 is None:
        return "", []
    lo = -math.inf if t0 is None else t0
    hi = math.inf if t1 is None else t1
    return f" WHERE {col} >= %s AND {col} < %s", [lo, hi]


def _snapshot(conn: psycopg.Connection[Any]) -> None:
    """One consistent, read-only view for the whole read (as SQLite's read transaction)."""
    conn.execute("BEGIN ISOLATION LEVEL REPEATABLE READ READ ONLY")


def _end(conn: psycopg.Connection[Any], release: Release) -> None:
    try:
        if not conn.closed and conn.info.transaction_status != psycopg.pq.TransactionStatus.IDLE:
            conn.execute("ROLLBACK")
    finally:
        release(conn)


def _messages(conn: psycopg.Connection[Any], release: Release, t0: float | None,
              t1: float | None, flt: BedFilter | None) -> Iterator[StoredMessage]:  # fmt: skip
    try:
        _snapshot(conn)
        if flt is not None and t0 is not None:
            for topic, payload in conn.execute(
                "SELECT topic, payload FROM messages WHERE topic LIKE '%%/context' "
                "AND recv_time < %s ORDER BY id", (t0,)):  # fmt: skip
                flt.see(topic, bytes(payload))
        where, params = _range("recv_time", t0, t1)
        with conn.cursor(name="hourwatch_messages") as cur:  # server side: streams
            cur.itersize = 2000
            cur.execute(f"SELECT id, recv_time, topic, payload, qos FROM messages{where} "
                        "ORDER BY id", params)  # fmt: skip
            for mid, t, topic, payload, qos in cur:
                data = bytes(payload)
                if flt is None or flt.keep(topic, data):
                    yield StoredMessage(int(mid), float(t), topic, data, int(qos))
    finally:
        _end(conn, release)


def _events(conn: psycopg.Connection[Any], release: Release, t0: float | None,
            t1: float | None, bed: str | None) -> Iterator[StoredEvent]:  # fmt: skip
    try:
        _snapshot(conn)
        where, params = _range("time", t0, t1)
        if bed is not None:
            where = (where + " AND" if where else " WHERE") + " bed = %s"
            params.append(bed)
        with conn.cursor(name="hourwatch_events") as cur:
            cur.itersize = 2000
            cur.execute(f"SELECT {_EVENT_COLS} FROM events{where} ORDER BY id", params)
            for r in cur:
                yield _event(r)
    finally:
        _end(conn, release)


def _close(conn: psycopg.Connection[Any]) -> None:
    conn.close()


def open_reader(url: PgUrl) -> psycopg.Connection[Any]:
    """A connection for review commands: never migrates, refuses what is not a journal."""
    conn = connect(url)
    try:
        if schema_version(conn, url) == 0:
            raise UserError(f"{url}: not a Hourwatch journal (an empty database)")
    except BaseException:
        conn.close()
        raise
    return conn


def journal_items(
    url: PgUrl, t0: float | None = None, t1: float | None = None, bed: str | None = None,
    *, prefix: str = "hourwatch",
) -> Iterator[tuple[int, LogRecord] | BadLine]:  # fmt: skip
    """As daemon.journal.journal_items, from a PostgreSQL journal (connects at once)."""
    from .journal import _items

    conn = open_reader(url)
    flt = BedFilter(bed, prefix) if bed is not None else None
    return _items(_messages(conn, _close, t0, t1, flt))


def is_reachable(url: PgUrl) -> str | None:
    """None if a journal server answers at `url`, else why not (one line)."""
    try:
        with connect(url) as conn:
            conn.execute("SELECT 1")
    except UserError as exc:
        return str(exc)
    return None
