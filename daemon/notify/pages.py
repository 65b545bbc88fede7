"""What a channel carries: one page for one recipient, and what the channel answered."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from ..engine.alarms import ALARM_CAUTION

PageType = Literal["alarm", "technical", "test", "probe"]


@dataclass(frozen=True)
class Page:
    """One page. `text` is the pager line as the engine made it (it carries its caution);
    `alarm` the alarm JSON as published on MQTT (None for a test page)."""

    key: str  # idempotency key: a receiver drops a second copy by it
    type: PageType
    text: str
    alarm: dict[str, Any] | None
    alarm_id: str
    ward: str | None
    bed: str | None
    priority: str
    alarm_kind: str  # physiological, technical, advisory, reminder
    state: str
    rule: str
    title: str
    event_time: float
    channel: str
    recipient: str
    role: str
    ack_url: str | None = None
    ack_until: float | None = None
    caution: str = ALARM_CAUTION


@dataclass(frozen=True)
class Answer:
    """A channel's reply: `ok` only for a confirmation (SMTP 250, HTTP 2xx, HL7 AA)."""

    ok: bool
    text: str
    # the failure is the channel's (unreachable, refused), not this one page's content
    channel_fault: bool = True


class WebhookPage(BaseModel):
    """The body a webhook channel POSTs (docs/operations.md, "Webhook")."""

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    type: PageType
    sent_at: str  # ISO 8601 UTC; the same instant as the timestamp header
    idempotency_key: str
    channel: str
    recipient: str
    role: str
    page: str  # the pager line with its caution
    ack_url: str | None = None  # open it to acknowledge as `role` (GET shows, POST acts)
    ack_until: str | None = None
    alarm: dict[str, Any] | None = None  # the alarm JSON as published on MQTT
    caution: str = ALARM_CAUTION

    def to_bytes(self) -> bytes:
        return self.model_dump_json(by_alias=True).encode()
