"""Alarm vocabulary shared by the rules, the lifecycle and the messages.

Priority words follow the FHIR DeviceAlert priority codes; kinds and states use
IEC 60601-1-8 terms (physiological / technical alarm condition, acknowledged).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum

from .timefmt import iso


class Priority(StrEnum):
    HIGH = "high"
    MEDIUM = "medium"
    LOW = "low"
    INFO = "info"


# Higher number = more urgent; used to tell a raised priority from a lowered one.
URGENCY: dict[Priority, int] = {
    Priority.INFO: 0,
    Priority.LOW: 1,
    Priority.MEDIUM: 2,
    Priority.HIGH: 3,
}


class Kind(StrEnum):
    PHYSIOLOGICAL = "physiological"
    TECHNICAL = "technical"
    ADVISORY = "advisory"
    REMINDER = "reminder"


class State(StrEnum):
    INACTIVE = "inactive"
    PENDING = "pending"  # condition present, not annunciated yet (delay or suppression)
    ACTIVE = "active"
    ESCALATED = "escalated"
    ACKNOWLEDGED = "acknowledged"
    RESOLVED = "resolved"


@dataclass(frozen=True, slots=True)
class RuleSpec:
    """What the lifecycle needs to know about a rule (the rule file owns the rest)."""

    rule_id: str
    title: str
    kind: Kind
    priority: Priority
    latching: bool
    condition_delay_s: int  # alarm-condition delay: condition must persist this long
    clear_hold_s: int  # non-latching: condition must stay clear this long to resolve
    low_output: bool  # low-output rules are suppressed by a bed's technical alarms


@dataclass(frozen=True, slots=True)
class AlarmEvent:
    """One lifecycle transition of one alarm: the unit that is journaled and published."""

    time: float
    alarm_id: str
    bed: str
    ward: str
    rule: str
    priority: Priority
    kind: Kind
    state: State
    reason: str
    summary: str
    evidence: dict[str, object] = field(hash=False)
    tier: int
    notify: tuple[str, ...]  # roles to page with this event; empty = record only
    by: str | None = None
    role: str | None = None
    suppressed_by: str | None = None
    title: str = ""
    advice: dict[str, object] | None = None  # the bed's latest replacement advice, if any
    ack_topic: str = "hourwatch/ack"
    ack_valid_s: int = 3600

    def pager(self) -> str:
        """One plain line for a pager, at most PAGER_MAX characters: bed, state and
        priority, what (the title up to its colon), the key numbers, and for an open
        high-output alarm the suggested replacement. The numbers are shortened
        first; the bed, what and the suggestion always fit."""
        what = (self.title or self.rule).split(":")[0]
        head = f"{self.bed} {_STATE_WORD[self.state]} {self.priority}: {what}"
        tail = ""
        if self.advice and self.state in (State.ACTIVE, State.ESCALATED):
            rate = self.advice.get("rate_ml_h")
            if isinstance(rate, list | tuple) and len(rate) == 2:
                tail = f" Suggest {rate[0]:.0f}-{rate[1]:.0f} mL/h {self.advice.get('fluid', '')}."
        text = f"{head}. {self.summary}.{tail}"
        if len(text) <= PAGER_MAX:
            return text
        room = PAGER_MAX - len(head) - len(tail) - 3  # '. ' and the ellipsis
        if room >= 10:
            return f"{head}. {self.summary[:room].rstrip()}…{tail}"
        return (f"{head}.{tail}")[:PAGER_MAX]

    def to_json(self) -> dict[str, object]:
        return {
            "time": iso(self.time),
            "alarm_id": self.alarm_id,
            "bed": self.bed,
            "ward": self.ward,
            "rule": self.rule,
            "priority": str(self.priority),
            "kind": str(self.kind),
            "state": str(self.state),
            "reason": self.reason,
            "summary": self.summary,
            "evidence": dict(self.evidence),
            "tier": self.tier,
            "notify": list(self.notify),
            "by": self.by,
            "role": self.role,
            "suppressed_by": self.suppressed_by,
            "title": self.title,
            "pager": self.pager(),
            "advice": self.advice,
            "caution": ALARM_CAUTION,
            "acknowledge": {
                "topic": self.ack_topic,
                # on a per-user topic the broker's user is the acknowledger
                "payload": {"alarm_id": self.alarm_id, "role": "<your role>"}
                | ({} if "{user}" in self.ack_topic else {"by": "<your name>"}),
                # the alarm returns after this if its condition is still present
                "valid_s": self.ack_valid_s,
            },
        }


PAGER_MAX = 160
ALARM_CAUTION = (
    "Decision support only: a prompt for the treating clinician, to be checked against "
    "local protocols and licensed practice. Hourwatch controls no pump and no order."
)
_STATE_WORD = {
    State.INACTIVE: "clear",
    State.PENDING: "pending",
    State.ACTIVE: "ALARM",
    State.ESCALATED: "ALARM (escalated)",
    State.ACKNOWLEDGED: "acknowledged",
    State.RESOLVED: "resolved",
}
