"""The delivery outbox and the notifier, against real channel servers on loopback and a
real journal file (no MQTT here; tests/test_notify_live.py runs the whole service).

Alarm events are built with the engine's own AlarmEvent (its pager line and JSON) and
journaled as the service journals them. Volumes and beds are invented; the numbers in
the summaries are not checked against any clinical threshold here.
"""

from __future__ import annotations

import threading
import time
from collections import Counter
from pathlib import Path

import pytest

from daemon.engine.alarms import AlarmEvent, Kind, Priority, State
from daemon.journal import SqliteJournal
from daemon.notify.notifier import Notifier
from daemon.notify.settings import NotifyConfig, Secrets
from daemon.notify.store import SqliteDeliveryStore
from daemon.service import journal_row
from tests.paging import MailCatcher, MllpListener, WebhookReceiver, free_port, wait_until

SECRET = b"invented-webhook-key-0123456789"
ONSET = "20260314T191831Z"


def event(bed: str = "bed-02", state: State = State.ACTIVE, tier: int = 0,
          notify: tuple[str, ...] = ("bedside-nurse",), t: float | None = None,
          reason: str = "condition_met") -> AlarmEvent:  # fmt: skip
    return AlarmEvent(
        time=time.time() if t is None else t, alarm_id=f"{bed}/pod-hourly/{ONSET}", bed=bed,
        ward="icu-east", rule="pod-hourly", priority=Priority.MEDIUM, kind=Kind.PHYSIOLOGICAL,
        state=state, reason=reason,
        summary="last 2 hours 250, 260 mL (alarm when each is > 200 mL)",  # invented numbers
        evidence={}, tier=tier, notify=notify, title="Post-obstructive diuresis: invented",
    )  # fmt: skip


def journal(path: Path, *events: AlarmEvent) -> list[int]:
    with SqliteJournal(path) as j:
        return j.append_events([journal_row(e) for e in events])


def config(mail_port: int, hook_url: str, mllp_port: int, **kw: object) -> NotifyConfig:
    data: dict[str, object] = {
        "channels": [
            {"name": "pager-mail", "kind": "smtp", "host": "127.0.0.1", "port": mail_port,
             "sender": "hourwatch@icu-east.example", "timeout_s": 2},
            {"name": "unit-hook", "kind": "webhook", "url": hook_url, "secret_env": "K",
             "timeout_s": 2},
            {"name": "alert-mgr", "kind": "hl7v2-mllp", "host": "127.0.0.1", "port": mllp_port,
             "timeout_s": 2},
        ],
        "routes": [
            {"role": "bedside-nurse", "channel": "pager-mail", "to": ["nurse-east@pager.example"]},
            {"role": "bedside-nurse", "channel": "unit-hook", "to": ["team-east"]},
            {"role": "bedside-nurse", "channel": "alert-mgr", "to": ["east-station"]},
            {"role": "charge-nurse", "channel": "pager-mail",
             "to": ["charge-east@pager.example", "nurse-east@pager.example"]},
        ],
        "retry_min_s": 0.2, "retry_max_s": 0.5, "fail_after_attempts": 2, "fail_after_s": 30,
    }  # fmt: skip
    return NotifyConfig.model_validate(data | kw)


class Servers:
    def __init__(self) -> None:
        self.mail = MailCatcher()
        self.hook = WebhookReceiver(SECRET)
        self.mllp = MllpListener(["AA"])

    def stop(self) -> None:
        self.mail.stop()
        self.hook.stop()
        self.mllp.stop()


@pytest.fixture
def servers():
    s = Servers()
    yield s
    s.stop()


def notifier(path: Path, cfg: NotifyConfig) -> Notifier:
    n = Notifier(cfg, Secrets({"unit-hook": SECRET.decode()}), path)
    n.start()
    return n


def fresh_journal(tmp_path: Path) -> Path:
    path = tmp_path / "j.db"
    SqliteJournal(path).close()
    return path


