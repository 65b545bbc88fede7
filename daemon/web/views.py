"""What the board shows, as words and numbers a person reads.

Two steps, so that the engine lock is held only to copy numbers: `bed_snapshot` (under
the lock) copies a bed's numbers out of the engine; `card` and `detail` turn them into
text. Every number a person reads goes through daemon/engine/numbers.py, every state
word through STATE_WORDS, and no rate appears that the engine's advice did not give.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any
from urllib.parse import quote
from zoneinfo import ZoneInfo

from ..caution import CAUTION
from ..engine import rules as r
from ..engine.alarms import ALARM_CAUTION, STATE_WORDS, URGENCY, Kind, Priority, State
from ..engine.bedstate import BedState
from ..engine.clinical import ANALYTES
from ..engine.engine import Engine
from ..engine.lifecycle import AlarmView
from ..engine.numbers import ml, num, pct, span
from ..engine.windows import COVERED_FRACTION, Window, measure
from ..review.evidence import WindowFact, residual_drains, threshold_words, windows_at

PRIORITY_WORDS = {Priority.HIGH: "high", Priority.MEDIUM: "medium", Priority.LOW: "low",
                  Priority.INFO: "info"}  # fmt: skip
LEVEL = {Priority.HIGH: 3, Priority.MEDIUM: 2, Priority.LOW: 1, Priority.INFO: 0}  # bars
ACKABLE = frozenset({State.ACTIVE, State.ESCALATED})
ANNUNCIATED = frozenset({State.ACTIVE, State.ESCALATED, State.ACKNOWLEDGED})
ANALYTE_WORDS = {
    "serum_na_mmol_l": ("serum sodium", "mmol/L"),
    "serum_k_mmol_l": ("serum potassium", "mmol/L"),
    "serum_mg_mmol_l": ("serum magnesium", "mmol/L"),
    "serum_phosphate_mmol_l": ("serum phosphate", "mmol/L"),
    "serum_creatinine_umol_l": ("serum creatinine", "µmol/L"),
    "urine_na_mmol_l": ("urine sodium", "mmol/L"),
    "urine_k_mmol_l": ("urine potassium", "mmol/L"),
}
assert set(ANALYTE_WORDS) == set(ANALYTES)
ADVICE_WORDS = {
    "rate": "Suggested replacement (under the order on file)",
    "no_order": "No replacement order on file: no fluid or rate suggested",
    "held_circulation": "No replacement rate: signs of hypovolaemia",
    "held_sodium": "No hypotonic replacement: the order needs review",
    "ended": "Output back under the criterion: review the order",
}


# --- copying out of the engine (under its lock) --------------------------------------


@dataclass(frozen=True)
class Meter:
    device_id: str
    profile: str
    last_usable: float | None  # receive time of its last usable reading (or binding)
    last_seen: float | None  # receive time of its last message
    unusable: dict[str, int]  # what it sent since its last usable reading, by outcome
    bag_ml: float | None
    capacity_ml: float | None
    counts: dict[str, int]  # every message so far, by outcome
    received: int


@dataclass(frozen=True)
class BedSnapshot:
    bed: str
    ward: str
    weight_kg: float | None
    weight_basis: str | None
    latest_reading: float | None
    last_hour: tuple[float, float, float] | None  # (start, mL, measured share)
    rolling: Window | None  # the last 60 min
    day: Window | None  # the last 24 h
    alarms: list[AlarmView]
    advice: dict[str, Any] | None
    order: dict[str, Any] | None
    meters: list[Meter]
    notices: list[str]
    episodes: list[dict[str, Any]] = field(default_factory=list)


def bed_snapshot(engine: Engine, bed_id: str, advice: dict[str, Any] | None) -> BedSnapshot:
    """The bed's numbers as they stand (call under the engine lock)."""
    bed = engine.beds[bed_id]
    series = bed.series
    end = series.latest_minute()
    rolling = day = None
    if end is not None:
        rolling = measure(series, end, 60)
        day = measure(series, end, 1440)
    last_hour = None
    if series.latest_time is not None and series.first_minute is not None:
        end_hour = math.floor(series.latest_time / 3600.0)  # hours before it are complete
        start = (end_hour - 1) * 60
        if start >= (series.first_minute // 60) * 60:
            s = series.sums(start, start + 60)
            last_hour = (start * 60.0, s.volume_ml, s.measured_min / 60)
    ctx = bed.context
    meters = []
    for dev_id in ctx.device_ids:
        dev = engine.devices.get(dev_id)
        if dev is None or dev.bed != bed_id:
            meters.append(Meter(dev_id, ctx.device_profiles.get(dev_id, ""), None, None, {},
                                None, None, {}, 0))  # fmt: skip
            continue
        q = dev.quality.to_dict()
        outcomes = q.get("outcomes")
        received = q.get("received")
        meters.append(Meter(
            dev_id, dev.decoder.profile.name, dev.last_usable, dev.last_seen,
            dict(dev.sent_since), dev.bag_ml, dev.decoder.profile.bag_capacity_ml,
            {str(k): int(v) for k, v in outcomes.items()} if isinstance(outcomes, dict) else {},
            received if isinstance(received, int) else 0,
        ))  # fmt: skip
    return BedSnapshot(
        bed=bed_id, ward=ctx.ward, weight_kg=ctx.weight_kg, weight_basis=ctx.weight_basis,
        latest_reading=series.latest_time, last_hour=last_hour, rolling=rolling, day=day,
        alarms=engine.book.active(bed_id), advice=advice,
        order=None if ctx.replacement is None else ctx.replacement.to_json(),
        meters=meters, notices=sorted(bed.notices),
        episodes=[e.model_dump(mode="json") for e in ctx.episodes],
    )  # fmt: skip


# --- words ---------------------------------------------------------------------------


class Words:
    """Times and ages for people: local clock time in the unit's zone."""

    def __init__(self, tz: ZoneInfo) -> None:
        self.tz = tz

    def local(self, t: float) -> datetime:
        return datetime.fromtimestamp(t, UTC).astimezone(self.tz)

    def clock(self, t: float) -> str:
        return self.local(t).strftime("%H:%M")

    def clock_s(self, t: float) -> str:
        return self.local(t).strftime("%H:%M:%S")

    def when(self, t: float) -> str:
        return self.local(t).strftime("%Y-%m-%d %H:%M")

    def zone(self, t: float) -> str:
        return self.local(t).strftime("%Z") or str(self.tz)

    def iso_local(self, text: str | None) -> str:
        """An ISO time from a message, as local date and clock time."""
        if not text:
            return "-"
        try:
            t = datetime.fromisoformat(text.replace("Z", "+00:00")).timestamp()
        except ValueError:
            return text
        return self.when(t)


def age(seconds: float) -> str:
    """'just now', '12 min', '1 h 05 min', '2 d 3 h'."""
    m = max(0, int(seconds // 60))
    if m < 1:
        return "just now"
    if m < 60:
        return f"{m} min"
    h, m = divmod(m, 60)
    if h < 48:
        return f"{h} h {m:02d} min"
    d, h = divmod(h, 24)
    return f"{d} d {h} h"


def per_kg(volume_ml: float, weight_kg: float | None, hours: float = 1.0) -> str:
    """mL/kg/h as a number (the unit is in the column's heading)."""
    return "-" if not weight_kg else num(volume_ml / weight_kg / hours, 2)


def alarm_href(alarm_id: str) -> str:
    return "/alarms/" + quote(alarm_id, safe="") + "/ack"


@dataclass
class AlarmLine:
    alarm_id: str
    ack_action: str
    rule: str
    title: str
    priority: str  # "high", ...: the CSS class and the word
    level: int  # bars of the shape
    state: str  # State value (CSS)
    state_word: str  # STATE_WORDS
    age: str
    since: str
    summary: str
    ackable: bool
    ack_text: str
    suppressed_text: str
    latched_text: str  # a latched alarm whose condition has ended, waiting for its ack
    technical: bool


def alarm_line(a: AlarmView, now: float, w: Words) -> AlarmLine:
    since = a.activated_at if a.activated_at is not None else a.onset
    ack = ""
    if a.state is State.ACKNOWLEDGED and a.ack_by:
        until = f" until {w.clock(a.ack_until)}" if a.ack_until is not None else ""
        ack = f"acknowledged by {a.ack_by} ({a.ack_role}){until}"
    return AlarmLine(
        alarm_id=a.alarm_id, ack_action=alarm_href(a.alarm_id), rule=a.rule,
        title=a.title or a.rule, priority=PRIORITY_WORDS[a.priority], level=LEVEL[a.priority],
        state=str(a.state), state_word=STATE_WORDS[a.state], age=age(now - since),
        since=w.clock(since), summary=a.summary, ackable=a.state in ACKABLE, ack_text=ack,
        suppressed_text=(f"held back while {a.suppressed_by.split('/')[1]} is open"
                         if a.suppressed_by and a.suppressed_by.count("/") >= 2
                         else f"held back by {a.suppressed_by}" if a.suppressed_by else ""),
        latched_text=("condition no longer met; stays until acknowledged"
                      if a.state in ACKABLE and not a.condition_present else ""),
        technical=a.kind is Kind.TECHNICAL,
    )  # fmt: skip


@dataclass
class OutputRow:
    label: str
    volume: str
    rate: str
    measured: str
    note: str = ""


@dataclass
class MeterLine:
    device_id: str
    status: str  # CSS class: ok, warn, waiting
    word: str
    detail: str


@dataclass
class Card:
    bed: str
    ward: str
    href: str
    weight: str
    top: str  # most urgent priority word, or "" for none
    top_level: int
    rows: list[OutputRow]
    latest: str
    alarms: list[AlarmLine]
    advice_head: str
    advice_text: str
    advice_time: str
    order: str
    meters: list[MeterLine]
    notices: list[str]
    caution: str = ALARM_CAUTION


def weight_words(kg: float | None, basis: str | None) -> str:
    if not kg:
        return "no weight on file"
    return f"{num(kg, 1).removesuffix('.0')} kg ({basis or 'basis not given'})"


def order_words(order: dict[str, Any] | None, w: Words) -> str:
    if order is None:
        return "Replacement order: none on file."
    lo, hi = order["fraction"]
    cap = (f", at most {num(order['max_rate_ml_h'])} mL/h" if order.get("max_rate_ml_h")
           else "")  # fmt: skip
    return (f"Replacement order: {span(100 * lo, 100 * hi)}% of output as {order['fluid']}"
            f"{cap} (by {order['ordered_by']}, {w.iso_local(order['ordered_at'])}).")  # fmt: skip


def window_row(label: str, win: Window | None, kg: float | None) -> OutputRow:
    if win is None:
        return OutputRow(label, "-", "-", "-", "no reading yet")
    hours = win.length_min / 60
    note = "" if win.covered else f"under {pct(COVERED_FRACTION)} measured"
    return OutputRow(label, num(win.volume_ml), per_kg(win.volume_ml, kg, hours),
                     pct(win.coverage), note)  # fmt: skip


def meter_line(m: Meter, alarms: list[AlarmView], now: float, w: Words) -> MeterLine:
    # the alarms' own evidence says which meters are silent or full (meter-offline, bag-full)
    silent = any(_names(a.evidence, "silent", m.device_id) for a in alarms)
    full = any(_names(a.evidence, "full", m.device_id) for a in alarms)
    bag = ""
    if m.bag_ml is not None and m.capacity_ml:
        bag = f"; bag {pct(m.bag_ml / m.capacity_ml)} of {ml(m.capacity_ml)}"
    last = ("no usable reading yet" if m.last_usable is None
            else f"last usable reading {w.clock(m.last_usable)} ({age(now - m.last_usable)} ago)")
    if silent:
        if m.unusable:
            sent = sum(m.unusable.values())
            why = ", ".join(f"{k} {n}" for k, n in sorted(m.unusable.items()))
            return MeterLine(m.device_id, "warn", "blind",
                             f"{sent} messages, none usable ({why}); {last}")  # fmt: skip
        return MeterLine(m.device_id, "warn", "offline", f"no message; {last}")
    if full:
        return MeterLine(m.device_id, "warn", "bag nearly full", f"{last}{bag}")
    if m.last_seen is None:
        return MeterLine(m.device_id, "waiting", "waiting", "no message from this meter yet")
    return MeterLine(m.device_id, "ok", "reporting", f"{last}{bag}")


def _names(evidence: dict[str, object], key: str, device_id: str) -> bool:
    items = evidence.get(key)
    return isinstance(items, list) and any(
        isinstance(x, dict) and x.get("device_id") == device_id for x in items
    )


def card(s: BedSnapshot, now: float, w: Words) -> Card:
    kg = s.weight_kg
    rows = []
    if s.last_hour is None:
        rows.append(OutputRow("Last hour", "-", "-", "-", "no clock hour completed yet"))
    else:
        start, vol, meas = s.last_hour
        note = "" if meas >= COVERED_FRACTION else f"under {pct(COVERED_FRACTION)} measured"
        rows.append(OutputRow(f"Hour {w.local(start).strftime('%H')}–"
                              f"{w.local(start + 3600).strftime('%H')}", num(vol),
                              per_kg(vol, kg), pct(meas), note))  # fmt: skip
    rows.append(window_row("Last 60 min", s.rolling, kg))
    rows.append(window_row("Last 24 h", s.day, kg))
    top = max(s.alarms, key=lambda a: URGENCY[a.priority], default=None)
    advice = s.advice
    head = text = when = ""
    if advice is not None:
        head = ADVICE_WORDS.get(str(advice.get("kind", "")), "Advice")
        text = str(advice.get("summary", ""))
        when = f"at {w.iso_local(str(advice.get('time', '')))[11:]}"
    notices = []
    if "no_weight" in s.notices:
        notices.append("No body weight on file: the weight-based rules (KDIGO oliguria) "
                       "are not running.")  # fmt: skip
    latest = ("no reading yet" if s.latest_reading is None
              else f"latest reading {w.clock(s.latest_reading)} "
                   f"({age(now - s.latest_reading)} ago)")  # fmt: skip
    return Card(
        bed=s.bed, ward=s.ward, href="/bed/" + quote(s.bed, safe=""),
        weight=weight_words(kg, s.weight_basis),
        top=PRIORITY_WORDS[top.priority] if top else "",
        top_level=LEVEL[top.priority] if top else 0,
        rows=rows, latest=latest, alarms=[alarm_line(a, now, w) for a in s.alarms],
        advice_head=head, advice_text=text, advice_time=when, order=order_words(s.order, w),
        meters=[meter_line(m, s.alarms, now, w) for m in s.meters], notices=notices,
    )  # fmt: skip


def ward_summary(snaps: list[BedSnapshot]) -> dict[str, Any]:
    """Counts of open alarms by priority and the beds that have any, most urgent first."""
    counts = {p: 0 for p in PRIORITY_WORDS.values()}
    beds: list[tuple[int, str, str]] = []
    for s in snaps:
        live = [a for a in s.alarms if a.state in ANNUNCIATED]
        for a in live:
            counts[PRIORITY_WORDS[a.priority]] += 1
        if live:
            top = max(live, key=lambda a: URGENCY[a.priority])
            beds.append((-URGENCY[top.priority], s.bed, PRIORITY_WORDS[top.priority]))
    beds.sort()
    return {"counts": counts, "beds": [(b, p) for _, b, p in beds],
            "total": sum(counts.values())}  # fmt: skip


def natural(bed: str) -> tuple[Any, ...]:
    """bed-2 before bed-10."""
    out: list[Any] = []
    for part in _split_digits(bed):
        out.append((0, int(part), "") if part.isdigit() else (1, 0, part))
    return tuple(out)


def _split_digits(text: str) -> list[str]:
    parts: list[str] = []
    for ch in text:
        if parts and parts[-1][-1].isdigit() == ch.isdigit():
            parts[-1] += ch
        else:
            parts.append(ch)
    return parts


# --- the bed page ----------------------------------------------------------------


@dataclass
class HourRow:
    start: str
    volume: str
    rate: str
    measured: str
    note: str


def hour_rows(bed: BedState, w: Words, hours: int = 24) -> list[HourRow]:
    """The last `hours` completed clock hours, newest first (call under the lock)."""
    kg = bed.context.weight_kg
    rows = list(bed.series.completed_hours())[-hours:]
    out = []
    residual = bed.residual
    for h in reversed(rows):
        t = h.hour_start_min * 60.0
        note = []
        if h.measured_fraction < COVERED_FRACTION:
            note.append(f"under {pct(COVERED_FRACTION)} measured: not enough data to judge "
                        "low output")  # fmt: skip
        lo, hi = h.hour_start_min, h.hour_start_min + 60
        held = sum(bed.series.sums(max(a, lo), min(b, hi)).volume_ml
                   for a, b in residual if max(a, lo) < min(b, hi))  # fmt: skip
        if held > 0:
            note.append(f"includes {ml(held)} residual drained")
        out.append(HourRow(f"{w.clock(t)}–{w.clock(t + 3600)}", num(h.volume_ml),
                           per_kg(h.volume_ml, kg), pct(h.measured_fraction), "; ".join(note)))
    return out


@dataclass
class FactLine:
    label: str
    span: str
    volume: str
    minutes: str
    line: str
    meets: bool


def fact_line(f: WindowFact, w: Words) -> FactLine:
    win = f.window
    lo, hi = f.span
    return FactLine(
        label=f.label, span=f"{w.clock(lo)}–{w.clock(hi)}", volume=ml(win.volume_ml),
        minutes=(f"{win.measured_min} of {win.length_min} min measured, {win.estimated_min} "
                 f"estimated, {f.unknown_min} without data"),
        line=threshold_words(f.threshold), meets=f.meets,
    )  # fmt: skip


@dataclass
class AlarmDetail:
    line: AlarmLine
    rule_title: str
    source: str
    rationale: str
    check: str
    facts: list[FactLine]
    evidence: list[tuple[str, str]]  # the alarm's own evidence, for rules without windows
    history: list[tuple[str, str, str]]  # (time, state word, what)
    explain: str  # the command that replays its evidence reading by reading


def _words(v: object, depth: int = 0) -> str:
    """A piece of evidence as plain words: numbers through numbers.num, no brackets."""
    if isinstance(v, bool) or v is None:
        return {True: "yes", False: "no", None: "-"}[v]
    if isinstance(v, float):
        return num(v, 2).rstrip("0").rstrip(".") if math.isfinite(v) else str(v)
    if isinstance(v, dict):
        if depth > 2:
            return "..."
        return ", ".join(f"{str(k).replace('_', ' ')} {_words(x, depth + 1)}"
                         for k, x in v.items())  # fmt: skip
    if isinstance(v, list):
        return "; ".join(_words(x, depth + 1) for x in v[:8]) + ("; ..." if len(v) > 8 else "")
    return str(v)


def evidence_pairs(ev: dict[str, Any]) -> list[tuple[str, str]]:
    return [(k.replace("_", " "), _words(v)[:400]) for k, v in ev.items()]


def rule_check_words(rule: r.RuleDef) -> str:
    return ", ".join(f"{k} {v}" for k, v in rule.check.model_dump(mode="json").items()
                     if k != "type")  # fmt: skip


def labs_rows(bed: BedState, now: float, w: Words) -> list[tuple[str, str, str]]:
    """(analyte, latest value, taken at), for each analyte with a result."""
    out = []
    for key in ANALYTES:
        latest = bed.latest_lab(key, now)
        if latest is None:
            continue
        t, v = latest
        name, unit = ANALYTE_WORDS[key]
        out.append((name, f"{num(v, 1)} {unit}", f"{w.when(t)} ({age(now - t)} ago)"))
    return out


def residual_rows(bed: BedState, w: Words) -> list[tuple[str, str]]:
    out = []
    for d in residual_drains(bed):
        out.append((f"{w.iso_local(d['from'])}–{w.iso_local(d['to'])[11:]}", ml(d["volume_ml"])))
    return out


def facts_for(engine: Engine, bed: BedState, rule_id: str, w: Words) -> list[FactLine]:
    rule = next((x for x in engine.rules if x.id == rule_id), None)
    if rule is None:
        return []
    return [fact_line(f, w) for f in windows_at(rule, bed)]


CAUTIONS = (CAUTION, ALARM_CAUTION)
