"""The live service with paging channels, end to end: a REAL Mosquitto (tests/broker.py),
the service, and the three real servers of tests/paging.py (aiosmtpd, an http.server that
checks the webhook signature, an MLLP listener that parses with hl7apy).

Beds, meters and volumes are invented. The stream is a post-obstructive diuresis at an
invented 300 mL/h after a recorded obstruction relief; the criterion it must meet:
# source: Halbgewachs C, Domes T. Postobstructive diuresis. Can Fam Physician
# 2015;61(2):137-42 -- > 200 mL/h for 2 consecutive hours
"""

from __future__ import annotations

import json
import time
import urllib.error
import urllib.request
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from daemon.engine.engine import Engine
from daemon.journal import SqliteJournal
from daemon.notify import acklinks
from daemon.profile_files import load_profiles
from daemon.replay import replay_file
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import constant, simulate
from tests.broker import (
    Watcher,
    broker,  # noqa: F401  (the fixture)
    publish_all,
    publisher,
    running_service,
)
from tests.paging import MailCatcher, MllpListener, WebhookReceiver, free_port, wait_until

PROFILE = {p.name: p for p in load_profiles()}["reference-cumulative"]
FLOW_ML_H = 300.0  # invented: a clear post-obstructive diuresis
HOOK_KEY = "invented-webhook-key-0123456789"
ACK_KEY = "invented-ack-link-key-0123456789"


def context(device: str, start: float) -> dict[str, Any]:
    relieved = datetime.fromtimestamp(start - 2 * 3600, UTC).isoformat()
    return {"ward": "icu-east", "device_ids": [device], "weight_kg": 80,
            "weight_basis": "actual",
            "episodes": [{"kind": "obstruction_relieved", "at": relieved}]}  # fmt: skip


def readings(device: str, start: float, hours: float) -> list[tuple[str, Any]]:
    sim = simulate(PROFILE, device, datetime.fromtimestamp(start, UTC), hours, constant(FLOW_ML_H))
    return [(topic, payload) for _, topic, payload in sim.records]


def raise_pod_alarm(pub: Any, bed: str, device: str) -> None:
    """Three hours of buffered readings uploaded at once: the pod-hourly alarm fires."""
    start = time.time() - 3 * 3600
    publish_all(pub, [(f"hourwatch/beds/{bed}/context", context(device, start))], retain=True)
    publish_all(pub, readings(device, start, 3.0))


class Servers:
    def __init__(self) -> None:
        self.mail = MailCatcher()
        self.hook = WebhookReceiver(HOOK_KEY.encode())
        self.mllp_port = free_port()
        self.mllp: MllpListener | None = MllpListener(["AA"], port=self.mllp_port)
        self.hl7_seen: list[Any] = []

    def hl7_down(self) -> None:
        assert self.mllp is not None
        self.hl7_seen += self.mllp.received
        self.mllp.stop()
        self.mllp = None

    def hl7_up(self) -> None:
        self.mllp = MllpListener(["AA"], port=self.mllp_port)

    def hl7(self) -> list[Any]:
        return self.hl7_seen + (self.mllp.received if self.mllp else [])

    def stop(self) -> None:
        self.mail.stop()
        self.hook.stop()
        if self.mllp:
            self.mllp.stop()


@pytest.fixture
def servers(monkeypatch):
    monkeypatch.setenv("HW_TEST_HOOK_KEY", HOOK_KEY)
    monkeypatch.setenv("HW_TEST_ACK_KEY", ACK_KEY)
    s = Servers()
    yield s
    s.stop()


