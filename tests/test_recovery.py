"""Restart recovery: rebuild the engine from the journal, publish what the downtime (or a
crash) left unsaid exactly once, and never page twice for what was already journaled.

The first tests drive the engine as the live service does and compare a restarted engine
with one that never stopped (no broker needed). The last ones run the service on a REAL
Mosquitto (tests/broker.py), including kill -9 under load and a broker restart.

All meters, beds and volumes are invented; no patient data.
"""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from daemon.engine.alarms import AlarmEvent
from daemon.engine.engine import Engine
from daemon.journal import SqliteJournal, journal_records
from daemon.profile_files import load_profiles
from daemon.recovery import longest_window_s, recover, rule_window_s
from daemon.rule_files import load_policy, load_rules
from daemon.service import journal_row
from simulator.meterlog import constant, iso_z, simulate
from tests.broker import (
    FakeClock,
    Watcher,
    broker,  # noqa: F401  (the fixture)
    publish_all,
    publisher,
    running_service,
)

PROFILES = load_profiles()
PROFILE = {p.name: p for p in PROFILES}["reference-cumulative"]
RULES = load_rules()
POLICY = load_policy()
T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC).timestamp()  # an invented night
HOUR = 3600.0
# source: Halbgewachs C, Domes T. Can Fam Physician 2015;61(2):137-42 -- post-obstructive
# diuresis is > 200 mL/h for 2 consecutive hours; 300 mL/h is an invented flow above it.
FLOW_ML_H = 300.0
# source: alert_rules/escalation.toml -- our own default: medium priority reaches tier 1
# after 900 s unacknowledged (common practice, no single source)
MEDIUM_TIER1_S = 900
GUARD_S = longest_window_s(RULES)
WINDOW_S = GUARD_S + 3600.0


def engine() -> Engine:
    return Engine(PROFILES, RULES, POLICY)


def records(hours: float, bed: str = "b01", device: str = "rc-1") -> list[tuple]:
    """(recv_time, topic, payload bytes): a bed context, then a simulated meter stream."""
    ctx = {
        "ward": "icu-east",
        "device_ids": [device],
        "weight_kg": 80,
        "weight_basis": "actual",
        "episodes": [{"kind": "obstruction_relieved", "at": iso_z(T0 - 7200.0)}],
    }
    sim = simulate(PROFILE, device, datetime.fromtimestamp(T0, UTC), hours, constant(FLOW_ML_H))
    out = [(T0, f"hourwatch/beds/{bed}/context", json.dumps(ctx).encode())]
    out += [(t, topic, json.dumps(p).encode()) for t, topic, p in sim.records]
    return out


def live(path: Path, recs: list[tuple], effects_until: int | None = None) -> list:
    """Journal as the live service does: each message, then its effects. With
    `effects_until`, the effects of message i >= effects_until are lost (a crash)."""
    eng = engine()
    produced = []
    with SqliteJournal(path) as j:
        for i, (t, topic, payload) in enumerate(recs):
            j.append_messages([(t, topic, payload, 1)])
            eff = eng.advance(t) + eng.step(topic, payload, t)
            produced.append(eff)
            if effects_until is None or i < effects_until:
                j.append_events([journal_row(e) for e in eff])
    return produced


def key(e: AlarmEvent) -> tuple:
    return (e.alarm_id, str(e.state), e.reason, e.time)


def uninterrupted(recs: list[tuple], until: float) -> list[AlarmEvent]:
    """Alarm events of an engine that never stopped, from the last message to `until`."""
    eng = engine()
    for t, topic, payload in recs:
        eng.advance(t)
        eng.step(topic, payload, t)
    return [e for e in eng.advance(until) if isinstance(e, AlarmEvent)]


def test_shipped_rules_need_a_24_hour_window():
    # source: Halbgewachs & Domes 2015 -- the 24-hour post-obstructive diuresis criterion
    # (> 3 L in 24 h) is the longest window among the shipped rules
    assert GUARD_S == 24 * HOUR
    assert "pod-24h" in {r.id for r in RULES if rule_window_s(r) == GUARD_S}
    assert rule_window_s(next(r for r in RULES if r.id == "pod-hourly")) == 2 * HOUR


