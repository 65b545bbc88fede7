"""`hourwatch replay SOURCE --report OUT.html`: one self-contained HTML file.

Per bed a plot (PNG embedded as base64), a table of alarms linking to each alarm's
explanation further down the same file, the data-quality summary per meter and the
caution. Nothing in it refers to anything outside the file.
"""

from __future__ import annotations

import base64
import re
from collections import Counter
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from html import escape
from pathlib import Path
from typing import Any

from ..caution import CAUTION
from ..engine.numbers import num, pct
from ..engine.outcomes import Outcome
from ..engine.timefmt import iso
from ..journal_api import JournalTarget
from .compare import RunSummary, summarize
from .episodes import Episode
from .evidence import residual_drains
from .explain import Review, evidence_value, explanation, lifecycle_lines
from .plots import PRIORITY_COLOUR, BedPicture, draw, png
from .recorder import ARTEFACTS, BAG_CHANGES

# Columns of the data-quality table: (heading, outcomes counted in it).
QUALITY_COLUMNS: list[tuple[str, tuple[Outcome, ...]]] = [
    (
        "counted",
        (
            Outcome.ACCEPTED,
            Outcome.REORDERED,
            Outcome.STORE_FORWARD,
            Outcome.CLOCK_SKEW,
            Outcome.NOISE_FALL,
            Outcome.SPIKE_CONFIRMED,
            Outcome.BAG_CHANGE,
            Outcome.BAG_CHANGE_INFERRED,
        ),
    ),
    ("duplicate", (Outcome.DUPLICATE, Outcome.CONFLICTING_DUPLICATE)),
    ("late", (Outcome.LATE, Outcome.TOO_OLD)),
    ("artefact", (Outcome.ARTEFACT_DROPPED, Outcome.IMPLAUSIBLE_FLOW)),
    ("bag change", (Outcome.BAG_CHANGE, Outcome.BAG_CHANGE_INFERRED)),
    ("clock skew", (Outcome.CLOCK_SKEW,)),
    ("store & fwd", (Outcome.STORE_FORWARD,)),
]
_SHOWN = {o for _, group in QUALITY_COLUMNS for o in group}

CSS = """
body { font-family: system-ui, sans-serif; margin: 1.5em auto; max-width: 72em; color: #222;
       line-height: 1.4; padding: 0 1em; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; border-bottom: 1px solid #ccc; margin-top: 2em; }
h3 { font-size: 1.05em; margin-top: 1.6em; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.88em; }
th, td { border: 1px solid #d0d0d0; padding: 0.2em 0.5em; text-align: left; vertical-align: top; }
th { background: #f2f2f2; } td.n { text-align: right; font-variant-numeric: tabular-nums; }
.caution { border: 2px solid #555; padding: 0.6em 1em; background: #fafafa; font-weight: 600; }
.prio { display: inline-block; width: 0.9em; height: 0.9em; margin-right: 0.3em;
        border: 1px solid #555; vertical-align: -0.1em; }
img { max-width: 100%; border: 1px solid #ddd; }
pre { background: #f7f7f7; padding: 0.5em; overflow-x: auto; font-size: 0.85em; }
.muted { color: #666; } .ok { color: #245a2a; } .bad { color: #8a1c1c; font-weight: 600; }
"""


def anchor(prefix: str, name: str) -> str:
    return prefix + "-" + re.sub(r"[^A-Za-z0-9_.-]", "-", name)


def _t(t: float | None) -> str:
    return "-" if t is None else iso(t)[:19].replace("T", " ")


def _e(x: object) -> str:
    return escape(str(x), quote=True)


@dataclass
class ReportInput:
    review: Review
    source: JournalTarget
    rules_label: str
    profiles_label: str
    bad_lines: int = 0
    comparison_html: str = ""


