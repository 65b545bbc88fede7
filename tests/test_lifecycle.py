"""The alarm lifecycle (DESIGN §5): the transition table cell by cell, latching,
hysteresis, acknowledgement expiry, escalation timing, suppression by technical
alarms, next_due, ids and snapshot/resume.

Beds, wards, people and times here are invented. Delays and clear-hold times are
test parameters (the rule files own the real ones); escalation timings are our
own defaults from alert_rules/escalation.toml, not from a standard.
"""

from __future__ import annotations

import itertools
import json
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path

import pytest
from hypothesis import given
from hypothesis import strategies as st

from daemon.engine.alarms import AlarmEvent, Kind, Priority, RuleSpec, State
from daemon.engine.escalation import EscalationPolicy, load_policy_text
from daemon.engine.lifecycle import (
    SUCCESSORS,
    TRANSITIONS,
    AlarmBook,
    Page,
    Trigger,
)

ROOT = Path(__file__).resolve().parents[1]
POLICY = load_policy_text(
    (ROOT / "alert_rules" / "escalation.toml").read_text(encoding="utf-8"), "escalation.toml"
)
T0 = datetime(2025, 6, 15, 15, 6, 40, tzinfo=UTC).timestamp()  # invented test time
TECH = "b1/meter-offline/20250615T150000Z"  # an invented technical alarm id
SUPPRESSION_MAX_S = 1800  # alert_rules/escalation.toml: our own default, 30 min

# Our own default chain (alert_rules/escalation.toml; expected response high =
# immediate, medium = prompt, low = awareness: Chambrin, Crit Care 2001, via
# CLINICAL-REFERENCE §8). Written out here so a change to the file is noticed.
BEDSIDE = ("bedside-nurse",)
CHARGE = ("bedside-nurse", "charge-nurse")
PHYSICIAN = ("bedside-nurse", "charge-nurse", "icu-physician")
CHAIN: dict[Priority, tuple[list[tuple[int, tuple[str, ...]]], int | None]] = {
    # priority: ([(seconds after activation, everyone paged at that tier)], renotify_s)
    Priority.HIGH: ([(0, BEDSIDE), (300, CHARGE), (600, PHYSICIAN)], 900),
    Priority.MEDIUM: ([(0, BEDSIDE), (900, CHARGE), (1800, PHYSICIAN)], 1800),
    Priority.LOW: ([(0, BEDSIDE), (3600, CHARGE)], 3600),
    Priority.INFO: ([(0, BEDSIDE)], None),
}
# each re-notification waits twice as long as the one before, up to (ours):
RENOTIFY_MAX: dict[Priority, int | None] = {
    Priority.HIGH: 3600, Priority.MEDIUM: 7200, Priority.LOW: 14400, Priority.INFO: None,
}  # fmt: skip


def renotify_times(prio: Priority, n: int) -> list[int]:
    """Seconds after activation of the first n re-notifications (written out from the
    policy's documented numbers, not from its code)."""
    tiers, first = CHAIN[prio]
    cap = RENOTIFY_MAX[prio]
    assert first is not None and cap is not None
    t, wait, out = tiers[-1][0], first, []
    for _ in range(n):
        t += wait
        out.append(t)
        wait = min(2 * wait, cap)
    return out


def rule(**kw: object) -> RuleSpec:
    base: dict[str, object] = {
        "rule_id": "oliguria-kdigo-1",
        "title": "Oliguria (test rule)",
        "kind": Kind.PHYSIOLOGICAL,
        "priority": Priority.MEDIUM,
        "latching": False,
        "condition_delay_s": 600,  # test parameter
        "clear_hold_s": 1800,  # test parameter
        "low_output": True,
    }
    base.update(kw)
    return RuleSpec(**base)  # type: ignore[arg-type]


ONE_TIER = EscalationPolicy.model_validate(
    {
        p: {"tiers": [{"roles": ["bedside-nurse"], "after_s": 0}], "renotify_s": 600}
        for p in ("high", "medium", "low", "info")
    }
)


class Bed:
    """Drives one bed and one rule the way the engine does: tick(now) first."""

    def __init__(
        self,
        spec: RuleSpec | None = None,
        policy: EscalationPolicy = POLICY,
        ack_validity_s: int = 3600,
    ) -> None:
        self.book = AlarmBook(policy, ack_validity_s)
        self.policy = policy
        self.spec = spec or rule()
        self.t = T0
        self.log: list[AlarmEvent] = []

    def update(
        self,
        cond: bool,
        dt: float = 0.0,
        sup: str | None = None,
        prio: Priority | None = None,
        spec: RuleSpec | None = None,
        bed: str = "b1",
    ) -> list[AlarmEvent]:
        self.t += dt
        ev = self.book.tick(self.t)
        ev += self.book.update(
            self.t, bed, "w1", spec or self.spec, cond, "test summary", {"value": 1},
            suppressed_by=sup, priority=prio,
        )  # fmt: skip
        self.log += ev
        return ev

    def tick(self, t: float) -> list[AlarmEvent]:
        self.t = max(self.t, t)
        ev = self.book.tick(t)
        self.log += ev
        return ev

    def tick_next(self) -> list[AlarmEvent]:
        due = self.book.next_due()
        assert due is not None
        return self.tick(due)

    def ack(
        self, dt: float = 0.0, by: str = "nurse-a", role: str = "bedside-nurse"
    ) -> list[AlarmEvent]:
        self.t += dt
        ev = self.book.tick(self.t)
        r = self.book.acknowledge(self.t, self.alarm_id, by, role)
        assert not isinstance(r, str), r
        self.log += ev + r
        return ev + r

    @property
    def alarm_id(self) -> str:
        return self.log[-1].alarm_id

    @property
    def state(self) -> State:
        views = self.book.active("b1")
        return views[0].state if views else State.INACTIVE


# --- the table, cell by cell ---------------------------------------------------

