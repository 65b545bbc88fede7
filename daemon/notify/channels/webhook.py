"""Webhook pages: an HTTP(S) POST of a signed JSON body (docs/operations.md, "Webhook").

Headers (our names): `Hourwatch-Signature` = hex HMAC-SHA256 of the body under the
channel's secret; `Hourwatch-Timestamp` = Unix seconds when it was sent (also inside the
signed body, as `sent_at`, so it cannot be changed without breaking the signature);
`Idempotency-Key` = the page's idempotency key. Confirmed by any 2xx reply; redirects
are not followed."""

from __future__ import annotations

import contextlib
import hashlib
import hmac
import http.client
import ssl
import time
from collections.abc import Callable, Sequence
from urllib.parse import urlsplit

from ...engine.timefmt import iso
from ..pages import Answer, Page, WebhookPage
from ..settings import WebhookChannel

SIGNATURE_HEADER = "Hourwatch-Signature"
TIMESTAMP_HEADER = "Hourwatch-Timestamp"
IDEMPOTENCY_HEADER = "Idempotency-Key"


def sign(secret: bytes, body: bytes) -> str:
    return hmac.new(secret, body, hashlib.sha256).hexdigest()


def body_for(page: Page, sent_at: float) -> bytes:
    return WebhookPage(
        type=page.type, sent_at=iso(sent_at), idempotency_key=page.key, channel=page.channel,
        recipient=page.recipient, role=page.role, page=page.text, ack_url=page.ack_url,
        ack_until=iso(page.ack_until) if page.ack_until is not None else None,
        alarm=page.alarm, caution=page.caution,
    ).to_bytes()  # fmt: skip


class WebhookSender:
    kind = "webhook"

    def __init__(self, cfg: WebhookChannel, secret: bytes,
                 clock: Callable[[], float] = time.time) -> None:  # fmt: skip
        self.cfg = cfg
        self.name = cfg.name
        self._secret = secret
        self._clock = clock
        u = urlsplit(cfg.url)
        self._https = u.scheme == "https"
        self._host = u.hostname or ""
        self._port = u.port
        self._path = (u.path or "/") + (f"?{u.query}" if u.query else "")

    def _connection(self) -> http.client.HTTPConnection:
        if self._https:
            ca = str(self.cfg.ca_file) if self.cfg.ca_file else None
            ctx = ssl.create_default_context(cafile=ca)
            return http.client.HTTPSConnection(self._host, self._port,
                                               timeout=self.cfg.timeout_s, context=ctx)  # fmt: skip
        return http.client.HTTPConnection(self._host, self._port, timeout=self.cfg.timeout_s)

    def post(self, body: bytes, key: str, sent_at: float) -> Answer:
        headers = {
            "Content-Type": "application/json",
            SIGNATURE_HEADER: sign(self._secret, body),
            TIMESTAMP_HEADER: str(int(sent_at)),
            IDEMPOTENCY_HEADER: key,
            "User-Agent": "hourwatch",
        }
        conn = self._connection()
        try:
            conn.request("POST", self._path, body=body, headers=headers)
            resp = conn.getresponse()
            reply = resp.read(2000).decode("utf-8", errors="replace").strip()
        except (OSError, http.client.HTTPException) as exc:
            if isinstance(exc, ssl.SSLError | ssl.CertificateError):
                return Answer(False, f"TLS: {exc}"[:300])
            what = exc.strerror if isinstance(exc, OSError) and exc.strerror else exc
            return Answer(False, f"cannot post: {what or type(exc).__name__}"[:300])
        finally:
            with contextlib.suppress(Exception):
                conn.close()
        text = f"HTTP {resp.status} {resp.reason}" + (f": {reply[:200]}" if reply else "")
        return Answer(200 <= resp.status < 300, text[:300])

    def send(self, pages: Sequence[Page]) -> list[Answer]:
        out: list[Answer] = []
        for page in pages:
            now = self._clock()
            out.append(self.post(body_for(page, now), page.key, now))
        return out

    def probe(self) -> Answer:
        """A signed body of type "probe" (the receiver answers 2xx and pages nobody)."""
        now = self._clock()
        key = f"probe-{now:.0f}"
        probe = WebhookPage(type="probe", sent_at=iso(now), idempotency_key=key,
                            channel=self.name, recipient="", role="",
                            page="Channel check from Hourwatch: not a page.")  # fmt: skip
        return self.post(probe.to_bytes(), key, now)