def pictures(rv: Review) -> list[BedPicture]:
    engine = rv.engine
    assert engine is not None
    end = rv.recorder.end_time
    out = []
    for bed_id in sorted(engine.beds):
        bed = engine.beds[bed_id]
        log = rv.recorder.readings.get(bed_id)
        off = set(bed.context.disabled_rules)
        out.append(
            BedPicture(
                bed=bed_id,
                series=bed.series,
                rules=[x for x in engine.rules if x.id not in off],
                weight_kg=bed.context.weight_kg,
                episodes=[e for e in rv.episodes if e.bed == bed_id],
                end=end,
                bag_changes=[t for t, _ in log.marks(BAG_CHANGES)] if log else [],
                artefacts=log.marks(ARTEFACTS) if log else [],
                intake=rv.recorder.intake.get(bed_id, []),
                advice=[a for a in rv.recorder.advice if a.bed == bed_id],
            )
        )
    return out


def render(
    inp: ReportInput,
    progress: Callable[[list[BedPicture]], Iterable[BedPicture]] | None = None,
    plots_dir: Path | None = None,
) -> str:
    rv = inp.review
    engine = rv.engine
    assert engine is not None
    end = rv.recorder.end_time
    raised = [e for e in rv.episodes if e.raised]
    run = summarize("", rv.episodes, {b: s.bound_at for b, s in engine.beds.items()}, end)
    parts: list[str] = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>Hourwatch replay report: {_e(inp.source.name)}</title>",
        f"<style>{CSS}</style></head><body>",
        f"<h1>Replay report: {_e(inp.source.name)}</h1>",
        f'<p class="caution">{_e(CAUTION)}</p>',
        _overview(inp, rv, run),
        '<h2 id="alarms">Alarms</h2>',
        _burden_table(run),
        _alarm_table(raised, rv.episodes, end),
    ]
    if inp.comparison_html:
        parts.append(inp.comparison_html)
    parts.append('<h2 id="beds">Beds</h2>')
    pics = pictures(rv)
    for pic in progress(pics) if progress else pics:
        parts.append(_bed_section(pic, rv, plots_dir))
    parts.append('<h2 id="explanations">Why each alarm fired</h2>')
    parts.append(
        '<p class="muted">Windows as the rule evaluated them when the alarm became active, '
        "recomputed from the minute series and checked against the alarm's own evidence. "
        f"For every reading behind a window: <code>hourwatch explain {_e(inp.source.name)} "
        "ALARM_ID</code>.</p>"
    )
    for ep in rv.episodes:
        parts.append(_explanation(explanation(rv, ep), ep))
    parts.append('<h2 id="quality">Data quality per meter</h2>')
    parts.append(_quality(engine.quality(), engine.unrouted, inp.bad_lines))
    parts.append(f'<p class="caution">{_e(CAUTION)}</p>')
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"


def _overview(inp: ReportInput, rv: Review, run: RunSummary) -> str:
    r = rv.recorder
    raised = run.raised
    by_prio = Counter(str(e.priority) for e in raised)
    minutes = sum(e.minutes_in_alarm(run.end) for e in raised)
    per_day = len(raised) / run.bed_days if run.bed_days else 0.0
    engine = rv.engine
    assert engine is not None
    rows = [
        ("source", inp.source.name),
        ("data from", f"{_t(r.first_time)} to {_t(r.last_time)} UTC"),
        (
            "messages replayed",
            f"{rv.messages:,}"
            + (f" ({inp.bad_lines} malformed line(s) skipped)" if inp.bad_lines else ""),
        ),
        ("rules", inp.rules_label),
        ("device profiles", inp.profiles_label),
        ("beds", f"{len(engine.beds)} ({num(run.bed_days, 2)} bed-days monitored)"),
        (
            "alarms raised",
            f"{len(raised)}"
            + (
                " (" + ", ".join(f"{k} {v}" for k, v in sorted(by_prio.items())) + ")"
                if raised
                else ""
            ),
        ),
        ("alarm burden", f"{num(per_day, 2)} alarms per bed-day, {num(minutes)} minutes in alarm"),
        (
            "never annunciated",
            f"{len(rv.episodes) - len(raised)} (pending, suppressed or cleared before activation)",
        ),
    ]
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)
    links = " · ".join(f'<a href="#{anchor("bed", b)}">{_e(b)}</a>' for b in sorted(engine.beds))
    return (
        f"<table>{body}</table><p>Beds: {links or 'none'} · "
        '<a href="#alarms">alarms</a> · <a href="#quality">data quality</a></p>'
    )