# The expected table, written out independently of the code: a change to the
# lifecycle must change both.
EXPECTED = [
    ("inactive", "onset", "pending", "condition_met", "none"),
    ("inactive", "onset_now", "active", "condition_met", "start"),
    ("inactive", "onset_suppressed", "pending", "suppressed", "none"),
    ("pending", "delay_elapsed", "active", "delay_elapsed", "start"),
    ("pending", "cleared_early", "inactive", "cleared_before_activation", "none"),
    ("pending", "suppress", "pending", "suppressed", "none"),
    ("pending", "lift", "active", "suppression_lifted", "start"),
    ("pending", "lift_wait", "pending", "suppression_lifted", "none"),
    ("pending", "priority_raised", "pending", "priority_raised", "none"),
    ("pending", "priority_lowered", "pending", "priority_lowered", "none"),
    ("pending", "suppression_expired", "active", "suppression_expired", "start"),
    ("pending", "suppression_expired_wait", "pending", "suppression_expired", "none"),
    ("active", "escalate", "escalated", "escalation_due", "tier"),
    ("active", "renotify", "active", "renotify", "repeat"),
    ("active", "cleared_latched", "active", "condition_cleared_latched", "none"),
    ("active", "returned_latched", "active", "condition_returned", "none"),
    ("active", "hold_elapsed", "resolved", "condition_cleared", "none"),
    ("active", "ack", "acknowledged", "acknowledged", "none"),
    ("active", "ack_latched_clear", "resolved", "acknowledged_after_clear", "none"),
    ("active", "suppress", "active", "suppressed", "none"),
    ("active", "lift", "active", "suppression_lifted", "start"),
    ("active", "lift_quiet", "active", "suppression_lifted", "none"),
    ("active", "priority_raised", "active", "priority_raised", "start"),
    ("active", "priority_lowered", "active", "priority_lowered", "none"),
    ("active", "suppression_expired", "active", "suppression_expired", "start"),
    ("escalated", "escalate", "escalated", "escalation_due", "tier"),
    ("escalated", "renotify", "escalated", "renotify", "repeat"),
    ("escalated", "cleared_latched", "escalated", "condition_cleared_latched", "none"),
    ("escalated", "returned_latched", "escalated", "condition_returned", "none"),
    ("escalated", "hold_elapsed", "resolved", "condition_cleared", "none"),
    ("escalated", "ack", "acknowledged", "acknowledged", "none"),
    ("escalated", "ack_latched_clear", "resolved", "acknowledged_after_clear", "none"),
    ("escalated", "suppress", "escalated", "suppressed", "none"),
    ("escalated", "lift", "active", "suppression_lifted", "start"),
    ("escalated", "lift_quiet", "escalated", "suppression_lifted", "none"),
    ("escalated", "priority_raised", "active", "priority_raised", "start"),
    ("escalated", "priority_lowered", "escalated", "priority_lowered", "none"),
    ("escalated", "suppression_expired", "active", "suppression_expired", "start"),
    ("acknowledged", "ack", "acknowledged", "reacknowledged", "none"),
    ("acknowledged", "ack_expired", "active", "ack_expired", "start"),
    ("acknowledged", "ack_expired_clear", "resolved", "ack_expired_condition_clear", "none"),
    ("acknowledged", "hold_elapsed", "resolved", "condition_cleared", "none"),
    ("acknowledged", "suppress", "acknowledged", "suppressed", "none"),
    ("acknowledged", "lift", "acknowledged", "suppression_lifted", "none"),
    ("acknowledged", "lift_quiet", "acknowledged", "suppression_lifted", "none"),
    ("acknowledged", "priority_raised", "active", "priority_raised", "start"),
    ("acknowledged", "priority_lowered", "acknowledged", "priority_lowered", "none"),
]


def test_table_is_exactly_the_expected_list() -> None:
    actual = sorted(
        (str(s), str(t), str(step.to), step.reason, str(step.page))
        for (s, t), step in TRANSITIONS.items()
    )
    assert actual == sorted(EXPECTED)
    assert len(EXPECTED) == len(set(EXPECTED))


def test_resolved_and_inactive_successors() -> None:
    assert SUCCESSORS[State.RESOLVED] == frozenset()  # an ended episode never moves again
    assert SUCCESSORS[State.INACTIVE] == {State.PENDING, State.ACTIVE}
    assert State.INACTIVE in SUCCESSORS[State.PENDING]
    assert State.PENDING not in SUCCESSORS[State.ACTIVE]


# Rule variants a trigger needs (test parameters).
_SPEC_FOR: dict[Trigger, RuleSpec] = {
    Trigger.ONSET_NOW: rule(condition_delay_s=0),
    Trigger.CLEARED_LATCHED: rule(latching=True, low_output=False),
    Trigger.RETURNED_LATCHED: rule(latching=True, low_output=False),
    Trigger.ACK_LATCHED_CLEAR: rule(latching=True, low_output=False),
    Trigger.HOLD_ELAPSED: rule(clear_hold_s=120),
    Trigger.ACK_EXPIRED_CLEAR: rule(clear_hold_s=7200),
    Trigger.LIFT_QUIET: rule(clear_hold_s=7200),
    # a delay longer than the longest suppression (escalation.toml: 1800 s)
    Trigger.SUPPRESSION_EXPIRED_WAIT: rule(condition_delay_s=3600),
}


def _reach(bed: Bed, state: State) -> None:
    if state is State.INACTIVE:
        return
    bed.update(True)
    if state is State.PENDING:
        return
    bed.tick_next()  # delay elapsed
    if state is State.ESCALATED:
        bed.tick_next()
    elif state is State.ACKNOWLEDGED:
        bed.ack(dt=60)