def notify(s: Servers, **kw: Any) -> dict[str, Any]:
    return {
        "channels": [
            {"name": "pager-mail", "kind": "smtp", "host": "127.0.0.1", "port": s.mail.port,
             "sender": "hourwatch@icu-east.example", "timeout_s": 2},
            {"name": "unit-hook", "kind": "webhook", "url": s.hook.url,
             "secret_env": "HW_TEST_HOOK_KEY", "timeout_s": 2},
            {"name": "alert-mgr", "kind": "hl7v2-mllp", "host": "127.0.0.1",
             "port": s.mllp_port, "timeout_s": 2},
        ],
        "routes": [
            {"role": "bedside-nurse", "channel": "pager-mail", "to": ["nurse-east@pager.example"],
             "ward": "icu-east"},
            {"role": "bedside-nurse", "channel": "unit-hook", "to": ["team-east"]},
            {"role": "bedside-nurse", "channel": "alert-mgr", "to": ["east-station"]},
        ],
        # the bound under test: 2 failed attempts in a row, or 8 s after the first failure
        "fail_after_attempts": 2, "fail_after_s": 8, "retry_min_s": 0.5, "retry_max_s": 1,
    } | kw  # fmt: skip


def pod_alarms(w: Watcher, state: str = "active") -> list[dict[str, Any]]:
    return [a for a in w.json("hourwatch/alarms/")
            if a["rule"] == "pod-hourly" and a["state"] == state]  # fmt: skip


def get(url: str) -> Any:
    with urllib.request.urlopen(url, timeout=5) as r:
        return json.loads(r.read()) if "json" in r.headers["Content-Type"] else r.read().decode()


def test_three_channels_deliver_a_dead_one_alarms_and_a_restart_repeats_nothing(
    broker,  # noqa: F811
    tmp_path,
    servers,
):
    jpath = tmp_path / "j.db"
    health = free_port()
    w = Watcher(broker)
    overrides = {"notify": notify(servers), "health__listen": f"127.0.0.1:{health}"}
    with running_service(broker, jpath, w, **overrides):
        pub = publisher(broker)
        # 1. a post-obstructive diuresis alarm reaches the nurse over all three channels
        raise_pod_alarm(pub, "b01", "rc-0101")
        (a1,) = w.wait_for(lambda w: pod_alarms(w), 10, "the pod-hourly alarm on MQTT")
        t_alarm = time.monotonic()
        (mail,) = servers.mail.wait(1, timeout=10)
        wait_until(lambda: servers.hook.received and servers.hl7(), 10, "webhook and HL7 pages")
        took = time.monotonic() - t_alarm
        assert mail["Subject"] == a1["pager"]
        assert servers.hook.received[0].json()["page"] == a1["pager"]
        assert servers.hook.received[0].json()["alarm"]["alarm_id"] == a1["alarm_id"]
        assert servers.hl7()[0].answered == "AA" and a1["alarm_id"] in servers.hl7()[0].raw
        assert took < 10  # "within seconds": all three confirmed inside the wait above
        # 2. the alert manager dies; a second bed alarms: mail and webhook keep delivering,
        # the dead channel raises its technical alarm within the bound (2 attempts / 8 s)
        servers.hl7_down()
        raise_pod_alarm(pub, "b02", "rc-0202")
        (a2,) = w.wait_for(lambda w: [a for a in pod_alarms(w) if a["bed"] == "b02"], 10, "b02")
        t_b02 = time.monotonic()
        servers.mail.wait(2, timeout=10)
        wait_until(lambda: len(servers.hook.received) >= 2, 10, "the b02 webhook page")

        def technical(w: Watcher) -> list[dict[str, Any]]:
            return [s for s in w.json("hourwatch/status") if s.get("technical_alarms")]

        status = w.wait_for(technical, 15, "the technical alarm in the retained status")
        raised_after = time.monotonic() - t_b02
        assert raised_after < 8 + 2 * 2 + 1  # fail_after_s, plus two attempts' timeouts
        tech = status[-1]["technical_alarms"][0]
        assert tech["code"] == "notify_channel_failing" and "alert-mgr" in tech["text"]
        mails = servers.mail.wait(3, timeout=10)  # the technical alarm, paged by mail
        assert (
            "ALARM medium: technical:" in mails[2]["Subject"] and "alert-mgr" in mails[2]["Subject"]
        )
        body = get(f"http://127.0.0.1:{health}/health")
        assert body["notify"]["channels"]["alert-mgr"]["state"] == "failing"
        assert body["notify"]["channels"]["pager-mail"]["state"] == "ok"
        assert any(t["code"] == "notify_channel_failing" for t in body["technical_alarms"])
        metrics = get(f"http://127.0.0.1:{health}/metrics")
        assert 'hourwatch_notify_channel_failing{channel="alert-mgr"} 1' in metrics
        assert 'hourwatch_notify_pages_total{channel="pager-mail",outcome="confirmed"} 3' \
            in metrics  # fmt: skip
        pub.disconnect()
    # 3. restart with the b02 HL7 page still in flight; the alert manager is back
    servers.hl7_up()
    with running_service(broker, jpath, w, **overrides):
        wait_until(lambda: any(a2["alarm_id"] in r.raw for r in servers.hl7()), 15, "b02 HL7")
        w.wait_for(lambda w: [s for s in w.json("hourwatch/status")
                              if s["status"] == "online" and not s.get("technical_alarms")],
                   15, "the technical alarm resolved in the status")  # fmt: skip
        servers.mail.wait(4, timeout=10)  # its resolution, by mail
        time.sleep(1.5)  # anything sent twice would have arrived by now
    w.close()
    assert "RESOLVED" in servers.mail.mails[3]["Subject"]
    # nobody got the same page twice, on any channel, across the restart
    for seen in (Counter(m["Message-ID"] for m in servers.mail.mails),
                 Counter(h.headers["Idempotency-Key"] for h in servers.hook.received),
                 Counter(r.message.msh.msh_10.to_er7() for r in servers.hl7())):  # fmt: skip
        assert set(seen.values()) == {1}, seen
    assert len(servers.mail.mails) == 4 and len(servers.hook.received) == 4
    assert [a1["alarm_id"] in r.raw or a2["alarm_id"] in r.raw for r in servers.hl7()] == [
        True, True]  # fmt: skip
    with SqliteJournal(jpath) as j:
        kinds = Counter(ev.body["state"] for ev in j.events_between(None, None)
                        if ev.kind == "notify_alarm")  # fmt: skip
    assert kinds == {"active": 1, "resolved": 1}


