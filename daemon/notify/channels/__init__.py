"""One module per channel kind; `sender_for` builds the sender a channel config names."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Protocol

from ..pages import Answer, Page
from ..settings import Hl7Channel, SmtpChannel, WebhookChannel


class Sender(Protocol):
    name: str
    kind: str

    def send(self, pages: Sequence[Page]) -> list[Answer]:
        """One answer per page, in order. Never raises for a network or protocol
        failure: that is a failed answer naming what went wrong."""
        ...

    def probe(self) -> Answer:
        """Would the channel take a page now? Sends no page."""
        ...


def sender_for(cfg: SmtpChannel | WebhookChannel | Hl7Channel, secret: str | None) -> Sender:
    if isinstance(cfg, SmtpChannel):
        from .smtp import SmtpSender

        return SmtpSender(cfg, secret)
    if isinstance(cfg, WebhookChannel):
        from .webhook import WebhookSender

        assert secret is not None
        return WebhookSender(cfg, secret.encode())
    from .hl7 import Hl7Sender

    return Hl7Sender(cfg)