def _setup(bed: Bed, state: State, trig: Trigger) -> None:
    """What must have happened just before `trig` can occur in `state`."""
    if trig in (
        Trigger.RETURNED_LATCHED, Trigger.ACK_LATCHED_CLEAR, Trigger.ACK_EXPIRED_CLEAR,
        Trigger.HOLD_ELAPSED,
    ):  # fmt: skip
        bed.update(False, dt=60)
    elif trig is Trigger.RENOTIFY and state is State.ESCALATED:
        bed.tick_next()  # up to the last tier
    elif trig is Trigger.LIFT:
        bed.update(True, dt=60, sup=TECH)
        if state is State.PENDING:
            bed.tick(T0 + bed.spec.condition_delay_s + 10)  # delay passes while suppressed
    elif trig in (Trigger.LIFT_WAIT, Trigger.SUPPRESSION_EXPIRED,
                  Trigger.SUPPRESSION_EXPIRED_WAIT):  # fmt: skip
        bed.update(True, dt=60, sup=TECH)
    elif trig is Trigger.LIFT_QUIET:
        bed.update(True, dt=60, sup=TECH)
        bed.update(False, dt=60, sup=TECH)


def _act(bed: Bed, trig: Trigger) -> list[AlarmEvent]:
    if trig in (Trigger.ONSET, Trigger.ONSET_NOW):
        return bed.update(True)
    if trig is Trigger.ONSET_SUPPRESSED:
        return bed.update(True, sup=TECH)
    if trig in (
        Trigger.DELAY_ELAPSED, Trigger.ESCALATE, Trigger.RENOTIFY,
        Trigger.ACK_EXPIRED, Trigger.ACK_EXPIRED_CLEAR,
        Trigger.SUPPRESSION_EXPIRED, Trigger.SUPPRESSION_EXPIRED_WAIT,
    ):  # fmt: skip
        return bed.tick_next()
    if trig is Trigger.HOLD_ELAPSED:
        return bed.tick(bed.t + bed.spec.clear_hold_s)
    if trig in (Trigger.CLEARED_EARLY, Trigger.CLEARED_LATCHED):
        return bed.update(False, dt=60)
    if trig is Trigger.RETURNED_LATCHED:
        return bed.update(True, dt=60)
    if trig in (Trigger.ACK, Trigger.ACK_LATCHED_CLEAR):
        return bed.ack(dt=60, by="nurse-b", role="charge-nurse")
    if trig is Trigger.SUPPRESS:
        return bed.update(True, dt=60, sup=TECH)
    if trig in (Trigger.LIFT, Trigger.LIFT_WAIT):
        return bed.update(True, dt=60)
    if trig is Trigger.LIFT_QUIET:
        return bed.update(False, dt=60)
    if trig is Trigger.PRIORITY_RAISED:
        return bed.update(True, dt=60, prio=Priority.HIGH)
    if trig is Trigger.PRIORITY_LOWERED:
        return bed.update(True, dt=60, prio=Priority.LOW)
    raise AssertionError(f"no recipe for {trig}")


@pytest.mark.parametrize(
    ("state", "trig"), sorted(TRANSITIONS), ids=lambda x: str(x) if isinstance(x, str) else ""
)
def test_every_cell_of_the_table(state: State, trig: Trigger) -> None:
    step = TRANSITIONS[(state, trig)]
    policy = ONE_TIER if (trig is Trigger.RENOTIFY and state is State.ACTIVE) else POLICY
    bed = Bed(_SPEC_FOR.get(trig, rule()), policy)
    _reach(bed, state)
    _setup(bed, state, trig)
    assert bed.state is state
    before = bed.log[-1] if bed.log else None
    events = _act(bed, trig)
    assert len(events) == 1, events
    e = events[0]
    assert (e.state, e.reason) == (step.to, step.reason)
    assert bed.state is (State.INACTIVE if step.to is State.RESOLVED else step.to)
    pol = policy.for_priority(e.priority)
    if step.page is Page.START:
        assert e.notify == pol.roles_up_to(0) and e.tier == 0
    elif step.page is Page.TIER:
        assert before is not None and e.tier == before.tier + 1
        assert e.notify == pol.roles_up_to(e.tier)
    elif step.page is Page.REPEAT:
        assert before is not None and e.tier == before.tier
        assert e.notify == pol.roles_up_to(e.tier)
    else:
        assert e.notify == ()
    if trig in (Trigger.ACK, Trigger.ACK_LATCHED_CLEAR):
        assert (e.by, e.role) == ("nurse-b", "charge-nurse")
    assert bed.book.refused == Counter()


# --- onset, delay, clearing ------------------------------------------------------


def test_pending_waits_the_delay_then_activates() -> None:
    bed = Bed(rule(condition_delay_s=600))
    [e] = bed.update(True)
    assert (e.state, e.reason, e.notify) == (State.PENDING, "condition_met", ())
    assert bed.tick(T0 + 599) == []
    [e] = bed.tick(T0 + 600)
    assert (e.state, e.reason, e.time, e.notify) == (
        State.ACTIVE,
        "delay_elapsed",
        T0 + 600,
        BEDSIDE,
    )


def test_pending_that_clears_goes_back_to_inactive_and_next_episode_gets_a_new_id() -> None:
    bed = Bed()
    [first] = bed.update(True)
    [e] = bed.update(False, dt=300)
    assert (e.state, e.reason, e.alarm_id) == (
        State.INACTIVE,
        "cleared_before_activation",
        first.alarm_id,
    )
    assert bed.book.next_due() is None and bed.book.active() == []
    [again] = bed.update(True, dt=60)
    assert again.state is State.PENDING and again.alarm_id != first.alarm_id


def test_delay_zero_activates_in_the_same_update() -> None:
    bed = Bed(rule(condition_delay_s=0))
    [e] = bed.update(True)
    assert (e.state, e.time, e.notify, e.tier) == (State.ACTIVE, T0, BEDSIDE, 0)


def test_alarm_ids_are_deterministic_and_unique_per_episode() -> None:
    a, b = (
        Bed(rule(condition_delay_s=0, clear_hold_s=0)),
        Bed(rule(condition_delay_s=0, clear_hold_s=0)),
    )
    for bed in (a, b):
        bed.update(True)
        bed.update(False)  # resolves at once: hold 0
        bed.update(True)  # same second: a second episode
        bed.update(False, dt=30)
        bed.update(True, dt=30)
    assert [e.alarm_id for e in a.log] == [e.alarm_id for e in b.log]
    ids = sorted({e.alarm_id for e in a.log})
    assert ids == [
        "b1/oliguria-kdigo-1/20250615T150640Z",
        "b1/oliguria-kdigo-1/20250615T150640Z.2",
        "b1/oliguria-kdigo-1/20250615T150740Z",
    ]


