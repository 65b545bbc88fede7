"""Alarm vocabulary shared by the rules, the lifecycle and the messages.

Priority words follow the FHIR DeviceAlert priority codes (high, medium, low, info).
Kinds use the IEC 60601-1-8 terms physiological and technical alarm condition (advisory
and reminder are ours). Of the states, "acknowledged" is an IEC 60601-1-8 alarm signal
inactivation state; inactive, pending, active, escalated and resolved are Hourwatch's own
lifecycle. What a person reads for each state is STATE_WORDS, and nothing else.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from types import MappingProxyType

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
    also_notify: tuple[str, ...] = ()  # paged with every page, besides the policy's roles
    ack_valid_s: int | None = None  # how long an acknowledgement holds (None: the book's)


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
    holding_back: tuple[str, ...] = ()  # a technical alarm: the rules it holds back
    clock: str = ""  # the event's local clock time, HH:MM, for people (engine's time zone)
    ack_topic: str = "hourwatch/ack"
    ack_valid_s: int = 3600

    def pager(self) -> str:
        """One plain line for a pager, at most PAGER_MAX characters: bed, state and
        priority, what (the title up to its colon), the key numbers, for an open
        high-output alarm what the advice says, and always the caution. Only the numbers
        are shortened (see `shorten`); the bed, what, the advice and the caution always fit."""
        what = pager_what(self.title or self.rule, self.state)
        when = f"{self.clock} " if self.clock else ""
        head = ascii_text(f"{when}{self.bed} {STATE_WORDS[self.state]} {self.priority}: {what}")
        tail = ""
        if self.holding_back:
            tail = f" Holding back: {', '.join(self.holding_back)}."
        if self.advice and self.state in (State.ACTIVE, State.ESCALATED):
            words = self.advice.get("pager")
            if isinstance(words, str) and words:
                tail += f" {words}"
        tail = ascii_text(f"{tail} {PAGER_CAUTION}")
        room = PAGER_MAX - len(head) - len(tail) - 3  # '. ' and the summary's '.'
        if room >= 10:
            return f"{head}. {shorten(ascii_text(self.summary), room)}.{tail}"
        return f"{head[: PAGER_MAX - len(tail) - 1]}.{tail}"

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
            "holding_back": list(self.holding_back),
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


# One pager line: plain ASCII (an en dash would force an SMS gateway into UCS-2, 70
# characters a segment), at most 200 characters: two SMS segments, and within what
# alphanumeric pagers commonly display (common practice, no single source).
PAGER_MAX = 200
_ASCII = str.maketrans({"–": "-", "—": "-", "…": "...", "≥": ">=", "≤": "<=", "×": "x",
                        "µ": "u", "°": " deg"})  # fmt: skip


def ascii_text(text: str) -> str:
    return text.translate(_ASCII).encode("ascii", "replace").decode("ascii")


ENDED = frozenset({State.RESOLVED, State.INACTIVE})
_MET = " criterion met"


def pager_what(title: str, state: State) -> str:
    """What a page is about: the title up to its colon. Once the alarm has ended, a
    title that says a criterion is met says it is no longer met: a RESOLVED page must
    not read as the criterion holding."""
    what = title.split(":")[0]
    if state in ENDED and what.endswith(_MET):
        return f"{what[: -len(' met')]} no longer met"
    return what


_DETAIL = re.compile(r" ?\([^()]*\)")  # a bracketed detail: a threshold, the basis


def shorten(summary: str, room: int) -> str:
    """The summary in at most `room` characters: whole; else without its bracketed
    details (the full message and the board keep them); else cut after the last whole
    clause, or failing that word, that fits, with an ellipsis. Never mid-word: a
    number cut short reads as another number."""
    if len(summary) <= room:
        return summary
    bare = _DETAIL.sub("", summary)
    if len(bare) <= room:
        return bare
    cut = bare[: room - 2]  # room for '..' (the line's '.' follows)
    for sep in ("; ", ", ", " "):
        i = cut.rfind(sep)
        if i >= room // 3:  # a clause boundary that keeps most of the text
            return f"{cut[:i].rstrip(' ;,:')}.."
    return f"{cut.rstrip()}.."


# The pager line's own caution: the page is a prompt for the clinician, not an order.
PAGER_CAUTION = "Decision support: verify per local protocol."
ALARM_CAUTION = (
    "Decision support only: a prompt for the treating clinician, to be checked against "
    "local protocols and licensed practice. Hourwatch controls no pump and no order."
)
# The one table of the words a person reads for each state: pages, the timeline, the
# ward view, the report and the board all use it.
STATE_WORDS: Mapping[State, str] = MappingProxyType({
    State.INACTIVE: "CLEARED",
    State.PENDING: "PENDING",
    State.ACTIVE: "ALARM",
    State.ESCALATED: "ESCALATED",
    State.ACKNOWLEDGED: "ACKNOWLEDGED",
    State.RESOLVED: "RESOLVED",
})  # fmt: skip
