"""Why did this alarm fire? Replay to the moment it became active and show the rule,
the windows it evaluated, the readings behind them, what suppressed or gated it,
and what happened to it afterwards.

The windows are recomputed from the bed's minute series at that moment and set
beside the numbers the alarm event carried; they must be the same.
"""

from __future__ import annotations

import bisect
import json
import re
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, TextIO

import numpy as np

from ..caution import CAUTION
from ..engine.advice import DEFAULT_POLICY, AdvicePolicy
from ..engine.alarms import STATE_WORDS, AlarmEvent, Kind, State
from ..engine.effects import Effect
from ..engine.engine import Engine, ReadingTrace
from ..engine.escalation import EscalationPolicy
from ..engine.evaluator import OPEN
from ..engine.numbers import half_up, num, pct
from ..engine.outcomes import COUNTED_IN_SERIES, Outcome
from ..engine.profiles import DeviceProfile
from ..engine.rules import RuleDef, canonical_alarm_id
from ..engine.timefmt import iso, parse_iso
from ..errors import UserError
from ..journal_api import JournalTarget
from .episodes import ANNUNCIATED, ENDED, Episode, episodes
from .evidence import WindowFact, compare, residual_drains, threshold_words, windows_at
from .recorder import CODE, OUTCOMES, Recorder, effective_time, run, warn_about

ALARM_ID = re.compile(r"^([^/]+)/([a-z0-9][a-z0-9-]*)/(\d{8}T\d{6}Z)(\.\d+)?$")

# What each cleaning outcome means, in a reviewer's words.
OUTCOME_WORDS: dict[Outcome, str] = {
    Outcome.ACCEPTED: "counted",
    Outcome.REORDERED: "arrived out of order within tolerance; inserted and counted",
    Outcome.STORE_FORWARD: "uploaded late from the meter's buffer; counted at its device time",
    Outcome.CLOCK_SKEW: "meter clock not believed; counted at its receive time",
    Outcome.NOISE_FALL: "small fall read as noise; the level held, nothing counted twice",
    Outcome.BAG_CHANGE: "bag emptied; counting restarts from zero",
    Outcome.BAG_CHANGE_INFERRED: "large fall confirmed by the next reading: bag change",
    Outcome.SPIKE_HELD: "implausible jump, held until the next reading confirms it",
    Outcome.SPIKE_CONFIRMED: "held jump confirmed by the next reading; counted",
    Outcome.DUPLICATE: "duplicate; ignored",
    Outcome.CONFLICTING_DUPLICATE: "same time as an earlier reading, other value; ignored",
    Outcome.LATE: "older than the reorder tolerance; not counted",
    Outcome.TOO_OLD: "older than the store-and-forward limit; not counted",
    Outcome.ARTEFACT_DROPPED: "jump or fall not confirmed by the next reading; dropped",
    Outcome.IMPLAUSIBLE_FLOW: "above the maximum plausible flow; not counted",
    Outcome.OUT_OF_RANGE: "outside the physical range; rejected",
    Outcome.DEVICE_FAULT: "the meter reported a fault; rejected",
}
COUNTED = COUNTED_IN_SERIES
TEXT_READINGS_MAX = 120  # longer windows list only the readings that were not plain


def words(o: Outcome) -> str:
    return OUTCOME_WORDS.get(o, f"rejected ({o})")


@dataclass(slots=True)
class Moment:
    """The bed as the rule saw it at one instant (activation, or onset)."""

    time: float
    windows: list[WindowFact]
    technical: list[dict[str, Any]]
    suppressor: str | None
    gates: list[dict[str, Any]]
    context: dict[str, Any]
    quality: dict[str, dict[str, object]]
    reading_counts: list[dict[str, int]]  # per window, by outcome (as known then)
    traces: list[tuple[ReadingTrace, Outcome]] | None = None
    evidence: dict[str, Any] | None = None  # the alarm's own evidence at that instant


