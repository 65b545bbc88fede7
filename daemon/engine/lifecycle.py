"""The alarm lifecycle: one record per alarm episode, moved only by the table below.

inactive → pending → active → escalated(n) → acknowledged → resolved (DESIGN §5).
Every transition is one AlarmEvent with a reason code. The book is pure: time is
an argument, and it says when it next needs to be woken (`next_due`).

Calling order, per `now`: `tick(now)` first, then `update`/`acknowledge` at the
same `now`, so that what fell due before a message is recorded before it.
Time never runs backwards inside a book: an earlier `now` counts as the latest
time seen.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from enum import StrEnum
from types import MappingProxyType
from typing import Any

from pydantic import TypeAdapter

from .alarms import URGENCY, AlarmEvent, Kind, Priority, RuleSpec, State
from .escalation import EscalationPolicy, PriorityPolicy
from .timefmt import to_datetime


class Trigger(StrEnum):
    """What can happen to an alarm. Guards (delay, latching, presence of the
    condition) are folded into the trigger name, so the table alone decides."""

    ONSET = "onset"  # condition met; the rule has an alarm-condition delay
    ONSET_NOW = "onset_now"  # condition met; no delay
    ONSET_SUPPRESSED = "onset_suppressed"  # condition met while a technical alarm suppresses
    DELAY_ELAPSED = "delay_elapsed"
    CLEARED_EARLY = "cleared_early"  # condition gone before the delay ran out
    CLEARED_LATCHED = "cleared_latched"  # latching rule, condition gone, no ack yet
    RETURNED_LATCHED = "returned_latched"  # ... and the condition is back
    HOLD_ELAPSED = "hold_elapsed"  # condition stayed clear for the clear-hold time
    ESCALATE = "escalate"  # next tier due
    RENOTIFY = "renotify"  # re-notify interval after the last tier
    ACK = "ack"
    ACK_LATCHED_CLEAR = "ack_latched_clear"  # ack of a latched alarm whose condition is gone
    ACK_EXPIRED = "ack_expired"  # ack ran out, condition still present
    ACK_EXPIRED_CLEAR = "ack_expired_clear"  # ack ran out, condition gone
    SUPPRESS = "suppress"  # a technical alarm on the bed began to suppress
    LIFT = "lift"  # suppression ended, condition present (pending: delay has passed)
    LIFT_WAIT = "lift_wait"  # pending: suppression ended, delay still running
    LIFT_QUIET = "lift_quiet"  # suppression ended while the condition is in its clear-hold
    # held back by a technical alarm for the policy's longest suppression: pages on its own
    SUPPRESSION_EXPIRED = "suppression_expired"
    SUPPRESSION_EXPIRED_WAIT = "suppression_expired_wait"  # pending: its delay still runs
    PRIORITY_RAISED = "priority_raised"
    PRIORITY_LOWERED = "priority_lowered"


class Page(StrEnum):
    """Who a transition pages (from the escalation policy of the alarm's priority)."""

    NONE = "none"  # recorded and published, nobody paged
    START = "start"  # (re)start escalation now; page tier 0
    TIER = "tier"  # next tier; page everyone up to it
    REPEAT = "repeat"  # page everyone reached so far again


@dataclass(frozen=True, slots=True)
class Step:
    to: State
    reason: str
    page: Page = Page.NONE


_I, _P, _A, _E, _K, _R = (
    State.INACTIVE,
    State.PENDING,
    State.ACTIVE,
    State.ESCALATED,
    State.ACKNOWLEDGED,
    State.RESOLVED,
)
T = Trigger

# The whole lifecycle. A (state, trigger) pair not listed here is never taken:
# it is counted in AlarmBook.refused instead.
TRANSITIONS: Mapping[tuple[State, Trigger], Step] = MappingProxyType({
    (_I, T.ONSET): Step(_P, "condition_met"),
    (_I, T.ONSET_NOW): Step(_A, "condition_met", Page.START),
    (_I, T.ONSET_SUPPRESSED): Step(_P, "suppressed"),

    (_P, T.DELAY_ELAPSED): Step(_A, "delay_elapsed", Page.START),
    (_P, T.CLEARED_EARLY): Step(_I, "cleared_before_activation"),
    (_P, T.SUPPRESS): Step(_P, "suppressed"),
    (_P, T.LIFT): Step(_A, "suppression_lifted", Page.START),
    (_P, T.LIFT_WAIT): Step(_P, "suppression_lifted"),
    (_P, T.SUPPRESSION_EXPIRED): Step(_A, "suppression_expired", Page.START),
    (_P, T.SUPPRESSION_EXPIRED_WAIT): Step(_P, "suppression_expired"),
    (_P, T.PRIORITY_RAISED): Step(_P, "priority_raised"),
    (_P, T.PRIORITY_LOWERED): Step(_P, "priority_lowered"),

    (_A, T.ESCALATE): Step(_E, "escalation_due", Page.TIER),
    (_A, T.RENOTIFY): Step(_A, "renotify", Page.REPEAT),  # single-tier policies
    (_A, T.CLEARED_LATCHED): Step(_A, "condition_cleared_latched"),
    (_A, T.RETURNED_LATCHED): Step(_A, "condition_returned"),
    (_A, T.HOLD_ELAPSED): Step(_R, "condition_cleared"),
    (_A, T.ACK): Step(_K, "acknowledged"),
    (_A, T.ACK_LATCHED_CLEAR): Step(_R, "acknowledged_after_clear"),
    (_A, T.SUPPRESS): Step(_A, "suppressed"),
    (_A, T.LIFT): Step(_A, "suppression_lifted", Page.START),
    (_A, T.LIFT_QUIET): Step(_A, "suppression_lifted"),
    (_A, T.SUPPRESSION_EXPIRED): Step(_A, "suppression_expired", Page.START),
    (_A, T.PRIORITY_RAISED): Step(_A, "priority_raised", Page.START),
    (_A, T.PRIORITY_LOWERED): Step(_A, "priority_lowered"),

    (_E, T.ESCALATE): Step(_E, "escalation_due", Page.TIER),
    (_E, T.RENOTIFY): Step(_E, "renotify", Page.REPEAT),
    (_E, T.CLEARED_LATCHED): Step(_E, "condition_cleared_latched"),
    (_E, T.RETURNED_LATCHED): Step(_E, "condition_returned"),
    (_E, T.HOLD_ELAPSED): Step(_R, "condition_cleared"),
    (_E, T.ACK): Step(_K, "acknowledged"),
    (_E, T.ACK_LATCHED_CLEAR): Step(_R, "acknowledged_after_clear"),
    (_E, T.SUPPRESS): Step(_E, "suppressed"),
    (_E, T.LIFT): Step(_A, "suppression_lifted", Page.START),
    (_E, T.LIFT_QUIET): Step(_E, "suppression_lifted"),
    (_E, T.SUPPRESSION_EXPIRED): Step(_A, "suppression_expired", Page.START),
    (_E, T.PRIORITY_RAISED): Step(_A, "priority_raised", Page.START),
    (_E, T.PRIORITY_LOWERED): Step(_E, "priority_lowered"),

    (_K, T.ACK): Step(_K, "reacknowledged"),
    (_K, T.ACK_EXPIRED): Step(_A, "ack_expired", Page.START),
    (_K, T.ACK_EXPIRED_CLEAR): Step(_R, "ack_expired_condition_clear"),
    (_K, T.HOLD_ELAPSED): Step(_R, "condition_cleared"),
    (_K, T.SUPPRESS): Step(_K, "suppressed"),
    (_K, T.LIFT): Step(_K, "suppression_lifted"),
    (_K, T.LIFT_QUIET): Step(_K, "suppression_lifted"),
    (_K, T.PRIORITY_RAISED): Step(_A, "priority_raised", Page.START),  # new information
    (_K, T.PRIORITY_LOWERED): Step(_K, "priority_lowered"),
})  # fmt: skip

# Which states may follow which, derived from the table (for checks and tests).
SUCCESSORS: Mapping[State, frozenset[State]] = MappingProxyType({
    s: frozenset(step.to for (frm, _), step in TRANSITIONS.items() if frm is s) for s in State
})  # fmt: skip

# Ties between time-driven triggers due at the same instant: ending first, so an
# alarm that resolves at t is not also escalated at t.
_TIE_ORDER: dict[Trigger, int] = {
    T.HOLD_ELAPSED: 0,
    T.ACK_EXPIRED_CLEAR: 1,
    T.ACK_EXPIRED: 2,
    T.DELAY_ELAPSED: 3,
    T.SUPPRESSION_EXPIRED: 3,
    T.SUPPRESSION_EXPIRED_WAIT: 3,
    T.ESCALATE: 4,
    T.RENOTIFY: 5,
}
# A latched alarm whose condition has ended is shown until acknowledged, but re-paged at
# most this often, to the tiers already reached, and never escalated (DESIGN §5).
LATCHED_RENOTIFY_S = 3600.0
LATCHED_RENOTIFY_MAX_S = 4 * 3600.0
_ANNUNCIATED = (State.ACTIVE, State.ESCALATED)
_ENDED = (State.INACTIVE, State.RESOLVED)

# (state, activation or onset time, when the condition went away; None while present)
OpenRule = tuple[State, float, float | None]

REJECT_UNKNOWN = "unknown_alarm"
REJECT_ENDED = "alarm_ended"
REJECT_NOT_ACKABLE = "not_acknowledgeable"
REJECT_NO_AUTHOR = "missing_author"


@dataclass(slots=True)
class _Record:
    """One alarm episode, from onset to its end."""

    alarm_id: str
    bed: str
    ward: str
    spec: RuleSpec
    priority: Priority
    state: State
    onset: float  # condition first met in this episode (start of the delay)
    t_last: float  # latest time the record changed or was updated
    summary: str
    evidence: dict[str, Any]
    present: bool = True  # condition as last reported
    cleared_at: float | None = None  # when the condition last went away (None: present)
    clear_since: float | None = None  # start of the clear-hold
    latched_clear: bool = False  # latching rule: condition gone, awaiting ack
    activated_at: float | None = None  # escalation clock (re)starts here
    tier: int = 0
    renotified: int = 0
    suppressed_by: str | None = None
    suppressed_at: float | None = None
    suppression_spent: bool = False  # held back for the longest allowed: never again
    paged_at: float | None = None  # when the alarm last paged anyone
    ack_by: str | None = None
    ack_role: str | None = None
    ack_until: float | None = None
    revision: int = 0  # counts evaluations: the evidence may differ after each


@dataclass(slots=True)
class _Slot:
    """Per bed and rule: the live episode and what makes the next id unique."""

    bed: str
    rule: str
    record: _Record | None = None
    last_stamp: str = ""
    dup: int = 0
    ended_id: str | None = None


@dataclass(slots=True)
class _Snapshot:
    schema_version: int
    ack_validity_s: int
    now: float | None
    slots: list[_Slot] = field(default_factory=list)


_SNAPSHOT = TypeAdapter(_Snapshot)


@dataclass(frozen=True, slots=True)
class AlarmView:
    """A current (not ended) alarm, for state messages and suppression."""

    alarm_id: str
    bed: str
    ward: str
    rule: str
    title: str
    priority: Priority
    kind: Kind
    state: State
    tier: int
    onset: float
    activated_at: float | None
    condition_present: bool
    suppressed_by: str | None
    ack_by: str | None
    ack_role: str | None
    ack_until: float | None
    summary: str
    evidence: dict[str, object] = field(hash=False)


class AlarmBook:
    # slotted: a snapshot (snapshot.py) knows its fields from the class
    __slots__ = (
        "_by_bed", "_dues", "_explain", "_live", "_min_due", "_min_stale", "_now", "_policy",
        "_slots", "ack_validity_s", "refused",
    )  # fmt: skip

    def __init__(self, policy: EscalationPolicy, ack_validity_s: int = 3600) -> None:
        if ack_validity_s <= 0:
            raise ValueError("ack_validity_s must be positive")
        self._policy = policy
        self.ack_validity_s = ack_validity_s
        self._now: float | None = None
        self._slots: dict[tuple[str, str], _Slot] = {}
        self._live: dict[str, _Slot] = {}  # alarm id -> slot, in onset order
        self._by_bed: dict[str, dict[str, _Slot]] = {}  # bed -> its live slots, by alarm id
        # the latest summary and evidence of a live alarm, built only when needed: an
        # open alarm is re-evaluated every minute, but its words are read rarely
        self._explain: dict[str, Callable[[], tuple[str, dict[str, object]]]] = {}
        # next due time per live alarm, and their minimum (recomputed only when one
        # of them changed): next_due is asked after every message
        self._dues: dict[str, float] = {}
        self._min_due: float | None = None
        self._min_stale = False
        # transitions asked for that the table does not list; should stay empty
        self.refused: Counter[tuple[State, Trigger]] = Counter()

    # --- inputs --------------------------------------------------------------
    def update(
        self,
        now: float,
        bed: str,
        ward: str,
        spec: RuleSpec,
        condition: bool,
        summary: str,
        evidence: dict[str, object],
        suppressed_by: str | None = None,
        priority: Priority | None = None,
        explain: Callable[[], tuple[str, dict[str, object]]] | None = None,
    ) -> list[AlarmEvent]:
        """The rule `spec` was evaluated for `bed` at `now`. `suppressed_by` names an
        active, unacknowledged technical alarm on the bed; it only affects
        low-output rules. `priority` overrides the rule's for this evaluation.
        `explain`, if given, stands in for `summary` and `evidence` and is called
        only when they are read (an event, a view, a snapshot)."""
        now = self._clock(now)
        slot = self._slots.get((bed, spec.rule_id))
        if not condition and (slot is None or slot.record is None):
            return []
        prio = priority if priority is not None else spec.priority
        rec = slot.record if slot is not None else None
        spent = rec is not None and rec.suppression_spent
        sup = suppressed_by if spec.low_output and not spent else None
        if (
            rec is not None
            and condition == rec.present
            and sup == rec.suppressed_by
            and prio is rec.priority
            and (due := self._dues.get(rec.alarm_id)) is not None
            and due > now
        ):  # the usual minute of an open alarm: same answer, nothing due, no event
            rec.spec, rec.ward = spec, ward
            self._keep_evidence(rec, summary, evidence, explain)
            rec.t_last = max(rec.t_last, now)  # moves no due: every one is after now
            return []
        out: list[AlarmEvent] = []
        if slot is not None and slot.record is not None:
            self._advance(slot, now, out)
        if slot is None:
            slot = self._slots[(bed, spec.rule_id)] = _Slot(bed, spec.rule_id)
        rec = slot.record
        if rec is None:
            if condition:
                if explain is not None:
                    summary, evidence = explain()
                self._open(slot, now, ward, spec, prio, summary, evidence, sup, out)
            return out
        rec.spec, rec.ward = spec, ward
        self._keep_evidence(rec, summary, evidence, explain)
        rec.t_last = max(rec.t_last, now)
        # 1. the condition itself
        if condition and not rec.present:
            rec.present, rec.clear_since, rec.cleared_at = True, None, None
            if rec.latched_clear:
                self._fire(slot, T.RETURNED_LATCHED, now, out)
        elif not condition and rec.present:
            rec.present, rec.cleared_at = False, now
            if rec.state is State.PENDING:
                rec.suppressed_by = sup  # the closing record names what holds now
                self._fire(slot, T.CLEARED_EARLY, now, out)
                return out
            if spec.latching and rec.state in _ANNUNCIATED:
                self._fire(slot, T.CLEARED_LATCHED, now, out)
            else:
                rec.clear_since = now  # hysteresis: resolves only if it stays clear
        # 2. suppression by a technical alarm
        if sup != rec.suppressed_by:
            was, rec.suppressed_by = rec.suppressed_by, sup
            if was is None:
                self._fire(slot, T.SUPPRESS, now, out)
            elif sup is None:
                self._fire(slot, self._lift_trigger(rec, now), now, out)
            # else another technical alarm took over: the record names it, no new event
        # 3. priority (e.g. hypovolaemia-risk gains or loses a haemodynamic sign)
        if prio != rec.priority:
            up = URGENCY[prio] > URGENCY[rec.priority]
            rec.priority = prio
            self._fire(slot, T.PRIORITY_RAISED if up else T.PRIORITY_LOWERED, now, out)
        if slot.record is rec:
            self._advance(slot, now, out)
        return out

    def _keep_evidence(
        self,
        rec: _Record,
        summary: str,
        evidence: dict[str, object],
        explain: Callable[[], tuple[str, dict[str, object]]] | None,
    ) -> None:
        rec.revision += 1
        if explain is not None:
            self._explain[rec.alarm_id] = explain
        else:
            self._explain.pop(rec.alarm_id, None)
            rec.summary, rec.evidence = summary, dict(evidence)

    def acknowledge(self, now: float, alarm_id: str, by: str, role: str) -> list[AlarmEvent] | str:
        """An authored acknowledgement of one alarm; a str is the rejection reason."""
        now = self._clock(now)
        if not by.strip() or not role.strip():
            return REJECT_NO_AUTHOR
        slot = self._live.get(alarm_id)
        if slot is None or slot.record is None:
            return REJECT_ENDED if self._ended(alarm_id) else REJECT_UNKNOWN
        if slot.record.state not in (State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED):
            return REJECT_NOT_ACKABLE
        out: list[AlarmEvent] = []
        # What fell due before the ack happened before it (no-op after tick(now)); if
        # that ended the alarm, the ack has nothing left to acknowledge.
        self._advance(slot, now, out)
        rec = slot.record
        if rec is not None and rec.state in (State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED):
            trig = T.ACK_LATCHED_CLEAR if rec.latched_clear else T.ACK
            self._fire(slot, trig, now, out, by=by, role=role)
            if slot.record is rec:
                self._advance(slot, now, out)
        return out

    def tick(self, now: float) -> list[AlarmEvent]:
        """Everything time-driven up to `now`, stamped with the time it fell due
        (so live and replay agree however late a timer fires)."""
        now = self._clock(now)
        first = self.next_due()
        if first is None or first > now:  # most wake-ups are a bed's rules, not the book's
            return []
        out: list[AlarmEvent] = []
        dues = self._dues
        # only alarms with something due (their due times are kept current), in the
        # book's order: a ward's worth of quiet open alarms costs a lookup each
        due_now = [s for aid, s in self._live.items() if dues.get(aid, math.inf) <= now]
        for slot in due_now:
            self._advance(slot, now, out)
        out.sort(key=lambda e: e.time)  # stable: per alarm, order is kept
        return out

    # --- queries -------------------------------------------------------------
    def next_due(self) -> float | None:
        """The earliest time at which tick() would emit an event."""
        if self._min_stale:
            self._min_due = min(self._dues.values(), default=None)
            self._min_stale = False
        return self._min_due

    def revision(self, alarm_id: str) -> int | None:
        """Changes whenever the alarm is evaluated again (its evidence may have moved);
        None once it has ended. Cheap: nothing is formatted."""
        slot = self._live.get(alarm_id)
        return None if slot is None or slot.record is None else slot.record.revision

    def active(self, bed: str | None = None) -> list[AlarmView]:
        """Current alarms (pending to acknowledged), most urgent first."""
        slots = self._live.values() if bed is None else self._by_bed.get(bed, {}).values()
        views = [_view(self._resolve(s.record)) for s in slots if s.record is not None]
        views.sort(key=lambda v: (-URGENCY[v.priority], v.onset, v.alarm_id))
        return views

    def _resolve(self, rec: _Record) -> _Record:
        fn = self._explain.pop(rec.alarm_id, None)
        if fn is not None:
            rec.summary, evidence = fn()
            rec.evidence = dict(evidence)
        return rec

    def settle(self) -> None:
        """Build the words of every live alarm now (they are built lazily, by closures
        that neither pickle nor snapshot)."""
        for slot in self._live.values():
            if slot.record is not None:
                self._resolve(slot.record)

    def __getstate__(self) -> tuple[None, dict[str, object]]:
        """Pickling (snapshot of a whole engine) resolves the pending words first."""
        self.settle()
        return None, {k: getattr(self, k) for k in AlarmBook.__slots__}

    def is_open(self, bed: str, rule_id: str) -> bool:
        """Whether the rule has a current alarm on the bed (cheaper than open_rules)."""
        slot = self._slots.get((bed, rule_id))
        return slot is not None and slot.record is not None

    def open_rules(self, bed: str) -> dict[str, OpenRule]:
        """Rule id -> (state, activation or onset time, when its condition went away or
        None while present) of the bed's current alarms."""
        return self.open_and_suppressor(bed)[0]

    def open_and_suppressor(self, bed: str) -> tuple[dict[str, OpenRule], str | None]:
        """open_rules(bed) and suppressor(bed), found in one pass over the bed's alarms:
        the question the evaluator asks every minute."""
        out: dict[str, OpenRule] = {}
        found: tuple[float, str] | None = None
        for s in self._by_bed.get(bed, {}).values():
            r = s.record
            if r is not None:
                at = r.activated_at if r.activated_at is not None else r.onset
                out[r.spec.rule_id] = (r.state, at, None if r.present else r.cleared_at or at)
                if (
                    r.spec.kind is Kind.TECHNICAL
                    and r.state in _ANNUNCIATED
                    and (found is None or (r.onset, r.alarm_id) < found)
                ):
                    found = (r.onset, r.alarm_id)
        return out, found[1] if found else None

    def suppressor(self, bed: str) -> str | None:
        """The alarm id that suppresses `bed`'s low-output alarms: its earliest
        active, unacknowledged technical alarm, or None."""
        return self.open_and_suppressor(bed)[1]

    # --- snapshot ------------------------------------------------------------
    def snapshot(self) -> dict[str, object]:
        # live episodes first, in the order the book holds them (tick order)
        live = list(self._live.values())
        for slot in live:
            if slot.record is not None:
                self._resolve(slot.record)
        rest = [s for _, s in sorted(self._slots.items()) if s.record is None]
        snap = _Snapshot(1, self.ack_validity_s, self._now, live + rest)
        data: dict[str, object] = _SNAPSHOT.dump_python(snap, mode="json")
        return data

    @classmethod
    def restore(cls, data: Mapping[str, object], policy: EscalationPolicy) -> AlarmBook:
        snap = _SNAPSHOT.validate_python(data)
        if snap.schema_version != 1:
            raise ValueError(f"alarm book snapshot schema {snap.schema_version} is not 1")
        book = cls(policy, snap.ack_validity_s)
        book._now = snap.now
        for slot in snap.slots:
            book._slots[(slot.bed, slot.rule)] = slot
            if slot.record is not None:
                book._live[slot.record.alarm_id] = slot
                book._by_bed.setdefault(slot.bed, {})[slot.record.alarm_id] = slot
                due = book._due(slot)
                book._set_due(slot.record.alarm_id, due[0][0] if due else None)
        return book

    # --- internals -----------------------------------------------------------
    def _clock(self, now: float) -> float:
        if not math.isfinite(now):
            raise ValueError(f"engine time must be finite, got {now!r}")
        if self._now is None or now > self._now:
            self._now = now
        return self._now

    def _open(
        self,
        slot: _Slot,
        now: float,
        ward: str,
        spec: RuleSpec,
        prio: Priority,
        summary: str,
        evidence: dict[str, object],
        sup: str | None,
        out: list[AlarmEvent],
    ) -> None:
        # The id comes from bed, rule and onset time, so a live run and a replay
        # of the same messages name the same alarm the same way.
        stamp = to_datetime(now).strftime("%Y%m%dT%H%M%SZ")
        slot.dup = slot.dup + 1 if stamp == slot.last_stamp else 1
        slot.last_stamp = stamp
        alarm_id = f"{slot.bed}/{slot.rule}/{stamp}"
        if slot.dup > 1:
            alarm_id += f".{slot.dup}"
        rec = _Record(
            alarm_id, slot.bed, ward, spec, prio, State.INACTIVE, now, now, summary,
            dict(evidence), suppressed_by=sup, suppressed_at=now if sup else None,
        )  # fmt: skip
        slot.record = rec
        self._live[alarm_id] = slot
        self._by_bed.setdefault(slot.bed, {})[alarm_id] = slot
        if sup is not None:
            trig = T.ONSET_SUPPRESSED
        else:
            trig = T.ONSET_NOW if spec.condition_delay_s <= 0 else T.ONSET
        self._fire(slot, trig, now, out)
        if slot.record is rec:
            self._advance(slot, now, out)

    def _ended(self, alarm_id: str) -> bool:
        parts = alarm_id.rsplit("/", 2)
        if len(parts) != 3:
            return False
        slot = self._slots.get((parts[0], parts[1]))
        return slot is not None and slot.ended_id == alarm_id

    @staticmethod
    def _lift_trigger(rec: _Record, now: float) -> Trigger:
        if rec.state is State.PENDING:
            due = rec.onset + rec.spec.condition_delay_s
            return T.LIFT if due <= now else T.LIFT_WAIT
        return T.LIFT if rec.present or rec.latched_clear else T.LIFT_QUIET

    def _due(self, slot: _Slot) -> list[tuple[float, int, Trigger]]:
        """Time-driven triggers of one alarm, earliest first (never before the
        record's latest change, so events stay in order)."""
        rec = slot.record
        if rec is None:
            return []
        raw: list[tuple[float, Trigger]] = []
        s = rec.state
        free = rec.suppressed_by is None
        if (
            not free
            and rec.present
            and rec.suppressed_at is not None
            and s is not State.ACKNOWLEDGED
        ):
            # suppression is bounded: after that the alarm pages in its own right
            ends = rec.suppressed_at + self._policy.suppression_max_s
            waits = s is State.PENDING and rec.onset + rec.spec.condition_delay_s > ends
            raw.append((ends, T.SUPPRESSION_EXPIRED_WAIT if waits else T.SUPPRESSION_EXPIRED))
        if s is State.PENDING:
            if free:
                raw.append((rec.onset + rec.spec.condition_delay_s, T.DELAY_ELAPSED))
        elif s in _ANNUNCIATED:
            if rec.clear_since is not None:
                raw.append((rec.clear_since + rec.spec.clear_hold_s, T.HOLD_ELAPSED))
            if free and rec.activated_at is not None:
                pol = self._policy.for_priority(rec.priority)
                if rec.latched_clear:  # shown until acknowledged; re-paged at most hourly
                    if rec.paged_at is not None and pol.renotify_s is not None:
                        raw.append((rec.paged_at + _renotify_s(rec, pol), T.RENOTIFY))
                elif not rec.present:
                    pass  # in its clear-hold: nobody is paged for a condition that has gone
                elif rec.tier + 1 < len(pol.tiers):
                    raw.append((rec.activated_at + pol.tiers[rec.tier + 1].after_s, T.ESCALATE))
                elif (wait := pol.renotify_after(rec.renotified)) is not None:
                    base = rec.paged_at
                    if base is None:
                        base = rec.activated_at + pol.tiers[-1].after_s
                    raw.append((base + wait, T.RENOTIFY))
        elif s is State.ACKNOWLEDGED:
            if rec.clear_since is not None:
                raw.append((rec.clear_since + rec.spec.clear_hold_s, T.HOLD_ELAPSED))
            if rec.ack_until is not None:
                if not rec.present:
                    raw.append((rec.ack_until, T.ACK_EXPIRED_CLEAR))
                elif free:  # a suppressed alarm does not re-activate
                    raw.append((rec.ack_until, T.ACK_EXPIRED))
        out = [(max(t, rec.t_last), _TIE_ORDER[trig], trig) for t, trig in raw]
        out.sort()
        return out

    def _advance(self, slot: _Slot, now: float, out: list[AlarmEvent]) -> None:
        rec = slot.record
        while rec is not None and slot.record is rec:
            due = self._due(slot)
            if not due or due[0][0] > now:
                self._set_due(rec.alarm_id, due[0][0] if due else None)
                return
            t, _, trig = due[0]
            if trig is T.RENOTIFY:
                # After downtime, send the latest overdue re-notification once, not
                # every one that was missed.
                later = t + _renotify_s(rec, self._policy.for_priority(rec.priority), 1)
                if later <= now and all(d[0] > later for d in due[1:]):
                    rec.renotified += 1
                    rec.paged_at = t
                    continue
            if not self._fire(slot, trig, t, out):
                # counted in `refused`; drop the wake-up rather than spin on it
                self._set_due(rec.alarm_id, None)
                return

    def _set_due(self, alarm_id: str, due: float | None) -> None:
        old = self._dues.get(alarm_id)
        if due == old:
            return
        if due is None:
            del self._dues[alarm_id]
        else:
            self._dues[alarm_id] = due
        self._min_stale = True

    def _fire(
        self,
        slot: _Slot,
        trig: Trigger,
        t: float,
        out: list[AlarmEvent],
        by: str | None = None,
        role: str | None = None,
    ) -> bool:
        rec = slot.record
        assert rec is not None
        self._resolve(rec)
        step = TRANSITIONS.get((rec.state, trig))
        if step is None:
            self.refused[(rec.state, trig)] += 1
            return False
        pol = self._policy.for_priority(rec.priority)
        # bookkeeping that belongs to the trigger
        if trig in (T.ACK, T.ACK_LATCHED_CLEAR):
            rec.ack_by, rec.ack_role = by, role
            rec.ack_until = t + (rec.spec.ack_valid_s or self.ack_validity_s)
            rec.latched_clear = False
        elif trig is T.CLEARED_LATCHED:
            rec.latched_clear = True
        elif trig is T.RETURNED_LATCHED:
            rec.latched_clear = False
        elif trig in (T.SUPPRESS, T.ONSET_SUPPRESSED):
            rec.suppressed_at = t
        elif trig in (T.SUPPRESSION_EXPIRED, T.SUPPRESSION_EXPIRED_WAIT):
            rec.suppressed_by, rec.suppression_spent = None, True
        elif trig in (T.LIFT, T.LIFT_QUIET) and rec.activated_at is not None:
            if rec.suppressed_at is not None and rec.state in _ANNUNCIATED:
                # escalation was paused while suppressed: resume where it stood
                rec.activated_at += t - max(rec.suppressed_at, rec.activated_at)
        elif trig is T.PRIORITY_LOWERED:
            rec.tier = min(rec.tier, len(pol.tiers) - 1)
        notify: tuple[str, ...] = ()
        if step.page is Page.START:
            rec.activated_at, rec.tier, rec.renotified = t, 0, 0
            rec.ack_by = rec.ack_role = None
            rec.ack_until = None
            notify = pol.roles_up_to(0)
        elif step.page is Page.TIER:
            rec.tier += 1
            notify = pol.roles_up_to(rec.tier)
        elif step.page is Page.REPEAT:
            rec.renotified += 1
            notify = pol.roles_up_to(rec.tier)
        if notify and rec.spec.also_notify:
            notify += tuple(x for x in rec.spec.also_notify if x not in notify)
        if rec.suppressed_by is not None:
            notify = ()
        if notify:
            rec.paged_at = t
        holding: tuple[str, ...] = ()
        if rec.spec.kind is Kind.TECHNICAL:  # its page says what it is holding back
            holding = tuple(sorted(
                o.record.spec.rule_id for o in self._by_bed.get(rec.bed, {}).values()
                if o.record is not None and o.record.suppressed_by == rec.alarm_id
            ))  # fmt: skip
        rec.state = step.to
        rec.t_last = max(rec.t_last, t)
        out.append(
            AlarmEvent(
                time=t,
                alarm_id=rec.alarm_id,
                bed=rec.bed,
                ward=rec.ward,
                rule=rec.spec.rule_id,
                priority=rec.priority,
                kind=rec.spec.kind,
                state=step.to,
                reason=step.reason,
                summary=rec.summary,
                evidence=dict(rec.evidence),
                tier=rec.tier,
                notify=notify,
                by=by,
                role=role,
                suppressed_by=rec.suppressed_by,
                title=rec.spec.title,
                holding_back=holding,
            )
        )
        if step.to in _ENDED:
            slot.record = None
            slot.ended_id = rec.alarm_id
            del self._live[rec.alarm_id]
            del self._by_bed[slot.bed][rec.alarm_id]
            self._explain.pop(rec.alarm_id, None)
            self._set_due(rec.alarm_id, None)
        return True


def _renotify_s(rec: _Record, pol: PriorityPolicy, ahead: int = 0) -> float:
    """The wait before the next re-notification (`ahead` more after it): the policy's
    while the condition persists; for a latched alarm whose condition has ended, at
    least an hour."""
    n = rec.renotified + ahead
    wait = pol.renotify_after(n)
    if rec.latched_clear:  # hourly at first, then every 2 h, then every 4 h
        latched = min(LATCHED_RENOTIFY_S * float(2 ** min(n, 8)), LATCHED_RENOTIFY_MAX_S)
        return max(wait or 0.0, latched)
    return wait or 0.0


def _view(r: _Record) -> AlarmView:
    return AlarmView(
        r.alarm_id, r.bed, r.ward, r.spec.rule_id, r.spec.title, r.priority, r.spec.kind,
        r.state, r.tier, r.onset, r.activated_at, r.present, r.suppressed_by, r.ack_by,
        r.ack_role, r.ack_until, r.summary, dict(r.evidence),
    )  # fmt: skip
