"""`hourwatch run` against a REAL Mosquitto (tests/broker.py): never a mock client,
never a public broker. Every wait is bounded.

All meters, beds and volumes are invented; no patient data. The streams are simulated
with simulator/meterlog.py in the reference meter's own wire format.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from daemon.caution import CAUTION
from daemon.journal import SqliteJournal
from daemon.profile_files import load_profiles
from simulator.meterlog import constant, iso_z, simulate
from tests.broker import (
    FakeClock,
    Watcher,
    broker,  # noqa: F401  (the fixture)
    publish_all,
    publisher,
    running_service,
)

PROFILE = {p.name: p for p in load_profiles()}["reference-cumulative"]
# source: Halbgewachs C, Domes T. Postobstructive diuresis. Can Fam Physician
# 2015;61(2):137-42 -- post-obstructive diuresis: > 200 mL/h for 2 consecutive hours
POD_THRESHOLD_ML_H = 200.0
# Invented test flow, well above that threshold (a clear post-obstructive diuresis).
FLOW_ML_H = 300.0
# source: alert_rules/escalation.toml -- our own default: medium priority reaches tier 1
# (charge nurse) after 900 s unacknowledged (common practice, no single source)
MEDIUM_TIER1_S = 900


def context(devices: list[str], ward: str = "icu-east") -> dict[str, Any]:
    """An obstruction relieved 12 h ago arms the post-obstructive rules (DESIGN §4)."""
    return {
        "ward": ward,
        "device_ids": devices,
        "weight_kg": 80,
        "weight_basis": "actual",
        "episodes": [{"kind": "obstruction_relieved", "at": iso_z(time.time() - 12 * 3600)}],
    }


def readings(device: str, start: float, hours: float, ml_h: float = FLOW_ML_H) -> list:
    """(topic, payload) of a meter's simulated stream, device times from `start`."""
    sim = simulate(PROFILE, device, datetime.fromtimestamp(start, UTC), hours, constant(ml_h))
    return [(topic, payload) for _, topic, payload in sim.records]


def alarms(w: Watcher, rule: str | None = None, state: str | None = None) -> list[dict]:
    return [
        a
        for a in w.json("hourwatch/alarms/")
        if (rule is None or a["rule"] == rule) and (state is None or a["state"] == state)
    ]


def journal_rows(path: Path) -> tuple[list, list]:
    with SqliteJournal(path) as j:
        return list(j.messages_between(None, None)), list(j.events_between(None, None))


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_store_and_forward_upload_raises_pod_hourly_alarm(broker, tmp_path, protocol):  # noqa: F811
    """3 h of buffered readings at 300 mL/h (device times in the past), uploaded at once:
    journaled, acknowledged, and a pod-hourly alarm on the alarm topic within a second."""
    jpath = tmp_path / "j.db"
    w = Watcher(broker)
    with running_service(broker, jpath, w, broker__protocol=protocol) as svc:
        pub = publisher(broker)
        now = time.time()
        msgs = readings("rc-0101", now - 3 * 3600, 3.0)
        publish_all(pub, [("hourwatch/beds/b01/context", context(["rc-0101"]))], retain=True)
        t_sent = time.monotonic()
        publish_all(pub, msgs)
        active = w.wait_for(lambda w: alarms(w, "pod-hourly", "active"), 5, "pod-hourly alarm")
        latency = time.monotonic() - t_sent
        w.wait_for(lambda w: svc.metrics.acked >= len(msgs) + 1, 5, "every message acked")
        pub.disconnect()
    assert latency < 1.0, f"alarm took {latency:.2f} s after the upload began"
    (a,) = active
    assert a["schema"] == 1 and a["bed"] == "b01" and a["ward"] == "icu-east"
    assert a["notify"] == ["bedside-nurse"] and a["tier"] == 0 and a["priority"] == "medium"
    assert "treating clinician" in a["caution"] and "local protocols" in a["caution"]
    ev = a["evidence"]
    assert ev["threshold_ml_h"] == POD_THRESHOLD_ML_H and ev["comparator"] == "gt"
    assert len(ev["windows"]) == 2
    for win in ev["windows"]:  # invented 300 mL/h stream: each hour near 300 mL
        assert POD_THRESHOLD_ML_H < win["volume_ml"] <= FLOW_ML_H * 1.05, win
    assert a["alarm_id"].startswith("b01/pod-hourly/")
    # journaled before it was acknowledged and published; confirmed by the broker
    messages, events = journal_rows(jpath)
    assert len(messages) == len(msgs) + 1
    assert sorted(json.loads(m.payload)["seq"] for m in messages[1:]) == list(
        range(1, len(msgs) + 1)
    )
    (journaled,) = [e for e in events if e.kind == "alarm" and e.alarm_id == a["alarm_id"]
                    and e.body["state"] == "active"]  # fmt: skip
    assert journaled.delivered_at is not None
    assert journaled.body["evidence"] == ev
    # the bed's retained state names the alarm and the rolling hourly output
    late = Watcher(broker, "hourwatch/state/#", client_id="late")
    state = late.wait_for(lambda w: w.json("hourwatch/state/icu-east/b01"), 5, "retained state")[-1]
    late.close()
    assert [x["alarm_id"] for x in state["active_alarms"] if x["rule"] == "pod-hourly"] == [
        a["alarm_id"]
    ]
    assert abs(state["output_60min"]["volume_ml"] - FLOW_ML_H) < 0.1 * FLOW_ML_H
    assert state["data_quality"]["rc-0101"]["received"] == len(msgs)
    w.close()