class Follower:
    """Follows alarms through a replay and captures each one's moment of activation.

    With no alarm-condition delay the alarm activates in the evaluation that
    computed its evidence, so the series at that instant is the one it saw. With a
    delay, activation comes later from the clock; then the moment kept is the last
    one at which the pending alarm's evidence changed."""

    def __init__(
        self,
        rules: list[RuleDef],
        recorder: Recorder,
        only: str | None = None,
        keep_traces: bool = False,
    ) -> None:
        self.rules = {x.id: x for x in rules}
        self.recorder = recorder
        self.only = only
        self.keep_traces = keep_traces
        self.engine: Engine | None = None
        self.moments: dict[str, Moment] = {}
        self.activated: set[str] = set()
        self._pending: dict[str, tuple[str, str]] = {}  # alarm id -> (bed, rule)
        self._candidate: dict[str, Moment] = {}
        self._last_evidence: dict[str, dict[str, object]] = {}
        self._revision: dict[str, int] = {}  # alarm id -> book revision last looked at

    def attach(self, engine: Engine) -> Engine:
        self.engine = engine
        return engine

    def capture(self, bed_id: str, rule_id: str, now: float) -> Moment | None:
        engine, rule = self.engine, self.rules.get(rule_id)
        bed = engine.beds.get(bed_id) if engine is not None else None
        if engine is None or bed is None or rule is None:
            return None
        facts = windows_at(rule, bed)
        views = engine.book.active(bed_id)
        ctx = bed.context
        log = self.recorder.readings.get(bed_id)
        counts = [_counts(log.times, log.codes, *f.span) if log else {} for f in facts]
        quality = {d: q for d, q in engine.quality().items() if d in ctx.device_ids}
        return Moment(
            time=now,
            windows=facts,
            technical=[
                {
                    "alarm_id": v.alarm_id,
                    "rule": v.rule,
                    "state": str(v.state),
                    "acknowledged_by": v.ack_by,
                }
                for v in views
                if v.kind is Kind.TECHNICAL
            ],
            suppressor=engine.book.suppressor(bed_id),
            gates=[
                {"alarm_id": v.alarm_id, "rule": v.rule, "state": str(v.state)}
                for v in views
                if v.rule in rule.while_active and v.state in OPEN
            ],
            context={
                "ward": ctx.ward,
                "device_ids": list(ctx.device_ids),
                "weight_kg": ctx.weight_kg,
                "weight_basis": ctx.weight_basis,
                "disabled_rules": list(ctx.disabled_rules),
                "episodes": [e.model_dump(mode="json") for e in ctx.episodes],
                "replacement_order": None if ctx.replacement is None else ctx.replacement.to_json(),
                "residual_drained": residual_drains(bed),
            },
            quality=quality,
            reading_counts=counts,
            traces=list(self.recorder.traces) if self.keep_traces else None,
        )

    def on_effects(self, effects: list[Effect]) -> None:
        for e in effects:
            if not isinstance(e, AlarmEvent) or (self.only and e.alarm_id != self.only):
                continue
            aid = e.alarm_id
            if aid in self.activated:
                continue
            first = aid not in self.moments
            if e.state in ANNUNCIATED:
                self.activated.add(aid)
                self._pending.pop(aid, None)
                m = self.capture(e.bed, e.rule, e.time)
                cand = self._candidate.pop(aid, None)
                if (
                    m is not None
                    and cand is not None
                    and not _agrees(m, e.evidence)
                    and _agrees(cand, e.evidence)
                ):
                    m = cand
                if m is not None:
                    m.evidence = dict(e.evidence)
                    self.moments[aid] = m
            elif first:
                m = self.capture(e.bed, e.rule, e.time)
                if m is not None:
                    m.evidence = dict(e.evidence)
                    self.moments[aid] = m
                rule = self.rules.get(e.rule)
                if e.state not in ENDED and rule is not None and rule.condition_delay_s > 0:
                    # only a delay lets the clock activate it after its last evaluation;
                    # a suppressed alarm activates in the evaluation that lifts it
                    self._pending[aid] = (e.bed, e.rule)
            elif e.state in ENDED:
                self._pending.pop(aid, None)

    def between(self) -> None:
        """Called between records: note a pending alarm's evidence when it changes."""
        if not self._pending or self.engine is None:
            return
        now = self.recorder.last_time or 0.0
        book = self.engine.book
        for aid, (bed, rule) in list(self._pending.items()):
            rev = book.revision(aid)
            if rev is None or self._revision.get(aid) == rev:
                continue  # not evaluated since the last look: its evidence is the same
            self._revision[aid] = rev
            view = next((v for v in book.active(bed) if v.alarm_id == aid), None)
            if view is None:
                continue
            if self._last_evidence.get(aid) != view.evidence:
                self._last_evidence[aid] = view.evidence
                m = self.capture(bed, rule, now)
                if m is not None:
                    self._candidate[aid] = m