def test_one_alarm_event_reaches_every_route_once(tmp_path, servers):
    path = fresh_journal(tmp_path)
    cfg = config(servers.mail.port, servers.hook.url, servers.mllp.port)
    n = notifier(path, cfg)
    try:
        e = event()
        journal(path, e)
        n.wake()
        mails = servers.mail.wait(1)
        wait_until(lambda: servers.hook.received and servers.mllp.received, 10, "hook and HL7")
        store = n.store
        assert store is not None
        wait_until(lambda: all(d.status == "confirmed" for d in store.deliveries()), 5, "confirmed")
        deliveries = store.deliveries()
    finally:
        n.stop()
    assert sorted((d.channel, d.recipient) for d in deliveries) == [
        ("alert-mgr", "east-station"), ("pager-mail", "nurse-east@pager.example"),
        ("unit-hook", "team-east")]  # fmt: skip
    assert [d.answer.split(" ")[0] for d in sorted(deliveries, key=lambda d: d.channel)] == [
        "ACK", "SMTP", "HTTP"]  # fmt: skip
    # every page text is the engine's pager line
    assert mails[0]["Subject"] == e.pager()
    assert servers.hook.received[0].signature_ok
    assert servers.hook.received[0].json()["page"] == e.pager()
    assert servers.hook.received[0].json()["alarm"]["alarm_id"] == e.alarm_id
    assert len(servers.mail.mails) == len(servers.hook.received) == len(servers.mllp.received) == 1


def test_a_recipient_under_two_roles_of_one_event_gets_one_page(tmp_path, servers):
    """An escalation pages bedside and charge nurse; the bedside pager address is on both
    roles' routes: one mail to it, one to the charge nurse."""
    path = fresh_journal(tmp_path)
    n = notifier(path, config(servers.mail.port, servers.hook.url, servers.mllp.port))
    try:
        journal(path, event(state=State.ESCALATED, tier=1, reason="escalation_due",
                            notify=("bedside-nurse", "charge-nurse")))  # fmt: skip
        n.wake()
        servers.mail.wait(2)
        time.sleep(1.0)  # a third mail would be here by now
    finally:
        n.stop()
    rcpts = sorted(r for _, rs in servers.mail.envelopes for r in rs)
    assert rcpts == ["charge-east@pager.example", "nurse-east@pager.example"]


def test_restart_with_pages_in_flight_repeats_no_page(tmp_path, servers):
    """Pages confirmed before a stop are not sent again; pages still queued when it
    stopped (the HL7 receiver was down) go once after the restart; a second restart
    sends nothing at all. The same event journaled twice is paged once."""
    path = fresh_journal(tmp_path)
    port = servers.mllp.port
    servers.mllp.stop()  # the alert manager is down
    cfg = config(servers.mail.port, servers.hook.url, port)
    n = notifier(path, cfg)
    e1 = event(bed="bed-02")
    try:
        journal(path, e1)
        n.wake()
        servers.mail.wait(1)
        wait_until(lambda: servers.hook.received, 5, "the webhook page")
        store = n.store
        assert store is not None
        wait_until(lambda: any(d.channel == "alert-mgr" and d.attempts >= 1
                               for d in store.deliveries()), 5, "an HL7 attempt")  # fmt: skip
    finally:
        n.stop()
    e2 = event(bed="bed-03")
    journal(path, e2, e2)  # journaled while stopped (twice: the key keeps it one page)
    servers.mllp = MllpListener(["AA"], port=port)  # back up
    n = notifier(path, cfg)
    try:
        wait_until(lambda: len(servers.mllp.received) >= 2, 15, "both HL7 pages")
        servers.mail.wait(2)
        wait_until(lambda: len(servers.hook.received) >= 2, 5, "both webhook pages")
        time.sleep(1.0)
    finally:
        n.stop()
    n = notifier(path, cfg)  # and once more: nothing left to send
    time.sleep(1.0)
    n.stop()
    keys = Counter(h.headers["Idempotency-Key"] for h in servers.hook.received)
    ids = Counter(m["Message-ID"] for m in servers.mail.mails)
    controls = Counter(r.message.msh.msh_10.to_er7() for r in servers.mllp.received)
    for seen in (keys, ids, controls):
        assert len(seen) == 2 and set(seen.values()) == {1}, seen
    beds = sorted(r.raw.split("OBR|1||")[1].split("/")[0] for r in servers.mllp.received)
    assert beds == ["bed-02", "bed-03"]