# --- latching and hysteresis -----------------------------------------------------


def test_latching_alarm_stays_after_clearing_until_acknowledged() -> None:
    # post-obstructive diuresis alarms latch (DESIGN §4; CLINICAL-REFERENCE §8, latching)
    bed = Bed(rule(rule_id="pod-hourly", latching=True, low_output=False, condition_delay_s=0))
    bed.update(True)
    [e] = bed.update(False, dt=600)
    assert (e.state, e.reason) == (State.ACTIVE, "condition_cleared_latched")
    # nobody acks: shown for days, re-paged hourly to the tier reached (the bedside
    # nurse), never escalated further (DESIGN §5)
    later = [x for k in range(1, 24 * 6 + 1) for x in bed.tick(T0 + k * 600)]  # a day
    assert later and {(x.reason, x.notify) for x in later} == {("renotify", BEDSIDE)}
    gaps = [b.time - a.time for a, b in itertools.pairwise([bed.log[0], *later])]
    # at most hourly, counted from its last page at activation (medium backs off to 2 h)
    assert later[0].time == T0 + 3600 and min(gaps) >= 3600 and gaps == sorted(gaps)
    assert bed.tick(T0 + 10 * 86400) != []  # days later, still shown and re-paged
    assert bed.state is State.ACTIVE
    evs = bed.ack(by="nurse-c", role="charge-nurse")
    assert [(x.state, x.reason, x.by, x.role) for x in evs] == [
        (State.RESOLVED, "acknowledged_after_clear", "nurse-c", "charge-nurse")
    ]
    assert bed.book.active() == [] and bed.book.next_due() is None


def test_latching_acknowledged_while_present_resolves_after_the_hold() -> None:
    bed = Bed(rule(latching=True, low_output=False, condition_delay_s=0, clear_hold_s=900))
    bed.update(True)
    bed.ack(dt=60)
    assert bed.update(False, dt=60) == []  # acknowledged: clearing just starts the hold
    clear_t = bed.t
    assert bed.tick(clear_t + 899) == []
    [e] = bed.tick(clear_t + 900)
    assert (e.state, e.reason) == (State.RESOLVED, "condition_cleared")


def test_non_latching_hysteresis() -> None:
    # info priority: no escalation, so every event here is about clearing
    bed = Bed(rule(condition_delay_s=0, clear_hold_s=1800, priority=Priority.INFO))
    bed.update(True)
    assert bed.update(False, dt=60) == []  # clear: the hold starts at T0+60
    assert bed.book.next_due() == T0 + 60 + 1800
    assert bed.update(True, dt=1799) == []  # back 1 s before the hold ends: stays active
    assert bed.state is State.ACTIVE and bed.book.next_due() is None
    assert bed.tick(T0 + 60 + 1800) == []
    bed.update(False, dt=100)
    clear_t = bed.t
    assert bed.tick(clear_t + 1799) == []
    [e] = bed.tick(clear_t + 1800)
    assert (e.state, e.reason, e.time) == (State.RESOLVED, "condition_cleared", clear_t + 1800)


def test_hold_and_escalation_due_together_resolves_without_escalating() -> None:
    # clear at T0+600 with hold 300: resolution and tier 1 both fall due at T0+900
    bed = Bed(rule(condition_delay_s=0, clear_hold_s=300))
    bed.update(True)
    bed.update(False, dt=600)
    evs = bed.tick(T0 + 900)
    assert [(e.state, e.reason) for e in evs] == [(State.RESOLVED, "condition_cleared")]


# --- acknowledgement ------------------------------------------------------------------


def test_ack_is_recorded_with_who_and_role_and_stops_escalation() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    [e] = bed.ack(dt=120, by="nurse-d", role="bedside-nurse")
    assert (e.state, e.reason, e.by, e.role, e.notify) == (
        State.ACKNOWLEDGED,
        "acknowledged",
        "nurse-d",
        "bedside-nurse",
        (),
    )
    [view] = bed.book.active("b1")
    assert (view.ack_by, view.ack_role, view.ack_until) == (
        "nurse-d",
        "bedside-nurse",
        T0 + 120 + 3600,
    )
    assert bed.book.next_due() == T0 + 120 + 3600  # the ack's expiry, no escalation


def test_ack_expiry_with_condition_present_reactivates_and_escalation_starts_again() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    bed.ack(dt=100)
    expiry = T0 + 100 + 3600  # default validity 60 min (DESIGN §5)
    assert bed.tick(expiry - 1) == []
    [e] = bed.tick(expiry)
    assert (e.state, e.reason, e.notify, e.tier) == (State.ACTIVE, "ack_expired", BEDSIDE, 0)
    assert bed.book.next_due() == expiry + 900  # medium tier 1 again, from re-activation


def test_ack_expiry_with_condition_absent_resolves() -> None:
    bed = Bed(rule(condition_delay_s=0, clear_hold_s=7200))
    bed.update(True)
    bed.ack(dt=100)
    bed.update(False, dt=100)
    [e] = bed.tick(T0 + 100 + 3600)
    assert (e.state, e.reason) == (State.RESOLVED, "ack_expired_condition_clear")


def test_ack_validity_is_a_setting() -> None:
    bed = Bed(rule(condition_delay_s=0), ack_validity_s=1800)
    bed.update(True)
    bed.ack()
    assert bed.book.next_due() == T0 + 1800


def test_reacknowledgement_extends_the_validity() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    bed.ack(dt=100)
    [e] = bed.ack(dt=1000, by="nurse-e", role="charge-nurse")
    assert (e.reason, e.by) == ("reacknowledged", "nurse-e")
    assert bed.book.next_due() == T0 + 1100 + 3600