def _counts(times: Any, codes: Any, t0: float, t1: float) -> dict[str, int]:
    """Readings with an effective time in (t0, t1], by outcome."""
    # views, not copies (a month of a bed is ~43,000 readings); they are gone before
    # the recorder appends again, so its arrays stay free to grow
    t = np.frombuffer(times, dtype=np.float64)
    c = np.frombuffer(codes, dtype=np.uint8)
    sel = c[(t > t0) & (t <= t1)]
    del t, c
    n = np.bincount(sel, minlength=len(OUTCOMES))
    return {str(OUTCOMES[i]): int(k) for i, k in enumerate(n.tolist()) if k}


def _agrees(m: Moment, evidence: dict[str, object]) -> bool:
    return all(row["equal"] for row in compare(m.windows, dict(evidence)))


# --- one alarm -----------------------------------------------------------------


@dataclass
class Review:
    """One replay with every alarm followed (the report) or one alarm (explain)."""

    recorder: Recorder
    follower: Follower
    rules: list[RuleDef]
    episodes: list[Episode] = field(default_factory=list)
    engine: Engine | None = None
    messages: int = 0
    bad_lines: int = 0


def review(
    path: JournalTarget,
    profiles: list[DeviceProfile],
    rules: list[RuleDef],
    policy: EscalationPolicy,
    *,
    only: str | None = None,
    trace_bed: str | None = None,
    until: float | None = None,
    progress: TextIO | None = None,
    warn: TextIO | None = None,
    label: str = "replay",
    advice: AdvicePolicy = DEFAULT_POLICY,
) -> Review:
    recorder = Recorder(keep_traces_for=trace_bed)
    follower = Follower(rules, recorder, only=only, keep_traces=trace_bed is not None)

    def make(observe: Callable[[ReadingTrace], None]) -> Engine:
        return follower.attach(
            Engine(profiles, rules, policy, observe=observe, advice_policy=advice)
        )

    result = run(
        path,
        make,
        recorder,
        until=until,
        progress=progress,
        label=label,
        before_each=follower.between,
        also=follower.on_effects,
    )
    warn_about(result, path, warn)
    return Review(
        recorder,
        follower,
        rules,
        episodes(recorder.events),
        result.engine,
        result.messages,
        len(result.bad_lines),
    )


def parse_alarm_id(alarm_id: str) -> tuple[str, str]:
    m = ALARM_ID.match(alarm_id)
    if not m:
        raise UserError(
            f"{alarm_id!r} is not an alarm id (BED/RULE/YYYYMMDDTHHMMSSZ, as replay prints it)"
        )
    return m.group(1), m.group(2)


def explain(
    path: JournalTarget,
    alarm_id: str,
    profiles: list[DeviceProfile],
    rules: list[RuleDef],
    policy: EscalationPolicy,
    progress: TextIO | None = None,
    advice: AdvicePolicy = DEFAULT_POLICY,
    until: float | None = None,
) -> dict[str, Any]:
    alarm_id = canonical_alarm_id(alarm_id)  # an old rule id names the same alarm
    bed, _ = parse_alarm_id(alarm_id)
    rv = review(
        path,
        profiles,
        rules,
        policy,
        only=alarm_id,
        trace_bed=bed,
        progress=progress,
        label="explain",
        advice=advice,
        until=until,
    )
    ep = next((e for e in rv.episodes if e.alarm_id == alarm_id), None)
    if ep is None:
        raised = sum(1 for e in rv.episodes if e.raised)
        raise UserError(
            f"no alarm {alarm_id!r} in {path} under these rules ({raised} alarm(s) raised; "
            f"`hourwatch replay` lists their ids){after_the_end(alarm_id, rv.recorder, until)}"
        )
    return explanation(rv, ep, with_readings=True)


def after_the_end(alarm_id: str, recorder: Recorder, until: float | None) -> str:
    """A hint for an alarm id not found: its onset lies after the last message, where
    only a clock run on with --until reaches (a silent meter's alarm, for one)."""
    m = ALARM_ID.match(alarm_id)
    last = recorder.last_time
    if m is None or last is None:
        return ""
    onset = parse_iso(m.group(3))  # YYYYMMDDTHHMMSSZ, ISO-8601's basic form
    if onset <= last or (until is not None and until >= onset):
        return ""
    return (f"; its onset is after the last message ({iso(last)}): add --until with a "
            "time after it, as `hourwatch replay --until` does")  # fmt: skip