def test_a_failing_channel_raises_a_technical_alarm_paged_over_the_others(tmp_path, servers):
    """HL7 receiver answers AE: after fail_after_attempts (2) failed attempts the channel's
    technical alarm is journaled and paged to bedside-nurse by mail and webhook (never by
    HL7); when the receiver answers AA again, the page goes and the alarm resolves."""
    path = fresh_journal(tmp_path)
    servers.mllp.codes = ["AE"]
    n = notifier(path, config(servers.mail.port, servers.hook.url, servers.mllp.port))
    try:
        e = event()
        journal(path, e)
        n.wake()
        wait_until(lambda: n.technical(), 10, "the technical alarm")
        mails = servers.mail.wait(2)  # the alarm's page, then the technical alarm's
        assert (
            "ALARM medium: technical:" in mails[1]["Subject"] and "alert-mgr" in mails[1]["Subject"]
        )
        assert mails[1]["Subject"].endswith("Decision support: verify per local protocol.")
        wait_until(lambda: len(servers.hook.received) >= 2, 5, "technical alarm by webhook")
        tech = servers.hook.received[1].json()
        assert tech["type"] == "technical" and tech["alarm"]["channel"] == "alert-mgr"
        assert tech["alarm"]["kind"] == "technical" and tech["role"] == "bedside-nurse"
        assert n.health()["channels"]["alert-mgr"]["state"] == "failing"
        assert 'hourwatch_notify_channel_failing{channel="alert-mgr"} 1' in n.metrics_text()
        hl7_before = len(servers.mllp.received)
        servers.mllp.codes = ["AA"]
        wait_until(lambda: not n.technical(), 10, "the technical alarm to resolve")
        servers.mail.wait(3)  # the resolution, by mail
        assert "RESOLVED" in servers.mail.mails[2]["Subject"]
    finally:
        n.stop()
    # the HL7 channel never carried its own technical alarm: only the alarm's page, retried
    assert all("notify/" not in r.raw for r in servers.mllp.received)
    assert servers.mllp.received[-1].answered == "AA" and len(servers.mllp.received) > hl7_before
    with SqliteJournal(path) as j:
        tech_events = [ev for ev in j.events_between(None, None) if ev.kind == "notify_alarm"]
    assert [ev.body["state"] for ev in tech_events] == ["active", "resolved"]
    assert tech_events[0].alarm_id == tech_events[1].alarm_id
    assert tech_events[0].body["failures"] >= 2


def test_an_open_technical_alarm_is_not_raised_again_after_a_restart(tmp_path, servers):
    path = fresh_journal(tmp_path)
    port = servers.mllp.port
    servers.mllp.stop()
    cfg = config(servers.mail.port, servers.hook.url, port)
    n = notifier(path, cfg)
    try:
        journal(path, event())
        n.wake()
        wait_until(lambda: n.technical(), 10, "the technical alarm")
        first = n.technical()[0].alarm_id
        servers.mail.wait(2)
    finally:
        n.stop()
    n = notifier(path, cfg)
    try:
        assert [t.alarm_id for t in n.technical()] == [first]  # restored, not raised anew
        time.sleep(1.5)  # attempts keep failing
        assert [t.alarm_id for t in n.technical()] == [first]
    finally:
        n.stop()
    with SqliteJournal(path) as j:
        raised = [ev for ev in j.events_between(None, None) if ev.kind == "notify_alarm"]
    assert len(raised) == 1
    assert len(servers.mail.mails) == 2  # the alarm and one technical alarm page, no more


