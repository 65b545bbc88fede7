"""Active/standby: any number of `hourwatch run` processes with one config and a
PostgreSQL journal form one group; exactly one is active.

The lease is a row of `ha_lease` (daemon/journal_pg.py), one per group, held on a
dedicated connection:
- The active renews it every lease_s / 4 (expiry = the database's clock + lease_s).
- A standby polls it every poll_s and takes it, with the fencing token + 1, when it has
  expired (a paused or cut-off active), or at once when the holder's lease connection is
  gone from pg_stat_activity (a dead process: its socket closed, the server ended its
  session). Each takeover is recorded in `ha_takeovers`.
- Only the active runs a `Service`: it is the only one connected to the broker with the
  group's client id (standbys hold no MQTT session, so they neither take nor acknowledge
  readings) and the only one paging (the notifier runs inside the service). On taking
  over, the service recovers from the journal (daemon/recovery.py: rebuilt state, pages
  that fell due, events never confirmed) and resumes the broker's persistent session,
  which hands over the readings queued meanwhile.
- Fencing: the service writes under `FenceToken(group, token)`; every journal write
  checks it (daemon/journal_pg.py). An active that cannot renew before its local
  deadline (renewal sent + lease_s - margin, on the monotonic clock, which keeps running
  while a process is stopped) steps down without another word on the broker; one
  that finds its token replaced steps down at once. Then it is a standby again.
"""

from __future__ import annotations

import contextlib
import os
import socket
import threading
import time
from dataclasses import dataclass
from typing import Any

import psycopg

from .caution import CAUTION
from .config import ServiceConfig, split_address
from .errors import UserError
from .health import render_ha
from .journal_api import FenceToken, PgUrl
from .journal_pg import connect, migrate
from .notify.acklinks import AckLinks
from .service import Service
from .web.app import build_app
from .web.server import WebServer
from .web.site import Site

RENEWALS_PER_LEASE = 4
LOCK_TIMEOUT_MS = 2000  # a takeover never waits long behind a write in progress
RETRY_AFTER_FAILURE_S = 5.0  # a worker that failed: give the others a chance first


@dataclass(frozen=True)
class Acquired:
    token: int
    why: str  # first, expired, connection_gone
    previous: str | None


class Lease:
    """The group's lease row on a connection of its own (its session is what a standby
    sees alive in pg_stat_activity)."""

    def __init__(self, url: PgUrl, group: str, instance: str, lease_s: float) -> None:
        self.url, self.group, self.instance, self.lease_s = url, group, instance, lease_s
        self.margin_s = min(1.0, lease_s * 0.1)
        self.valid_until = -1.0  # monotonic: acting as active is safe until then
        self._conn: psycopg.Connection[Any] | None = None

    def _db(self) -> psycopg.Connection[Any]:
        if self._conn is None or self._conn.closed:
            conn = connect(self.url)
            conn.execute(f"SET lock_timeout = {LOCK_TIMEOUT_MS}")
            conn.execute(f"SET statement_timeout = {LOCK_TIMEOUT_MS * 2}")
            conn.execute("SET application_name = 'hourwatch-lease'")
            migrate(conn, self.url)
            self._conn = conn
        return self._conn

    def reset(self) -> None:
        if self._conn is not None:
            self._conn.close()
        self._conn = None

    def try_acquire(self) -> Acquired | None:
        """Take the lease if it is free, expired or its holder's connection is gone."""
        conn = self._db()
        sent = time.monotonic()
        args = {"g": self.group, "me": self.instance, "s": self.lease_s}
        with conn.transaction():
            row = conn.execute(
                "SELECT token, holder, clock_timestamp() > expires_at, EXISTS (SELECT 1 FROM "
                "pg_stat_activity a WHERE a.pid = l.holder_pid AND (a.backend_start IS NULL "
                "OR a.backend_start = l.holder_since)) FROM ha_lease l WHERE grp = %(g)s "
                "FOR UPDATE", args).fetchone()  # fmt: skip
            me = ("holder = %(me)s, holder_pid = pg_backend_pid(), holder_since = (SELECT "
                  "backend_start FROM pg_stat_activity WHERE pid = pg_backend_pid()), "
                  "acquired_at = clock_timestamp(), renewed_at = clock_timestamp(), "
                  "expires_at = clock_timestamp() + %(s)s * interval '1 second'")  # fmt: skip
            if row is None:
                cur = conn.execute(
                    "INSERT INTO ha_lease (grp, token, holder, holder_pid, holder_since, "
                    "acquired_at, renewed_at, expires_at) SELECT %(g)s, 1, %(me)s, "
                    "pg_backend_pid(), backend_start, clock_timestamp(), clock_timestamp(), "
                    "clock_timestamp() + %(s)s * interval '1 second' FROM pg_stat_activity "
                    "WHERE pid = pg_backend_pid() ON CONFLICT (grp) DO NOTHING", args)  # fmt: skip
                if not cur.rowcount:
                    return None  # another standby was first
                got = Acquired(1, "first", None)
            else:
                token, holder, expired, alive = row
                if not expired and alive:
                    return None
                got = Acquired(int(token) + 1, "expired" if expired else "connection_gone",
                               str(holder))  # fmt: skip
                conn.execute(f"UPDATE ha_lease SET token = token + 1, {me} WHERE grp = %(g)s",
                             args)  # fmt: skip
            conn.execute("INSERT INTO ha_takeovers (grp, token, holder, previous, why) "
                         "VALUES (%s, %s, %s, %s, %s)",
                         (self.group, got.token, self.instance, got.previous, got.why))  # fmt: skip
        self.valid_until = sent + self.lease_s - self.margin_s
        return got

    def renew(self, token: int) -> bool:
        """False when the lease carries another token now (replaced)."""
        conn = self._db()
        sent = time.monotonic()
        row = conn.execute(
            "UPDATE ha_lease SET renewed_at = clock_timestamp(), expires_at = clock_timestamp() "
            "+ %s * interval '1 second', holder_pid = pg_backend_pid(), holder_since = (SELECT "
            "backend_start FROM pg_stat_activity WHERE pid = pg_backend_pid()) WHERE grp = %s "
            "AND token = %s AND holder = %s RETURNING token",
            (self.lease_s, self.group, token, self.instance)).fetchone()  # fmt: skip
        if row is None:
            self.valid_until = -1.0
            return False
        self.valid_until = sent + self.lease_s - self.margin_s
        return True

    def release(self, token: int) -> None:
        """A clean stop: expire the lease now, so a standby takes over at its next poll."""
        self.valid_until = -1.0
        with contextlib.suppress(psycopg.Error, UserError):  # else it expires by itself
            self._db().execute(
                "UPDATE ha_lease SET expires_at = clock_timestamp() - interval '1 second' "
                "WHERE grp = %s AND token = %s AND holder = %s",
                (self.group, token, self.instance))  # fmt: skip

    def close(self) -> None:
        self.reset()