def test_escalation_due_during_downtime_comes_out_once_as_if_never_stopped(tmp_path):
    recs = records(2.2)
    live(tmp_path / "j.db", recs)
    last = recs[-1][0]
    now = last + MEDIUM_TIER1_S + 100
    with SqliteJournal(tmp_path / "j.db") as j:
        rec = recover(engine(), j, now, WINDOW_S, GUARD_S, "hourwatch")
    expected = uninterrupted(recs, now)
    assert expected, "the scenario must have an escalation due in the downtime"
    assert [key(e) for e in rec.to_publish] == [key(e) for e in expected]
    # the chain went on during the downtime (and the silent meter was noticed)
    assert any(e.state == "escalated" for e in rec.to_publish)
    assert rec.differs == [] and rec.complete and rec.contexts == 0
    assert rec.messages == len(recs)
    # a second restart finds it journaled and publishes nothing again
    with SqliteJournal(tmp_path / "j.db") as j:
        j.append_events([journal_row(e) for e in rec.to_publish])
        again = recover(engine(), j, now + 5, WINDOW_S, GUARD_S, "hourwatch")
    assert again.to_publish == [] and again.differs == []
    assert again.already_journaled == rec.already_journaled + len(rec.to_publish)


def test_effects_lost_in_a_crash_after_journaling_the_messages_are_published(tmp_path):
    recs = records(3.0)
    produced = live(tmp_path / "full.db", recs)
    first = next(
        i for i, eff in enumerate(produced)
        if any(isinstance(e, AlarmEvent) and e.rule == "pod-hourly" for e in eff)
    )  # fmt: skip
    live(tmp_path / "j.db", recs, effects_until=first)  # died before journaling those
    now = recs[-1][0] + 1
    with SqliteJournal(tmp_path / "j.db") as j:
        rec = recover(engine(), j, now, WINDOW_S, GUARD_S, "hourwatch")
    lost = [key(e) for eff in produced[first:] for e in eff if isinstance(e, AlarmEvent)]
    lost += [key(e) for e in uninterrupted(recs, now)]
    published = [key(e) for e in rec.to_publish if isinstance(e, AlarmEvent)]
    assert published == lost
    assert any(k[0].startswith("b01/pod-hourly/") and k[1] == "active" for k in published)
    assert rec.differs == []


def test_an_alarm_open_for_longer_than_the_window_keeps_its_id_over_a_restart(tmp_path):
    """Open (latched, unacknowledged) for 28 h: the re-feed reaches back a full rule
    window before its onset, so it keeps renotifying under its own id, once."""
    recs = records(30.0)
    produced = live(tmp_path / "j.db", recs)
    ids = {e.alarm_id for eff in produced for e in eff
           if isinstance(e, AlarmEvent) and e.rule == "pod-hourly"}  # fmt: skip
    now = recs[-1][0] + 1000
    with SqliteJournal(tmp_path / "j.db") as j:
        rec = recover(engine(), j, now, WINDOW_S, GUARD_S, "hourwatch")
    assert rec.window_start < T0 and rec.complete
    expected = [key(e) for e in uninterrupted(recs, now)]
    assert expected, "a renotification falls in the downtime"
    assert [key(e) for e in rec.to_publish] == expected
    assert {k[0] for k in expected if "pod-hourly" in k[0]} <= ids
    assert rec.differs == []


def test_a_truncated_history_is_never_published_for_its_rebuilt_first_window(tmp_path):
    """With the look-back cut to 25 h, the rebuilt engine opens the episode afresh; what
    it says during its first (still filling) rule window is logged, never published."""
    recs = records(30.0)
    live(tmp_path / "j.db", recs)
    now = recs[-1][0] + 60
    with SqliteJournal(tmp_path / "j.db") as j:
        rec = recover(engine(), j, now, WINDOW_S, GUARD_S, "hourwatch", max_lookback_s=25 * HOUR)
    assert not rec.complete and rec.window_start == now - 25 * HOUR
    assert rec.contexts == 1  # the bed context from before the window was fed first
    assert rec.differs, "the rebuilt episode starts later than the live one"
    assert all(e.time >= rec.window_start + GUARD_S for e in rec.to_publish)
    assert not {key(e) for e in rec.differs} & {key(e) for e in rec.to_publish}