def _rule_json(rule: RuleDef) -> dict[str, Any]:
    return {
        "id": rule.id,
        "title": rule.title,
        "kind": str(rule.kind),
        "priority": str(rule.priority),
        "latching": rule.latching,
        "condition_delay_s": rule.condition_delay_s,
        "clear_hold_s": rule.clear_hold_s,
        "while_active": list(rule.while_active),
        "low_output": rule.low_output,
        "check": rule.check.model_dump(mode="json"),
        "rationale": rule.rationale,
        "source": rule.source,
    }


def _event_json(e: AlarmEvent) -> dict[str, Any]:
    return {
        "time": iso(e.time),
        "state": str(e.state),
        "reason": e.reason,
        "priority": str(e.priority),
        "tier": e.tier,
        "notify": list(e.notify),
        "by": e.by,
        "role": e.role,
        "suppressed_by": e.suppressed_by,
        "summary": e.summary,
    }


def _readings(m: Moment, final: list[tuple[ReadingTrace, Outcome]]) -> list[dict[str, Any]]:
    """Readings of the bed's meters that fed the evaluated windows (or, for a rule
    without windows, in the hour before the moment), with their outcome.

    A counted reading fed every window its volume was spread over: from the meter's
    counted reading before it to its own time (DESIGN §3), so the first reading after
    a window's end fed the window's last minutes. Any other reading is listed where its
    time falls."""
    traces = m.traces or []
    spans = [f.span for f in m.windows] if m.windows else [(m.time - 3600.0, m.time)]
    counted: dict[str, list[float]] = {}
    for tr, outcome in traces:
        if outcome in COUNTED:
            counted.setdefault(tr.device_id, []).append(effective_time(tr))
    for times in counted.values():
        times.sort()
    out: list[dict[str, Any]] = []
    for i, (tr, outcome) in enumerate(traces):
        t = effective_time(tr)
        t0 = t
        if outcome in COUNTED and m.windows:
            times = counted[tr.device_id]
            k = bisect.bisect_left(times, t)
            t0 = times[k - 1] if k > 0 else t
        inside = [f.label for f in m.windows if _fed(f.span, t0, t)]
        if not inside and not any(a < t <= b for a, b in spans):
            continue
        later = final[i][1] if i < len(final) else outcome
        row: dict[str, Any] = {
            "device_id": tr.device_id,
            "received": iso(tr.received),
            "device_time": iso(tr.device_time) if tr.device_time is not None else None,
            "time_used": iso(t),
            "volume_ml": half_up(tr.volume_ml, 2) if tr.volume_ml is not None else None,
            "outcome": str(outcome),
            "counted": outcome in COUNTED,
            "meaning": words(outcome),
            "windows": inside,
        }
        if tr.labels:  # the topic's metadata levels, e.g. {"ward": "4-east"}
            row["topic_levels"] = dict(tr.labels)
        if later is not outcome:
            row["settled_later_as"] = str(later)
        if len(tr.outcomes) == 2:
            row["also_settled_previous_as"] = str(tr.outcomes[0])
        out.append(row)
    return out


def _fed(span: tuple[float, float], t0: float, t: float) -> bool:
    """Does a reading spread over (t0, t] (a point when t0 == t) reach window (a, b]?"""
    a, b = span
    return a < t <= b if t0 >= t else t0 < b and a < t