def test_a_failing_channel_is_raised_once_however_many_threads_find_it_due(tmp_path, servers):
    """The dispatcher and a channel's sender both check the failure bound; eight checks at
    once journal one technical alarm, not one each."""
    path = fresh_journal(tmp_path)
    n = notifier(path, config(servers.mail.port, servers.hook.url, servers.mllp.port))
    try:
        st = n.states["alert-mgr"]
        with n.lock:  # past the bound of 2 failed attempts
            st.failures, st.failing_since = 3, time.time() - 60
        gate = threading.Barrier(8)

        def check() -> None:
            gate.wait()
            n.check_channels()

        threads = [threading.Thread(target=check) for _ in range(8)]
        for th in threads:
            th.start()
        for th in threads:
            th.join(10)
    finally:
        n.stop()
    with SqliteJournal(path) as j:
        raised = [ev for ev in j.events_between(None, None) if ev.kind == "notify_alarm"]
    assert len(raised) == 1, [ev.alarm_id for ev in raised]


def test_an_acknowledged_alarm_cancels_its_pages_still_waiting(tmp_path, servers):
    path = fresh_journal(tmp_path)
    servers.mllp.stop()  # HL7 pages wait
    cfg = config(servers.mail.port, servers.hook.url, free_port(), fail_after_attempts=50)
    n = notifier(path, cfg)
    try:
        e = event()
        journal(path, e)
        n.wake()
        servers.mail.wait(1)
        journal(path, event(state=State.ACKNOWLEDGED, reason="acknowledged", notify=()))
        n.wake()
        store = n.store
        assert store is not None

        def cancelled() -> list:
            return [d for d in store.deliveries()
                    if d.channel == "alert-mgr" and d.status == "cancelled"]  # fmt: skip

        hl7 = wait_until(cancelled, 5, "the HL7 page cancelled")
    finally:
        n.stop()
    assert "acknowledged" in (hl7[0].answer or "")


def test_pages_for_an_event_older_than_the_give_up_time_are_recorded_not_sent(tmp_path, servers):
    path = fresh_journal(tmp_path)
    n = notifier(path, config(servers.mail.port, servers.hook.url, servers.mllp.port,
                              give_up_after_s=600))  # fmt: skip
    try:
        journal(path, event(t=time.time() - 3600))
        n.wake()
        store = n.store
        assert store is not None
        rows = wait_until(lambda: store.deliveries(), 5, "deliveries")
        time.sleep(0.5)
    finally:
        n.stop()
    assert {d.status for d in rows} == {"expired"}
    assert not servers.mail.mails and not servers.hook.received and not servers.mllp.received


def test_the_outbox_starts_after_the_events_already_journaled(tmp_path):
    """A journal from before paging was configured: its old alarms are not paged."""
    path = fresh_journal(tmp_path)
    ids = journal(path, event(), event(bed="bed-05"))
    store = SqliteDeliveryStore(path)
    try:
        assert store.cursor() == ids[-1]
        assert store.events_after(store.cursor(), 10) == []
    finally:
        store.close()


def test_a_page_whose_event_the_retention_pruned_is_given_up_not_sent(tmp_path, servers):
    path = fresh_journal(tmp_path)
    port = servers.mllp.port
    servers.mllp.stop()
    cfg = config(servers.mail.port, servers.hook.url, port, fail_after_attempts=50)
    n = notifier(path, cfg)
    try:
        journal(path, event())
        n.wake()
        store = n.store
        assert store is not None
        wait_until(lambda: any(d.channel == "alert-mgr" and d.attempts
                               for d in store.deliveries()), 5, "an HL7 attempt")  # fmt: skip
    finally:
        n.stop()
    with SqliteJournal(path, retention_days=1) as j:  # two days on: the event is past retention
        assert j.prune(time.time() + 2 * 86400) >= 1
    servers.mllp = MllpListener(["AA"], port=port)
    n = notifier(path, cfg)
    try:
        store = n.store
        assert store is not None
        (hl7,) = wait_until(lambda: [d for d in store.deliveries()
                                     if d.channel == "alert-mgr" and d.status == "expired"],
                            5, "the HL7 page given up")  # fmt: skip
    finally:
        n.stop()
    assert "no longer in the journal" in (hl7.answer or "")
    assert not servers.mllp.received