# --- on a real broker ----------------------------------------------------------------
def context(devices: list[str]) -> dict[str, Any]:
    """An obstruction relieved 12 h ago arms the post-obstructive rules (DESIGN §4)."""
    return {
        "ward": "icu-east",
        "device_ids": devices,
        "weight_kg": 80,
        "weight_basis": "actual",
        "episodes": [{"kind": "obstruction_relieved", "at": iso_z(time.time() - 12 * 3600)}],
    }


def readings(device: str, start: float, hours: float) -> list:
    sim = simulate(PROFILE, device, datetime.fromtimestamp(start, UTC), hours, constant(FLOW_ML_H))
    return [(topic, payload) for _, topic, payload in sim.records]


def alarm_msgs(w: Watcher) -> list[dict]:
    return w.json("hourwatch/alarms/")


@pytest.mark.parametrize("every_s", [0.0, 900.0], ids=["re-feed", "snapshot"])
def test_restart_publishes_the_downtime_escalation_once_and_nothing_twice(broker, tmp_path,  # noqa: F811
                                                                         every_s):  # fmt: skip
    """Alike whether the restart re-feeds the journal or loads the snapshot the clean stop
    wrote (and feeds nothing after it)."""
    clock = FakeClock(time.time())
    jpath = tmp_path / "j.db"
    w = Watcher(broker)
    pub = publisher(broker)
    with running_service(broker, jpath, w, clock=clock, recovery__snapshot_every_s=every_s):
        publish_all(pub, [("hourwatch/beds/b01/context", context(["rc-1"]))], retain=True)
        publish_all(pub, readings("rc-1", clock() - 2.2 * HOUR, 2.2))
        w.wait_for(lambda w: [a for a in alarm_msgs(w) if a["rule"] == "pod-hourly"], 5, "alarm")
        time.sleep(0.3)
    before = alarm_msgs(w)
    paging = {a["alarm_id"] for a in before if a["state"] == "active" and a["rule"] == "pod-hourly"}
    assert len(paging) == 1
    clock.advance(MEDIUM_TIER1_S + 100)  # the service is down while tier 1 falls due
    with running_service(broker, jpath, w, clock=clock, recovery__snapshot_every_s=every_s) as svc:
        w.wait_for(lambda w: [a for a in alarm_msgs(w) if a["state"] == "escalated"], 5, "esc")
        time.sleep(0.3)
        if every_s:
            assert svc.stats.recovery.snapshot_id is not None
            assert svc.stats.recovery.messages == 0
        else:
            assert svc.stats.recovery.snapshot_id is None
            assert svc.stats.recovery.messages == len(readings("rc-1", 0, 2.2)) + 1
    after = alarm_msgs(w)[len(before) :]
    escalated = {a["alarm_id"] for a in after if a["state"] == "escalated"}
    assert paging <= escalated  # the paging alarm's chain went on
    keys = [(a["alarm_id"], a["state"], a["reason"], a["time"]) for a in before + after]
    assert len(keys) == len(set(keys))  # nothing announced twice
    assert not [a for a in after if a["alarm_id"] in paging and a["state"] != "escalated"]
    for a in after:
        if a["state"] == "escalated":
            assert a["notify"] == ["bedside-nurse", "charge-nurse"]
    clock.advance(10)
    with running_service(broker, jpath, w, clock=clock, recovery__snapshot_every_s=every_s) as svc:
        time.sleep(0.5)
        assert svc.stats.recovery.to_publish == []
    assert len(alarm_msgs(w)) == len(before) + len(after)  # the third start said nothing new
    pub.disconnect()
    w.close()