def explanation(rv: Review, ep: Episode, with_readings: bool = False) -> dict[str, Any]:
    rule = next((x for x in rv.rules if x.id == ep.rule), None)
    m = rv.follower.moments.get(ep.alarm_id)
    activation = next((e for e in ep.events if e.state in ANNUNCIATED), None)
    shown = activation or ep.events[0]
    out: dict[str, Any] = {
        "alarm_id": ep.alarm_id,
        "bed": ep.bed,
        "ward": ep.ward,
        "annunciated": activation is not None,
        "moment": iso(m.time) if m else iso(shown.time),
        "onset": iso(ep.onset),
        "activated": iso(ep.activated) if ep.activated is not None else None,
        "ended": iso(ep.ended) if ep.ended is not None else None,
        "summary": shown.summary,
        "rule": _rule_json(rule) if rule else {"id": ep.rule},
        "event_evidence": dict(shown.evidence),
    }
    if m is not None:
        rows = compare(m.windows, dict(shown.evidence))
        out["windows"] = [
            f.to_json() | {"readings_by_outcome": c}
            for f, c in zip(m.windows, m.reading_counts, strict=True)
        ]
        out["evidence_check"] = {
            "compared": len(rows),
            "all_equal": all(r["equal"] for r in rows),
            "rows": rows,
        }
        out["context"] = m.context
        out["suppression"] = _suppression(rule, m, ep)
        out["data_quality"] = m.quality
        if with_readings:
            out["readings"] = _readings(m, rv.recorder.traces)
    notices = [
        {"time": iso(n.time), "code": n.code, "text": n.text}
        for n in rv.recorder.notices
        if n.bed == ep.bed and n.time <= (ep.ended or float("inf"))
    ]
    if notices:
        out["notices"] = notices
    out["lifecycle"] = [_event_json(e) for e in ep.events] if with_readings else _folded(ep.events)
    out["caution"] = CAUTION
    return out


def _suppression(rule: RuleDef | None, m: Moment, ep: Episode) -> dict[str, Any]:
    low = bool(rule and rule.low_output)
    history = [
        {"time": iso(e.time), "reason": e.reason, "suppressed_by": e.suppressed_by}
        for e in ep.events
        if e.reason in ("suppressed", "suppression_lifted") or e.suppressed_by
    ]
    return {
        "low_output_rule": low,
        "how": (
            "a low-output rule: held back while a technical alarm on the bed is active and "
            "unacknowledged, and it fires only on windows at least 90% measured"
            if low
            else "not a low-output rule: technical alarms do not suppress it"
        ),
        "technical_alarms_open": m.technical,
        "suppressing_at_moment": m.suppressor if low else None,
        "gated_by": m.gates,
        "disabled_on_bed": bool(rule and rule.id in m.context.get("disabled_rules", [])),
        "history": history,
    }


# --- text ------------------------------------------------------------------------


def _window_like(v: Any) -> bool:
    """A window of the event's evidence (shown above, recomputed), or a list of them."""
    if isinstance(v, list):
        return bool(v) and all(_window_like(x) for x in v)
    return isinstance(v, dict) and "length_min" in v


def evidence_value(v: Any) -> str:
    """An evidence value as the JSON output gives it: an event from a log holds the
    engine's enums (a Python repr would show `<Outcome.DEVICE_FAULT: ...>`), one read
    back from a journal plain strings; both read the same."""
    return v if isinstance(v, str) else json.dumps(v, ensure_ascii=False, default=str)


def _when(text: str | None) -> str:
    return "-" if text is None else text[:19].replace("T", " ")


