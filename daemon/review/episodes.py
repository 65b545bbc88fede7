"""Alarm episodes: one alarm id's lifecycle events folded into spans (pure)."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

from ..engine.alarms import URGENCY, AlarmEvent, Kind, Priority, State

ANNUNCIATED = frozenset({State.ACTIVE, State.ESCALATED})
ENDED = frozenset({State.RESOLVED, State.INACTIVE})
ACK_REASONS = frozenset({"acknowledged", "reacknowledged", "acknowledged_after_clear"})


@dataclass(frozen=True, slots=True)
class Ack:
    time: float
    by: str
    role: str


@dataclass(slots=True)
class Episode:
    """One alarm id from onset to its end (or the end of the replay)."""

    alarm_id: str
    bed: str
    ward: str
    rule: str
    kind: Kind
    onset: float  # time of its first event (condition met, possibly pending)
    priority: Priority  # at activation (or at onset if it never became active)
    max_priority: Priority
    activated: float | None = None  # first time it was annunciated; None = never paged
    ended: float | None = None  # resolved or inactive; None = still open at the end
    acks: list[Ack] = field(default_factory=list)
    events: list[AlarmEvent] = field(default_factory=list)
    suppressed_by: set[str] = field(default_factory=set)

    @property
    def raised(self) -> bool:
        """Annunciated at least once: somebody was told."""
        return self.activated is not None

    def span(self, end_of_replay: float) -> tuple[float, float]:
        """From activation (or onset) to its end, or to the end of the replay."""
        start = self.activated if self.activated is not None else self.onset
        return start, self.ended if self.ended is not None else max(end_of_replay, start)

    @property
    def pages(self) -> int:
        """Events that paged anyone (activation, escalations, re-notifications, returns)."""
        return sum(1 for e in self.events if e.notify)

    def minutes_in_alarm(self, end_of_replay: float) -> float:
        if self.activated is None:
            return 0.0
        a, b = self.span(end_of_replay)
        return (b - a) / 60.0


def episodes(events: Iterable[AlarmEvent]) -> list[Episode]:
    """Episodes in onset order; events of each in the order the engine emitted them."""
    by_id: dict[str, Episode] = {}
    for e in events:
        ep = by_id.get(e.alarm_id)
        if ep is None:
            ep = by_id[e.alarm_id] = Episode(
                e.alarm_id, e.bed, e.ward, e.rule, e.kind, e.time, e.priority, e.priority
            )
        ep.events.append(e)
        if URGENCY[e.priority] > URGENCY[ep.max_priority]:
            ep.max_priority = e.priority
        if e.state in ANNUNCIATED and ep.activated is None:
            ep.activated, ep.priority = e.time, e.priority
        if e.reason in ACK_REASONS and e.by is not None:
            ep.acks.append(Ack(e.time, e.by, e.role or ""))
        if e.suppressed_by:
            ep.suppressed_by.add(e.suppressed_by)
        if e.state in ENDED:
            ep.ended = e.time
    return sorted(by_id.values(), key=lambda x: (x.onset, x.alarm_id))
