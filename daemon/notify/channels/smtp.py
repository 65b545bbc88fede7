"""E-mail pages over SMTP (stdlib smtplib): STARTTLS with certificate checks, AUTH, one
mail per recipient, several mails per connection. Confirmed only by the server's 250
after the message data."""

from __future__ import annotations

import contextlib
import email.policy
import smtplib
import ssl
from collections.abc import Sequence
from datetime import UTC, datetime
from email.message import EmailMessage
from email.utils import format_datetime

from ..pages import Answer, Page
from ..settings import SmtpChannel


def when(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M UTC")


def mail_for(page: Page, sender: str) -> EmailMessage:
    """Subject: the pager line. Body: the pager line, where (ward and bed only), the
    acknowledgement link, and the caution. Nothing else about the patient."""
    msg = EmailMessage(policy=email.policy.SMTP)
    msg["From"] = sender
    msg["To"] = page.recipient
    msg["Subject"] = page.text
    msg["Date"] = format_datetime(datetime.now(UTC))
    domain = sender.rpartition("@")[2]
    msg["Message-ID"] = f"<{page.key}@{domain}>"  # the idempotency key: a copy is the same
    msg["Auto-Submitted"] = "auto-generated"  # RFC 3834: no auto-replies to a page
    lines = [page.text, ""]
    if page.type == "test":
        lines.append(f"Test page for role {page.role} over channel {page.channel}.")
    else:
        where = ", ".join(x for x in (f"ward {page.ward}" if page.ward else "",
                                      f"bed {page.bed}" if page.bed else "") if x)  # fmt: skip
        lines.append(f"Paged to role {page.role}" + (f"; {where}" if where else "") + ".")
        lines.append(f"Alarm {page.alarm_id}, event at {when(page.event_time)}.")
    if page.ack_url:
        lines += ["", f"To acknowledge as {page.role}, open:", page.ack_url]
        if page.ack_until is not None:
            lines.append(f"(the link works once, until {when(page.ack_until)})")
    lines += ["", page.caution]
    msg.set_content("\n".join(lines) + "\n", cte="quoted-printable")
    return msg


def _why(exc: BaseException) -> str:
    if isinstance(exc, smtplib.SMTPResponseException):
        text = exc.smtp_error.decode(errors="replace") if isinstance(exc.smtp_error, bytes) \
            else str(exc.smtp_error)  # fmt: skip
        return f"SMTP {exc.smtp_code} {text}"[:300]
    if isinstance(exc, ssl.SSLError | ssl.CertificateError):
        return f"TLS: {exc}"[:300]
    if isinstance(exc, OSError):
        return f"cannot connect: {exc.strerror or exc}"[:300]
    return f"{type(exc).__name__}: {exc}"[:300]


class SmtpSender:
    kind = "smtp"

    def __init__(self, cfg: SmtpChannel, password: str | None) -> None:
        self.cfg = cfg
        self.name = cfg.name
        self._password = password

    def _connect(self) -> smtplib.SMTP:
        c = self.cfg
        s = smtplib.SMTP(c.host, c.port, timeout=c.timeout_s)
        try:
            s.ehlo()
            if c.starttls:
                ctx = ssl.create_default_context(cafile=str(c.ca_file) if c.ca_file else None)
                s.starttls(context=ctx)  # raises if the server does not offer it
                s.ehlo()
            if c.username:
                assert self._password is not None
                s.login(c.username, self._password)
        except BaseException:
            with contextlib.suppress(Exception):
                s.close()
            raise
        return s

    def send(self, pages: Sequence[Page]) -> list[Answer]:
        try:
            s = self._connect()
        except (OSError, smtplib.SMTPException, ValueError) as exc:
            return [Answer(False, _why(exc))] * len(pages)
        out: list[Answer] = []
        try:
            for page in pages:
                out.append(self._one(s, page))
                if not out[-1].ok and out[-1].channel_fault:
                    break  # the connection is gone: the rest wait for the retry
        finally:
            with contextlib.suppress(Exception):
                s.quit()
        lost = Answer(False, out[-1].text if out else "not sent")
        return out + [lost] * (len(pages) - len(out))

    def _one(self, s: smtplib.SMTP, page: Page) -> Answer:
        data = mail_for(page, self.cfg.sender).as_bytes()
        try:
            code, resp = s.mail(self.cfg.sender)
            if code != 250:
                s.rset()
                return Answer(False, f"SMTP {code} {resp.decode(errors='replace')} (MAIL)"[:300],
                              channel_fault=code >= 400)  # fmt: skip
            code, resp = s.rcpt(page.recipient)
            if code not in (250, 251):
                s.rset()
                # a 5xx for this address is the route's fault, a 4xx the server's
                return Answer(False, f"SMTP {code} {resp.decode(errors='replace')} (RCPT)"[:300],
                              channel_fault=code < 500)  # fmt: skip
            code, resp = s.data(data)
        except (OSError, smtplib.SMTPException) as exc:
            return Answer(False, _why(exc))
        text = f"SMTP {code} {resp.decode(errors='replace')}"[:300]
        return Answer(code == 250, text, channel_fault=code != 250)

    def probe(self) -> Answer:
        try:
            s = self._connect()
        except (OSError, smtplib.SMTPException, ValueError) as exc:
            return Answer(False, _why(exc))
        try:
            code, resp = s.noop()
        except (OSError, smtplib.SMTPException) as exc:
            return Answer(False, _why(exc))
        finally:
            with contextlib.suppress(Exception):
                s.quit()
        return Answer(code == 250, f"SMTP {code} {resp.decode(errors='replace')} (NOOP)"[:300])