def text(d: dict[str, Any]) -> list[str]:
    """The explanation as plain lines."""
    rule = d["rule"]
    lines = [f"Alarm {d['alarm_id']}  (bed {d['bed']}, ward {d['ward']})", ""]
    lines.append(f"Rule {rule['id']}: {rule.get('title', '')}")
    if "check" in rule:
        params = ", ".join(f"{k}={v}" for k, v in rule["check"].items())
        lines += [
            f"  kind {rule['kind']}, priority {rule['priority']}, "
            f"{'latching' if rule['latching'] else 'non-latching'}, "
            f"condition delay {rule['condition_delay_s']} s, clear hold {rule['clear_hold_s']} s",
            f"  check: {params}",
            f"  source: {rule['source']}",
            f"  why this priority: {rule['rationale']}",
        ]
        if rule["while_active"]:
            lines.append(f"  runs only while an alarm of {', '.join(rule['while_active'])} is open")
    lines.append("")
    if d["annunciated"]:
        lines.append(
            f"Became active {_when(d['activated'])} UTC (onset {_when(d['onset'])}); "
            f"ended {_when(d['ended'])}"
        )
    else:
        lines.append(f"Never annunciated: onset {_when(d['onset'])}, ended {_when(d['ended'])}")
    lines.append(f"  {d['summary']}")
    lines.append("")
    wins = d.get("windows", [])
    if wins:
        lines.append(f"Windows evaluated at {_when(d['moment'])} UTC (each window is (from, to])")
        for w in wins:
            mark = "meets" if w["meets_condition"] else "does not meet"
            lines.append(
                f"  {w['label']:<22} {_when(w['from'])} .. {_when(w['to'])}  "
                f"{w['volume_ml']:>8.1f} mL  measured {w['measured_min']}/{w['length_min']} min "
                f"(coverage {w['coverage']:.1%}), estimated {w['estimated_min']}, "
                f"unknown {w['unknown_min']}"
            )
            lines.append(f"  {'':<22} threshold {threshold_words(w['threshold'])}: {mark} its part")
            if w.get("residual_ml"):
                lines.append(
                    f"  {'':<22} residual drained: {num(w['residual_ml'])} mL inside, left out "
                    "(the bladder's retained content after relief)"
                )
            for run_ in w["unmeasured_runs"][:6]:
                lines.append(
                    f"  {'':<22} {run_['state']} minutes {_when(run_['from'])} .. "
                    f"{_when(run_['to'])} ({run_['minutes']} min)"
                )
            if len(w["unmeasured_runs"]) > 6:
                lines.append(f"  {'':<22} ... {len(w['unmeasured_runs']) - 6} more runs")
            counts = ", ".join(f"{k} {v}" for k, v in w["readings_by_outcome"].items())
            lines.append(f"  {'':<22} readings: {counts or 'none'}")
        chk = d["evidence_check"]
        if chk["all_equal"]:
            lines.append(
                f"  recomputed from the minute series: all {chk['compared']} window(s) "
                "equal the alarm event's evidence"
            )
        else:
            lines.append("  recomputed windows DIFFER from the alarm event's evidence:")
            for row in chk["rows"]:
                if not row["equal"]:
                    lines.append(
                        f"    {row['evidence_key']}: event {row['event']} "
                        f"recomputed {row['recomputed']}"
                    )
        # what the windows do not show (a fluid balance, vital signs, a rate), as the
        # event holds it
        rest = {k: v for k, v in d["event_evidence"].items() if not _window_like(v)}
        if rest:
            lines.append("  the alarm event's other evidence:")
            lines += [f"    {k}: {evidence_value(v)}" for k, v in rest.items()]
    else:
        lines.append("Evidence (this rule looks at no output window):")
        for k, v in d["event_evidence"].items():
            lines.append(f"  {k}: {evidence_value(v)}")
    lines.append("")
    readings = d.get("readings")
    if readings is not None:
        lines += _reading_lines(readings, bool(wins))
        lines.append("")
    sup = d.get("suppression")
    if sup:
        lines.append("Suppression and gating")
        lines.append(f"  {sup['how']}")
        if sup["technical_alarms_open"]:
            for t in sup["technical_alarms_open"]:
                ack = f", acknowledged by {t['acknowledged_by']}" if t["acknowledged_by"] else ""
                lines.append(
                    f"  technical alarm open on the bed: {t['alarm_id']} ({t['state']}{ack})"
                )
        else:
            lines.append("  no technical alarm open on the bed at that moment")
        if sup["suppressing_at_moment"]:
            lines.append(f"  suppressed at that moment by {sup['suppressing_at_moment']}")
        for g in sup["gated_by"]:
            lines.append(f"  allowed to run by the open alarm {g['alarm_id']} ({g['state']})")
        for h in sup["history"]:
            by = f" by {h['suppressed_by']}" if h["suppressed_by"] else ""
            lines.append(f"  {_when(h['time'])}  {h['reason']}{by}")
        lines.append("")
    for n in d.get("notices", []):
        lines.append(f"Notice {_when(n['time'])}: {n['text']}")
    ctx = d.get("context")
    if ctx:
        w = (
            f"{ctx['weight_kg']:g} kg ({ctx['weight_basis'] or 'basis not given'})"
            if ctx["weight_kg"]
            else "no weight"
        )
        lines.append(
            f"Bed context: meters {', '.join(ctx['device_ids'])}; weight {w}; "
            f"rules disabled on this bed: {', '.join(ctx['disabled_rules']) or 'none'}"
        )
        for ep_ in ctx.get("episodes", []):
            lines.append(f"  episode: {ep_['kind']} at {_when(ep_['at'])} UTC")
        for res in ctx.get("residual_drained", []):
            lines.append(
                f"  residual drained: {num(res['volume_ml'])} mL ({_when(res['from'])} .. "
                f"{_when(res['to'])}): the bladder's retained content, not counted as output"
            )
        order = ctx.get("replacement_order")
        lines.append(
            "  replacement order: none on file"
            if order is None
            else f"  replacement order: {pct(order['fraction'][0])}-{pct(order['fraction'][1])} "
            f"of output as {order['fluid']}, by {order['ordered_by']} at "
            f"{_when(order['ordered_at'])} UTC"
        )
    q = d.get("data_quality") or {}
    if q:
        lines.append("Data quality of the bed's meters up to that moment")
        for dev, info in q.items():
            outcomes = info.get("outcomes")
            counts = (
                ", ".join(f"{k} {v}" for k, v in outcomes.items())
                if isinstance(outcomes, dict)
                else ""
            )
            lines.append(
                f"  {dev} ({info.get('profile')}): received {info.get('received')}; {counts}"
            )
    lines.append("")
    lines.append("Lifecycle")
    lines += lifecycle_lines(d["lifecycle"])
    lines += ["", d["caution"]]
    return lines


