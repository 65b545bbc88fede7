"""Outbound MQTT messages (DESIGN §7): the single source of truth for their format.

Every message is JSON with a `schema` version field. Builders turn engine effects into
these models; the publisher only ever sends `model.to_bytes()`.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

from .caution import CAUTION
from .engine.alarms import AlarmEvent
from .engine.effects import AdviceIssued, RejectedInput
from .engine.timefmt import iso

SCHEMA = 1  # the `schema` field of every outbound message


class _Out(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")

    def to_bytes(self) -> bytes:
        return self.model_dump_json(by_alias=True).encode()


class AlarmMessage(_Out):
    """`{prefix}/alarms/{ward}/{bed}`, QoS 1: one lifecycle event of one alarm."""

    time: str
    alarm_id: str
    bed: str
    ward: str
    rule: str
    priority: str
    kind: str
    state: str
    reason: str
    summary: str
    evidence: dict[str, Any]
    tier: int
    notify: list[str]  # roles to page with this event; empty = record only
    by: str | None = None
    role: str | None = None
    suppressed_by: str | None = None
    holding_back: list[str] = Field(default_factory=list)  # a technical alarm's held-back rules
    title: str = ""
    pager: str | None = None  # one plain line for a pager
    advice: dict[str, Any] | None = None  # the bed's latest replacement advice
    acknowledge: dict[str, Any] | None = None  # how to acknowledge it over MQTT
    caution: str = CAUTION

    @classmethod
    def of(cls, e: AlarmEvent) -> AlarmMessage:
        return cls.model_validate(e.to_json())


class AdviceMessage(_Out):
    """`{prefix}/advice/{ward}/{bed}`: suggested replacement for a completed hour, or why
    none is suggested (`kind`; engine.advice.Advice.to_json)."""

    time: str
    bed: str
    ward: str
    because_of: list[str]
    kind: str  # rate, no_order, held_circulation, held_sodium, ended (engine/advice.py)
    hour_start: str
    hour_output_ml: float
    residual_ml: float = 0.0  # retained bladder content drained in the hour, not counted
    rate_ml_h: list[float] | None  # None: no rate suggested (no order, or held)
    fluid: str | None  # named only with a rate, under an order
    capped: bool = False
    sodium_mmol_h: list[float] | None
    free_water_ml_h: list[float] | None
    tonicity_review: bool
    order: dict[str, Any] | None = None
    serum_na: dict[str, Any] | None = None
    notes: list[str]
    projection: dict[str, Any] | None
    summary: str
    pager: str = ""  # the few words an alarm page carries about it
    caution: str

    @classmethod
    def of(cls, e: AdviceIssued) -> AdviceMessage:
        return cls.model_validate(e.to_json())


class RejectedMessage(_Out):
    """`{prefix}/rejected`: why an input was not used. Device id and topic only,
    never patient fields."""

    time: str
    topic: str
    device_id: str | None
    reason: str
    detail: str

    @classmethod
    def of(cls, e: RejectedInput) -> RejectedMessage:
        return cls.model_validate(e.to_json())


class ActiveAlarm(_Out):
    alarm_id: str
    rule: str
    title: str
    priority: str
    kind: str
    state: str
    tier: int
    onset: str
    condition_present: bool
    suppressed_by: str | None
    ack_by: str | None
    ack_role: str | None
    ack_until: str | None
    summary: str


class OutputWindow(_Out):
    """Urine output over a window ending at the latest reading's minute."""

    minutes: int
    volume_ml: float
    measured_fraction: float
    estimated_fraction: float


class StateMessage(_Out):
    """`{prefix}/state/{ward}/{bed}`, retained: what a bed looks like now."""

    time: str
    bed: str
    ward: str
    latest_reading: str | None
    active_alarms: list[ActiveAlarm]
    output_60min: OutputWindow | None
    output_24h: OutputWindow | None
    last_completed_hour: dict[str, Any] | None
    latest_advice: dict[str, Any] | None
    notices: list[str]
    data_quality: dict[str, dict[str, Any]]  # per bound meter: counts by outcome
    caution: str = CAUTION


class TechnicalAlarm(_Out):
    """A problem of the service itself (not of a patient)."""

    code: str
    text: str
    since: str
    alarm_id: str | None = None


class StatusMessage(_Out):
    """`{prefix}/status`, retained; the broker publishes the "offline" last will."""

    status: Literal["online", "degraded", "offline"]
    time: str
    service: str = "hourwatch"
    started: str | None = None
    reason: str | None = None
    delivery: Literal["ok", "degraded", "unknown"] = "unknown"
    technical_alarms: list[TechnicalAlarm] = Field(default_factory=list)
    caution: str = CAUTION


def offline_status(t: float, reason: str, started: float | None = None) -> StatusMessage:
    return StatusMessage(
        status="offline",
        time=iso(t),
        started=iso(started) if started is not None else None,
        reason=reason,
    )
