"""An active/standby pair on one REAL PostgreSQL journal (tests/pg.py) and one REAL
Mosquitto (tests/broker.py): two `hourwatch run` processes with the same config.

- SIGKILL of the active mid-stream: the standby takes over, pages the next alarm, no
  reading is lost, no page is repeated.
- SIGSTOP of the active: the standby takes over when the lease expires; SIGCONT: the old
  active is fenced, writes nothing, and is a standby again.
- Sharding by ward: two groups on one broker, each with its own journal, each journals
  and pages only its own ward.

Beds, meters and volumes are invented. The stream is a post-obstructive diuresis at an
invented 300 mL/h after a recorded obstruction relief; the criterion it must meet:
# source: Halbgewachs C, Domes T. Postobstructive diuresis. Can Fam Physician
# 2015;61(2):137-42 -- > 200 mL/h for 2 consecutive hours
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

# skipped, with the reason, where the optional driver is not installed
pytest.importorskip("psycopg", reason="psycopg is not installed (.[postgresql])")

from daemon.journal_api import PgUrl
from daemon.journal_pg import PostgresJournal
from daemon.profile_files import load_profiles
from daemon.recovery import ENGINE_KINDS
from simulator.meterlog import constant, simulate
from tests.broker import (
    Broker,
    Watcher,
    broker,  # noqa: F401  (the fixture)
    publish_all,
    publisher,
    running_service,
)
from tests.paging import WebhookReceiver, free_port, wait_until
from tests.pg import pg, pg2  # noqa: F401  (the fixtures)

ROOT = Path(__file__).resolve().parent.parent
PROFILE = {p.name: p for p in load_profiles()}["reference-cumulative"]
FLOW_ML_H = 300.0  # invented: a clear post-obstructive diuresis
HOOK_KEY = "invented-webhook-key-0123456789"
CLIENT_ID = "hourwatch-pair"


def context(device: str, start: float, ward: str = "icu-east") -> dict[str, Any]:
    relieved = datetime.fromtimestamp(start - 2 * 3600, UTC).isoformat()
    return {"ward": ward, "device_ids": [device], "weight_kg": 80, "weight_basis": "actual",
            "episodes": [{"kind": "obstruction_relieved", "at": relieved}]}  # fmt: skip


def readings(device: str, start: float, hours: float) -> list[tuple[str, Any]]:
    sim = simulate(PROFILE, device, datetime.fromtimestamp(start, UTC), hours, constant(FLOW_ML_H))
    return [(topic, payload) for _, topic, payload in sim.records]


def health(port: int) -> dict[str, Any]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=2) as r:
            body: dict[str, Any] = json.loads(r.read())
    except urllib.error.HTTPError as exc:  # 503 still has the body
        body = json.loads(exc.read())
    except (urllib.error.URLError, OSError, ValueError):
        return {}
    return body


def scrape(port: int) -> str:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=2) as r:
        return str(r.read().decode())


class Instance:
    """One `hourwatch run` process of the pair, with its own health port and log."""

    def __init__(self, name: str, conf: Path, folder: Path, env: dict[str, str]) -> None:
        self.name = name
        self.port = free_port()
        text = conf.read_text().replace("HEALTH_PORT", str(self.port)).replace("NAME", name)
        self.conf = folder / f"{name}.toml"
        self.conf.write_text(text)
        self.log_path = folder / f"{name}.log"
        with self.log_path.open("w") as log:  # kept for a post-mortem
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "daemon.cli", "run", "--config", str(self.conf)],
                env=env, stdout=log, stderr=log)  # fmt: skip

    def role(self) -> str | None:
        return health(self.port).get("role")

    def wait_role(self, role: str, timeout: float) -> dict[str, Any]:
        def ready() -> dict[str, Any] | None:
            h = health(self.port)
            if h.get("role") != role:
                return None
            return h if role == "standby" or h.get("connected") else None

        return wait_until(ready, timeout, f"{self.name} {role}")  # type: ignore[no-any-return]

    def log(self) -> list[dict[str, Any]]:
        out = []
        for line in self.log_path.read_text().splitlines():
            try:
                out.append(json.loads(line))
            except ValueError:
                continue
        return out

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGCONT)
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(15)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)


def pair_config(folder: Path, b: Broker, url: PgUrl, hook: WebhookReceiver,
                lease_s: float = 8.0) -> Path:  # fmt: skip
    conf = folder / "pair.toml"
    conf.write_text(f"""