def test_ack_rejections() -> None:
    bed = Bed()
    book = bed.book
    assert book.acknowledge(T0, "b1/no-such-rule/20250615T000000Z", "n", "r") == "unknown_alarm"
    [p] = bed.update(True)
    assert book.acknowledge(T0, p.alarm_id, "nurse-a", "bedside-nurse") == "not_acknowledgeable"
    assert book.acknowledge(T0, p.alarm_id, " ", "bedside-nurse") == "missing_author"
    bed.update(False, dt=60)
    assert book.acknowledge(bed.t, p.alarm_id, "nurse-a", "bedside-nurse") == "alarm_ended"
    assert book.refused == Counter()


# --- escalation timing ---------------------------------------------------------------


def _due_points() -> list[tuple[Priority, int, int, tuple[str, ...], State, str]]:
    """(priority, index, seconds after activation, paged, state, reason) for each tier
    and for the first two re-notifications."""
    out = []
    for prio, (tiers, renotify) in CHAIN.items():
        for n, (after, roles) in enumerate(tiers[1:], start=1):
            out.append((prio, n, after, roles, State.ESCALATED, "escalation_due"))
        if renotify is not None:
            roles = tiers[-1][1]
            for k, at in enumerate(renotify_times(prio, 3), start=1):
                out.append(
                    (
                        prio,
                        len(tiers) - 1 + k,
                        at,
                        roles,
                        State.ESCALATED,
                        "renotify",
                    )
                )
    return out


@pytest.mark.parametrize(("prio", "index", "after", "roles", "state", "reason"), _due_points())
@pytest.mark.parametrize("offset", [-1, 0, 1])
def test_escalation_timing_around_each_due_time(
    prio: Priority, index: int, after: int, roles: tuple[str, ...], state: State, reason: str,
    offset: int,
) -> None:  # fmt: skip
    bed = Bed(rule(condition_delay_s=0, priority=prio))
    [act] = bed.update(True)
    assert act.notify == BEDSIDE
    for _ in range(index - 1):  # every earlier due point, on time
        bed.tick_next()
    due = T0 + after
    assert bed.book.next_due() == due
    evs = bed.tick(due + offset)
    if offset < 0:
        assert evs == []
        return
    [e] = evs
    # stamped with the time it fell due, also when the timer fires late
    assert (e.time, e.state, e.reason, e.notify) == (due, state, reason, roles)


def test_info_priority_pages_once_and_never_escalates() -> None:
    bed = Bed(rule(condition_delay_s=0, priority=Priority.INFO))
    [e] = bed.update(True)
    assert e.notify == BEDSIDE
    assert bed.book.next_due() is None
    assert bed.tick(T0 + 7 * 86400) == []


def test_escalations_missed_during_downtime_are_sent_once() -> None:
    bed = Bed(rule(condition_delay_s=0, priority=Priority.MEDIUM))
    bed.update(True)
    evs = bed.tick(T0 + 3 * 3600)  # the daemon was down for three hours
    # each tier once at its own time, then only the latest re-notification: medium
    # re-notifies 3600 and 7200 s after activation, then at 14400 (ours)
    assert renotify_times(Priority.MEDIUM, 3) == [3600, 7200, 14400]
    assert [(e.time - T0, e.reason, e.tier) for e in evs] == [
        (900, "escalation_due", 1),
        (1800, "escalation_due", 2),
        (7200, "renotify", 2),
    ]
    assert bed.book.next_due() == T0 + 14400


def test_late_timers_give_the_same_events_as_exact_ones() -> None:
    exact, late = (
        Bed(rule(condition_delay_s=0, priority=Priority.HIGH)),
        Bed(rule(condition_delay_s=0, priority=Priority.HIGH)),
    )
    exact.update(True)
    late.update(True)
    for _ in range(6):
        exact.tick_next()
        due = late.book.next_due()
        assert due is not None
        late.tick(due + 2.5)
    assert exact.log == late.log


def test_next_due_is_exactly_the_next_change() -> None:
    policy = POLICY
    book = AlarmBook(policy)
    specs = [
        rule(condition_delay_s=600, priority=Priority.LOW),
        rule(rule_id="pod-hourly", latching=True, low_output=False, condition_delay_s=0),
        rule(rule_id="hypovolaemia-risk", low_output=False, condition_delay_s=120, clear_hold_s=60),
    ]
    book.update(T0, "b1", "w1", specs[0], True, "s", {})
    book.update(T0 + 30, "b2", "w1", specs[1], True, "s", {})
    book.update(T0 + 45, "b1", "w1", specs[2], True, "s", {}, priority=Priority.HIGH)
    book.update(T0 + 400, "b1", "w1", specs[2], False, "s", {})
    seen = 0
    while seen < 25:
        due = book.next_due()
        assert due is not None
        probe = AlarmBook.restore(json.loads(json.dumps(book.snapshot())), policy)
        assert probe.tick(due - 0.5) == []
        evs = book.tick(due)
        assert evs and min(e.time for e in evs) == due
        seen += len(evs)


# --- suppression by a technical alarm ----------------------------------------------


def test_technical_alarm_suppresses_low_output_alarm_until_it_is_acknowledged() -> None:
    book = AlarmBook(POLICY)
    offline = rule(rule_id="meter-offline", kind=Kind.TECHNICAL, priority=Priority.LOW,
                   condition_delay_s=0, clear_hold_s=0, low_output=False)  # fmt: skip
    olig = rule(condition_delay_s=600)
    [tech] = book.update(T0, "b1", "w1", offline, True, "meter silent", {})
    assert tech.state is State.ACTIVE
    assert book.suppressor("b1") == tech.alarm_id and book.suppressor("b2") is None
    [e] = book.update(T0 + 60, "b1", "w1", olig, True, "s", {}, suppressed_by=book.suppressor("b1"))
    assert (e.state, e.reason, e.suppressed_by, e.notify) == (
        State.PENDING,
        "suppressed",
        tech.alarm_id,
        (),
    )
    # the delay runs out while suppressed: no activation within the longest suppression
    assert book.tick(T0 + 1000) == []
    # the same condition on another bed is not suppressed
    [other] = book.update(
        T0 + 1000, "b2", "w1", olig, True, "s", {}, suppressed_by=book.suppressor("b2")
    )
    assert other.suppressed_by is None and other.reason == "condition_met"
    # the nurse acknowledges the technical alarm: suppression lifts, the alarm activates
    acked = book.acknowledge(T0 + 1100, tech.alarm_id, "nurse-a", "bedside-nurse")
    assert not isinstance(acked, str)
    assert book.suppressor("b1") is None
    [lift] = book.update(
        T0 + 1100, "b1", "w1", olig, True, "s", {}, suppressed_by=book.suppressor("b1")
    )
    assert (lift.state, lift.reason, lift.notify, lift.suppressed_by) == (
        State.ACTIVE,
        "suppression_lifted",
        BEDSIDE,
        None,
    )
    assert lift.alarm_id == e.alarm_id