def test_acknowledgement_link_get_shows_post_acknowledges_once(broker, tmp_path, servers):  # noqa: F811
    jpath = tmp_path / "j.db"
    health = free_port()
    base = f"http://127.0.0.1:{health}"
    w = Watcher(broker)
    cfg = notify(servers, ack_base_url=base, ack_secret_env="HW_TEST_ACK_KEY")
    with running_service(broker, jpath, w, notify=cfg, health__listen=f"127.0.0.1:{health}") \
            as svc:  # fmt: skip
        pub = publisher(broker)
        raise_pod_alarm(pub, "b01", "rc-0101")
        (alarm,) = w.wait_for(lambda w: pod_alarms(w), 10, "the pod-hourly alarm")
        (mail,) = servers.mail.wait(1, timeout=10)
        wait_until(lambda: servers.hook.received, 10, "the webhook page")
        url = next(line for line in mail.get_content().splitlines() if line.startswith(base))
        assert servers.hook.received[0].json()["ack_url"].startswith(base + "/ack/")
        assert servers.hook.received[0].json()["ack_url"] != url  # one link per recipient
        # GET shows a confirmation page and acknowledges nothing (a link preview is safe)
        page = get(url)
        assert "Acknowledge as bedside-nurse" in page and alarm["alarm_id"] in page
        assert 'method="post"' in page
        time.sleep(0.5)
        assert not pod_alarms(w, "acknowledged")
        # a tampered token is refused
        token = url.rsplit("/", 1)[1]
        forged = token[:-2] + ("AA" if not token.endswith("AA") else "BB")
        for method, data in (("GET", None), ("POST", b"by=someone")):
            forged_req = urllib.request.Request(f"{base}/ack/{forged}", data=data, method=method)
            with pytest.raises(urllib.error.HTTPError) as exc:
                urllib.request.urlopen(forged_req, timeout=5)
            assert exc.value.code == 403
        # POST acknowledges once, as the role the page went to, through the engine
        req = urllib.request.Request(url, data=b"by=nurse+seven", method="POST")
        with urllib.request.urlopen(req, timeout=10) as r:
            assert r.status == 200 and "Acknowledged by nurse seven" in r.read().decode()
        (acked,) = w.wait_for(lambda w: pod_alarms(w, "acknowledged"), 5, "the ack event")
        assert (acked["by"], acked["role"]) == ("nurse seven", "bedside-nurse")
        with pytest.raises(urllib.error.HTTPError) as exc:  # reused
            urllib.request.urlopen(urllib.request.Request(url, data=b"", method="POST"), timeout=5)
        assert exc.value.code == 409
        with pytest.raises(urllib.error.HTTPError) as exc:  # and its GET says so
            urllib.request.urlopen(url, timeout=5)
        assert exc.value.code == 409 and "already used" in exc.value.read().decode()
        # the same handler, an hour and a minute later: the link has expired
        n = svc.notifier
        assert n is not None and n.store is not None
        later = acklinks.AckLinks(ACK_KEY.encode(), n.store, svc.acknowledge_from_link,
                                  lambda: time.time() + 3660)  # fmt: skip
        hook_url = servers.hook.received[0].json()["ack_url"]
        reply = later.handle("POST", hook_url[len(base) :], b"")
        assert reply is not None and reply.status == 410
        pub.disconnect()
    w.close()
    # journaled as an acknowledgement message with who and role: a replay agrees
    with SqliteJournal(jpath) as j:
        acks = [json.loads(m.payload) for m in j.messages_between(None, None)
                if m.topic == "hourwatch/ack"]  # fmt: skip
    assert acks == [{"alarm_id": alarm["alarm_id"], "by": "nurse seven", "role": "bedside-nurse"}]
    engine = Engine(load_profiles(), load_rules(), load_policy())
    replayed = replay_file(jpath, engine, warn=None).effects
    states = [(e.state, e.by, e.role) for e in replayed
              if getattr(e, "alarm_id", None) == alarm["alarm_id"]]  # fmt: skip
    assert ("acknowledged", "nurse seven", "bedside-nurse") in states


