"""What-if: the same recorded data under two rule sets (or two device profile sets).

Alarms are matched as episodes: same bed, same rule, annunciated spans that overlap.
For each rule: alarms raised under A and under B, only in A, only in B, the change in
time to alarm for matched pairs, and alarm burden (alarms per bed-day, minutes in
alarm). Reviewers' annotations are then counted per rule set: actionable alarms
kept, non-actionable alarms avoided, and positive predictive value (PPV) when
enough annotated alarms are raised.
"""

from __future__ import annotations

import statistics
from dataclasses import dataclass, field
from typing import Any

from ..engine.numbers import half_up, num, pct
from ..engine.timefmt import iso
from .episodes import Episode
from .verdicts import Annotation

# PPV is shown only when at least this many annotated alarms are raised under a rule
# set; below it one verdict moves the figure by more than 10 points (our choice).
MIN_ANNOTATED_FOR_PPV = 10


@dataclass
class RunSummary:
    """One replay's raised alarms and how long the beds were watched."""

    label: str
    raised: list[Episode]
    end: float  # end of the replay (open alarms count up to here)
    bed_days: float

    def span(self, ep: Episode) -> tuple[float, float]:
        return ep.span(self.end)


def summarize(label: str, eps: list[Episode], bound_at: dict[str, float], end: float) -> RunSummary:
    """`bound_at`: when each bed's context first arrived (monitoring began)."""
    bed_days = sum(max(0.0, end - t) for t in bound_at.values()) / 86400.0
    return RunSummary(label, [e for e in eps if e.raised], end, bed_days)


def _overlap(a: tuple[float, float], b: tuple[float, float]) -> bool:
    return a[0] <= b[1] and b[0] <= a[1]


@dataclass
class Match:
    both: list[tuple[Episode, Episode]] = field(default_factory=list)
    only_a: list[Episode] = field(default_factory=list)
    only_b: list[Episode] = field(default_factory=list)


def match(a: RunSummary, b: RunSummary) -> Match:
    """Pair episodes per bed and rule, in activation order, by overlapping spans."""
    out = Match()
    groups: dict[tuple[str, str], tuple[list[Episode], list[Episode]]] = {}
    for ep in a.raised:
        groups.setdefault((ep.bed, ep.rule), ([], []))[0].append(ep)
    for ep in b.raised:
        groups.setdefault((ep.bed, ep.rule), ([], []))[1].append(ep)
    for key in sorted(groups):
        xs, ys = groups[key]
        free = list(ys)
        for x in xs:
            sx = a.span(x)
            y = next((y for y in free if _overlap(sx, b.span(y))), None)
            if y is None:
                out.only_a.append(x)
            else:
                free.remove(y)
                out.both.append((x, y))
        out.only_b += free
    return out


def _burden(run: RunSummary, eps: list[Episode]) -> dict[str, float]:
    days = run.bed_days
    per_day = len(eps) / days if days > 0 else 0.0
    pages = sum(e.pages for e in eps)
    minutes = sum(e.minutes_in_alarm(run.end) for e in eps)
    return {
        "alarms_per_bed_day": half_up(per_day, 3),
        "pages": pages,
        "pages_per_bed_day": half_up(pages / days if days > 0 else 0.0, 2),
        "minutes_in_alarm": half_up(minutes, 1),
    }


def _delays(pairs: list[tuple[Episode, Episode]]) -> dict[str, Any]:
    d = [((y.activated or 0.0) - (x.activated or 0.0)) / 60.0 for x, y in pairs]
    if not d:
        return {"n": 0}
    return {
        "n": len(d),
        "median_min": half_up(statistics.median(d), 1),
        "min_min": half_up(min(d), 1),
        "max_min": half_up(max(d), 1),
        "changed": sum(1 for x in d if x != 0.0),
    }


def kept(ann: Annotation, run: RunSummary) -> Episode | None:
    """The alarm under `run` that stands for the annotated one, if any."""
    span = (ann.span_start, ann.span_end if ann.span_end is not None else run.end)
    for ep in run.raised:
        if ep.alarm_id == ann.alarm_id:
            return ep
    for ep in run.raised:
        if ep.bed == ann.bed and ep.rule == ann.rule and _overlap(span, run.span(ep)):
            return ep
    return None


def annotation_stats(anns: list[Annotation], run: RunSummary) -> dict[str, Any]:
    act = [a for a in anns if a.actionable]
    non = [a for a in anns if not a.actionable]
    act_kept = sum(1 for a in act if kept(a, run) is not None)
    non_kept = sum(1 for a in non if kept(a, run) is not None)
    raised = act_kept + non_kept
    ppv = half_up(act_kept / raised, 3) if raised >= MIN_ANNOTATED_FOR_PPV else None
    return {
        "actionable": len(act),
        "actionable_kept": act_kept,
        "non_actionable": len(non),
        "non_actionable_avoided": len(non) - non_kept,
        "annotated_raised": raised,
        "ppv": ppv,
        "ppv_min_annotated": MIN_ANNOTATED_FOR_PPV,
    }