def test_suppression_is_said_once_and_pauses_escalation() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    [e] = bed.update(True, dt=600, sup=TECH)
    assert (e.state, e.reason, e.suppressed_by) == (State.ACTIVE, "suppressed", TECH)
    assert bed.update(True, dt=60, sup=TECH) == []  # said once, not at every evaluation
    # no escalation while suppressed; only the end of the longest suppression is due
    assert bed.book.next_due() == T0 + 600 + SUPPRESSION_MAX_S
    assert bed.tick(T0 + 2000) == []
    [lift] = bed.update(True, dt=0, sup=None)
    assert (lift.reason, lift.notify, lift.time) == ("suppression_lifted", BEDSIDE, T0 + 2000)
    assert bed.book.next_due() == T0 + 2000 + 900


def test_suppression_is_bounded_then_the_alarm_pages_in_its_own_right() -> None:
    """A technical alarm nobody acknowledges holds a low-output alarm back for at most
    30 min (alert_rules/escalation.toml, our own default); then it pages, escalates as
    any other, and is not held back again."""
    bed = Bed(rule(condition_delay_s=0, priority=Priority.HIGH))
    [e] = bed.update(True, sup=TECH)
    assert (e.state, e.notify) == (State.PENDING, ())
    [own] = bed.tick_next()
    assert own.time == T0 + SUPPRESSION_MAX_S
    assert (own.state, own.reason, own.suppressed_by) == (State.ACTIVE, "suppression_expired", None)
    assert own.notify == BEDSIDE
    assert bed.update(True, dt=60, sup=TECH) == []  # still there: no longer held back
    [tier1] = bed.tick_next()
    assert (tier1.reason, tier1.time) == ("escalation_due", own.time + 300)


def test_the_suppressing_alarm_says_what_it_holds_back() -> None:
    book = AlarmBook(POLICY)
    offline = rule(rule_id="flow-stopped", kind=Kind.TECHNICAL, condition_delay_s=0,
                   clear_hold_s=0, low_output=False)  # medium: tier 1 after 900 s  # fmt: skip
    [tech] = book.update(T0, "b1", "w1", offline, True, "flow stopped", {})
    assert tech.holding_back == ()
    book.update(T0 + 60, "b1", "w1", rule(condition_delay_s=0, priority=Priority.HIGH), True,
                "s", {}, suppressed_by=tech.alarm_id)  # fmt: skip
    [esc] = book.tick(T0 + 900)
    assert esc.alarm_id == tech.alarm_id and esc.holding_back == ("oliguria-kdigo-1",)
    assert "Holding back: oliguria-kdigo-1." in esc.pager()


def test_quiet_lift_resumes_the_paused_escalation_without_paging() -> None:
    bed = Bed(rule(condition_delay_s=0, clear_hold_s=7200))
    bed.update(True)
    bed.update(True, dt=600, sup=TECH)  # suppressed at +600
    bed.update(False, dt=100, sup=TECH)  # condition clears at +700: hold runs
    [e] = bed.update(False, dt=300, sup=None)  # lifted at +1000
    assert (e.state, e.reason, e.notify) == (State.ACTIVE, "suppression_lifted", ())
    # while the condition is away nothing escalates: only the end of the hold is due
    assert bed.book.next_due() == T0 + 700 + 7200
    # it returns: tier 1 was 300 s away when paused at +600; it is 300 s after the lift
    bed.update(True, dt=50)
    assert bed.book.next_due() == T0 + 1000 + 300


def test_rules_that_are_not_low_output_ignore_suppression() -> None:
    bed = Bed(rule(rule_id="pod-hourly", low_output=False, latching=True, condition_delay_s=0))
    [e] = bed.update(True, sup=TECH)
    assert (e.state, e.suppressed_by, e.notify) == (State.ACTIVE, None, BEDSIDE)


def test_suppressed_acknowledged_alarm_does_not_reactivate_until_lifted() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    bed.ack(dt=60)
    bed.update(True, dt=60, sup=TECH)
    assert bed.tick(T0 + 60 + 3600 + 10) == []
    evs = bed.update(True, dt=0, sup=None)
    # the expiry fell due while suppressed; it takes effect at the lift, not before it
    assert [(e.state, e.reason, e.time) for e in evs] == [
        (State.ACKNOWLEDGED, "suppression_lifted", T0 + 60 + 3600 + 10),
        (State.ACTIVE, "ack_expired", T0 + 60 + 3600 + 10),
    ]


@pytest.mark.parametrize(("lift_after", "state"), [(599, State.PENDING), (600, State.ACTIVE)])
def test_lift_activates_only_once_the_delay_has_passed(lift_after: int, state: State) -> None:
    bed = Bed(rule(condition_delay_s=600))
    [e] = bed.update(True, sup=TECH)
    assert (e.state, e.reason) == (State.PENDING, "suppressed")
    [lift] = bed.update(True, dt=lift_after, sup=None)
    assert (lift.state, lift.reason) == (state, "suppression_lifted")
    if state is State.PENDING:
        [act] = bed.tick(T0 + 600)
        assert (act.state, act.reason) == (State.ACTIVE, "delay_elapsed")