def test_ack_over_mqtt_stops_escalation_and_unknown_id_is_rejected(broker, tmp_path):  # noqa: F811
    """Two beds alarm; the nurse acknowledges bed b01's alarm over MQTT. 1,000 s later
    (simulated) only the unacknowledged b02 alarm has escalated to the charge nurse."""
    clock = FakeClock(time.time())
    w = Watcher(broker)
    with running_service(broker, tmp_path / "j.db", w, clock=clock) as svc:
        pub = publisher(broker)
        start = clock() - 3 * 3600
        for bed, dev in (("b01", "rc-1"), ("b02", "rc-2")):
            publish_all(pub, [(f"hourwatch/beds/{bed}/context", context([dev]))], retain=True)
            publish_all(pub, readings(dev, start, 3.0))

        def two(w: Watcher) -> list[dict]:
            found = alarms(w, "pod-hourly", "active")
            return found if len(found) == 2 else []

        both = w.wait_for(two, 5, "two pod-hourly alarms")
        by_bed = {a["bed"]: a["alarm_id"] for a in both}
        # the per-user topic: the broker's ACL lets a client publish only under its own
        # user name (deploy/mosquitto/acl), so the user is the acknowledger
        assert all(a["acknowledge"]["topic"] == "hourwatch/ack/{user}" for a in both)
        ack = {"alarm_id": by_bed["b01"], "role": "bedside-nurse"}
        publish_all(pub, [("hourwatch/ack/nurse-7", ack)])
        acked = w.wait_for(lambda w: alarms(w, "pod-hourly", "acknowledged"), 5, "the ack event")
        assert [(x["alarm_id"], x["by"], x["role"]) for x in acked] == [
            (by_bed["b01"], "nurse-7", "bedside-nurse")
        ]
        unknown = {"alarm_id": "b09/pod-hourly/20200101T000000Z", "role": "bedside-nurse"}
        publish_all(pub, [("hourwatch/ack/nurse-7", unknown)])
        rej = w.wait_for(lambda w: w.json("hourwatch/rejected"), 5, "a rejection")
        assert rej[-1]["reason"] == "unknown_alarm" and rej[-1]["topic"] == "hourwatch/ack/nurse-7"
        # the shared topic is not even subscribed: an acknowledgement naming anyone in its
        # payload never reaches the engine
        assert "hourwatch/ack" not in svc.subscriptions
        # device id and topic only, never patient fields
        assert set(rej[-1]) == {"schema", "time", "topic", "device_id", "reason", "detail"}
        clock.advance(MEDIUM_TIER1_S + 100)
        svc.timer_fired()  # what APScheduler does when the wake-up falls due
        esc = w.wait_for(lambda w: alarms(w, "pod-hourly", "escalated"), 5, "an escalation")
        time.sleep(0.3)  # anything else would have come with it
        esc = alarms(w, "pod-hourly", "escalated")
        pub.disconnect()
    assert [e["alarm_id"] for e in esc] == [by_bed["b02"]]
    assert esc[0]["notify"] == ["bedside-nurse", "charge-nurse"] and esc[0]["tier"] == 1
    # stamped with the time it fell due, not when the timer got round to it
    due = datetime.fromisoformat(both[0]["time"]).timestamp() + MEDIUM_TIER1_S
    assert abs(datetime.fromisoformat(esc[0]["time"]).timestamp() - due) < 1.0
    w.close()