def test_kill_9_under_load_loses_no_reading_and_journals_no_alarm_twice(broker, tmp_path):  # noqa: F811
    """2,400 QoS 1 readings from 10 meters, the service killed -9 three times while they
    flow: every reading ends up in the journal, every alarm event is journaled once and
    was published."""
    jpath = tmp_path / "j.db"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    cmd = [sys.executable, "-m", "daemon.cli", "run", "--broker", broker.address,
           "--journal", str(jpath)]  # fmt: skip
    conf = tmp_path / "hw.toml"
    conf.write_text('[health]\nlisten = ""\n')
    cmd += ["--config", str(conf)]
    w = Watcher(broker)
    pub = publisher(broker)
    start = time.time() - 4 * HOUR
    beds = [(f"b{i:02d}", f"rc-{i:02d}") for i in range(10)]
    for bed, dev in beds:
        publish_all(pub, [(f"hourwatch/beds/{bed}/context", context([dev]))], retain=True)
    feed = [m for _, dev in beds for m in readings(dev, start, 4.0)]
    assert len(feed) >= 2000
    rng = random.Random(7)
    # an hour of every meter per chunk, in time order (a later chunk is never "late")
    chunks = [sorted((m for m in feed if k * 60 < m[1]["seq"] <= (k + 1) * 60),
                     key=lambda m: (m[1]["seq"], m[0])) for k in range(4)]  # fmt: skip
    assert sum(map(len, chunks)) == len(feed)
    proc = None
    kills = 0
    try:
        for k, chunk in enumerate(chunks):
            n_status = len(w.json("hourwatch/status"))
            with (tmp_path / f"service-{k}.log").open("w") as log:  # kept for a post-mortem
                proc = subprocess.Popen(cmd, env=env, stdout=log, stderr=log)
            w.wait_for(lambda w, n=n_status: [s for s in w.json("hourwatch/status")[n:]
                                             if s["status"] == "online"], 20, "online")  # fmt: skip
            infos = [pub.publish(t, json.dumps(p), qos=1) for t, p in chunk]
            if chunk is not chunks[-1]:
                time.sleep(rng.uniform(0.05, 0.25))  # mid-flow
                proc.send_signal(signal.SIGKILL)
                proc.wait(10)
                kills += 1
            for info in infos:
                info.wait_for_publish(10)
        published = {(t, p["seq"]) for t, p in feed}
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline:
            # a reader only: a second writer in this process is not needed while it runs
            got = {(r.topic, r.payload["seq"]) for _, r in journal_records(jpath)
                   if r.topic.startswith("meters/") and isinstance(r.payload, dict)}  # fmt: skip
            if got >= published:
                break
            time.sleep(0.25)
        time.sleep(0.5)
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(15) == 0
    finally:
        if proc is not None and proc.poll() is None:
            proc.kill()
    assert kills == 3
    assert published - got == set(), f"{len(published - got)} readings missing"
    with SqliteJournal(jpath) as j:
        rows = list(j.messages_between(None, None))
        events = [e for e in j.events_between(None, None) if e.kind == "alarm"]
    keys = [(e.alarm_id, e.body["state"], e.body["reason"], e.time) for e in events]
    assert len(keys) == len(set(keys)), "an alarm event was journaled twice"
    assert {k[0].split("/")[1] for k in keys} >= {"pod-hourly"}
    assert {k[0].split("/")[0] for k in keys if "pod-hourly" in k[0]} == {b for b, _ in beds}
    wire = [(a["alarm_id"], a["state"], a["reason"], a["time"]) for a in alarm_msgs(w)]
    from daemon.engine.timefmt import iso

    assert {(a, s, r, iso(t)) for a, s, r, t in keys} == set(wire)  # all published
    dup_wire = len(wire) - len(set(wire))
    # at-least-once: only an event whose PUBACK was not yet recorded at a kill goes twice
    assert dup_wire <= kills * 20
    print(f"\njournal rows {len(rows)} for {len(published)} readings (redelivered "
          f"{len(rows) - len(published) - len(beds)}), alarm events {len(keys)}, "
          f"sent twice after a kill: {dup_wire}")  # fmt: skip
    pub.disconnect()
    w.close()