def test_nobody_is_paged_while_suppressed() -> None:
    bed = Bed(rule(condition_delay_s=0))
    bed.update(True)
    bed.update(True, dt=60, sup=TECH)
    [e] = bed.update(True, dt=60, sup=TECH, prio=Priority.HIGH)
    assert (e.state, e.reason, e.notify, e.suppressed_by) == (
        State.ACTIVE,
        "priority_raised",
        (),
        TECH,
    )


def test_a_pending_alarm_that_clears_names_the_suppression_that_holds_now() -> None:
    bed = Bed()
    bed.update(True, sup=TECH)
    [e] = bed.update(False, dt=60, sup=None)
    assert (e.state, e.suppressed_by) == (State.INACTIVE, None)


# --- priority override ------------------------------------------------------------


def test_priority_override_raises_and_lowers() -> None:
    # hypovolaemia-risk: high with a haemodynamic sign, else medium (DESIGN §4)
    bed = Bed(rule(rule_id="hypovolaemia-risk", low_output=False, condition_delay_s=0))
    bed.update(True)
    [up] = bed.update(True, dt=60, prio=Priority.HIGH)
    assert (up.state, up.reason, up.priority, up.notify) == (
        State.ACTIVE,
        "priority_raised",
        Priority.HIGH,
        BEDSIDE,
    )
    assert bed.book.next_due() == T0 + 60 + 300  # high chain, from now
    [down] = bed.update(True, dt=60, prio=None)
    assert (down.reason, down.priority, down.notify) == ("priority_lowered", Priority.MEDIUM, ())
    assert bed.book.next_due() == T0 + 60 + 900  # medium chain, same start


# --- messages and snapshots -----------------------------------------------------------


def test_event_json() -> None:
    bed = Bed(rule(condition_delay_s=0))
    [e] = bed.update(True)
    j = e.to_json()
    assert j["time"] == "2025-06-15T15:06:40Z"
    assert (j["state"], j["priority"], j["kind"], j["notify"]) == (
        "active",
        "medium",
        "physiological",
        ["bedside-nurse"],
    )
    assert json.loads(json.dumps(j)) == j


def _run(book: AlarmBook, ops: list[tuple[object, ...]], specs: list[RuleSpec], t: float):
    out: list[AlarmEvent] = []
    for op in ops:
        kind, dt = op[0], op[1]
        assert isinstance(dt, int)
        t += dt
        out += book.tick(t)
        if kind == "update":
            _, _, bed_i, rule_i, cond, sup, prio = op
            assert isinstance(rule_i, int) and isinstance(prio, Priority | None)
            bed = f"b{bed_i}"
            s = book.suppressor(bed) if sup == "live" else (TECH if sup == "fixed" else None)
            out += book.update(
                t, bed, "w1", specs[rule_i], bool(cond), f"s{t}", {"t": t},
                suppressed_by=s, priority=prio,
            )  # fmt: skip
        elif kind == "ack":
            ids = sorted({v.alarm_id for v in book.active()})
            pick = op[2]
            assert isinstance(pick, int)
            target = ids[pick % len(ids)] if ids and pick >= 0 else "b9/none/x"
            r = book.acknowledge(t, target, "nurse-h", "bedside-nurse")
            if not isinstance(r, str):
                out += r
    return out, t


SPECS = [
    rule(condition_delay_s=600, clear_hold_s=1800, priority=Priority.LOW),
    rule(
        rule_id="pod-hourly", latching=True, low_output=False, condition_delay_s=0, clear_hold_s=0
    ),
    rule(
        rule_id="meter-offline",
        kind=Kind.TECHNICAL,
        priority=Priority.LOW,
        low_output=False,
        condition_delay_s=0,
        clear_hold_s=300,
    ),
    rule(
        rule_id="labs-due",
        kind=Kind.REMINDER,
        priority=Priority.INFO,
        low_output=False,
        condition_delay_s=300,
        clear_hold_s=0,
    ),
    rule(rule_id="hypovolaemia-risk", low_output=False, condition_delay_s=120, clear_hold_s=600),
]

_op = st.one_of(
    st.tuples(
        st.just("update"),
        st.integers(0, 1800),
        st.integers(0, 1),
        st.integers(0, len(SPECS) - 1),
        st.booleans(),
        st.sampled_from([None, "live", "fixed"]),
        st.sampled_from([None, Priority.HIGH, Priority.LOW]),
    ),
    st.tuples(st.just("ack"), st.integers(0, 1800), st.integers(-1, 5)),
    st.tuples(st.just("tick"), st.integers(0, 7200)),
)


def test_snapshot_resume_mid_episode_gives_identical_later_events() -> None:
    ops: list[tuple[object, ...]] = [
        ("update", 0, 1, 2, True, None, None),  # meter offline on b1
        ("update", 60, 1, 0, True, "live", None),  # oliguria, suppressed
        ("update", 60, 0, 1, True, None, None),  # high output on b0
        ("tick", 1000),  # b0 escalates
        ("update", 30, 1, 2, False, None, None),  # meter back: offline alarm holds 300 s
        ("update", 400, 1, 0, True, "live", None),  # offline resolved: suppression lifts
        ("update", 60, 0, 1, False, None, None),  # b0 output falls: latched
        ("update", 60, 1, 4, True, None, Priority.HIGH),  # hypovolaemia risk, pending
    ]
    later: list[tuple[object, ...]] = [
        ("tick", 2000),
        ("ack", 5, 1),
        ("update", 60, 1, 0, False, "live", None),
        ("tick", 4000),
        ("ack", 5, 0),
        ("update", 60, 1, 4, True, None, None),
        ("tick", 9000),
    ]
    book = AlarmBook(POLICY)
    mid, t = _run(book, ops, SPECS, T0)
    # really mid-episode: one of each of these at the snapshot
    assert {(v.rule, v.state) for v in book.active()} == {
        ("oliguria-kdigo-1", State.ACTIVE),
        ("pod-hourly", State.ESCALATED),
        ("hypovolaemia-risk", State.PENDING),
    }
    assert ("oliguria-kdigo-1", "suppression_lifted") in {(e.rule, e.reason) for e in mid}
    resumed = AlarmBook.restore(json.loads(json.dumps(book.snapshot())), POLICY)
    assert resumed.next_due() == book.next_due()
    a, _ = _run(book, later, SPECS, t)
    b, _ = _run(resumed, later, SPECS, t)
    assert a and a == b
    assert resumed.snapshot() == book.snapshot()