def _burden_table(run: RunSummary) -> str:
    """Per rule: alarms and pages per bed-day, so a unit can see what its pager carries."""
    if not run.raised:
        return ""
    rows = []
    rules = sorted({e.rule for e in run.raised})
    for rule in [*rules, None]:
        eps = [e for e in run.raised if rule is None or e.rule == rule]
        pages = sum(e.pages for e in eps)
        per_alarm = pages / len(eps) if eps else 0.0
        days = run.bed_days or 1.0
        name = "all rules" if rule is None else rule
        rows.append(
            f'<tr><td>{_e(name)}</td><td class="n">{len(eps)}</td>'
            f'<td class="n">{num(len(eps) / days, 2)}</td><td class="n">{pages}</td>'
            f'<td class="n">{num(pages / days, 1)}</td><td class="n">{num(per_alarm, 1)}</td></tr>'
        )
    head = (
        "<tr><th>rule</th><th>alarms</th><th>alarms per bed-day</th><th>pages</th>"
        "<th>pages per bed-day</th><th>pages per alarm</th></tr>"
    )
    return f"<table>{head}{''.join(rows)}</table>"


def _prio(p: object) -> str:
    colour = PRIORITY_COLOUR.get(p, "#ffffff")  # type: ignore[call-overload]
    return f'<span class="prio" style="background:{colour}"></span>{_e(p)}'


def _alarm_table(raised: list[Episode], all_eps: list[Episode], end: float) -> str:
    if not all_eps:
        return "<p>No alarm condition was met.</p>"
    head = (
        "<tr><th>alarm</th><th>bed</th><th>rule</th><th>priority</th><th>active from</th>"
        "<th>ended</th><th>min in alarm</th><th>acknowledged</th><th>notes</th></tr>"
    )
    rows = []
    for ep in all_eps:
        acks = "; ".join(f"{_t(a.time)} {a.by} ({a.role})" for a in ep.acks) or "-"
        notes = []
        if not ep.raised:
            notes.append("never annunciated")
        if ep.suppressed_by:
            notes.append("suppressed by " + ", ".join(sorted(ep.suppressed_by)))
        if ep.max_priority != ep.priority:
            notes.append(f"priority up to {ep.max_priority}")
        rows.append(
            f'<tr><td><a href="#{anchor("alarm", ep.alarm_id)}">{_e(ep.alarm_id)}</a></td>'
            f'<td><a href="#{anchor("bed", ep.bed)}">{_e(ep.bed)}</a></td><td>{_e(ep.rule)}</td>'
            f"<td>{_prio(ep.priority)}</td><td>{_t(ep.activated)}</td><td>{_t(ep.ended)}</td>"
            f'<td class="n">{num(ep.minutes_in_alarm(end))}</td><td>{_e(acks)}</td>'
            f"<td>{_e('; '.join(notes))}</td></tr>"
        )
    return f"<p>{len(raised)} raised.</p><table>{head}{''.join(rows)}</table>"


