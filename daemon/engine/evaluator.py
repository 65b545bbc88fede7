"""Runs a bed's rules and carries findings into the alarm lifecycle.

Order matters: technical rules first (they suppress low-output alarms), then
rules that stand alone, then rules that only run while another rule's alarm
is open on the bed (replacement, reminders).
"""

from __future__ import annotations

from dataclasses import dataclass

from .alarms import AlarmEvent, Kind, State
from .bedstate import BedState
from .checks import BedView, DeviceSeen, evaluate
from .lifecycle import AlarmBook
from .rules import RuleDef

# Alarm states that open a gate for dependent rules (replacement, reminders).
OPEN = frozenset({State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED})


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


class Evaluator:
    def __init__(self, rules: list[RuleDef], book: AlarmBook) -> None:
        self.rules = sorted((r for r in rules if r.enabled), key=_order)
        self.specs = {r.id: r.spec() for r in self.rules}
        self.stages = {r.id: _order(r)[0] for r in self.rules}
        self.book = book

    def run(
        self, bed: BedState, now: float, devices: tuple[DeviceSeen, ...]
    ) -> tuple[list[AlarmEvent | Notice], float | None]:
        """Evaluate every rule on the bed; return events and the next due time."""
        out: list[AlarmEvent | Notice] = []
        due: float | None = None
        ward = bed.context.ward
        disabled = set(bed.context.disabled_rules)
        stage = -1
        opened: dict[str, tuple[State, float]] = {}
        suppressor: str | None = None
        for rule in self.rules:
            spec = self.specs[rule.id]
            if self.stages[rule.id] != stage:  # an earlier stage may have opened or closed alarms
                stage = self.stages[rule.id]
                opened = self.book.open_rules(bed.bed_id)  # these must hear every answer
                suppressor = self.book.suppressor(bed.bed_id)
            if rule.id in disabled:
                if rule.id in opened:
                    off = "disabled for this bed"
                    out += self.book.update(now, bed.bed_id, ward, spec, False, off, {})
                continue
            gates = {
                g: opened[g][1] for g in rule.while_active if g in opened and opened[g][0] in OPEN
            }
            if rule.while_active and not gates:
                if rule.id in opened:
                    idle = "no high-output alarm open"
                    out += self.book.update(now, bed.bed_id, ward, spec, False, idle, {})
                continue
            f = evaluate(rule, BedView(bed, now, devices, gates))
            if f.skipped is not None and f.skipped not in bed.notices:
                bed.notices.add(f.skipped)
                out.append(Notice(now, bed.bed_id, ward, f.skipped,
                                  f"{rule.id} and other weight-based rules are not running: "
                                  "no body weight in the bed context"))  # fmt: skip
            if f.condition or rule.id in opened:
                summary, evidence = f.explain()
                out += self.book.update(
                    now, bed.bed_id, ward, spec, f.condition, summary, evidence,
                    suppressed_by=suppressor if rule.low_output else None, priority=f.priority,
                )  # fmt: skip
            if f.due is not None and f.due > now:
                due = f.due if due is None else min(due, f.due)
        return out, due