@given(st.lists(_op, max_size=40), st.lists(_op, max_size=20))
def test_snapshot_resume_property(
    first: list[tuple[object, ...]], rest: list[tuple[object, ...]]
) -> None:
    book = AlarmBook(POLICY)
    _, t = _run(book, first, SPECS, T0)
    resumed = AlarmBook.restore(json.loads(json.dumps(book.snapshot())), POLICY)
    a, _ = _run(book, rest, SPECS, t)
    b, _ = _run(resumed, rest, SPECS, t)
    assert a == b


@given(st.lists(_op, max_size=60))
def test_random_sequences_follow_the_table(ops: list[tuple[object, ...]]) -> None:
    book = AlarmBook(POLICY)
    t = T0
    last: dict[str, State] = {}
    last_t: dict[str, float] = {}
    ended: set[str] = set()
    for op in ops:
        events, t = _run(book, [op], SPECS, t)
        for e in events:
            assert e.alarm_id not in ended, "an ended episode's id came back"
            prev = last.get(e.alarm_id, State.INACTIVE)
            assert e.state in SUCCESSORS[prev], (prev, e)
            assert e.time >= last_t.get(e.alarm_id, e.time) and e.time <= t
            last[e.alarm_id], last_t[e.alarm_id] = e.state, e.time
            if e.state in (State.INACTIVE, State.RESOLVED):
                ended.add(e.alarm_id)
            if e.reason == "suppressed":
                assert e.suppressed_by is not None
            if e.suppressed_by is not None:
                assert e.notify == (), "nobody is paged for a suppressed alarm"
        # the book's view agrees with the events
        for v in book.active():
            assert last[v.alarm_id] is v.state
        due = book.next_due()
        assert due is None or due > t
        # the cached wake-up equals one worked out afresh from the records
        assert due == AlarmBook.restore(book.snapshot(), POLICY).next_due()
    assert book.refused == Counter()


@given(st.lists(_op, max_size=40))
def test_next_due_property(ops: list[tuple[object, ...]]) -> None:
    book = AlarmBook(POLICY)
    _run(book, ops, SPECS, T0)
    due = book.next_due()
    if due is None:
        return
    probe = AlarmBook.restore(json.loads(json.dumps(book.snapshot())), POLICY)
    assert probe.tick(due - 0.001) == []
    evs = probe.tick(due)
    assert evs and evs[0].time == due


# --- the policy file --------------------------------------------------------------------


def test_shipped_policy_matches_the_documented_chain() -> None:
    for prio, (tiers, renotify) in CHAIN.items():
        pol = POLICY.for_priority(prio)
        assert [(t.after_s, pol.roles_up_to(n)) for n, t in enumerate(pol.tiers)] == tiers
        assert pol.renotify_s == renotify
        assert pol.renotify_max_s == RENOTIFY_MAX[prio]


_GOOD = (ROOT / "alert_rules" / "escalation.toml").read_text(encoding="utf-8")


@pytest.mark.parametrize(
    ("old", "new", "message"),
    [
        ('after_s = 0\n[[high.tiers]]\nroles = ["charge-nurse"]',
         'after_s = 60\n[[high.tiers]]\nroles = ["charge-nurse"]',
         "src.toml: high.tiers: tiers.0.after_s must be 0"),
        ("after_s = 1800", "after_s = 900",
         "src.toml: medium.tiers: tiers.2.after_s must be later"),
        ("renotify_s = 3600", "renotify_s = 0",
         "src.toml: low.renotify_s: Input should be greater than 0"),
        ("[info]", "[info]\ncolour = 1", "src.toml: info.colour: Extra inputs are not permitted"),
        ('roles = ["charge-nurse"]\nafter_s = 300', 'roles = []\nafter_s = 300',
         "src.toml: high.tiers.1.roles: List should have at least 1 item"),
        ("schema = 1", "schema = 1\nschema = 2", "src.toml: not valid TOML"),
    ],
)  # fmt: skip
def test_policy_errors_name_the_file_and_key(old: str, new: str, message: str) -> None:
    assert old in _GOOD
    with pytest.raises(ValueError) as err:
        load_policy_text(_GOOD.replace(old, new, 1), "src.toml")
    assert str(err.value).startswith(message), str(err.value)


def test_policy_needs_every_priority() -> None:
    text = _GOOD.split("# info:")[0]
    with pytest.raises(ValueError, match=r"^src.toml: info: Field required"):
        load_policy_text(text, "src.toml")


def test_lowering_to_a_shorter_chain_keeps_the_tier_within_it() -> None:
    bed = Bed(rule(rule_id="hypovolaemia-risk", low_output=False, condition_delay_s=0))
    bed.update(True, prio=Priority.HIGH)
    bed.tick(T0 + 600)  # high: tiers 1 and 2
    assert bed.log[-1].tier == 2
    [e] = bed.update(True, dt=10, prio=Priority.LOW)  # the low chain has tiers 0 and 1
    assert (e.reason, e.tier, e.state) == ("priority_lowered", 1, State.ESCALATED)
    # low re-notifies its interval after the last page (tier 2 of high, at +600)
    assert bed.book.next_due() == T0 + 600 + CHAIN[Priority.LOW][1]


def test_tick_returns_events_of_several_alarms_in_time_order() -> None:
    book = AlarmBook(POLICY)
    slow = rule(condition_delay_s=900)
    fast = rule(rule_id="hypovolaemia-risk", low_output=False, condition_delay_s=60)
    book.update(T0, "b1", "w1", slow, True, "s", {})  # opened first, due later
    book.update(T0 + 10, "b2", "w1", fast, True, "s", {})
    evs = book.tick(T0 + 2000)
    times = [e.time for e in evs]
    assert times == sorted(times) and times[0] == T0 + 70 and len(evs) >= 3