def _bed_section(pic: BedPicture, rv: Review, plots_dir: Path | None) -> str:
    engine = rv.engine
    assert engine is not None
    ctx = engine.beds[pic.bed].context
    weight = (
        f"{ctx.weight_kg:g} kg ({ctx.weight_basis or 'basis not given'})"
        if ctx.weight_kg
        else "no weight (weight-based rules do not run)"
    )
    fig = draw(pic)
    data = png(fig)
    if plots_dir is not None:
        plots_dir.mkdir(parents=True, exist_ok=True)
        (plots_dir / f"{re.sub(r'[^A-Za-z0-9_.-]', '-', pic.bed)}.png").write_bytes(data)
    b64 = base64.b64encode(data).decode("ascii")
    alarms = [e for e in pic.episodes if e.raised]
    links = ", ".join(
        f'<a href="#{anchor("alarm", e.alarm_id)}">{_e(e.rule)} {_t(e.activated)[11:16]}</a>'
        for e in alarms
    )
    alt = (
        f"Bed {pic.bed}: rolling 60-minute and 24-hour urine output with rule thresholds, "
        f"{len(alarms)} alarm span(s), {len(pic.bag_changes)} bag change(s), "
        f"{len(pic.artefacts)} artefact(s)"
    )
    disabled = (
        f"; rules disabled on this bed: {', '.join(ctx.disabled_rules)}"
        if ctx.disabled_rules
        else ""
    )
    order = ctx.replacement
    facts = [f"{e.kind.replace('_', ' ')} {_t(e.at.timestamp())}" for e in ctx.episodes] + [
        f"residual drained: {num(d['volume_ml'])} mL ({_t_iso(d['from'])[11:16]}-"
        f"{_t_iso(d['to'])[11:16]}), not counted as output"
        for d in residual_drains(engine.beds[pic.bed])
    ]
    facts.append(
        "replacement order: none on file"
        if order is None
        else f"replacement order: {pct(order.fraction_low)}-{pct(order.fraction_high)} of "
        f"output as {order.fluid}, by {order.ordered_by} at {_t(order.ordered_at.timestamp())}"
    )
    return (
        f'<h3 id="{anchor("bed", pic.bed)}">Bed {_e(pic.bed)}</h3>'
        f"<p>Ward {_e(ctx.ward)} · meters {_e(', '.join(ctx.device_ids))} · {_e(weight)}"
        f"{_e(disabled)}</p><p>{_e(' · '.join(facts))}</p>"
        f'<img class="plot" src="data:image/png;base64,{b64}" alt="{_e(alt)}">'
        '<p class="muted">Top: output in the 60 minutes ending at each minute, with alarm '
        "spans shaded by priority (darker = more urgent), bag changes (triangles) and "
        "artefacts (crosses); grey bands are minutes with no data, hatched bands estimated "
        "minutes. Dashed lines are rule thresholds (weight-based ones at this bed's weight; "
        "KDIGO rules compare the mean over their window, not a single hour). Then: output "
        "in the last 24 hours; one lane per rule with alarms (triangles = acknowledgements); "
        "documented intake and suggested replacement where present.</p>"
        f"<p>Alarms: {links or 'none'}</p>"
    )


def _fmt_thr(t: dict[str, Any]) -> str:
    out = []
    for k, v in t.items():
        out.append(f"{k.replace('_', ' ')} {v}")
    return "; ".join(out)