def test_notify_test_command_reports_each_recipient(tmp_path, servers, capsys):
    from daemon.cli import main

    conf = tmp_path / "hw.toml"
    n = notify(servers)
    lines = []
    for c in n["channels"]:
        lines.append("[[notify.channels]]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in c.items()]
    for r in n["routes"]:
        lines.append("[[notify.routes]]")
        lines += [f"{k} = {json.dumps(v)}" for k, v in r.items()]
    conf.write_text(f'[journal]\npath = "{tmp_path / "j.db"}"\n' + "\n".join(lines) + "\n")
    assert main(["notify-test", "--config", str(conf), "--role", "bedside-nurse"]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0].startswith("ok    pager-mail (smtp)  nurse-east@pager.example  SMTP 250")
    assert out[1].startswith("ok    unit-hook (webhook)  team-east  HTTP 200")
    assert out[2].startswith("ok    alert-mgr (hl7v2-mllp)  east-station  ACK AA")
    assert out[3] == "3 of 3 test pages confirmed for role bedside-nurse"
    assert servers.mail.mails[0]["Subject"].startswith("TEST PAGE, not an alarm")
    assert servers.hook.received[0].json()["type"] == "test"
    assert "TEST PAGE" in servers.hl7()[0].raw
    assert not (tmp_path / "j.db").exists()  # nothing journaled
    servers.hl7_down()
    assert main(["notify-test", "--config", str(conf), "--role", "bedside-nurse"]) == 1
    out = capsys.readouterr().out.splitlines()
    assert out[2].startswith("FAIL  alert-mgr (hl7v2-mllp)  east-station  MLLP")
    assert main(["notify-test", "--config", str(conf), "--role", "icu-physician"]) == 2
    assert "--role: no route for role 'icu-physician'" in capsys.readouterr().err


def outbox(jpath: Path) -> list[tuple[str, str, str]]:
    """(channel, status, alarm id) of every delivery, read-only (the service is writing)."""
    import sqlite3

    db = sqlite3.connect(f"file:{jpath}?mode=ro", uri=True)
    try:
        return db.execute("SELECT channel, status, alarm_id FROM deliveries ORDER BY id").fetchall()
    except sqlite3.OperationalError:  # not created yet
        return []
    finally:
        db.close()


def test_kill_9_with_a_page_in_flight_then_restart_sends_it_once(broker, tmp_path, servers):  # noqa: F811
    """The alert manager is down: the HL7 page waits in the outbox while mail and webhook
    deliver. The service is killed -9; the alert manager comes back; the restarted
    service sends the waiting page once and repeats none of the confirmed ones."""
    import os
    import signal
    import subprocess
    import sys

    jpath = tmp_path / "j.db"
    n = notify(servers)
    lines = ['[health]\nlisten = ""', f'[journal]\npath = "{jpath}"',
             f'[broker]\nhost = "{broker.host}"\nport = {broker.port}\n'
             'client_id = "hourwatch-kill-test"']  # fmt: skip
    for c in n.pop("channels"):
        lines.append("[[notify.channels]]\n" + "\n".join(f"{k} = {json.dumps(v)}"
                                                         for k, v in c.items()))  # fmt: skip
    for r in n.pop("routes"):
        lines.append("[[notify.routes]]\n" + "\n".join(f"{k} = {json.dumps(v)}"
                                                       for k, v in r.items()))  # fmt: skip
    head = "[notify]\n" + "\n".join(f"{k} = {json.dumps(v)}" for k, v in n.items())
    conf = tmp_path / "hw.toml"
    conf.write_text("\n".join([lines[0], lines[1], lines[2], head, *lines[3:]]) + "\n")
    root = Path(__file__).resolve().parent.parent
    env = dict(os.environ, PYTHONPATH=str(root))
    cmd = [sys.executable, "-m", "daemon.cli", "run", "--config", str(conf)]
    w = Watcher(broker)
    servers.hl7_down()
    proc = None

    def start(k: int) -> subprocess.Popen[bytes]:
        seen = len(w.json("hourwatch/status"))
        with (tmp_path / f"service-{k}.log").open("w") as log:  # kept for a post-mortem
            p = subprocess.Popen(cmd, env=env, stdout=log, stderr=log)
        w.wait_for(lambda w: [s for s in w.json("hourwatch/status")[seen:]
                              if s["status"] != "offline"], 20, "the service online")  # fmt: skip
        return p

    try:
        proc = start(0)
        pub = publisher(broker)
        raise_pod_alarm(pub, "b01", "rc-0101")
        (alarm,) = w.wait_for(lambda w: pod_alarms(w), 10, "the pod-hourly alarm")

        def settled() -> bool:  # every page but the HL7 one confirmed, incl. the technical
            rows = outbox(jpath)
            waiting = {(ch, a.split("/")[0]) for ch, st, a in rows if st != "confirmed"}
            return any(a.startswith("notify/") for _, _, a in rows) and \
                waiting == {("alert-mgr", "b01")}  # fmt: skip

        wait_until(settled, 20, "mail and webhook confirmed, the HL7 page waiting")
        proc.send_signal(signal.SIGKILL)
        proc.wait(10)
        pub.disconnect()
        servers.hl7_up()
        proc = start(1)
        wait_until(lambda: servers.hl7(), 15, "the waiting HL7 page")
        wait_until(lambda: all(st == "confirmed" for _, st, _ in outbox(jpath)), 15,
                   "every page confirmed, the resolution too")  # fmt: skip
        time.sleep(1.0)  # anything sent twice would have arrived by now
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(15) == 0
    finally:
        if proc is not None and proc.poll() is None:
            proc.kill()
        w.close()
    (hl7,) = servers.hl7()  # once, after the restart
    assert alarm["alarm_id"] in hl7.raw and hl7.answered == "AA"
    for seen in (Counter(m["Message-ID"] for m in servers.mail.mails),
                 Counter(h.headers["Idempotency-Key"] for h in servers.hook.received)):  # fmt: skip
        assert set(seen.values()) == {1}, seen
    subjects = [m["Subject"] for m in servers.mail.mails]
    assert subjects[0] == alarm["pager"]
    assert (
        "ALARM medium: technical:" in subjects[1]
        and "RESOLVED" in subjects[2]
        and len(subjects) == 3
    )


def status_report(alarm_id: str, status: str, control: str, person: str = "",
                  recipient: str = "east-station") -> bytes:  # fmt: skip
    """An alert manager's ORU^R41, built with hl7apy on the test side."""
    from hl7apy.core import Message

    m = Message("ORU_R01", version="2.6")
    m.msh.msh_3 = "ALERT-MGR"
    m.msh.msh_7 = time.strftime("%Y%m%d%H%M%S+0000", time.gmtime())
    m.msh.msh_9 = "ORU^R41^ORU_R01"
    m.msh.msh_10 = control
    m.msh.msh_11 = "P"
    order = m.add_group("ORU_R01_PATIENT_RESULT").add_group("ORU_R01_ORDER_OBSERVATION")
    order.obr.obr_1 = "1"
    order.obr.obr_3 = alarm_id
    order.obr.obr_4 = "196616^MDC_EVT_ALARM^MDC"
    for n, (code, value) in enumerate((("STATUS", status), ("RECIPIENT", recipient)), start=1):
        obx = order.add_group("ORU_R01_OBSERVATION").obx
        obx.obx_1, obx.obx_2, obx.obx_3 = str(n), "ST", f"{code}^{code.title()}^99HW"
        obx.obx_5, obx.obx_11 = value, "F"
        if code == "STATUS" and person:
            obx.obx_16 = person
    return bytes(m.to_er7().encode())


def mllp_send(port: int, message: bytes) -> str:
    """Send one MLLP block, return MSA-1 and MSA-3 of the answer."""
    import socket

    with socket.create_connection(("127.0.0.1", port), timeout=10) as s:
        s.sendall(b"\x0b" + message + b"\x1c\r")
        buf = b""
        while b"\x1c\r" not in buf:
            chunk = s.recv(4096)
            assert chunk, "closed before the ACK"
            buf += chunk
    ack = buf.strip(b"\x0b\x1c\r").decode()
    msa = next(seg for seg in ack.split("\r") if seg.startswith("MSA|")).split("|")
    return "|".join([msa[1], msa[3] if len(msa) > 3 else ""])


def test_hl7_status_report_from_the_alert_manager_acknowledges_when_configured(
    broker,  # noqa: F811
    tmp_path,
    servers,
):
    status_port = free_port()
    cfg = notify(servers)
    cfg["channels"][2] |= {"status_listen": f"127.0.0.1:{status_port}",
                           "ack_statuses": ["accepted"]}  # fmt: skip
    w = Watcher(broker)
    with running_service(broker, tmp_path / "j.db", w, notify=cfg):
        pub = publisher(broker)
        raise_pod_alarm(pub, "b01", "rc-0101")
        (alarm,) = w.wait_for(lambda w: pod_alarms(w), 10, "the pod-hourly alarm")
        wait_until(lambda: servers.hl7(), 10, "the HL7 page")
        aid = alarm["alarm_id"]
        # a status that is not an acceptance is taken (AA) and changes nothing
        assert mllp_send(status_port, status_report(aid, "delivered", "s1")) == "AA|"
        time.sleep(0.5)
        assert not pod_alarms(w, "acknowledged")
        # not a valid ORU^R41: AR; an alarm we never paged over this channel: AE
        assert mllp_send(status_port, b"MSH|^~\\&|X||||||ADT^A01|s2|P|2.6").startswith("AR|")
        unknown = mllp_send(status_port, status_report("b09/pod-hourly/x", "accepted", "s3"))
        assert unknown.startswith("AE|")
        # accepted by a person on the alert manager: acknowledged as the paged role
        answer = mllp_send(status_port, status_report(aid, "Accepted", "s4", "n7^Seven"))
        assert answer == "AA|", answer
        (acked,) = w.wait_for(lambda w: pod_alarms(w, "acknowledged"), 5, "the ack event")
        assert (acked["by"], acked["role"]) == ("n7", "bedside-nurse")
        pub.disconnect()
    w.close()
