"""Acknowledgement links in pages: a signed, time-limited token per page (one alarm, one
recipient, the role it was paged to), served at `{ack_base_url}/ack/{token}`.

GET shows what the link acknowledges and a button; it never acknowledges, so a mail
client's or messenger's link preview cannot. POST acknowledges once, as the paged role,
through the engine like an MQTT acknowledgement (journaled as a message with who and role).

`AckLinks.handle` depends on no HTTP server: it takes a method, a path and a form body and
returns a status, headers and an HTML page, so any server can carry it.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import html
import json
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any
from urllib.parse import parse_qs

from ..engine.alarms import ALARM_CAUTION
from .store import DeliveryStore

PATH = "/ack/"
_DOMAIN = b"hourwatch-ack-link-v1."  # keys the MAC to this use of the secret
MAX_TOKEN = 2000
MAX_FORM = 4096
BY_MAX = 64  # AckMessage.by


@dataclass(frozen=True)
class LinkClaims:
    alarm_id: str
    recipient: str  # "channel:address"
    role: str
    expires: float
    token_id: str  # the page's idempotency key: one link per page, usable once


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode("ascii")


def _unb64(text: str) -> bytes:
    return base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))


def _mac(key: bytes, payload: str) -> bytes:
    return hmac.new(key, _DOMAIN + payload.encode("ascii"), hashlib.sha256).digest()


def make_token(key: bytes, c: LinkClaims) -> str:
    claims = {"a": c.alarm_id, "r": c.recipient, "o": c.role, "e": int(c.expires),
              "k": c.token_id}  # fmt: skip
    payload = _b64(json.dumps(claims, separators=(",", ":")).encode())
    return f"{payload}.{_b64(_mac(key, payload))}"


def read_token(key: bytes, token: str, now: float) -> LinkClaims | str:
    """The claims of a genuine, unexpired token; else "invalid" or "expired"."""
    if len(token) > MAX_TOKEN or token.count(".") != 1:
        return "invalid"
    payload, sig = token.split(".")
    try:
        given = _unb64(sig)
        if not hmac.compare_digest(given, _mac(key, payload)):
            return "invalid"
        d = json.loads(_unb64(payload))
        c = LinkClaims(str(d["a"]), str(d["r"]), str(d["o"]), float(d["e"]), str(d["k"]))
    except (ValueError, KeyError, TypeError, UnicodeError):
        return "invalid"
    return "expired" if now >= c.expires else c


def link(base_url: str, key: bytes, c: LinkClaims) -> str:
    return f"{base_url}{PATH}{make_token(key, c)}"


@dataclass(frozen=True)
class AckOutcome:
    """What the engine made of the acknowledgement: ok, or its reason for refusing."""

    ok: bool
    text: str


@dataclass(frozen=True)
class Reply:
    status: int
    body: str
    headers: tuple[tuple[str, str], ...] = (
        ("Content-Type", "text/html; charset=utf-8"),
        ("Cache-Control", "no-store"),
        ("Referrer-Policy", "no-referrer"),  # the token is in the address
        ("X-Content-Type-Options", "nosniff"),
        ("X-Robots-Tag", "noindex"),
        ("Content-Security-Policy",
         "default-src 'none'; style-src 'unsafe-inline'; form-action 'self'"),
    )  # fmt: skip


Submit = Callable[[str, str, str], AckOutcome]  # (alarm_id, by, role) -> outcome


def _when(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:%M UTC")


def _page(title: str, *parts: str) -> str:
    body = "\n".join(parts)
    return (
        '<!doctype html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(title)}</title>"
        "<style>body{font-family:sans-serif;max-width:36em;margin:1.5em auto;padding:0 1em;"
        "line-height:1.4}button{font-size:1.1em;padding:.6em 1.2em}"
        "input{font-size:1em;padding:.3em}.caution{font-size:.9em;margin-top:2em}</style>"
        f"</head><body><h1>{html.escape(title)}</h1>\n{body}\n"
        f'<p class="caution">{html.escape(ALARM_CAUTION)}</p></body></html>\n'
    )


def _what(c: LinkClaims) -> str:
    parts = c.alarm_id.split("/")
    bed, rule = (parts[0], parts[1]) if len(parts) >= 3 else ("?", c.alarm_id)
    return (f"<p>Alarm <strong>{html.escape(rule)}</strong> on bed "
            f"<strong>{html.escape(bed)}</strong><br><small>{html.escape(c.alarm_id)}"
            "</small></p>")  # fmt: skip


class AckLinks:
    def __init__(self, key: bytes, store: DeliveryStore, submit: Submit,
                 clock: Callable[[], float]) -> None:  # fmt: skip
        self.key = key
        self.store = store
        self.submit = submit
        self.clock = clock

    def handle(self, method: str, path: str, form: bytes = b"") -> Reply | None:
        """None if `path` is not an acknowledgement link."""
        if not path.startswith(PATH):
            return None
        token = path[len(PATH) :]
        if method not in ("GET", "HEAD", "POST"):
            return Reply(405, _page("Not allowed", "<p>Open the link, or use its button.</p>"),
                         (*Reply.headers, ("Allow", "GET, POST")))  # fmt: skip
        now = self.clock()
        claims = read_token(self.key, token, now)
        if claims == "invalid":
            return Reply(403, _page("Link not valid",
                                    "<p>This acknowledgement link is not valid. Acknowledge "
                                    "the alarm another way.</p>"))  # fmt: skip
        if claims == "expired":
            return Reply(410, _page("Link expired",
                                    "<p>This acknowledgement link has expired. Acknowledge "
                                    "the alarm another way.</p>"))  # fmt: skip
        assert isinstance(claims, LinkClaims)
        used = self.store.link_used(claims.token_id)
        if used is not None:
            return Reply(409, _page("Link already used", _what(claims),
                                    f"<p>This link was used at {_when(used)}. Each link "
                                    "acknowledges once.</p>"))  # fmt: skip
        if method != "POST":
            return self._confirm(claims, token)
        return self._acknowledge(claims, form, now)

    def _confirm(self, c: LinkClaims, token: str) -> Reply:
        action = html.escape(PATH + token, quote=True)
        return Reply(200, _page(
            "Acknowledge this alarm?", _what(c),
            f"<p>You acknowledge as <strong>{html.escape(c.role)}</strong> "
            f"(paged at {html.escape(c.recipient)}). Nothing happens until you press the "
            "button.</p>",
            f"<form method=\"post\" action=\"{action}\">"
            f"<p><label>Your name (optional): <input name=\"by\" maxlength=\"{BY_MAX}\" "
            "autocomplete=\"name\"></label></p>"
            f"<p><button type=\"submit\">Acknowledge as {html.escape(c.role)}</button></p>"
            "</form>",
            f"<p><small>The link works once, until {_when(c.expires)}.</small></p>",
        ))  # fmt: skip

    def _acknowledge(self, c: LinkClaims, form: bytes, now: float) -> Reply:
        by = _by(form) or c.recipient.split(":", 1)[-1][:BY_MAX]
        if not self.store.use_link(c.token_id, c.alarm_id, c.recipient, c.role, now):
            return Reply(409, _page("Link already used", _what(c),
                                    "<p>Each link acknowledges once.</p>"))  # fmt: skip
        outcome = self.submit(c.alarm_id, by, c.role)
        if not outcome.ok:
            return Reply(409, _page("Not acknowledged", _what(c),
                                    f"<p>{html.escape(outcome.text)}</p>"))  # fmt: skip
        return Reply(
            200,
            _page(
                "Acknowledged",
                _what(c),
                f"<p>Acknowledged by {html.escape(by)} as "
                f"<strong>{html.escape(c.role)}</strong> at {_when(now)}.</p>",
            ),
        )


def _by(form: bytes) -> str | None:
    """The optional name typed in the form: printable, at most 64 characters."""
    if not form or len(form) > MAX_FORM:
        return None
    try:
        fields: dict[str, Any] = parse_qs(form.decode("utf-8"), max_num_fields=4)
    except (UnicodeDecodeError, ValueError):
        return None
    values = fields.get("by") or [""]
    name = " ".join(str(values[0]).split())[:BY_MAX]
    return name if name and name.isprintable() else None