def test_manual_ack_only_after_journaling_broker_redelivers(broker, tmp_path, monkeypatch):  # noqa: F811
    """A service that journals but never acknowledges (as if it died before the ack) gets
    only the broker's in-flight window; the next one gets every reading, the unacked ones
    again, and the engine counts those as duplicates. Nothing is lost."""
    from daemon.mqtt_ingest import MqttLink

    jpath = tmp_path / "j.db"
    pub = publisher(broker)
    start = time.time() - 3600
    msgs = readings("rc-1", start, 50 / 60)  # 50 readings, one a minute
    publish_all(pub, [("hourwatch/beds/b01/context", context(["rc-1"]))], retain=True)
    with monkeypatch.context() as m:
        m.setattr(MqttLink, "ack", lambda self, mid, qos: True)  # journal, then no ack
        with running_service(broker, jpath, broker__receive_maximum=20) as svc:
            publish_all(pub, msgs)
            deadline = time.monotonic() + 3
            while time.monotonic() < deadline and svc.metrics.journaled < 20:
                time.sleep(0.05)
            time.sleep(0.3)
            first = svc.metrics.journaled
    # the in-flight window (Receive Maximum 20 QoS 1 messages) stalls without acks
    assert 1 < first < len(msgs) + 1
    with running_service(broker, jpath) as svc:
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline and svc.metrics.acked < len(msgs):
            time.sleep(0.05)
        time.sleep(0.2)
        dups = svc.engine.quality()["rc-1"]["outcomes"].get("duplicate", 0)
    messages, _ = journal_rows(jpath)
    seqs = [json.loads(m.payload)["seq"] for m in messages if m.topic.startswith("meters/")]
    assert sorted(set(seqs)) == list(range(1, len(msgs) + 1))  # none lost
    assert len(seqs) > len(msgs)  # the unacknowledged ones came again
    assert dups == len(seqs) - len(msgs)  # and the engine knew them for duplicates
    pub.disconnect()


def _hourwatch(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


def test_sigterm_stops_cleanly_and_status_goes_offline(broker, tmp_path):  # noqa: F811
    w = Watcher(broker)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    conf = tmp_path / "hw.toml"
    conf.write_text('[health]\nlisten = "127.0.0.1:0"\n[broker]\nclient_id = "hw-sub"\n')
    proc = subprocess.Popen(
        _hourwatch("run", "--config", str(conf), "--broker", broker.address,
                   "--journal", str(tmp_path / "j.db")),
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
    )  # fmt: skip
    try:
        online = w.wait_for(
            lambda w: [s for s in w.json("hourwatch/status") if s["status"] == "online"],
            20, "status online",
        )  # fmt: skip
        assert online[-1]["caution"] == CAUTION and online[-1]["schema"] == 1
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=15)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err[-2000:]
    lines = [json.loads(x) for x in out.splitlines() if x.startswith("{")]  # logs on stdout
    assert any(x["event"] == "service_stopped" for x in lines)
    assert all("level" in x and "timestamp" in x for x in lines)  # structured, one per line
    w.close()
    # retained: a newcomer learns the service is offline, and why
    late = Watcher(broker, "hourwatch/status", client_id="late")
    st = late.wait_for(lambda w: w.json("hourwatch/status"), 5, "retained status")[-1]
    late.close()
    assert st["status"] == "offline" and st["reason"] == "signal SIGTERM"


