"""Completed clock-hour totals and the data-quality summary, as text or JSON."""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

from .engine.engine import Engine
from .engine.numbers import half_up, ml, num, pct
from .engine.outcomes import COUNTED_IN_SERIES, Outcome
from .engine.timefmt import iso

# Columns of the quality table: (heading, outcomes counted in it).
_QUALITY_COLUMNS: list[tuple[str, tuple[Outcome, ...]]] = [
    ("accepted", tuple(sorted(COUNTED_IN_SERIES))),  # everything that went into the series
    ("dup", (Outcome.DUPLICATE,)),
    ("late", (Outcome.LATE, Outcome.TOO_OLD)),
    ("artefact", (Outcome.ARTEFACT_DROPPED, Outcome.IMPLAUSIBLE_FLOW)),
    ("bag chg", (Outcome.BAG_CHANGE, Outcome.BAG_CHANGE_INFERRED)),
    ("skew", (Outcome.CLOCK_SKEW,)),
    ("unbound", (Outcome.UNBOUND,)),
]  # fmt: skip
_SHOWN = {o for _, group in _QUALITY_COLUMNS for o in group}


def hourly_rows(engine: Engine) -> Iterator[dict[str, Any]]:
    for bed_id in sorted(engine.beds):
        for h in engine.beds[bed_id].series.completed_hours():
            yield {
                "bed": bed_id,
                "hour_start": iso(h.hour_start_min * 60.0),
                "volume_ml": half_up(h.volume_ml, 1),
                "measured_fraction": half_up(h.measured_fraction, 3),
            }


def hourly_json(engine: Engine) -> Iterator[str]:
    for row in hourly_rows(engine):
        yield json.dumps(row)
    for device, q in engine.quality().items():
        yield json.dumps({"device": device, "quality": q})


def hourly_text(engine: Engine) -> Iterator[str]:
    if not engine.beds:
        yield "No bed context in the log: no meter is bound to a bed, so there is no output series."
    for bed_id in sorted(engine.beds):
        bed = engine.beds[bed_id]
        ctx = bed.context
        weight = (
            f"{ctx.weight_kg:g} kg ({ctx.weight_basis or 'basis not given'})"
            if ctx.weight_kg
            else "no weight"
        )
        yield f"Bed {bed_id}  ward {ctx.ward}  {weight}  meters {', '.join(ctx.device_ids)}"
        yield f"  {'clock hour (UTC)':<18} {'urine mL':>9} {'mL/kg/h':>8} {'measured':>9}"
        rows = list(bed.series.completed_hours())
        if not rows:
            yield "  (no completed clock hour yet)"
        for h in rows:
            per_kg = f"{num(h.volume_ml / ctx.weight_kg, 2):>8}" if ctx.weight_kg else f"{'-':>8}"
            note = ""
            if h.measured_fraction < 0.9:
                note = "  < 90% measured: not enough data to judge low output"
            yield (
                f"  {iso(h.hour_start_min * 60.0)[:16].replace('T', ' '):<18} "
                f"{num(h.volume_ml, 1):>9} {per_kg} {pct(h.measured_fraction):>9}{note}"
            )
        if rows:
            total = sum(h.volume_ml for h in rows[-24:])
            yield f"  last {min(24, len(rows))} completed hours: {ml(total)}"
        for lo, hi in bed.residual:
            drained = bed.series.sums(lo, hi).volume_ml
            if drained > 0:
                yield (
                    f"  residual drained {iso(lo * 60.0)[11:16]}-{iso(hi * 60.0)[11:16]}: "
                    f"{ml(drained)}, in the hours above, not counted by the high-output criteria"
                )
        yield ""
    yield from quality_text(engine)


def quality_text(engine: Engine) -> Iterator[str]:
    yield "Data quality per meter (counts of readings by outcome)"
    head = f"  {'meter':<14} {'profile':<22} {'bed':<8} {'recv':>6}"
    head += "".join(f" {name:>8}" for name, _ in _QUALITY_COLUMNS) + "  rejected (reason: n)"
    yield head
    for device, q in engine.quality().items():
        outcomes = q["outcomes"]
        assert isinstance(outcomes, dict)
        counts = {Outcome(k): v for k, v in outcomes.items()}
        cells = "".join(
            f" {sum(counts.get(o, 0) for o in group):>8}" for _, group in _QUALITY_COLUMNS
        )
        other = ", ".join(f"{o}: {n}" for o, n in sorted(counts.items()) if o not in _SHOWN)
        held = " (1 reading held for confirmation)" if q.get("held") else ""
        yield (
            f"  {device:<14} {q['profile']!s:<22} {q['bed'] or '-'!s:<8} {q['received']:>6}"
            f"{cells}  {other or '-'}{held}"
        )
    if engine.unrouted:
        yield "  messages on topics no profile matches: " + ", ".join(
            f"{o}: {n}" for o, n in engine.unrouted.items()
        )
    if engine.context_rejections:
        yield "  bed context messages rejected: " + ", ".join(
            f"{b}: {n}" for b, n in sorted(engine.context_rejections.items())
        )
    warnings = engine.sanity_history()
    if warnings:
        yield ""
        yield "Profile sanity warnings (readings were not rejected; the profile may be wrong)"
        for w in warnings:
            when = f"since {iso(w.since)}" + (
                f", cleared {iso(w.cleared)}" if w.cleared is not None else ", still active"
            )
            yield f"  {w.device_id:<14} {w.code:<24} check {w.key}  ({when})"
            yield f"  {'':<14} {w.detail}"
