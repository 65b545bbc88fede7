"""The delivery outbox, kept in the journal (the same SQLite file as the messages and
events), behind a small interface so that another journal (PostgreSQL) can give the same
semantics.

- Pages follow the journal: every journaled alarm event (and failing-channel event) with
  roles to notify becomes one delivery per recipient, in the same transaction that moves
  the cursor past the event. A crash between journaling an event and queueing its pages
  therefore loses nothing: the next start carries on from the cursor.
- Idempotency: one delivery per (alarm id, state, tier, event, channel, recipient), a
  unique key. The event (its reason and engine time) is part of it because a
  re-notification and a re-activation after an expired acknowledgement repeat the alarm's
  state and tier; the engine time is the same live, in replay and after a restart.
  A recipient reached under two roles of one event gets one page.
- States: pending (queued or waiting to retry) -> sending -> confirmed; or cancelled
  (the alarm was acknowledged or ended, or a newer page to the same recipient for the
  same alarm superseded it) or expired (not confirmed within the give-up time). A row
  left in `sending` by a crash is in doubt: it is sent again with the same idempotency
  key, which the receiver can use to drop the copy (webhook header, mail Message-ID,
  HL7 message control id).
"""

from __future__ import annotations

import hashlib
import json
import sqlite3
import threading
from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Protocol

from ..errors import UserError
from ..journal import APPLICATION_ID, BUSY_TIMEOUT_MS, OUTBOX_TABLES
from ..journal_api import FenceToken, JournalTarget, PgUrl

PAGED_KINDS = ("alarm", "notify_alarm")  # journaled event kinds that can page someone
OPEN = ("pending", "sending")
FINAL = ("confirmed", "cancelled", "expired")

# The outbox's tables are part of the journal's schema (migration 2 of daemon/journal.py);
# created here too, so a store opened on a journal of version 1 finds them.
_SCHEMA = OUTBOX_TABLES


@dataclass(frozen=True)
class JournaledEvent:
    id: int
    time: float
    kind: str
    alarm_id: str | None
    body: dict[str, Any]


@dataclass(frozen=True)
class NewDelivery:
    event_id: int
    alarm_id: str
    state: str
    tier: int
    reason: str
    event_time: float
    channel: str
    recipient: str
    role: str
    expired: bool = False  # the event is already older than the give-up time


@dataclass(frozen=True)
class Delivery:
    id: int
    event_id: int
    alarm_id: str
    state: str
    tier: int
    reason: str
    event_time: float
    channel: str
    recipient: str
    role: str
    status: str
    attempts: int
    created: float
    next_at: float
    answer: str | None

    @property
    def key(self) -> str:
        return delivery_key(self.alarm_id, self.state, self.tier, self.reason, self.event_time,
                            self.channel, self.recipient)  # fmt: skip


def delivery_key(alarm_id: str, state: str, tier: int, reason: str, event_time: float,
                 channel: str, recipient: str) -> str:  # fmt: skip
    """The idempotency key as 32 hex characters (a receiver drops a second copy by it)."""
    text = "\x1f".join([alarm_id, state, str(tier), reason, repr(event_time), channel, recipient])
    return hashlib.sha256(text.encode()).hexdigest()[:32]


class DeliveryStore(Protocol):
    """What the notifier needs from a journal. Every method is one transaction."""

    def cursor(self) -> int: ...
    def events_after(self, event_id: int, limit: int) -> list[JournaledEvent]: ...
    def event(self, event_id: int) -> JournaledEvent | None: ...
    def enqueue(self, upto: int, new: Sequence[NewDelivery], ended: Sequence[str],
                now: float) -> int: ...  # fmt: skip
    def claim(self, channel: str, now: float, limit: int) -> list[Delivery]: ...
    def confirm(self, delivery_id: int, now: float, answer: str) -> None: ...
    def retry(self, delivery_id: int, next_at: float, answer: str) -> None: ...
    def drop(self, delivery_id: int, now: float, answer: str) -> None: ...
    def expire_old(self, now: float, before_event_time: float) -> list[Delivery]: ...
    def next_due(self, channel: str) -> float | None: ...
    def open_counts(self) -> dict[str, int]: ...
    def deliveries(self, alarm_id: str | None = None) -> list[Delivery]: ...
    def append_event(self, time: float, kind: str, alarm_id: str,
                     body: dict[str, object]) -> int: ...  # fmt: skip
    def latest_notify_alarms(self) -> dict[str, JournaledEvent]: ...
    def use_link(self, token_id: str, alarm_id: str, recipient: str, role: str,
                 now: float) -> bool: ...  # fmt: skip
    def link_used(self, token_id: str) -> float | None: ...
    def prune(self, before: float) -> int: ...
    def close(self) -> None: ...


