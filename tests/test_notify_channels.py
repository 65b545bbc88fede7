"""Each channel against a real server on loopback: aiosmtpd (plain, and STARTTLS with a
certificate made by `cryptography`, with AUTH), an http.server that checks the webhook's
HMAC signature, and an MLLP listener that parses the HL7 message with hl7apy and answers
AA, then AE. Pages are built from the engine's own AlarmEvent (beds and numbers invented).
"""

from __future__ import annotations

import json
import time

import pytest

from daemon.engine.alarms import ALARM_CAUTION, AlarmEvent, Kind, Priority, State
from daemon.notify.channels.hl7 import Hl7Sender, escape, read_ack
from daemon.notify.channels.smtp import SmtpSender
from daemon.notify.channels.webhook import WebhookSender
from daemon.notify.pages import Page
from daemon.notify.settings import Hl7Channel, SmtpChannel, WebhookChannel
from tests.paging import (
    MllpListener,
    WebhookReceiver,
    free_port,
    hl7_unescape,
    mail_catcher,
    make_certificates,
    observations,
)

SECRET = b"invented-webhook-key-0123456789"


def page(text_extra: str = "", **kw: object) -> Page:
    e = AlarmEvent(
        time=time.time(), alarm_id="bed-07/pod-hourly/20260314T191831Z", bed="bed-07",
        ward="icu-east", rule="pod-hourly", priority=Priority.MEDIUM, kind=Kind.PHYSIOLOGICAL,
        state=State.ACTIVE, reason="condition_met",
        summary="last 2 hours 250, 260 mL (alarm when each is > 200 mL)" + text_extra,  # invented
        evidence={}, tier=0, notify=("bedside-nurse",), title="Post-obstructive diuresis: x",
    )  # fmt: skip
    fields: dict[str, object] = dict(
        key="0123456789abcdef0123456789abcdef", type="alarm", text=e.pager(), alarm=e.to_json(),
        alarm_id=e.alarm_id, ward=e.ward, bed=e.bed, priority="medium",
        alarm_kind="physiological", state="active", rule=e.rule, title=e.title,
        event_time=e.time, channel="c", recipient="nurse-east@pager.example",
        role="bedside-nurse", ack_url="https://hourwatch.icu-east.example/ack/tok",
        ack_until=e.time + 3600,
    )  # fmt: skip
    return Page(**(fields | kw))  # type: ignore[arg-type]


def smtp(port: int, **kw: object) -> SmtpChannel:
    return SmtpChannel.model_validate({"name": "pager-mail", "kind": "smtp", "host": "127.0.0.1",
                                       "port": port, "sender": "hourwatch@icu-east.example",
                                       "timeout_s": 3} | kw)  # fmt: skip


# --- SMTP ----------------------------------------------------------------------------------
def test_smtp_mail_is_the_pager_line_with_its_caution_and_link():
    p = page()
    with mail_catcher() as m:
        (answer,) = SmtpSender(smtp(m.port), None).send([p])
        (mail,) = m.wait(1)
    assert answer.ok and answer.text.startswith("SMTP 250"), answer
    assert m.envelopes == [("hourwatch@icu-east.example", ["nurse-east@pager.example"])]
    assert mail["Subject"] == p.text
    assert mail["Message-ID"] == f"<{p.key}@icu-east.example>"  # a copy has the same id
    body = mail.get_content().replace("\r\n", "\n")
    assert body.startswith(p.text + "\n")
    assert ALARM_CAUTION in body
    assert "https://hourwatch.icu-east.example/ack/tok" in body
    assert "ward icu-east, bed bed-07" in body


def test_smtp_starttls_with_auth_and_a_certificate_from_a_test_ca(tmp_path):
    tls = make_certificates(tmp_path / "tls")
    with mail_catcher(tls=tls, users={"hw": "invented-pass"}) as m:
        cfg = smtp(m.port, starttls=True, ca_file=str(tls.ca), username="hw", password_env="X")
        (ok,) = SmtpSender(cfg, "invented-pass").send([page()])
        (bad_password,) = SmtpSender(cfg, "wrong").send([page()])
        (plain,) = SmtpSender(smtp(m.port), None).send([page()])  # no STARTTLS: refused
        m.wait(1)
        time.sleep(0.2)
        delivered = len(m.mails)
    assert ok.ok, ok
    assert not bad_password.ok and "535" in bad_password.text, bad_password
    assert not plain.ok and "STARTTLS" in plain.text, plain
    assert delivered == 1 and m.logins == ["hw"]


def test_smtp_starttls_refuses_a_certificate_from_another_ca(tmp_path):
    tls = make_certificates(tmp_path / "tls")
    other = make_certificates(tmp_path / "other")
    with mail_catcher(tls=tls) as m:
        (answer,) = SmtpSender(smtp(m.port, starttls=True, ca_file=str(other.ca)), None).send(
            [page()]
        )
        assert not m.mails
    assert not answer.ok and answer.text.startswith("TLS"), answer