def test_broker_restart_loses_nothing_and_the_outage_alarm_goes_out_on_reconnect(broker, tmp_path):  # noqa: F811
    clock = FakeClock(time.time())
    jpath = tmp_path / "j.db"
    w = Watcher(broker, client_id="watch-persistent", persistent=True)
    pub = publisher(broker)
    with running_service(broker, jpath, w, clock=clock, publish__confirm_timeout_s=30) as svc:
        publish_all(pub, [("hourwatch/beds/b01/context", context(["rc-1"]))], retain=True)
        feed = readings("rc-1", clock() - 2.2 * HOUR, 2.2)
        publish_all(pub, feed[:60])
        broker.restart()  # SIGTERM: mosquitto saves its sessions and queued messages
        deadline = time.monotonic() + 5
        while not pub.is_connected() and time.monotonic() < deadline:
            time.sleep(0.05)
        publish_all(pub, feed[60:])
        active = w.wait_for(
            lambda w: [a for a in alarm_msgs(w) if a["rule"] == "pod-hourly"], 10, "alarm"
        )
        time.sleep(0.3)
        before_outage = {a["alarm_id"] for a in alarm_msgs(w) if a["state"] == "active"}
        broker.stop()  # the broker goes away for a while
        deadline = time.monotonic() + 5
        while svc.connected and time.monotonic() < deadline:
            time.sleep(0.02)
        assert not svc.connected
        clock.advance(MEDIUM_TIER1_S + 100)
        svc.timer_fired()  # tier 1 falls due during the outage: kept, in order
        time.sleep(0.3)
        ok, health = svc.health_report()
        assert not ok and health["delivery"] == "degraded" and health["outbox"] >= 1
        clock.advance(31)  # past the confirmation bound: a technical alarm of the service
        time.sleep(0.5)
        ok, health = svc.health_report()
        assert [t["code"] for t in health["technical_alarms"]][:1] == ["alarm_not_delivered"]
        outage_end = len(w.messages)
        broker.start()
        esc = w.wait_for(
            lambda w: [a for a in alarm_msgs(w) if a["state"] == "escalated"], 10, "escalation"
        )
        deadline = time.monotonic() + 5
        while svc.stats.technical and time.monotonic() < deadline:
            time.sleep(0.05)
        assert svc.stats.technical == {}  # delivered late: cleared
        w.wait_for(lambda w: w.json("hourwatch/status")[-1]["status"] == "online", 5, "online")
    # after the outage: the status says delivery is degraded before the held alarms go out
    after = [(t, json.loads(p)) for t, p, _ in w.messages[outage_end:] if p]
    kinds = [b["status"] if t == "hourwatch/status" else b.get("state") for t, b in after]
    assert "degraded" in kinds and kinds.index("degraded") < kinds.index("escalated")
    # (mosquitto may send the service's last will "offline" as it shuts down)
    degraded = next(b for t, b in after if t == "hourwatch/status" and b["status"] != "offline")
    assert degraded["delivery"] == "degraded"
    assert [x["code"] for x in degraded["technical_alarms"]][:1] == ["alarm_not_delivered"]
    assert {a["alarm_id"] for a in esc} == before_outage
    assert len(esc) == len({a["alarm_id"] for a in esc})  # once each
    with SqliteJournal(jpath) as j:
        seqs = {json.loads(m.payload)["seq"] for m in j.messages_between(None, None)
                if m.topic.startswith("meters/")}  # fmt: skip
        failed = [e for e in j.events_between(None, None) if e.kind == "publish_failed"]
        undelivered = j.undelivered_events()
    assert seqs == set(range(1, len(feed) + 1))  # nothing lost over the broker restart
    assert {a["alarm_id"] for a in esc} <= {e.alarm_id for e in failed}
    assert undelivered == []  # every alarm event confirmed in the end
    assert active
    pub.disconnect()
    w.close()