def test_kill_9_leaves_the_last_will_offline(broker, tmp_path):  # noqa: F811
    w = Watcher(broker)
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    proc = subprocess.Popen(
        _hourwatch("run", "--broker", broker.address, "--journal", str(tmp_path / "j.db")),
        stderr=subprocess.DEVNULL, env=env | {"HOURWATCH_MQTT_USERNAME": "hw"},
    )  # fmt: skip
    try:
        w.wait_for(lambda w: any(s["status"] == "online" for s in w.json("hourwatch/status")),
                   20, "status online")  # fmt: skip
        proc.kill()
        proc.wait(10)
        # keepalive is not needed: the broker sees the socket close at once
        will = w.wait_for(
            lambda w: [s for s in w.json("hourwatch/status") if s["status"] == "offline"],
            10, "the last will",
        )  # fmt: skip
    finally:
        if proc.poll() is None:
            proc.kill()
    assert will[-1]["reason"] == "connection lost" and will[-1]["caution"] == CAUTION
    w.close()


def test_health_and_metrics_endpoints(broker, tmp_path):  # noqa: F811
    import urllib.error
    import urllib.request

    with running_service(broker, tmp_path / "j.db") as svc:
        pub = publisher(broker)
        publish_all(pub, [("meters/rc-9/volume", b"not json")])
        deadline = time.monotonic() + 5
        while svc.metrics.acked < 1 and time.monotonic() < deadline:
            time.sleep(0.02)
        host, port = svc.health.address
        with urllib.request.urlopen(f"http://{host}:{port}/health", timeout=5) as r:
            assert r.status == 200
            body = json.loads(r.read())
        assert body["connected"] is True and body["worker_alive"] is True
        with urllib.request.urlopen(f"http://{host}:{port}/metrics", timeout=5) as r:
            text = r.read().decode()
        assert "hourwatch_messages_journaled_total 1" in text
        assert "hourwatch_messages_acked_total 1" in text
        assert 'hourwatch_rejected_total{reason="bad_payload"} 1' in text
        assert "hourwatch_ingest_latency_seconds_count 1" in text
        pub.disconnect()
        svc.link.client.disconnect()  # the broker is gone as far as the service knows
        deadline = time.monotonic() + 5
        while svc.connected and time.monotonic() < deadline:
            time.sleep(0.02)
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(f"http://{host}:{port}/health", timeout=5)
        assert err.value.code == 503