def _explanation(d: dict[str, Any], ep: Episode) -> str:
    rule = d["rule"]
    head = (
        f'<h3 id="{anchor("alarm", ep.alarm_id)}">{_e(ep.alarm_id)}</h3>'
        f"<p>{_prio(ep.priority)} · {_e(rule.get('title', ep.rule))} · bed "
        f'<a href="#{anchor("bed", ep.bed)}">{_e(ep.bed)}</a> · '
        f"{'active from ' + _t(ep.activated) if ep.raised else 'never annunciated'}"
        f" · ended {_t(ep.ended)}</p>"
        f"<p>{_e(d['summary'])}</p>"
    )
    parts = [head]
    if "check" in rule:
        params = ", ".join(f"{k} = {v}" for k, v in rule["check"].items())
        parts.append(
            f"<p><b>Rule</b> {_e(rule['id'])}: {_e(params)}; "
            f"{'latching' if rule['latching'] else 'non-latching'}, condition delay "
            f"{rule['condition_delay_s']} s, clear hold {rule['clear_hold_s']} s.<br>"
            f"<b>Source</b>: {_e(rule['source'])}<br><b>Priority</b>: {_e(rule['rationale'])}</p>"
        )
    wins = d.get("windows") or []
    if wins:
        rows = "".join(
            f"<tr><td>{_e(w['label'])}</td><td>{_t_iso(w['from'])}</td><td>{_t_iso(w['to'])}</td>"
            f'<td class="n">{num(w["volume_ml"], 1)}</td><td class="n">{pct(w["coverage"], 1)}</td>'
            f'<td class="n">{w["estimated_min"]}</td><td class="n">{w["unknown_min"]}</td>'
            f"<td>{_e(_fmt_thr(w['threshold']))}</td>"
            f"<td>{'yes' if w['meets_condition'] else 'no'}</td>"
            f"<td>{_e(_counts_text(w['readings_by_outcome']))}</td></tr>"
            for w in wins
        )
        chk = d["evidence_check"]
        verdict = (
            f'<span class="ok">recomputed windows equal the alarm event\'s evidence '
            f"({chk['compared']} compared)</span>"
            if chk["all_equal"]
            else '<span class="bad">recomputed windows differ from the alarm event\'s '
            "evidence</span>"
        )
        parts.append(
            f"<p>Windows at {_t_iso(d['moment'])} UTC, each (from, to]:</p><table><tr>"
            "<th>window</th><th>from</th><th>to</th><th>mL</th><th>measured</th>"
            "<th>estimated min</th><th>unknown min</th><th>threshold</th><th>meets</th>"
            f"<th>readings by outcome</th></tr>{rows}</table><p>{verdict}</p>"
        )
    else:
        ev = "; ".join(f"{k}: {evidence_value(v)}" for k, v in d["event_evidence"].items())
        parts.append(f"<p>Evidence (no output window): {_e(ev)}</p>")
    sup = d.get("suppression")
    if sup:
        bits = [sup["how"]]
        for t in sup["technical_alarms_open"]:
            bits.append(f"technical alarm open: {t['alarm_id']} ({t['state']})")
        if sup["suppressing_at_moment"]:
            bits.append(f"suppressed by {sup['suppressing_at_moment']}")
        for g in sup["gated_by"]:
            bits.append(f"runs because {g['alarm_id']} is open")
        for h in sup["history"]:
            bits.append(
                f"{_t_iso(h['time'])} {h['reason']}"
                + (f" by {h['suppressed_by']}" if h["suppressed_by"] else "")
            )
        parts.append("<p><b>Suppression</b>: " + _e("; ".join(bits)) + "</p>")
    parts.append("<pre>" + _e("\n".join(lifecycle_lines(d["lifecycle"]))) + "</pre>")
    return "\n".join(parts)


def _counts_text(counts: dict[str, int]) -> str:
    return ", ".join(f"{k} {v}" for k, v in counts.items()) or "-"


def _t_iso(text: str | None) -> str:
    return "-" if text is None else _e(text[:19].replace("T", " "))


def _quality(quality: dict[str, dict[str, object]], unrouted: Counter[Any], bad: int) -> str:
    head = (
        "<tr><th>meter</th><th>profile</th><th>bed</th><th>received</th>"
        + "".join(f"<th>{_e(name)}</th>" for name, _ in QUALITY_COLUMNS)
        + "<th>other (reason: n)</th></tr>"
    )
    rows = []
    for dev, q in quality.items():
        outcomes = q["outcomes"]
        assert isinstance(outcomes, dict)
        counts = {Outcome(k): int(v) for k, v in outcomes.items()}
        cells = "".join(
            f'<td class="n">{sum(counts.get(o, 0) for o in group)}</td>'
            for _, group in QUALITY_COLUMNS
        )
        other = ", ".join(f"{o}: {n}" for o, n in sorted(counts.items()) if o not in _SHOWN)
        held = " (1 reading held for confirmation at the end)" if q.get("held") else ""
        rows.append(
            f"<tr><td>{_e(dev)}</td><td>{_e(q['profile'])}</td><td>{_e(q['bed'] or '-')}"
            f'</td><td class="n">{q["received"]}</td>{cells}<td>{_e(other or "-")}'
            f"{_e(held)}</td></tr>"
        )
    extra = []
    if unrouted:
        extra.append(
            "messages on topics no profile matches: "
            + ", ".join(f"{o}: {n}" for o, n in unrouted.items())
        )
    if bad:
        extra.append(f"{bad} malformed line(s) in the source were skipped")
    tail = "".join(f"<p>{_e(x)}</p>" for x in extra)
    if not rows:
        return "<p>No meter messages.</p>" + tail
    return f"<table>{head}{''.join(rows)}</table>{tail}"


def write(path: Path, html_text: str) -> None:
    path.write_text(html_text, encoding="utf-8")