def _folded(events: list[AlarmEvent]) -> list[dict[str, Any]]:
    """Events as JSON, each run of re-notifications as one item with `repeats` and
    `until` (a month of an unacknowledged alarm is thousands of them)."""
    out: list[dict[str, Any]] = []
    i = 0
    while i < len(events):
        j = i
        while j + 1 < len(events) and events[j + 1].reason == "renotify" == events[i].reason:
            j += 1
        item = _event_json(events[i])
        if j > i:
            item |= {"repeats": j - i + 1, "until": iso(events[j].time)}
        out.append(item)
        i = j + 1
    return out


def lifecycle_lines(events: list[dict[str, Any]]) -> list[str]:
    """One line per event; a run of re-notifications is folded into one line."""
    lines: list[str] = []
    i = 0
    while i < len(events):
        e = events[i]
        j = i
        while j + 1 < len(events) and events[j + 1]["reason"] == "renotify" == e["reason"]:
            j += 1
        who = f" by {e['by']} ({e['role']})" if e["by"] else ""
        page = f" -> page {', '.join(e['notify'])}" if e["notify"] else ""
        sup_ = f" [suppressed by {e['suppressed_by']}]" if e["suppressed_by"] else ""
        n = sum(int(x.get("repeats", 1)) for x in events[i : j + 1])
        last = events[j].get("until", events[j]["time"])
        what = e["reason"] if n == 1 else f"renotify x {n} until {_when(last)}"
        lines.append(
            f"  {_when(e['time'])}  {STATE_WORDS[State(e['state'])]:<12} {e['priority']:<6} "
            f"{what}{who}{sup_}{page}"
        )
        i = j + 1
    return lines


def _reading_lines(readings: list[dict[str, Any]], windowed: bool = True) -> list[str]:
    n = len(readings)
    plain = sum(1 for r in readings if r["outcome"] == "accepted" and "settled_later_as" not in r)
    what = "that fed these windows" if windowed else "of the bed's meters in the hour before"
    head = f"Readings {what}: {n} ({plain} plain accepted)"
    shown = (
        readings
        if n <= TEXT_READINGS_MAX
        else [r for r in readings if r["outcome"] != "accepted" or "settled_later_as" in r]
    )
    lines = [head]
    if n > TEXT_READINGS_MAX:
        lines.append(f"  (showing the {len(shown)} that were not plain accepted; --json lists all)")
    lines.append(f"  {'meter':<10} {'time used (UTC)':<19} {'received':<19} {'mL':>8}  outcome")
    for r in shown:
        vol = f"{num(r['volume_ml'], 1):>8}" if r["volume_ml"] is not None else f"{'-':>8}"
        later = f" (settled later as {r['settled_later_as']})" if "settled_later_as" in r else ""
        prev = (
            f"; settled the held reading before as {r['also_settled_previous_as']}"
            if "also_settled_previous_as" in r
            else ""
        )
        levels = r.get("topic_levels")
        where = " [" + ", ".join(f"{k}={v}" for k, v in levels.items()) + "]" if levels else ""
        lines.append(
            f"  {r['device_id']:<10} {_when(r['time_used']):<19} "
            f"{_when(r['received']):<19} {vol}  {r['outcome']}: {r['meaning']}"
            f"{later}{prev}{where}"
        )
    return lines


__all__ = ["CODE", "Follower", "Moment", "Review", "explain", "explanation", "review", "text"]