def compare(a: RunSummary, b: RunSummary, anns: list[Annotation] | None = None) -> dict[str, Any]:
    m = match(a, b)
    rules = sorted({e.rule for e in a.raised} | {e.rule for e in b.raised})
    per_rule: list[dict[str, Any]] = []
    for rule in [*rules, None]:

        def pick(eps: list[Episode], r: str | None = rule) -> list[Episode]:
            return [e for e in eps if r is None or e.rule == r]

        pairs = [(x, y) for x, y in m.both if rule is None or x.rule == rule]
        per_rule.append(
            {
                "rule": rule or "all rules",
                "a": len(pick(a.raised)),
                "b": len(pick(b.raised)),
                "only_a": len(pick(m.only_a)),
                "only_b": len(pick(m.only_b)),
                "both": len(pairs),
                "time_to_alarm_b_minus_a": _delays(pairs),
                "burden_a": _burden(a, pick(a.raised)),
                "burden_b": _burden(b, pick(b.raised)),
            }
        )
    total = per_rule[-1]
    out: dict[str, Any] = {
        "a": a.label,
        "b": b.label,
        "bed_days_a": half_up(a.bed_days, 3),
        "bed_days_b": half_up(b.bed_days, 3),
        "rules": per_rule[:-1],
        "total": total,
        "differences": total["only_a"]
        + total["only_b"]
        + total["time_to_alarm_b_minus_a"].get("changed", 0),
        "only_a": [_ep(e, a) for e in m.only_a],
        "only_b": [_ep(e, b) for e in m.only_b],
    }
    if anns is not None:
        out["annotations"] = {
            "count": len(anns),
            "a": annotation_stats(anns, a),
            "b": annotation_stats(anns, b),
        }
    return out


def _ep(e: Episode, run: RunSummary) -> dict[str, Any]:
    return {
        "alarm_id": e.alarm_id,
        "bed": e.bed,
        "rule": e.rule,
        "priority": str(e.priority),
        "activated": iso(e.activated or e.onset),
        "minutes_in_alarm": half_up(e.minutes_in_alarm(run.end), 1),
    }


def _delay_text(d: dict[str, Any]) -> str:
    if not d.get("n"):
        return "-"
    if d["min_min"] == d["max_min"]:
        return f"{d['median_min']:+.0f}"
    return f"{_signed(d['median_min'])} [{_signed(d['min_min'])}..{_signed(d['max_min'])}]"


def _signed(minutes: float) -> str:
    text = num(minutes)
    return text if text.startswith("-") else f"+{text}"


def text(c: dict[str, Any]) -> list[str]:
    lines = [
        "What-if comparison on the same recorded data",
        f"  A: {c['a']}",
        f"  B: {c['b']}",
        f"  monitored: {num(c['bed_days_a'], 2)} bed-days under A, "
        f"{num(c['bed_days_b'], 2)} under B",
        "",
        f"  {'rule':<22} {'A':>4} {'B':>4} {'only A':>7} {'only B':>7} {'both':>5} "
        f"{'B-A min to alarm':>17} {'per bed-day A':>14} {'B':>6} {'pages/bed-day A':>16} "
        f"{'B':>6} {'min in alarm A':>15} {'B':>8}",
    ]
    for row in [*c["rules"], c["total"]]:
        ba, bb = row["burden_a"], row["burden_b"]
        delay = _delay_text(row["time_to_alarm_b_minus_a"])
        lines.append(
            f"  {row['rule']:<22} {row['a']:>4} {row['b']:>4} {row['only_a']:>7} "
            f"{row['only_b']:>7} {row['both']:>5} {delay:>17} "
            f"{num(ba['alarms_per_bed_day'], 2):>14} {num(bb['alarms_per_bed_day'], 2):>6} "
            f"{num(ba['pages_per_bed_day'], 1):>16} {num(bb['pages_per_bed_day'], 1):>6} "
            f"{num(ba['minutes_in_alarm']):>15} {num(bb['minutes_in_alarm']):>8}"
        )
    lines.append("")
    if c["differences"] == 0:
        lines.append("  No differences: every alarm is raised under both, at the same time.")
    for side, name in (("only_a", "A"), ("only_b", "B")):
        for e in c[side]:
            lines.append(
                f"  only under {name}: {e['alarm_id']} ({e['priority']}, active from "
                f"{e['activated'][:16].replace('T', ' ')}, "
                f"{num(e['minutes_in_alarm'])} min in alarm)"
            )
    ann = c.get("annotations")
    if ann is not None:
        lines.append("")
        if not ann["count"]:
            lines.append(
                "  No annotations yet (`hourwatch annotate SOURCE ALARM_ID --actionable yes|no`)."
            )
        else:
            lines.append(f"  Reviewers' annotations: {ann['count']}")
            for side in ("a", "b"):
                s = ann[side]
                ppv = (
                    f"PPV {pct(s['ppv'])}"
                    if s["ppv"] is not None
                    else f"PPV not shown (fewer than {s['ppv_min_annotated']} annotated "
                    "alarms raised)"
                )
                lines.append(
                    f"  under {side.upper()}: actionable alarms kept {s['actionable_kept']} of "
                    f"{s['actionable']}, non-actionable avoided {s['non_actionable_avoided']} of "
                    f"{s['non_actionable']}; {ppv}"
                )
    for side, n in (c.get("recorded_acks") or {}).items():
        if n["carried"] or n["unmatched"]:
            lines.append(
                f"  under {side.upper()}: {n['carried']} recorded acknowledgement(s) of another "
                "rule set's alarm applied to the same bed and rule's alarm open then"
                + (f"; {n['unmatched']} found none open" if n["unmatched"] else "")
            )
    lines += [
        "",
        "  Episodes are matched by bed, rule and overlapping annunciated spans; minutes in "
        "alarm run from activation to resolution (or the end of the data).",
    ]
    return lines