_DELIVERY_COLS = ("id, event_id, alarm_id, state, tier, reason, event_time, channel, recipient, "
                  "role, status, attempts, created, next_at, answer")  # fmt: skip


def _delivery(r: Sequence[Any]) -> Delivery:
    return Delivery(*r)


class SqliteDeliveryStore:
    """The outbox tables in the service's SQLite journal, on a connection of its own
    (SQLite serialises it with the journal's writer; each transaction is short). One lock
    makes the connection safe for the notifier's threads."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self._lock = threading.Lock()
        try:
            db = sqlite3.connect(str(path), isolation_level=None, check_same_thread=False,
                                 timeout=BUSY_TIMEOUT_MS / 1000)  # fmt: skip
            db.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
            app = db.execute("PRAGMA application_id").fetchone()[0]
        except sqlite3.Error as exc:
            raise UserError(f"{path}: cannot open the journal for the outbox: {exc}") from None
        if app != APPLICATION_ID:
            db.close()
            raise UserError(f"{path}: not a Hourwatch journal (the outbox lives in one)")
        db.execute("PRAGMA synchronous = FULL")
        db.execute("PRAGMA wal_autocheckpoint = 0")  # the journal's owner checkpoints
        self._db = db
        self._write(self._init)
        # A page left `sending` by a crash is in doubt: send it again (same key).
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'pending', answer = 'in doubt after a restart: "
            "sent again with the same idempotency key' WHERE status = 'sending'"))  # fmt: skip

    @staticmethod
    def _init(c: sqlite3.Connection) -> None:
        for sql in _SCHEMA:
            c.execute(sql)
        # First use on this journal: pages start with the events journaled from now on.
        c.execute("INSERT OR IGNORE INTO notify_cursor (one, event_id) "
                  "SELECT 1, COALESCE(MAX(id), 0) FROM events")  # fmt: skip

    def _write(self, fn: Any) -> Any:
        with self._lock:
            db = self._db
            db.execute("BEGIN IMMEDIATE")
            try:
                out = fn(db)
                db.execute("COMMIT")
            except BaseException:
                db.execute("ROLLBACK")
                raise
            return out

    def _read(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        with self._lock:
            return self._db.execute(sql, params).fetchall()

    # --- following the journal ---------------------------------------------------------
    def cursor(self) -> int:
        return int(self._read("SELECT event_id FROM notify_cursor")[0][0])

    def events_after(self, event_id: int, limit: int) -> list[JournaledEvent]:
        rows = self._read(
            "SELECT id, time, kind, alarm_id, body FROM events WHERE id > ? "
            f"AND kind IN {PAGED_KINDS!r} ORDER BY id LIMIT ?", (event_id, limit))  # fmt: skip
        return [JournaledEvent(i, t, k, a, json.loads(b)) for i, t, k, a, b in rows]

    def event(self, event_id: int) -> JournaledEvent | None:
        rows = self._read("SELECT id, time, kind, alarm_id, body FROM events WHERE id = ?",
                          (event_id,))  # fmt: skip
        if not rows:
            return None
        i, t, k, a, body = rows[0]
        return JournaledEvent(i, t, k, a, json.loads(body))

    def enqueue(self, upto: int, new: Sequence[NewDelivery], ended: Sequence[str],
                now: float) -> int:  # fmt: skip
        """One transaction: cancel what is still open for alarms that have `ended`
        (acknowledged or over), supersede older open pages to the same recipient for the
        same alarm, insert the new deliveries (a key already present is left alone), and
        move the cursor to `upto`. Returns how many deliveries were new. A page being
        sent at that moment is cancelled too: should the channel confirm it, `confirm`
        records that; should it fail, `retry` leaves it cancelled."""

        def tx(c: sqlite3.Connection) -> int:
            for alarm_id in ended:
                c.execute("UPDATE deliveries SET status = 'cancelled', done_at = ?, answer = "
                          "'not sent: the alarm was acknowledged or has ended' "
                          f"WHERE alarm_id = ? AND status IN {OPEN!r}",
                          (now, alarm_id))  # fmt: skip
            added = 0
            for d in new:
                status, done, answer = (("expired", now, "not sent: the event was already "
                                         "older than the give-up time") if d.expired
                                        else ("pending", None, None))  # fmt: skip
                cur = c.execute(
                    "INSERT OR IGNORE INTO deliveries (event_id, alarm_id, state, tier, reason, "
                    "event_time, channel, recipient, role, status, created, next_at, done_at, "
                    "answer) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (d.event_id, d.alarm_id, d.state, d.tier, d.reason, d.event_time, d.channel,
                     d.recipient, d.role, status, now, now, done, answer))  # fmt: skip
                if not cur.rowcount:
                    continue  # this very page is queued already (the same event twice)
                added += 1
                c.execute("UPDATE deliveries SET status = 'cancelled', done_at = ?, answer = "
                          "'not sent: superseded by a newer page for this alarm' WHERE "
                          "alarm_id = ? AND channel = ? AND recipient = ? "
                          f"AND status IN {OPEN!r} AND event_id < ?",
                          (now, d.alarm_id, d.channel, d.recipient, d.event_id))  # fmt: skip
            c.execute("UPDATE notify_cursor SET event_id = ? WHERE one = 1 AND event_id < ?",
                      (upto, upto))  # fmt: skip
            return added

        return int(self._write(tx))

    # --- sending -------------------------------------------------------------------------
    def claim(self, channel: str, now: float, limit: int) -> list[Delivery]:
        """The channel's due pages, oldest first, marked `sending` (attempt counted)."""

        def tx(c: sqlite3.Connection) -> list[Delivery]:
            rows = c.execute(
                f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE channel = ? "
                "AND status = 'pending' AND next_at <= ? ORDER BY id LIMIT ?",
                (channel, now, limit)).fetchall()  # fmt: skip
            c.executemany("UPDATE deliveries SET status = 'sending', attempts = attempts + 1, "
                          "sent_at = ? WHERE id = ?", [(now, r[0]) for r in rows])  # fmt: skip
            # as updated: `attempts` counts this one
            return [replace(_delivery(r), status="sending", attempts=r[11] + 1) for r in rows]

        out: list[Delivery] = self._write(tx)
        return out

    def confirm(self, delivery_id: int, now: float, answer: str) -> None:
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'confirmed', done_at = ?, answer = ? WHERE id = ?",
            (now, answer[:500], delivery_id)))  # fmt: skip

    def retry(self, delivery_id: int, next_at: float, answer: str) -> None:
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'pending', next_at = ?, answer = ? "
            "WHERE id = ? AND status = 'sending'",
            (next_at, answer[:500], delivery_id)))  # fmt: skip

    def drop(self, delivery_id: int, now: float, answer: str) -> None:
        """Give one page up (recorded as expired, with why)."""
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'expired', done_at = ?, answer = ? WHERE id = ?",
            (now, answer[:500], delivery_id)))  # fmt: skip

    def expire_old(self, now: float, before_event_time: float) -> list[Delivery]:
        def tx(c: sqlite3.Connection) -> list[Delivery]:
            rows = c.execute(
                f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE status = 'pending' "
                "AND event_time < ?", (before_event_time,)).fetchall()  # fmt: skip
            c.executemany("UPDATE deliveries SET status = 'expired', done_at = ?, answer = "
                          "COALESCE(answer, '') || ' (given up)' WHERE id = ?",
                          [(now, r[0]) for r in rows])  # fmt: skip
            return [_delivery(r) for r in rows]

        out: list[Delivery] = self._write(tx)
        return out

    def next_due(self, channel: str) -> float | None:
        rows = self._read("SELECT MIN(next_at) FROM deliveries WHERE channel = ? "
                          "AND status = 'pending'", (channel,))  # fmt: skip
        return None if rows[0][0] is None else float(rows[0][0])

    def open_counts(self) -> dict[str, int]:
        rows = self._read("SELECT channel, COUNT(*) FROM deliveries WHERE status IN "
                          "('pending', 'sending') GROUP BY channel")  # fmt: skip
        return {ch: int(n) for ch, n in rows}

    def deliveries(self, alarm_id: str | None = None) -> list[Delivery]:
        if alarm_id is None:
            rows = self._read(f"SELECT {_DELIVERY_COLS} FROM deliveries ORDER BY id")
        else:
            rows = self._read(f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE alarm_id = ? "
                              "ORDER BY id", (alarm_id,))  # fmt: skip
        return [_delivery(r) for r in rows]

    # --- the failing-channel alarm, journaled as an event ------------------------------
    def append_event(self, time: float, kind: str, alarm_id: str,
                     body: dict[str, object]) -> int:  # fmt: skip
        text = json.dumps(body)
        return int(self._write(lambda c: c.execute(
            "INSERT INTO events (time, kind, bed, alarm_id, body) VALUES (?, ?, NULL, ?, ?)",
            (time, kind, alarm_id, text)).lastrowid))  # fmt: skip

    def latest_notify_alarms(self) -> dict[str, JournaledEvent]:
        """The latest failing-channel event per channel (open or resolved)."""
        out: dict[str, JournaledEvent] = {}
        for i, t, k, a, b in self._read(
            "SELECT id, time, kind, alarm_id, body FROM events WHERE kind = 'notify_alarm' "
            "ORDER BY id"
        ):
            body = json.loads(b)
            out[str(body.get("channel"))] = JournaledEvent(i, t, k, a, body)
        return out

    # --- acknowledgement links ----------------------------------------------------------
    def use_link(self, token_id: str, alarm_id: str, recipient: str, role: str,
                 now: float) -> bool:  # fmt: skip
        """Record a link as used; False if it had been used before."""
        cur = self._write(lambda c: c.execute(
            "INSERT OR IGNORE INTO ack_links (token_id, alarm_id, recipient, role, used_at) "
            "VALUES (?, ?, ?, ?, ?)", (token_id, alarm_id, recipient, role, now)))  # fmt: skip
        return bool(cur.rowcount)

    def link_used(self, token_id: str) -> float | None:
        rows = self._read("SELECT used_at FROM ack_links WHERE token_id = ?", (token_id,))
        return float(rows[0][0]) if rows else None

    def prune(self, before: float) -> int:
        """Finished deliveries queued before `before`, and links used before it."""

        def tx(c: sqlite3.Connection) -> int:
            n = c.execute(f"DELETE FROM deliveries WHERE created < ? AND status IN {FINAL!r}",
                          (before,)).rowcount  # fmt: skip
            n += c.execute("DELETE FROM ack_links WHERE used_at < ?", (before,)).rowcount
            return int(n)

        return int(self._write(tx))

    def close(self) -> None:
        with self._lock:
            self._db.close()


def open_store(where: JournalTarget, fence: FenceToken | None = None) -> DeliveryStore:
    """The outbox in the journal at `where` (daemon/notify/store_pg.py for PostgreSQL)."""
    if isinstance(where, PgUrl):
        from .store_pg import PostgresDeliveryStore

        return PostgresDeliveryStore(where, fence)
    return SqliteDeliveryStore(where)