def test_smtp_a_refusal_or_no_server_is_a_failed_answer():
    with mail_catcher() as m:
        m.reply = "451 4.3.0 invented temporary failure"
        (answer,) = SmtpSender(smtp(m.port), None).send([page()])
    assert not answer.ok and answer.text.startswith("SMTP 451"), answer
    (down,) = SmtpSender(smtp(free_port()), None).send([page()])
    assert not down.ok and "cannot connect" in down.text, down


# --- webhook --------------------------------------------------------------------------------
def webhook(url: str) -> WebhookChannel:
    return WebhookChannel(name="unit-hook", kind="webhook", url=url, secret_env="K", timeout_s=3)


def test_webhook_posts_the_signed_page_with_timestamp_and_idempotency_key():
    p = page()
    recv = WebhookReceiver(SECRET)
    try:
        before = time.time()
        (answer,) = WebhookSender(webhook(recv.url), SECRET).send([p])
    finally:
        recv.stop()
    assert answer.ok and answer.text.startswith("HTTP 200"), answer
    (hook,) = recv.received
    assert hook.signature_ok
    body = hook.json()
    assert hook.headers["Idempotency-Key"] == p.key == body["idempotency_key"]
    stamp = int(hook.headers["Hourwatch-Timestamp"])
    assert before - 1 <= stamp <= time.time() + 1
    assert body["sent_at"].startswith(time.strftime("%Y-%m-%dT%H:%M", time.gmtime(stamp)))
    assert body["page"] == p.text and body["caution"] == ALARM_CAUTION
    assert body["alarm"] == json.loads(json.dumps(p.alarm))  # the alarm JSON, unchanged
    assert body["ack_url"] == p.ack_url and body["role"] == "bedside-nurse"
    assert body["type"] == "alarm"


def test_webhook_with_the_wrong_key_or_a_server_error_is_not_confirmed():
    recv = WebhookReceiver(SECRET)
    try:
        (wrong,) = WebhookSender(webhook(recv.url), b"another-key-0000000000").send([page()])
        recv.status = 503
        (busy,) = WebhookSender(webhook(recv.url), SECRET).send([page()])
    finally:
        recv.stop()
    assert not wrong.ok and wrong.text.startswith("HTTP 401"), wrong
    assert not busy.ok and busy.text.startswith("HTTP 503"), busy
    assert [h.signature_ok for h in recv.received] == [False, True]


# --- HL7 v2 over MLLP --------------------------------------------------------------------------
def hl7(port: int) -> Hl7Channel:
    return Hl7Channel(name="alert-mgr", kind="hl7v2-mllp", host="127.0.0.1", port=port,
                      sending_facility="ICU-EAST", receiving_application="ALERT-MGR",
                      timeout_s=3)  # fmt: skip


def test_hl7_oru_r40_is_accepted_then_an_ae_is_a_failure():
    tricky = " | ^ & ~ \\ …"  # HL7 delimiters in the text travel escaped
    p = page(tricky)
    listener = MllpListener(["AA", "AE"])
    try:
        first, second = Hl7Sender(hl7(listener.port)).send([p, p])
    finally:
        listener.stop()
    assert not listener.errors, listener.errors  # hl7apy parsed and validated both
    assert first.ok and first.text.startswith("ACK AA"), first
    assert not second.ok and second.text.startswith("ACK AE") and "says no" in second.text
    msg = listener.received[0].message
    assert msg.msh.msh_9.to_er7() == "ORU^R40^ORU_R01"
    assert msg.msh.msh_12.to_er7() == "2.6"
    assert msg.msh.msh_10.to_er7() == p.key[:20]  # a copy has the same control id
    raw = listener.received[0].raw
    assert "\rPID|" not in raw and "\rPV1|" not in raw  # no patient identity at all
    obx = observations(msg)
    assert hl7_unescape(obx["PAGE"][1]) == p.text
    assert obx["PAGE"][2] == "PM~SP"  # medium priority, physiological source
    assert obx["LOCATION"] == ("PL", "icu-east^^bed-07", "")
    assert obx["ALARM-STATE"][1] == "active"
    order = msg.ORU_R01_PATIENT_RESULT.ORU_R01_ORDER_OBSERVATION
    assert order.obr.obr_3.to_er7() == p.alarm_id


def test_hl7_ack_for_another_message_or_none_is_not_a_confirmation():
    ack = "MSH|^~\\&|AM||||20260314191900+0000||ACK^R40^ACK|1|P|2.6\rMSA|AA|someone-else"
    assert not read_ack(ack.encode(), "0123456789abcdef0123").ok
    assert not read_ack(b"not hl7 at all", "x").ok
    (down,) = Hl7Sender(hl7(free_port())).send([page()])
    assert not down.ok and down.text.startswith("MLLP"), down


@pytest.mark.parametrize("text", ["a|b", "x^y&z", "r~s", "back\\slash", "line\nbreak"])
def test_hl7_escape_round_trips_through_the_receivers_unescape(text):
    assert hl7_unescape(escape(text)) == text.replace("\n", " ")
    assert not any(ch in escape(text) for ch in "|^&~\r\n")
