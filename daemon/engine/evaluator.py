"""Runs a bed's rules and carries findings into the alarm lifecycle.

Order matters: technical rules first (they suppress low-output alarms), then
rules that stand alone, then rules that only run while another rule's alarm
is open on the bed (replacement, reminders).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

from .alarms import AlarmEvent, Kind, RuleSpec, State
from .bedstate import BedState
from .checks import (
    CHECKS,
    FOREVER,
    INPUT_ONLY,
    OUTPUT_BLIND,
    BedView,
    DeviceSeen,
    Finding,
    episode_armed,
)
from .lifecycle import AlarmBook, OpenRule
from .rules import RuleDef
from .timefmt import hhmm_utc

# Alarm states that open a gate for dependent rules (replacement, reminders), while
# the alarm's condition holds: a latched alarm whose condition has ended opens none.
OPEN = frozenset({State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED})


def criterion_holds(entry: OpenRule, now: float, end_hold_s: float) -> tuple[bool, float | None]:
    """Whether an open alarm's criterion counts as holding at `now` (for gates and
    advice), and when that next changes by time alone. It holds while its condition is
    present and until the condition has stayed away for `end_hold_s`, so an output
    wavering about its line does not start and stop the prompts every minute."""
    state, _, cleared = entry
    if state not in OPEN:
        return False, None
    if cleared is None:
        return True, None
    ends = cleared + end_hold_s
    return (True, ends) if now < ends else (False, None)


@dataclass(frozen=True, slots=True)
class Notice:
    """A technical notice on a bed that is not an alarm (nobody is paged)."""

    time: float
    bed: str
    ward: str
    code: str
    text: str


def _order(rule: RuleDef) -> tuple[int, str]:
    if rule.kind is Kind.TECHNICAL:
        return 0, rule.id
    return (2 if rule.while_active else 1), rule.id


class _Plan(NamedTuple):
    """A rule prepared once: what run() needs without looking it up every minute
    (a tuple, unpacked in one step in run's loop)."""

    rule: RuleDef
    spec: RuleSpec
    stage: int
    check: Callable[[Any, BedView], Finding]
    blind: bool  # reads no urine output: a reading can only end its condition
    rule_id: str
    waits: bool  # reads only inputs and time, ungated: waits for its wake-up (see run)


class Evaluator:
    def __init__(
        self, rules: list[RuleDef], book: AlarmBook,
        hypotonic: Callable[[str], bool] = lambda fluid: False, end_hold_s: float = 3600.0,
        clock: Callable[[float], str] = hhmm_utc,
    ) -> None:  # fmt: skip
        self.hypotonic = hypotonic
        self.clock = clock
        self.end_hold_s = end_hold_s
        self.rules = sorted((r for r in rules if r.enabled), key=_order)
        self.plans = [self._plan(r) for r in self.rules]
        # the rules whose quiet proofs make the floor (the others cannot be met by a reading)
        self._on_output = [p.rule_id for p in self.plans if not p.blind and not p.rule.while_active]
        self._waiting = [p.rule_id for p in self.plans if p.waits]
        self._waiting_set = frozenset(self._waiting)
        # (rule id, waits, plan): the shortcut's filter reads these at every reading
        self._keyed = [(p.rule_id, p.waits, p) for p in self.plans]
        self._keyed_output = [(p.rule_id, p) for p in self.plans if not p.waits]
        self.book = book

    @staticmethod
    def _plan(r: RuleDef) -> _Plan:
        check = type(r.check)
        waits = check in INPUT_ONLY and not r.while_active  # a gate opens without a wake-up
        return _Plan(r, r.spec(), _order(r)[0], CHECKS[check], check in OUTPUT_BLIND, r.id, waits)

    def run(
        self, bed: BedState, now: float, devices: tuple[DeviceSeen, ...], shortcut: bool = False
    ) -> tuple[list[AlarmEvent | Notice], float | None]:
        """Evaluate every rule on the bed; return events and the next due time.

        With `shortcut` (after a reading, at a wake-up), a rule on the output that
        proved itself quiet until a later minute is not re-checked before then:
        nothing a reading adds can meet it, and time alone does not move its
        windows. Any other cause (an input, a context, an acknowledgement)
        re-checks every rule. Likewise a rule on inputs alone (labs), last found
        false, waits for its own wake-up. Afterwards the bed's quiet floor says up to
        which minute no rule on it needs a reading at all."""
        out: list[AlarmEvent | Notice] = []
        due: float | None = None
        bed_id, ward = bed.bed_id, bed.context.ward
        disabled = bed.context.disabled_rules
        book = self.book
        end = bed.series.latest_minute()
        view = BedView(bed, now, devices, {}, end, hypotonic=self.hypotonic, clock=self.clock)
        quiet, input_due, arm_due = bed.quiet_until, bed.input_due, bed.arm_due
        stage = -1
        changed = False  # an evaluation opened or closed alarms: re-read the book's view
        opened, suppressor = book.open_and_suppressor(bed_id)  # opened: must hear every answer
        plans = self.plans
        if shortcut:  # one pass that drops the rules allowed to wait (see above)
            last = end if end is not None else FOREVER
            qget, iget = quiet.get, input_due.get
            waiting = False  # a rule on inputs alone is to run now
            first = min(input_due.values(), default=now)
            if (
                first > now
                and input_due.keys() == self._waiting_set
                and opened.keys().isdisjoint(self._waiting_set)
            ):  # the usual case: every one waits, for the first wake-up to come
                if first < FOREVER:
                    due = first
            else:
                for rid in self._waiting:  # a waiting rule keeps its wake-up
                    wake = iget(rid)
                    if wake is None or wake <= now or rid in opened:
                        waiting = True
                        continue
                    if wake < FOREVER and (due is None or wake < due):
                        due = wake
            if arm_due or waiting:
                aget = arm_due.get
                plans = [
                    p for rid, waits, p in self._keyed
                    if rid in opened or aget(rid, FOREVER) <= now or not (
                        iget(rid, now) > now if waits else qget(rid, -1) >= last
                    )
                ]  # fmt: skip
            else:  # the usual case: only rules on the output can be due
                output = self._keyed_output
                plans = [p for rid, p in output if rid in opened or qget(rid, -1) < last]
        for rule, spec, plan_stage, check, _, rid, waits in plans:
            if plan_stage != stage:
                stage = plan_stage
                if changed:  # an earlier stage opened or closed alarms
                    opened, suppressor = book.open_and_suppressor(bed_id)
                    changed = False
            if disabled and rid in disabled:
                if rid in opened:
                    off = "disabled for this bed"
                    out += book.update(now, bed_id, ward, spec, False, off, {})
                    changed = True
                continue
            if rule.episode is not None:
                armed, change = episode_armed(rule.episode, view)
                if change is None:
                    arm_due.pop(rid, None)
                else:
                    arm_due[rid] = change
                    due = change if due is None or change < due else due
                if not armed:
                    quiet[rid] = FOREVER  # until the arming changes (arm_due) or an input
                    if rid in opened:
                        off = (
                            "no obstruction relief on record"
                            if rule.episode.armed == "with_marker"
                            else "an obstruction relief is on record"
                        )
                        out += book.update(now, bed_id, ward, spec, False, off, {})
                        changed = True
                    continue
            if rule.while_active:
                gates = {}
                for g in rule.while_active if opened else ():
                    if g in opened:
                        holds, until = criterion_holds(opened[g], now, self.end_hold_s)
                        if holds:
                            gates[g] = opened[g][1]
                        if until is not None and (due is None or until < due):
                            due = until  # the gate closes then
                if not gates:
                    if rid in opened:
                        idle = "the high-output criterion is no longer met"
                        out += book.update(now, bed_id, ward, spec, False, idle, {})
                        changed = True
                    continue
                view.gates = gates
            view.quiet_wanted = rid not in opened
            f = check(rule.check, view)
            if f.quiet_until is not None:
                quiet[rid] = f.quiet_until
            else:
                quiet.pop(rid, None)
            if f.skipped is not None and f.skipped not in bed.notices:
                bed.notices.add(f.skipped)
                out.append(Notice(now, bed_id, ward, f.skipped,
                                  f"{rid} and other weight-based rules are not running: "
                                  "no body weight in the bed context"))  # fmt: skip
            if rid in opened and (opened[rid][2] is None) != f.condition:
                changed = True  # a gate on this rule's condition opens or closes
            if f.condition or rid in opened:
                events = book.update(
                    now, bed_id, ward, spec, f.condition, "", {},
                    suppressed_by=suppressor if spec.low_output else None, priority=f.priority,
                    explain=f.explain,
                )  # fmt: skip
                if events:
                    out += events
                    changed = True
            if f.due is not None and f.due > now and (due is None or f.due < due):
                due = f.due
            if waits:
                if f.condition:
                    input_due.pop(rid, None)
                else:  # no wake-up: only an input can change the answer
                    input_due[rid] = f.due if f.due is not None else FOREVER
        bed.quiet_floor = self._floor(bed, changed or bool(opened))
        return out, due

    def _floor(self, bed: BedState, open_or_changed: bool) -> int:
        """The last minute up to which a reading cannot change any rule on the bed:
        no alarm open, every rule on the output quiet, and the others (silence,
        labs, reminders) only ever made false by a reading, their wake-ups kept."""
        if open_or_changed:
            return -1
        quiet, disabled = bed.quiet_until, bed.context.disabled_rules
        ids = [r for r in self._on_output if r not in disabled] if disabled else self._on_output
        try:
            return min([quiet[rid] for rid in ids]) if ids else -1
        except KeyError:  # a rule with no proof
            return -1
