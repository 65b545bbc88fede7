"""The delivery outbox in a PostgreSQL journal: the same guarantees as SqliteDeliveryStore
(daemon/notify/store.py), which documents them.

- Idempotency: the unique key (alarm id, state, tier, reason, event time, channel,
  recipient); a second insert of a key is `ON CONFLICT DO NOTHING`, and the cursor moves
  in the same transaction as the deliveries it queued.
- The cursor follows events by id: the journal commits event ids in order (EVENTS_LOCK
  in daemon/journal_pg.py), so no event is committed behind the cursor.
- Fencing: every write checks the group's lease token first (daemon/journal_pg.py), so a
  notifier on an instance that lost its lease queues, claims and confirms nothing; a page
  it was sending at that moment stays `sending` and is sent again, with the same key, by
  the new active.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import replace
from typing import Any

import psycopg

from ..journal_api import FenceToken, PgUrl
from ..journal_pg import EVENTS_LOCK, check_fence, connect, make_pool, migrate
from .store import (
    _DELIVERY_COLS,
    FINAL,
    OPEN,
    PAGED_KINDS,
    Delivery,
    JournaledEvent,
    NewDelivery,
    _delivery,
)

Conn = psycopg.Connection[Any]


class PostgresDeliveryStore:
    def __init__(self, url: PgUrl, fence: FenceToken | None = None, pool_size: int = 4) -> None:
        self.url = url
        self.fence = fence
        with connect(url) as conn:
            migrate(conn, url)
        self.pool = make_pool(url, pool_size, "hourwatch-outbox")
        # First use on this journal: pages start with the events journaled from now on.
        self._write(lambda c: c.execute(
            "INSERT INTO notify_cursor (one, event_id) SELECT 1, COALESCE(MAX(id), 0) "
            "FROM events ON CONFLICT (one) DO NOTHING"))  # fmt: skip
        # A page left `sending` by a crash (or by a former active) is in doubt.
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'pending', answer = 'in doubt after a restart: "
            "sent again with the same idempotency key' WHERE status = 'sending'"))  # fmt: skip

    def _write(self, fn: Callable[[Conn], Any]) -> Any:
        with self.pool.connection() as conn, conn.transaction():
            check_fence(conn, self.fence)
            return fn(conn)

    def _read(self, sql: str, params: Sequence[Any] = ()) -> list[Any]:
        with self.pool.connection() as conn:
            rows: list[Any] = conn.execute(sql, params).fetchall()
            return rows

    # --- following the journal ---------------------------------------------------------
    def cursor(self) -> int:
        return int(self._read("SELECT event_id FROM notify_cursor")[0][0])

    def events_after(self, event_id: int, limit: int) -> list[JournaledEvent]:
        rows = self._read("SELECT id, time, kind, alarm_id, body FROM events WHERE id > %s "
                          "AND kind = ANY(%s) ORDER BY id LIMIT %s",
                          (event_id, list(PAGED_KINDS), limit))  # fmt: skip
        return [JournaledEvent(int(i), float(t), k, a, json.loads(b)) for i, t, k, a, b in rows]

    def event(self, event_id: int) -> JournaledEvent | None:
        rows = self._read("SELECT id, time, kind, alarm_id, body FROM events WHERE id = %s",
                          (event_id,))  # fmt: skip
        if not rows:
            return None
        i, t, k, a, body = rows[0]
        return JournaledEvent(int(i), float(t), k, a, json.loads(body))

    def enqueue(self, upto: int, new: Sequence[NewDelivery], ended: Sequence[str],
                now: float) -> int:  # fmt: skip
        """As SqliteDeliveryStore.enqueue, in one transaction with the cursor's move."""

        def tx(c: Conn) -> int:
            for alarm_id in ended:
                c.execute("UPDATE deliveries SET status = 'cancelled', done_at = %s, answer = "
                          "'not sent: the alarm was acknowledged or has ended' "
                          "WHERE alarm_id = %s AND status = ANY(%s)",
                          (now, alarm_id, list(OPEN)))  # fmt: skip
            added = 0
            for d in new:
                status, done, answer = (("expired", now, "not sent: the event was already "
                                         "older than the give-up time") if d.expired
                                        else ("pending", None, None))  # fmt: skip
                cur = c.execute(
                    "INSERT INTO deliveries (event_id, alarm_id, state, tier, reason, "
                    "event_time, channel, recipient, role, status, created, next_at, done_at, "
                    "answer) VALUES (%s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s) "
                    "ON CONFLICT DO NOTHING",
                    (d.event_id, d.alarm_id, d.state, d.tier, d.reason, d.event_time, d.channel,
                     d.recipient, d.role, status, now, now, done, answer))  # fmt: skip
                if not cur.rowcount:
                    continue  # this very page is queued already (the same event twice)
                added += 1
                c.execute("UPDATE deliveries SET status = 'cancelled', done_at = %s, answer = "
                          "'not sent: superseded by a newer page for this alarm' WHERE "
                          "alarm_id = %s AND channel = %s AND recipient = %s "
                          "AND status = ANY(%s) AND event_id < %s",
                          (now, d.alarm_id, d.channel, d.recipient, list(OPEN),
                           d.event_id))  # fmt: skip
            c.execute("UPDATE notify_cursor SET event_id = %s WHERE one = 1 AND event_id < %s",
                      (upto, upto))  # fmt: skip
            return added

        return int(self._write(tx))

    # --- sending -------------------------------------------------------------------------
    def claim(self, channel: str, now: float, limit: int) -> list[Delivery]:
        def tx(c: Conn) -> list[Delivery]:
            rows = c.execute(
                f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE channel = %s "
                "AND status = 'pending' AND next_at <= %s ORDER BY id LIMIT %s FOR UPDATE",
                (channel, now, limit)).fetchall()  # fmt: skip
            if rows:
                c.execute("UPDATE deliveries SET status = 'sending', attempts = attempts + 1, "
                          "sent_at = %s WHERE id = ANY(%s)",
                          (now, [r[0] for r in rows]))  # fmt: skip
            return [replace(_delivery(r), status="sending", attempts=r[11] + 1)
                    for r in rows]  # fmt: skip

        out: list[Delivery] = self._write(tx)
        return out

    def confirm(self, delivery_id: int, now: float, answer: str) -> None:
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'confirmed', done_at = %s, answer = %s WHERE id = %s",
            (now, answer[:500], delivery_id)))  # fmt: skip

    def retry(self, delivery_id: int, next_at: float, answer: str) -> None:
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'pending', next_at = %s, answer = %s "
            "WHERE id = %s AND status = 'sending'",
            (next_at, answer[:500], delivery_id)))  # fmt: skip

    def drop(self, delivery_id: int, now: float, answer: str) -> None:
        self._write(lambda c: c.execute(
            "UPDATE deliveries SET status = 'expired', done_at = %s, answer = %s WHERE id = %s",
            (now, answer[:500], delivery_id)))  # fmt: skip

    def expire_old(self, now: float, before_event_time: float) -> list[Delivery]:
        def tx(c: Conn) -> list[Delivery]:
            rows = c.execute(
                f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE status = 'pending' "
                "AND event_time < %s FOR UPDATE", (before_event_time,)).fetchall()  # fmt: skip
            if rows:
                c.execute("UPDATE deliveries SET status = 'expired', done_at = %s, answer = "
                          "COALESCE(answer, '') || ' (given up)' WHERE id = ANY(%s)",
                          (now, [r[0] for r in rows]))  # fmt: skip
            return [_delivery(r) for r in rows]

        out: list[Delivery] = self._write(tx)
        return out

    def next_due(self, channel: str) -> float | None:
        rows = self._read("SELECT MIN(next_at) FROM deliveries WHERE channel = %s "
                          "AND status = 'pending'", (channel,))  # fmt: skip
        return None if rows[0][0] is None else float(rows[0][0])

    def open_counts(self) -> dict[str, int]:
        rows = self._read("SELECT channel, COUNT(*) FROM deliveries WHERE status = ANY(%s) "
                          "GROUP BY channel", (list(OPEN),))  # fmt: skip
        return {ch: int(n) for ch, n in rows}

    def deliveries(self, alarm_id: str | None = None) -> list[Delivery]:
        if alarm_id is None:
            rows = self._read(f"SELECT {_DELIVERY_COLS} FROM deliveries ORDER BY id")
        else:
            rows = self._read(f"SELECT {_DELIVERY_COLS} FROM deliveries WHERE alarm_id = %s "
                              "ORDER BY id", (alarm_id,))  # fmt: skip
        return [_delivery(r) for r in rows]

    # --- the failing-channel alarm, journaled as an event ------------------------------
    def append_event(self, time: float, kind: str, alarm_id: str,
                     body: dict[str, object]) -> int:  # fmt: skip
        text = json.dumps(body)
        token = self.fence.token if self.fence else None

        def tx(c: Conn) -> int:
            c.execute("SELECT pg_advisory_xact_lock(%s)", (EVENTS_LOCK,))
            row = c.execute("INSERT INTO events (time, kind, bed, alarm_id, body, lease_token) "
                            "VALUES (%s, %s, NULL, %s, %s, %s) RETURNING id",
                            (time, kind, alarm_id, text, token)).fetchone()  # fmt: skip
            assert row is not None
            return int(row[0])

        return int(self._write(tx))

    def latest_notify_alarms(self) -> dict[str, JournaledEvent]:
        out: dict[str, JournaledEvent] = {}
        for i, t, k, a, b in self._read(
            "SELECT id, time, kind, alarm_id, body FROM events WHERE kind = 'notify_alarm' "
            "ORDER BY id"
        ):
            body = json.loads(b)
            out[str(body.get("channel"))] = JournaledEvent(int(i), float(t), k, a, body)
        return out

    # --- acknowledgement links ----------------------------------------------------------
    def use_link(self, token_id: str, alarm_id: str, recipient: str, role: str,
                 now: float) -> bool:  # fmt: skip
        cur = self._write(lambda c: c.execute(
            "INSERT INTO ack_links (token_id, alarm_id, recipient, role, used_at) "
            "VALUES (%s, %s, %s, %s, %s) ON CONFLICT DO NOTHING",
            (token_id, alarm_id, recipient, role, now)))  # fmt: skip
        return bool(cur.rowcount)

    def link_used(self, token_id: str) -> float | None:
        rows = self._read("SELECT used_at FROM ack_links WHERE token_id = %s", (token_id,))
        return float(rows[0][0]) if rows else None

    def prune(self, before: float) -> int:
        def tx(c: Conn) -> int:
            n = c.execute("DELETE FROM deliveries WHERE created < %s AND status = ANY(%s)",
                          (before, list(FINAL))).rowcount  # fmt: skip
            n += c.execute("DELETE FROM ack_links WHERE used_at < %s", (before,)).rowcount
            return int(n)

        return int(self._write(tx))

    def close(self) -> None:
        self.pool.close()