[broker]
host = "{b.host}"
port = {b.port}
client_id = "{CLIENT_ID}"
reconnect_min_s = 1
reconnect_max_s = 2
[journal]
url = "{url}"
[health]
listen = "127.0.0.1:HEALTH_PORT"
[ha]
instance = "NAME"
lease_s = {lease_s}
poll_s = 0.25
[publish]
state_interval_s = 0
[notify]
retry_min_s = 0.5
retry_max_s = 1
[[notify.channels]]
name = "unit-hook"
kind = "webhook"
url = "{hook.url}"
secret_env = "HW_TEST_HOOK_KEY"
timeout_s = 2
[[notify.routes]]
role = "bedside-nurse"
channel = "unit-hook"
to = ["team-east"]
""")
    return conf


def alarm_msgs(w: Watcher) -> list[dict[str, Any]]:
    return w.json("hourwatch/alarms/")


def pod_active(w: Watcher, bed: str) -> list[dict[str, Any]]:
    return [a for a in alarm_msgs(w) if a["rule"] == "pod-hourly" and a["state"] == "active"
            and a["bed"] == bed]  # fmt: skip


def journal(url: PgUrl) -> tuple[list[Any], list[Any]]:
    with PostgresJournal(url) as j:
        return list(j.messages_between(None, None)), list(j.events_between(None, None))


def tokens(url: PgUrl) -> Counter[int | None]:
    """Rows per lease token they were written under (messages and events)."""
    import psycopg

    with psycopg.connect(url.url) as conn:
        rows = conn.execute("SELECT lease_token FROM messages UNION ALL "
                            "SELECT lease_token FROM events").fetchall()  # fmt: skip
    return Counter(r[0] for r in rows)


def page_of(h: Any) -> tuple[str, str, int, str]:
    body = h.json()
    return (body["alarm"]["alarm_id"], body["alarm"]["state"], body["alarm"]["tier"],
            body["recipient"])  # fmt: skip


def paged_beds(hook: WebhookReceiver) -> set[str]:
    return {page_of(h)[0].split("/")[0] for h in hook.received}


def event_token(url: PgUrl, event_id: int) -> int | None:
    import psycopg

    with psycopg.connect(url.url) as conn:
        row = conn.execute("SELECT lease_token FROM events WHERE id = %s", (event_id,)).fetchone()
    assert row is not None
    return None if row[0] is None else int(row[0])


def token_of(url: PgUrl, instance: str) -> int:
    import psycopg

    with psycopg.connect(url.url) as conn:
        row = conn.execute("SELECT max(token) FROM ha_takeovers WHERE holder = %s",
                           (instance,)).fetchone()  # fmt: skip
    assert row is not None and row[0] is not None, f"{instance} never took the lease"
    return int(row[0])


@pytest.fixture
def hook(monkeypatch):
    monkeypatch.setenv("HW_TEST_HOOK_KEY", HOOK_KEY)
    h = WebhookReceiver(HOOK_KEY.encode())
    yield h
    h.stop()


def env() -> dict[str, str]:
    return dict(os.environ, PYTHONPATH=str(ROOT), HW_TEST_HOOK_KEY=HOOK_KEY)


def test_sigkill_of_the_active_mid_stream_the_standby_pages_nothing_lost_nothing_repeated(
    broker, pg, hook, tmp_path  # noqa: F811
):
    conf = pair_config(tmp_path, broker, pg, hook)
    w = Watcher(broker)
    pub = publisher(broker)
    a = b = None
    try:
        a = Instance("a", conf, tmp_path, env())
        a.wait_role("active", 30)
        b = Instance("b", conf, tmp_path, env())
        assert b.wait_role("standby", 30)["connected"] is False  # no MQTT session
        start = time.time() - 3 * 3600
        publish_all(pub, [("hourwatch/beds/b01/context", context("rc-0101", start))],
                    retain=True)  # fmt: skip
        feed1 = readings("rc-0101", start, 3.0)
        publish_all(pub, feed1)
        w.wait_for(lambda w: pod_active(w, "b01"), 20, "b01's alarm from the active")
        wait_until(lambda: hook.received, 10, "b01's page")
        # b02's upload is under way when the active dies; the rest queues at the broker
        publish_all(pub, [("hourwatch/beds/b02/context", context("rc-0202", start))],
                    retain=True)  # fmt: skip
        feed2 = readings("rc-0202", start, 3.0)
        sender = threading.Thread(target=publish_all, args=(pub, feed2), daemon=True)
        sender.start()
        time.sleep(0.05)
        a.proc.send_signal(signal.SIGKILL)
        a.proc.wait(10)
        sender.join(30)
        # b03's upload begins after the death: the standby must raise and page it
        publish_all(pub, [("hourwatch/beds/b03/context", context("rc-0303", start))],
                    retain=True)  # fmt: skip
        feed3 = readings("rc-0303", start, 3.0)
        publish_all(pub, feed3)
        b.wait_role("active", 30)
        w.wait_for(lambda w: pod_active(w, "b02") and pod_active(w, "b03"), 30,
                   "b02's and b03's alarms")  # fmt: skip
        wait_until(lambda: {"b02", "b03"} <= paged_beds(hook), 15, "their pages")
        published = {(t, p["seq"]) for t, p in feed1 + feed2 + feed3}

        def all_journaled() -> bool:
            msgs, _ = journal(pg)
            got = {(m.topic, json.loads(m.payload)["seq"]) for m in msgs
                   if m.topic.startswith("meters/")}  # fmt: skip
            return got >= published

        wait_until(all_journaled, 30, "every reading journaled")
        time.sleep(1.0)  # anything sent twice would have arrived by now
        metrics = scrape(b.port)
        assert 'hourwatch_ha_active{group="hourwatch-pair"} 1' in metrics
        assert 'hourwatch_ha_takeovers_total{group="hourwatch-pair"} 1' in metrics
        assert "hourwatch_messages_journaled_total" in metrics  # the service's own, too
    finally:
        for inst in (a, b):
            if inst is not None:
                inst.stop()
        pub.disconnect()
        w.close()
    msgs, events = journal(pg)
    got = Counter((m.topic, json.loads(m.payload)["seq"]) for m in msgs
                  if m.topic.startswith("meters/"))  # fmt: skip
    assert set(got) == published, "a reading was lost"
    alarms = [e for e in events if e.kind == "alarm"]
    keys = [(e.alarm_id, e.body["state"], e.body["reason"], e.time) for e in alarms]
    assert len(keys) == len(set(keys)), "an alarm event was journaled twice"
    from daemon.engine.timefmt import iso

    wire = [(m["alarm_id"], m["state"], m["reason"], m["time"]) for m in alarm_msgs(w)]
    assert {(k[0], k[1], k[2], iso(k[3])) for k in keys} == set(wire)  # all published
    # b02's alarm came from the new active, under its own token
    token_b = token_of(pg, "b")
    assert token_b > token_of(pg, "a")
    (b03,) = [e for e in alarms if e.bed == "b03" and e.body["state"] == "active"
              and e.body["rule"] == "pod-hourly"]  # fmt: skip
    assert event_token(pg, b03.id) == token_b
    # A page at most once per (alarm, state, tier, recipient), by its idempotency key: no
    # page was queued twice; a copy can only be a page in flight at the kill, sent again
    # with the same key (the receiver drops it by the key).
    keys_of: dict[tuple[str, str, int, str], set[str]] = {}
    for h in hook.received:
        keys_of.setdefault(page_of(h), set()).add(h.headers["Idempotency-Key"])
    assert all(len(k) == 1 for k in keys_of.values()), keys_of
    copies = len(hook.received) - len(keys_of)
    assert copies <= 1, f"{copies} pages sent again"
    paged = {(p[0], p[1]) for p in keys_of}
    assert {(e.alarm_id, "active") for e in alarms if e.body["rule"] == "pod-hourly"
            and e.body["state"] == "active"} <= paged  # fmt: skip
    assert {a.split("/")[0] for a, _ in paged} == {"b01", "b02", "b03"}
    assert [x for x in b.log() if x.get("event") == "ha_takeover"][-1]["why"] == \
        "connection_gone"  # fmt: skip


def test_a_paused_active_is_fenced_and_writes_nothing_when_resumed(
    broker, pg, hook, tmp_path  # noqa: F811
):
    conf = pair_config(tmp_path, broker, pg, hook, lease_s=4.0)
    w = Watcher(broker)
    pub = publisher(broker)
    a = b = None
    try:
        a = Instance("a", conf, tmp_path, env())
        a.wait_role("active", 30)
        b = Instance("b", conf, tmp_path, env())
        b.wait_role("standby", 30)
        start = time.time() - 3 * 3600
        publish_all(pub, [("hourwatch/beds/b01/context", context("rc-0101", start))],
                    retain=True)  # fmt: skip
        feed1 = readings("rc-0101", start, 3.0)
        publish_all(pub, feed1[:100])
        token_a = token_of(pg, "a")
        wait_until(lambda: tokens(pg)[token_a] >= 101, 15, "the active journals")
        a.proc.send_signal(signal.SIGSTOP)
        b.wait_role("active", 30)  # after the lease expired: a's connection is still open
        written_by_a = tokens(pg)[token_a]
        publish_all(pub, feed1[100:])
        w.wait_for(lambda w: pod_active(w, "b01"), 30, "the alarm from the new active")
        a.proc.send_signal(signal.SIGCONT)
        a.wait_role("standby", 20)
        # more readings while the resumed process is there: the new active takes them
        feed2 = readings("rc-0101", start + 3 * 3600, 0.2)
        publish_all(pub, feed2)
        published = {(t, p["seq"]) for t, p in feed1 + feed2}

        def all_journaled() -> bool:
            msgs, _ = journal(pg)
            return {(m.topic, json.loads(m.payload)["seq"]) for m in msgs
                    if m.topic.startswith("meters/")} >= published  # fmt: skip

        wait_until(all_journaled, 30, "every reading journaled")
        time.sleep(1.5)
        assert b.wait_role("active", 5)["connected"] is True  # never knocked off the broker
    finally:
        for inst in (a, b):
            if inst is not None:
                inst.stop()
        pub.disconnect()
        w.close()
    assert tokens(pg)[token_a] == written_by_a, "the paused active wrote after it lost its lease"
    lost = [x for x in a.log() if x.get("event") == "ha_lease_lost"]
    assert lost, "the resumed active did not step down"
    why = [x for x in b.log() if x.get("event") == "ha_takeover"][-1]["why"]
    assert why == "expired"
    _, events = journal(pg)
    keys = [(e.alarm_id, e.body["state"], e.body["reason"], e.time)
            for e in events if e.kind == "alarm"]  # fmt: skip
    assert len(keys) == len(set(keys))


def test_sharding_by_ward_each_group_journals_and_pages_its_own_ward(
    broker, pg, pg2, tmp_path  # noqa: F811
):
    """Two groups on one broker, each with its own journal: icu-east and icu-west."""
    w = Watcher(broker)
    pub = publisher(broker)
    start = time.time() - 3 * 3600
    east_feed = readings("rc-0101", start, 3.0)
    west_feed = readings("rc-0909", start, 3.0)
    with (
        running_service(broker, tmp_path / "unused-e.db", journal__url=str(pg),
                        broker__client_id="hw-east", shard__wards=["icu-east"]) as east,
        running_service(broker, tmp_path / "unused-w.db", journal__url=str(pg2),
                        broker__client_id="hw-west", shard__wards=["icu-west"]) as west,
    ):  # fmt: skip
        publish_all(pub, [
            ("hourwatch/beds/b01/context", context("rc-0101", start, "icu-east")),
            ("hourwatch/beds/b09/context", context("rc-0909", start, "icu-west")),
        ], retain=True)  # fmt: skip
        publish_all(pub, east_feed + west_feed)
        w.wait_for(lambda w: pod_active(w, "b01") and pod_active(w, "b09"), 20, "both alarms")
        wait_until(lambda: east.metrics.journaled >= len(east_feed) + 1
                   and west.metrics.journaled >= len(west_feed) + 1,
                   10, "both journaled")  # fmt: skip
        time.sleep(0.5)
        assert east.shard.ignored >= len(west_feed) + 1
        assert west.shard.ignored >= len(east_feed) + 1
    pub.disconnect()
    w.close()
    for url, bed, dev, other_bed, other_dev, feed in (
        (pg, "b01", "rc-0101", "b09", "rc-0909", east_feed),
        (pg2, "b09", "rc-0909", "b01", "rc-0101", west_feed),
    ):
        msgs, events = journal(url)
        topics = [m.topic for m in msgs]
        assert f"hourwatch/beds/{bed}/context" in topics
        assert not [t for t in topics if other_bed in t or other_dev in t], "another ward's"
        assert len([t for t in topics if dev in t]) == len(feed)
        beds = {e.bed for e in events if e.kind == "alarm"}
        assert beds == {bed}
    east_alarms = {a["bed"] for a in alarm_msgs(w) if a["ward"] == "icu-east"}
    west_alarms = {a["bed"] for a in alarm_msgs(w) if a["ward"] == "icu-west"}
    assert east_alarms == {"b01"} and west_alarms == {"b09"}


def test_a_service_without_a_group_says_it_is_active(broker, tmp_path):  # noqa: F811
    with running_service(broker, tmp_path / "j.db") as svc:
        assert svc.health is not None
        body = health(svc.health.address[1])
    assert body["role"] == "active" and body["status"] == "ok"


def test_the_live_service_journals_identical_events_in_sqlite_and_postgresql(
    broker, pg, tmp_path  # noqa: F811
):
    """One scenario through the live service twice, on a clock that only moves when told:
    once on a journal file, once on PostgreSQL. The journals hold the same events."""
    from daemon.journal import SqliteJournal
    from tests.broker import FakeClock

    t0 = time.time()
    start = t0 - 3 * 3600
    feed = readings("rc-0101", start, 3.0)
    out = []
    for n, where in enumerate(({"journal__path": str(tmp_path / "j.db")},
                               {"journal__url": str(pg)})):  # fmt: skip
        clock = FakeClock(t0)
        w = Watcher(broker, client_id=f"watch-{n}")
        pub = publisher(broker, client_id=f"pub-{n}")
        with running_service(broker, tmp_path / "j.db", w, clock=clock,
                             broker__client_id=f"parity-{n}", **where) as svc:  # fmt: skip
            publish_all(pub, [("hourwatch/beds/b01/context", context("rc-0101", start))])
            publish_all(pub, feed)
            wait_until(lambda s=svc: s.metrics.journaled >= len(feed) + 1, 15, "journaled")
            w.wait_for(lambda w: pod_active(w, "b01"), 10, "the alarm")
            # everything confirmed before the clock jumps (else the jump makes a late
            # confirmation a `publish_failed` of the service's own, on its own clock)
            wait_until(lambda s=svc: not len(s.outbox), 10, "the broker's confirmations")
            clock.advance(1200)  # past the medium priority's first escalation (900 s)
            svc.timer_fired()
            w.wait_for(lambda w: [a for a in alarm_msgs(w) if a["state"] == "escalated"], 10,
                       "the escalation")  # fmt: skip
        pub.disconnect()
        w.close()
        j = SqliteJournal(tmp_path / "j.db") if n == 0 else PostgresJournal(pg)
        with j:  # the engine's events (recovery.ENGINE_KINDS), not the service's own
            out.append([(e.time, e.kind, e.bed, e.alarm_id, e.body)
                        for e in j.events_between(None, None)
                        if e.kind in ENGINE_KINDS])  # fmt: skip
    assert [e[1] for e in out[0]].count("alarm") >= 3
    assert out[0] == out[1]