def _tls_files(d: Path) -> tuple[Path, Path, Path]:
    """A throw-away CA and a server certificate for 127.0.0.1, made with openssl."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.skip("openssl not found: cannot make test certificates")

    def run(*args: str) -> None:
        subprocess.run([openssl, *args], cwd=d, check=True, capture_output=True, timeout=30)

    run("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "2", "-subj", "/CN=test-ca",
        "-keyout", "ca.key", "-out", "ca.crt")  # fmt: skip
    run("req", "-newkey", "rsa:2048", "-nodes", "-subj", "/CN=localhost",
        "-keyout", "server.key", "-out", "server.csr")  # fmt: skip
    (d / "san.ext").write_text("subjectAltName=DNS:localhost,IP:127.0.0.1\n")
    run("x509", "-req", "-in", "server.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
        "-CAcreateserial", "-days", "2", "-extfile", "san.ext", "-out", "server.crt")  # fmt: skip
    return d / "ca.crt", d / "server.crt", d / "server.key"


def test_tls_with_password_is_accepted_and_anonymous_refused(tmp_path):
    import paho.mqtt.client as mqtt
    from paho.mqtt.enums import CallbackAPIVersion

    from daemon.config import load_config
    from daemon.service import Service
    from tests.broker import running_broker

    ca, cert, key = _tls_files(tmp_path)
    passwd = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
    if not os.access(passwd, os.X_OK):
        pytest.skip("mosquitto_passwd not found")
    pwfile = tmp_path / "passwords"
    subprocess.run([passwd, "-c", "-b", str(pwfile), "hw-service", "invented-secret"],
                   check=True, capture_output=True, timeout=30)  # fmt: skip
    listener = (f"cafile {ca}\ncertfile {cert}\nkeyfile {key}\n"
                f"allow_anonymous false\npassword_file {pwfile}\n")  # fmt: skip
    conf = tmp_path / "hw.toml"
    conf.write_text(
        f'[broker]\nusername = "hw-service"\n[broker.tls]\nca_file = "{ca}"\n'
        f'[health]\nlisten = ""\n[journal]\npath = "{tmp_path / "j.db"}"\n'
    )
    with running_broker(listener) as b:

        def attempt(password: str) -> Service:
            env = {"HOURWATCH_MQTT_PASSWORD": password}
            svc = Service(load_config(conf, broker=b.address, env=env))
            svc.start()
            deadline = time.monotonic() + 5
            while time.monotonic() < deadline and not (svc.connected or svc.link.last_error):
                time.sleep(0.02)
            return svc

        good = attempt("invented-secret")
        try:
            assert good.connected, good.link.last_error
        finally:
            good.stop()
        bad = attempt("wrong")
        try:
            assert not bad.connected and "authorized" in (bad.link.last_error or "").lower()
        finally:
            bad.stop()
        # an anonymous client over TLS is refused too
        refused: list[str] = []
        anon = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="anon")
        anon.tls_set(ca_certs=str(ca))
        anon.on_connect = lambda c, u, f, rc, p: refused.append(str(rc))
        anon.connect(b.host, b.port)
        anon.loop_start()
        deadline = time.monotonic() + 5
        while not refused and time.monotonic() < deadline:
            time.sleep(0.02)
        anon.loop_stop()
        assert refused and "authorized" in refused[0].lower()


def test_a_journal_that_cannot_write_stops_the_service_without_acking(broker, tmp_path):  # noqa: F811
    """Disk full or failing: the reading is not acknowledged, the service says it is
    offline and why, and the next start gets the reading again from the broker."""
    import sqlite3

    from daemon.journal import SqliteJournal as J

    jpath = tmp_path / "j.db"
    w = Watcher(broker)
    pub = publisher(broker)
    reading = readings("rc-1", time.time() - 600, 2 / 60)[:1]
    real = J.append_messages

    def failing(self, rows):
        raise sqlite3.OperationalError("database or disk is full")

    J.append_messages = failing  # type: ignore[method-assign]
    try:
        with running_service(broker, jpath, w) as svc:
            publish_all(pub, reading)
            svc.done.wait(5)
            assert svc.failed is not None and "disk is full" in svc.failed
            ok, health = svc.health_report()
            assert not ok and health["worker_alive"] is False
            assert svc.metrics.acked == 0
            svc.stop(f"worker failed: {svc.failed}")
    finally:
        J.append_messages = real  # type: ignore[method-assign]
    st = w.wait_for(
        lambda w: [s for s in w.json("hourwatch/status") if s["status"] == "offline"], 5, "offline"
    )
    assert "disk is full" in st[-1]["reason"]
    with running_service(broker, jpath) as svc:  # the broker kept the unacknowledged reading
        deadline = time.monotonic() + 5
        while svc.metrics.acked < 1 and time.monotonic() < deadline:
            time.sleep(0.02)
    messages, _ = journal_rows(jpath)
    assert [json.loads(m.payload)["seq"] for m in messages] == [reading[0][1]["seq"]]
    pub.disconnect()
    w.close()