def instance_name(cfg: ServiceConfig) -> str:
    return cfg.ha.instance or f"{socket.gethostname()}:{os.getpid()}"


class HaRunner:
    """The process of one group member: standby until it holds the lease, then active
    (a `Service`) until it stops or loses the lease, then standby again."""

    def __init__(self, cfg: ServiceConfig, log: Any) -> None:
        if cfg.journal.url is None:
            raise UserError("active/standby needs a PostgreSQL journal (journal.url)")
        self.cfg = cfg
        self.log = log
        self.url = PgUrl(cfg.journal.url)
        self.group = cfg.ha.group or cfg.broker.client_id
        self.instance = instance_name(cfg)
        self.lease = Lease(self.url, self.group, self.instance, cfg.ha.lease_s)
        # The service's own health server is off: this one outlives each term as active.
        self.service_cfg = cfg.model_copy(
            update={"health": cfg.health.model_copy(update={"listen": ""})}
        )
        Service(self.service_cfg)  # profiles, rules, channels: a bad file fails now
        self.role = "standby"
        self.service: Service | None = None
        self.token: int | None = None
        self.takeovers = 0
        self.lease_lost = 0
        self.last_takeover_s: float | None = None
        self.db_error: str | None = None
        self.health: WebServer | None = None

    # --- the process ------------------------------------------------------------------
    def run(self, stop: threading.Event) -> int:
        if self.cfg.health.listen:
            host, port = split_address(self.cfg.health.listen, allow_zero=True)
            try:  # /health, /metrics and the acknowledgement links, across terms
                site = Site(self.health_report, self.render_metrics, self._ack_links)
                self.health = WebServer(build_app(site), {"health": (host, port)})
            except OSError as exc:
                raise UserError(f"health.listen: cannot listen on {host}:{port}: "
                                f"{exc.strerror or exc}") from None  # fmt: skip
            self.health.start()
            self.log.info("health_listening", address=f"{self.health.address[0]}:"
                          f"{self.health.address[1]}")  # fmt: skip
        try:
            while not stop.is_set():
                got = self._standby(stop)
                if got is None:
                    break
                self._active(got, stop)
        finally:
            if self.health is not None:
                self.health.stop()
            self.lease.close()
        return 0

    def _standby(self, stop: threading.Event) -> Acquired | None:
        self.role, self.token = "standby", None
        self.log.info("ha_standby", group=self.group, instance=self.instance,
                      lease_s=self.cfg.ha.lease_s, poll_s=self.cfg.ha.poll_s)  # fmt: skip
        wait = 0.0
        while not stop.wait(wait):
            wait = self.cfg.ha.poll_s
            try:
                got = self.lease.try_acquire()
            except (psycopg.Error, UserError) as exc:
                if self.db_error is None:
                    self.log.error("ha_database_unreachable", error=str(exc).splitlines()[0])
                self.db_error = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
                self.lease.reset()
                continue
            if self.db_error is not None:
                self.log.info("ha_database_reachable")
            self.db_error = None
            if got is not None:
                return got
        return None

    def _active(self, got: Acquired, stop: threading.Event) -> None:
        began = time.monotonic()
        self.log.info("ha_takeover", group=self.group, instance=self.instance, token=got.token,
                      why=got.why, previous=got.previous)  # fmt: skip
        svc = Service(self.service_cfg, fence=FenceToken(self.group, got.token))
        try:
            svc.start()  # recovery from the journal, then the broker's persistent session
        except UserError:
            self.lease.release(got.token)
            raise
        except Exception as exc:
            self.log.error("ha_start_failed", error=str(exc)[:300], exc_info=True)
            self.lease.release(got.token)
            stop.wait(RETRY_AFTER_FAILURE_S)
            return
        self.service, self.role, self.token = svc, "active", got.token
        self.takeovers += 1
        self.last_takeover_s = time.monotonic() - began
        self.log.info("ha_active", group=self.group, token=got.token,
                      takeover_s=round(self.last_takeover_s, 3))  # fmt: skip
        try:
            self._hold(svc, got.token, stop)
        finally:
            self.service, self.role = None, "standby"

    def _hold(self, svc: Service, token: int, stop: threading.Event) -> None:
        every = self.cfg.ha.lease_s / RENEWALS_PER_LEASE
        next_renew = time.monotonic() + every
        while True:
            if stop.wait(0.05):
                svc.stop("stopped")
                self.lease.release(token)
                return
            if svc.done.is_set():  # the worker ended: fenced on a write, or failed
                why = svc.failed or "worker ended"
                if svc.fenced:
                    self._lost(svc, f"fenced: {why}")
                else:
                    svc.stop(f"worker failed: {why}")
                    self.lease.release(token)
                    stop.wait(RETRY_AFTER_FAILURE_S)
                return
            now = time.monotonic()
            if now >= self.lease.valid_until:  # e.g. resumed after a pause: not ours now
                self._lost(svc, "lease not renewed in time")
                return
            if now < next_renew:
                continue
            next_renew = now + every
            try:
                held = self.lease.renew(token)
            except (psycopg.Error, UserError) as exc:
                self.log.warning("ha_renew_failed", error=str(exc).splitlines()[0][:200])
                self.lease.reset()  # try again until the deadline
                continue
            if not held:
                self._lost(svc, "lease taken over by another instance")
                return

    def _lost(self, svc: Service, why: str) -> None:
        self.lease_lost += 1
        self.log.error("ha_lease_lost", group=self.group, instance=self.instance,
                       token=self.token, reason=why)  # fmt: skip
        svc.step_down(f"lease lost: {why}")

    # --- health and metrics (one server for the process, across terms) ------------------
    def health_report(self) -> tuple[bool, dict[str, Any]]:
        svc = self.service
        if svc is not None and self.role == "active":
            ok, body = svc.health_report()
        else:
            ok = self.db_error is None
            body = {"status": "ok" if ok else "unhealthy", "connected": False,
                    "database_error": self.db_error, "caution": CAUTION}  # fmt: skip
        body["role"] = self.role
        body["ha"] = {"group": self.group, "instance": self.instance, "token": self.token,
                      "takeovers": self.takeovers, "lease_lost": self.lease_lost,
                      "lease": None if svc is not None else self.lease_view()}  # fmt: skip
        return ok, body

    def lease_view(self) -> dict[str, Any] | None:
        """Who holds the lease (asked on a connection of its own: the poller owns the
        lease connection)."""
        try:
            with connect(self.url) as conn:
                row = conn.execute(
                    "SELECT holder, token, extract(epoch FROM expires_at - clock_timestamp()) "
                    "FROM ha_lease WHERE grp = %s", (self.group,)).fetchone()  # fmt: skip
        except (psycopg.Error, UserError):
            return None
        if row is None:
            return None
        return {"holder": row[0], "token": int(row[1]), "expires_in_s": round(float(row[2]), 1)}

    def render_metrics(self) -> str:
        svc = self.service
        text = svc.render_metrics() if svc is not None else ""
        return text + render_ha(self.role, self.group, self.token, self.takeovers,
                                self.lease_lost, self.last_takeover_s)  # fmt: skip

    def _ack_links(self) -> AckLinks | None:
        """The active term's acknowledgement links (a standby has none to serve)."""
        svc = self.service
        return svc.notifier.ack_links if svc is not None and svc.notifier is not None else None
