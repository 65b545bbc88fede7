"""The fixed set of checks a rule file can name, evaluated on one bed.

Each check returns a Finding: whether the alarm condition holds, a one-line
summary for the page, the evidence behind it, and when (without new input)
its answer could next change, so the engine can declare a wake-up.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, NamedTuple

from . import rules as r
from .alarms import Priority
from .bedstate import BedState
from .haemo import mean_arterial_pressure, shock_index
from .numbers import half_up, ml, num, pct
from .series import MinuteSeries
from .timefmt import hhmm_utc, iso
from .windows import Window, above, below, hours_ending, measure, tenths, window_bounds


class DeviceSeen(NamedTuple):  # a tuple: one is made per meter at every evaluation
    device_id: str
    # receive time of its last usable reading (one that reached the series), or when it
    # was bound: a meter whose every message fails is as blind as a silent one
    last_seen: float
    period_s: int
    # the most a reading the cleaner accepts as it comes can add per minute: the
    # family's maximum plausible flow plus its noise allowance on every reading
    max_ml_per_min: float = 0.0
    # what it sent since its last usable reading, by outcome (reason code, count)
    sent_since: tuple[tuple[str, int], ...] = ()
    bag_ml: float | None = None  # what its bag held at its last usable reading
    capacity_ml: float | None = None  # its bag's declared capacity (profile)


@dataclass(slots=True)
class BedView:
    """Everything a check may read, at engine time `now`."""

    bed: BedState
    now: float
    devices: tuple[DeviceSeen, ...]
    gates: dict[str, float]  # rule id -> activation time of its open alarm on this bed
    end: int | None  # the bed's latest whole minute: every window ends here (or no data)
    # False while the rule's own alarm is open: it is re-checked every minute then,
    # so a costly proof of quietness would be thrown away
    quiet_wanted: bool = True
    # whether a fluid counts as hypotonic under the advice policy
    hypotonic: Callable[[str], bool] = lambda fluid: False
    # a time as people read it: local clock HH:MM in the engine's time zone
    clock: Callable[[float], str] = hhmm_utc


Explain = Callable[[], tuple[str, dict[str, Any]]]


@dataclass(slots=True)
class Finding:
    """`explain` builds the summary and evidence only when an alarm needs them:
    most evaluations change nothing, and formatting costs more than checking."""

    condition: bool
    explain: Explain
    priority: Priority | None = None  # overrides the rule's priority for this episode
    due: float | None = None  # time at which the answer may change without new input
    skipped: str | None = None  # why the check could not run (e.g. no weight)
    # the condition is false and provably stays false, whatever new readings bring,
    # until windows end after this minute (low-output rules: new minutes only add)
    quiet_until: int | None = None


def _say(summary: str, evidence: dict[str, Any] | None = None) -> Explain:
    facts = evidence or {}
    return lambda: (summary, facts)


NOT_YET = Finding(False, _say("no data yet"))

QUIET_LIMIT_MIN = 60  # re-check at least hourly even when provably quiet
FOREVER = 2**62  # quiet until an input (not a reading) re-checks every rule
# corrections of recent minutes (a refit, a reordered reading) may take back a little
QUIET_MARGIN_ML = 5.0
QUIET_MARGIN_SHARE = 0.05


def _quiet_below(v: BedView, volume_ml: float, threshold_ml: float) -> int | None:
    """A high-output window gains at most the meters' plausible flow per minute
    (readings beyond it are held, and a confirmed one makes the engine re-check
    every rule), so while it stays at or under `threshold_ml` (with a margin)
    the alarm condition cannot be met."""
    end = v.end
    per_min = sum(d.max_ml_per_min for d in v.devices)
    margin = max(QUIET_MARGIN_ML, QUIET_MARGIN_SHARE * threshold_ml)
    if end is None or per_min <= 0:
        return None
    k = math.floor((threshold_ml - margin - volume_ml) / per_min)
    return end + min(k, QUIET_LIMIT_MIN) if k > 0 else None


def _quiet_until(w: Window, series: MinuteSeries, threshold_ml: float) -> int | None:
    """While a low-output window keeps more than `threshold_ml` (plus a margin) of
    what it holds now, the alarm condition cannot be met."""
    budget = w.volume_ml - threshold_ml - max(QUIET_MARGIN_ML, QUIET_MARGIN_SHARE * threshold_ml)
    if budget < 0:
        return None
    lo, hi = window_bounds(w.end_minute, w.length_min)
    return w.end_minute + series.slide_budget(lo, hi, budget, QUIET_LIMIT_MIN)


_ml = ml


def _share(x: float, line: float) -> str:
    """A share in whole percent, or finer where whole percent would read as the line
    itself ("100% ... (alarm above 100%)" on a page that fired at 100.4%)."""
    for digits in (0, 1, 2):
        text = pct(x, digits)
        if x == line or text != pct(line, digits):
            return text
    return text


def _vol(x: float, threshold: float) -> str:
    """A volume in whole mL, or to the tenth where whole mL would read as the threshold
    itself (comparisons are made to the tenth: a page never contradicts its threshold)."""
    text = num(x)
    return num(x, 1) if text == num(threshold) and tenths(x) != tenths(threshold) else text


def _elapsed_quiet(v: BedView, end: int, length: int) -> int | None:
    """A duration criterion needs its whole window after the bed's first data (DESIGN
    §3): None once it has that; else the last minute it provably stays unmet."""
    first = v.bed.series.first_minute
    fits_at = (first if first is not None else end) + length - 1
    return None if end >= fits_at else fits_at - 1


def _later(a: int | None, b: int | None) -> int | None:
    return b if a is None else a if b is None else max(a, b)


def _rate(rate: float, threshold: float) -> str:
    """Two decimals; where two would round onto the threshold, three, rounded away
    from it (0.49997 is below 0.5 and reads 0.499, not 0.50)."""
    text = num(rate, 2)
    if float(text) != threshold or rate == threshold:
        return text
    step = math.floor if rate < threshold else math.ceil
    return num(step(rate * 1000) / 1000, 3)


def hourly_above(c: r.HourlyAbove, v: BedView) -> Finding:
    end = v.end
    if end is None:
        return NOT_YET
    wins = hours_ending(v.bed.series, end, c.consecutive_hours, v.bed.residual)
    gt = c.comparator == "gt"
    cond = all(above(w.volume_ml, c.threshold_ml_h, gt) for w in wins)

    def explain() -> tuple[str, dict[str, Any]]:
        vols = ", ".join(_vol(w.volume_ml, c.threshold_ml_h) for w in wins)
        return (
            f"last {len(wins)} h: {vols} mL "
            f"(alarm {'above' if gt else 'at or above'} {c.threshold_ml_h:g} each)",
            {"windows": [w.to_json() for w in wins], "threshold_ml_h": c.threshold_ml_h,
             "comparator": c.comparator},
        )  # fmt: skip

    quiet = None
    if not cond:
        quiet = _quiet_below(v, wins[-1].volume_ml, c.threshold_ml_h)
        if len(wins) > 1 and v.quiet_wanted:  # the older hours slide over known minutes
            older = _older_hours_quiet(v.bed.series, end, len(wins), c.threshold_ml_h)
            if older is not None and (quiet is None or older > quiet):
                quiet = older  # quiet while either proof holds: the longer one
    return Finding(cond, explain, quiet_until=quiet)


def _older_hours_quiet(
    series: MinuteSeries, end: int, hours: int, threshold_ml: float
) -> int | None:
    """Every hour must exceed the threshold, and the oldest one, slid k <= 60 minutes
    on, covers only minutes known now: while it holds at most `threshold_ml` (less a
    margin for corrections) the condition cannot be met, whatever readings bring."""
    limit = threshold_ml - max(QUIET_MARGIN_ML, QUIET_MARGIN_SHARE * threshold_ml)
    lo, hi = window_bounds(end - 60 * (hours - 1), 60)  # the oldest hour now
    k = series.stays_at_most(lo + 1, hi + 1, limit, QUIET_LIMIT_MIN)
    return end + k if k > 0 else None


def volume_above(c: r.VolumeAbove, v: BedView) -> Finding:
    end = v.end
    first = v.bed.series.first_minute
    if end is None or first is None:
        return NOT_YET
    length = c.window_h * 60
    if c.since_start_if_shorter:
        length = min(length, end - first + 1)
    w = measure(v.bed.series, end, length, v.bed.residual)
    cond = above(w.volume_ml, c.threshold_ml)
    return Finding(
        cond,
        lambda: (
            f"{_vol(w.volume_ml, c.threshold_ml)} mL in {num(length / 60, 1)} h "
            f"(alarm above {c.threshold_ml:g})",
            {"window": w.to_json(), "threshold_ml": c.threshold_ml},
        ),
        quiet_until=None if cond else _quiet_below(v, w.volume_ml, c.threshold_ml),
    )


def _weight(v: BedView) -> float | None:
    return v.bed.context.weight_kg


def _weight_evidence(v: BedView) -> dict[str, Any]:
    return {"weight_kg": v.bed.context.weight_kg, "weight_basis": v.bed.context.weight_basis}


# only a context can bring a weight, and a context re-checks every rule
NO_WEIGHT = Finding(
    False, _say("no body weight in the bed context"), skipped="no_weight", quiet_until=FOREVER
)


def _monitored(v: BedView, end: int) -> str:
    first = v.bed.series.first_minute
    return num((end - (first if first is not None else end) + 1) / 60, 1)


def rate_below(c: r.RateBelow, v: BedView) -> Finding:
    end, kg = v.end, _weight(v)
    if kg is None:
        return NO_WEIGHT
    if end is None:
        return NOT_YET
    length = c.window_h * 60
    early = _elapsed_quiet(v, end, length)  # the duration has not elapsed yet
    if c.mode == "mean":
        w = measure(v.bed.series, end, length)
        # the volume at the line over the minutes with data, compared to the tenth of a mL
        cond = (
            early is None
            and w.covered
            and below(w.volume_ml, c.threshold_ml_kg_h * kg * max(w.known_min, 1) / 60)
        )

        def explain_mean() -> tuple[str, dict[str, Any]]:
            rate = w.rate_ml_kg_h(kg)
            base = {"threshold_ml_kg_h": c.threshold_ml_kg_h, "mode": c.mode}
            ev = (
                _weight_evidence(v)
                | base
                | {"window": w.to_json(), "rate_ml_kg_h": half_up(rate, 3)}
            )
            if early is not None:
                return f"monitored for {_monitored(v, end)} of the {c.window_h} h", ev
            if not w.covered:
                return f"window only {pct(w.coverage)} measured", ev
            return (
                f"{_rate(rate, c.threshold_ml_kg_h)} mL/kg/h over {c.window_h} h "
                f"(alarm below {c.threshold_ml_kg_h:g}; {_ml(w.volume_ml)}, {kg:g} kg, "
                f"{num(w.known_min / 60, 1)} h with data)",
                ev,
            )

        # the rate over the known minutes is at least volume / whole window
        quiet = None if cond else _later(
            early, _quiet_until(w, v.bed.series, c.threshold_ml_kg_h * kg * c.window_h)
        )  # fmt: skip
        return Finding(cond, explain_mean, quiet_until=quiet)
    wins = hours_ending(v.bed.series, end, c.window_h)
    rates = [w.rate_ml_kg_h(kg) for w in wins]
    covered = all(w.covered for w in wins)
    cond = (
        early is None
        and covered
        and all(
            below(w.volume_ml, c.threshold_ml_kg_h * kg * max(w.known_min, 1) / 60) for w in wins
        )
    )

    def explain_hours() -> tuple[str, dict[str, Any]]:
        base = {"threshold_ml_kg_h": c.threshold_ml_kg_h, "mode": c.mode}
        ev = _weight_evidence(v) | base | {
            "windows": [w.to_json() for w in wins], "rates_ml_kg_h": [half_up(x, 3) for x in rates],
        }  # fmt: skip
        if early is not None:
            return f"monitored for {_monitored(v, end)} of the {c.window_h} h", ev
        if not covered:
            return "not every hour in the window is measured", ev
        return (  # words true whether the criterion holds or has ended
            f"highest hour {num(max(rates), 2)} mL/kg/h in the last {c.window_h} h "
            f"(alarm when every hour is below {c.threshold_ml_kg_h:g})",
            ev,
        )

    return Finding(cond, explain_hours, quiet_until=None if cond else early)


def volume_below(c: r.VolumeBelow, v: BedView) -> Finding:
    end = v.end
    if end is None:
        return NOT_YET
    length = c.window_h * 60
    early = _elapsed_quiet(v, end, length)
    w = measure(v.bed.series, end, length)
    scaled = w.volume_over_length()  # missing minutes are not counted as no urine

    def explain() -> tuple[str, dict[str, Any]]:
        ev = {"window": w.to_json(), "threshold_ml": c.threshold_ml,
              "volume_scaled_ml": half_up(scaled, 1)}  # fmt: skip
        if early is not None:
            return f"monitored for {_monitored(v, end)} of the {c.window_h} h", ev
        if not w.covered:
            return f"window only {pct(w.coverage)} measured", ev
        return (
            f"{_vol(scaled, c.threshold_ml)} mL in {c.window_h} h (alarm below {c.threshold_ml:g}; "
            f"{num(w.known_min / 60, 1)} h with data)",
            ev,
        )

    cond = early is None and w.covered and below(scaled, c.threshold_ml)
    quiet = None if cond else _later(early, _quiet_until(w, v.bed.series, c.threshold_ml))
    return Finding(cond, explain, quiet_until=quiet)


def flow_stopped(c: r.FlowStopped, v: BedView) -> Finding:
    """With a weight the flow before the stop is judged in mL/kg/h; without one in mL/h
    (a blocked catheter must not go unseen on a bed with no weight)."""
    end, kg = v.end, _weight(v)
    if end is None:
        return NOT_YET
    last = measure(v.bed.series, end, c.stopped_min)
    if above(last.volume_ml, c.max_ml) or last.measured_min < c.stopped_min:
        # the common case, O(1): flowing, or not all measured
        return Finding(
            False,
            lambda: ("urine is flowing", {"last": last.to_json()}),
            quiet_until=_quiet_until(last, v.bed.series, c.max_ml),
        )
    # the trailing run of measured minutes holding at most max_ml in all
    run = v.bed.series.trailing_quiet(end, c.max_ml, 1440)
    stop_end = end - run  # last minute before the stop
    before = measure(v.bed.series, stop_end, c.before_min)
    hours = max(before.known_min, 1) / 60
    if kg is not None:
        rate, unit, line = before.rate_ml_kg_h(kg), "mL/kg/h", c.before_min_ml_kg_h
        enough = not below(before.volume_ml, line * kg * hours)
    else:
        rate, unit, line = before.volume_ml / hours, "mL/h", c.before_min_ml_h
        enough = not below(before.volume_ml, line * hours)
    cond = run >= c.stopped_min and before.covered and enough
    return Finding(
        cond,
        lambda: (
            f"no urine flow for {run} min after {num(rate, 2 if kg else 0)} {unit} before: "
            "check the catheter (kinked, clamped or blocked?)",
            _weight_evidence(v) | {
                "stopped_min": run, "stopped_since": iso((stop_end + 1) * 60.0),
                "before": before.to_json(), "before_rate": half_up(rate, 3),
                "before_rate_unit": unit, "before_line": line,
                "threshold_stopped_min": c.stopped_min, "max_ml": c.max_ml,
            },
        ),
    )  # fmt: skip


def meter_silent(c: r.MeterSilent, v: BedView) -> Finding:
    silent: list[tuple[DeviceSeen, int]] = []
    due: float | None = None
    for d in v.devices:
        limit = max(c.min_silence_s, c.periods * d.period_s)
        if v.now - d.last_seen >= limit:
            silent.append((d, limit))
        else:
            t = d.last_seen + limit
            due = t if due is None else min(due, t)

    def explain() -> tuple[str, dict[str, Any]]:
        parts = []
        for d, _ in silent:
            minutes = num((v.now - d.last_seen) / 60)
            if d.sent_since:
                sent = sum(n for _, n in d.sent_since)
                why = ", ".join(f"{code} {n}" for code, n in d.sent_since)
                parts.append(f"meter {d.device_id}: no usable reading for {minutes} min "
                             f"(it sent {sent}: {why})")  # fmt: skip
            else:
                parts.append(f"meter {d.device_id}: no message for {minutes} min")
        facts = [
            {"device_id": d.device_id, "last_usable": iso(d.last_seen),
             "silent_s": round(v.now - d.last_seen), "limit_s": limit,
             "sent_since": dict(d.sent_since)}
            for d, limit in silent
        ]  # fmt: skip
        text = "; ".join(parts) if silent else "all meters reporting"
        return text, {"silent": facts}

    return Finding(bool(silent), explain, due=due)


def bag_full(c: r.BagFull, v: BedView) -> Finding:
    full = [d for d in v.devices if d.bag_ml is not None and d.capacity_ml
            and d.bag_ml >= c.fill_fraction * d.capacity_ml]  # fmt: skip

    def explain() -> tuple[str, dict[str, Any]]:
        what = ", ".join(
            f"meter {d.device_id} holds {_ml(d.bag_ml or 0.0)} of {_ml(d.capacity_ml or 0.0)}"
            for d in full
        )
        facts = [{"device_id": d.device_id, "bag_ml": d.bag_ml, "capacity_ml": d.capacity_ml}
                 for d in full]  # fmt: skip
        return (f"empty the bag: {what}" if full else "bags have room",
                {"full": facts, "fill_fraction": c.fill_fraction})  # fmt: skip

    quiet = None
    if not full and v.end is not None:  # a bag fills by at most its meter's plausible flow
        room = [(c.fill_fraction * (d.capacity_ml or 0.0) - (d.bag_ml or 0.0)) / d.max_ml_per_min
                for d in v.devices if d.capacity_ml and d.max_ml_per_min > 0]  # fmt: skip
        k = math.floor(min(room)) - 1 if room else QUIET_LIMIT_MIN
        quiet = v.end + min(k, QUIET_LIMIT_MIN) if k > 0 else None
    return Finding(bool(full), explain, quiet_until=quiet)


def no_usable_data(c: r.NoUsableData, v: BedView) -> Finding:
    last = v.bed.series.latest_time
    since = last if last is not None else v.bed.bound_at
    gap = v.now - since
    return Finding(
        gap >= c.max_gap_s,
        lambda: (
            f"no usable reading for {num(gap / 3600, 1)} h (limit {c.max_gap_s / 3600:g} h)",
            {"last_accepted": iso(since), "gap_s": round(gap), "max_gap_s": c.max_gap_s},
        ),
        due=None if gap >= c.max_gap_s else since + c.max_gap_s,
    )


def replacement_ratio(c: r.ReplacementRatio, v: BedView) -> Finding:
    end = v.end
    if end is None:
        return NOT_YET
    w = measure(v.bed.series, end, c.window_h * 60, v.bed.residual)
    lo, hi = window_bounds(end, c.window_h * 60)
    intake = v.bed.intake_between(lo * 60.0, hi * 60.0)
    judged = not below(w.volume_ml, c.min_output_ml)
    share = intake / w.volume_ml if judged else 0.0
    line = c.ratio * w.volume_ml  # intake at the line, compared to the tenth of a mL
    cond = judged and (below(intake, line) if c.direction == "below" else above(intake, line))

    def explain() -> tuple[str, dict[str, Any]]:
        ev = {"window": w.to_json(), "intake_ml": half_up(intake, 1), "ratio": c.ratio}
        if not judged:
            return "output too small to judge replacement", ev
        word = "below" if c.direction == "below" else "above"
        return (
            f"intake {_ml(intake)} = {_share(share, c.ratio)} of output {_ml(w.volume_ml)} in "
            f"{c.window_h} h (alarm {word} {pct(c.ratio)})",
            ev | {"intake_share": half_up(share, 3)},
        )

    return Finding(cond, explain)


def hypovolaemia(c: r.Hypovolaemia, v: BedView) -> Finding:
    end = v.end
    if end is None:
        return NOT_YET
    hour = measure(v.bed.series, end, 60, v.bed.residual)
    if not above(hour.volume_ml, c.hourly_above_ml):  # the common case: nothing else to look at
        # without vitals or documented intake no sign can be found, whatever the
        # output; either arrives as an input, which re-checks every rule
        signless = not v.bed.vitals and not (v.bed.intake_times and _weight(v) is not None)
        return Finding(
            False,
            lambda: (f"{_ml(hour.volume_ml)} in the last hour",
                     {"hour": hour.to_json(), "hourly_above_ml": c.hourly_above_ml}),
            quiet_until=FOREVER if signless
            else _quiet_below(v, hour.volume_ml, c.hourly_above_ml),
        )  # fmt: skip
    signs: list[str] = []
    # the evidence is put into words only when read (explain); these are its numbers now
    vit = v.bed.latest_vitals(v.now, c.vitals_max_age_s)
    due = si = mean = None
    if vit is not None:
        due = vit.time + c.vitals_max_age_s
        if vit.heart_rate is not None and vit.systolic is not None:
            si = shock_index(vit.heart_rate, vit.systolic)
            if si >= c.shock_index_at_least:
                signs.append(f"shock index {num(si, 2)}")
        mean = vit.mean
        if mean is None and vit.systolic is not None and vit.diastolic is not None:
            mean = mean_arterial_pressure(vit.systolic, vit.diastolic)
        if mean is not None and mean < c.map_below_mmhg:
            signs.append(f"MAP {num(mean)} mmHg")
        if vit.heart_rate is not None and vit.heart_rate > c.heart_rate_above:
            signs.append(f"heart rate {num(vit.heart_rate)}/min")
    balance_low = False
    kg = _weight(v)
    net = None
    if kg is not None and v.bed.intake_times:  # balance only when intake is documented
        w = measure(v.bed.series, end, c.balance_window_h * 60, v.bed.residual)
        lo, hi = window_bounds(end, c.balance_window_h * 60)
        net = v.bed.intake_between(lo * 60.0, hi * 60.0) - w.volume_ml
        balance_low = below(net, c.balance_below_ml_kg * kg)
    what = ", ".join(signs + (["negative fluid balance"] if balance_low else [])) or "no sign"

    def explain() -> tuple[str, dict[str, Any]]:
        ev: dict[str, Any] = {"hour": hour.to_json(), "hourly_above_ml": c.hourly_above_ml}
        if vit is not None:
            ev["vitals_time"] = iso(vit.time)
            if si is not None:
                ev["shock_index"] = half_up(si, 2)
            if mean is not None:
                ev["map_mmhg"] = half_up(mean, 1)
        if net is not None and kg is not None:
            ev |= {"net_balance_ml": half_up(net, 1), "balance_ml_kg": half_up(net / kg, 2)}
        # what to do is the title's; the signs come first, so a short pager keeps them
        signed = what if signs or balance_low else "no sign of hypovolaemia"  # or ending
        return (
            f"{signed}; {_ml(hour.volume_ml)} last hour",
            ev | {"signs": signs, "balance_low": balance_low, "what": what},
        )

    return Finding(
        bool(signs) or balance_low,
        explain,
        priority=c.priority_with_sign if signs else None,
        due=due,
    )


def _lab_series(v: BedView, analyte: str) -> tuple[list[tuple[float, float]], float | None]:
    """Results timed at or before now, and when the next later-timed one counts."""
    results = v.bed.labs.get(analyte, [])
    later = [t for t, _ in results if t > v.now]
    return [(t, x) for t, x in results if t <= v.now], min(later) if later else None


def _sooner(a: float | None, b: float | None) -> float | None:
    return b if a is None else a if b is None else min(a, b)


# How people read each analyte: its name, its short name and its unit.
LAB_WORDS: dict[str, tuple[str, str, str]] = {
    "serum_na_mmol_l": ("serum sodium", "Na", "mmol/L"),
    "serum_k_mmol_l": ("serum potassium", "K", "mmol/L"),
    "serum_mg_mmol_l": ("serum magnesium", "Mg", "mmol/L"),
    "serum_phosphate_mmol_l": ("serum phosphate", "phosphate", "mmol/L"),
    "serum_creatinine_umol_l": ("serum creatinine", "creatinine", "umol/L"),
}


def _lab_limit(c: r.LabAbove | r.LabBelow, v: BedView, above: bool) -> Finding:
    series, later = _lab_series(v, c.analyte)
    if not series:
        return Finding(False, _say("no result"), due=later)
    t, x = series[-1]
    fresh = v.now - t < c.max_age_s
    name, _, unit = LAB_WORDS[c.analyte]
    cond = fresh and (x > c.threshold if above else x < c.threshold)

    def explain() -> tuple[str, dict[str, Any]]:
        word = "above" if above else "below"
        age = num((v.now - t) / 3600, 1)
        # the age and the line in brackets: a short pager keeps the value and what to do
        text = f"{name} {x:g} {unit} at {v.clock(t)} ({age} h ago; alarm {word} {c.threshold:g})"
        ev: dict[str, Any] = {"analyte": c.analyte, "value": x, "time": iso(t),
                              "threshold": c.threshold}  # fmt: skip
        order = v.bed.context.replacement
        if isinstance(c, r.LabBelow) and c.review_hypotonic_order and order is not None \
                and v.hypotonic(order.fluid):  # fmt: skip
            text += "; hypotonic replacement order on file: physician to review it"
            ev["hypotonic_order_on_file"] = True
        return text, ev

    return Finding(cond, explain, due=_sooner(t + c.max_age_s if fresh else None, later))


def lab_above(c: r.LabAbove, v: BedView) -> Finding:
    return _lab_limit(c, v, above=True)


def lab_below(c: r.LabBelow, v: BedView) -> Finding:
    return _lab_limit(c, v, above=False)


def _lab_change(c: r.LabRise | r.LabFall, v: BedView, rising: bool) -> Finding:
    series, later = _lab_series(v, c.analyte)
    if len(series) < 2:
        return Finding(False, _say("fewer than two results"), due=later)
    t, x = series[-1]
    prior = [(tt, xx) for tt, xx in series[:-1] if tt >= t - c.window_h * 3600]
    if not prior:
        return Finding(False, _say("no earlier result in the window"), due=later)
    t0, x0 = (min if rising else max)(prior, key=lambda p: p[1])
    change = x - x0 if rising else x0 - x
    limit = c.rise_above if isinstance(c, r.LabRise) else c.fall_above
    name, _, unit = LAB_WORDS[c.analyte]
    word = "rose" if rising else "fell"
    return Finding(
        change > limit,
        lambda: (
            f"{name} {word} {num(change)} {unit} ({x0:g} -> {x:g}) in {num((t - t0) / 3600, 1)} h "
            f"(alarm above {limit:g} per {c.window_h} h)",
            {"from": x0, "from_time": iso(t0), "to": x, "to_time": iso(t), "change": change},
        ),
        due=later,
    )


def lab_rise(c: r.LabRise, v: BedView) -> Finding:
    return _lab_change(c, v, rising=True)


def lab_fall(c: r.LabFall, v: BedView) -> Finding:
    return _lab_change(c, v, rising=False)


def reminder(c: r.Reminder, v: BedView) -> Finding:
    """Each analyte is due `every_s` after its latest result, or after the gate opened."""
    gate_start = min(v.gates.values())
    due_at: dict[str, float] = {}
    last: dict[str, float | None] = {}
    for analyte in c.analytes:
        res = v.bed.latest_lab(analyte, v.now)
        last[analyte] = res[0] if res is not None else None
        since = gate_start if res is None else max(gate_start, res[0])
        due_at[analyte] = since + c.every_s
    overdue = [a for a in c.analytes if v.now >= due_at[a]]
    waiting = [t for a, t in due_at.items() if t > v.now]

    def explain() -> tuple[str, dict[str, Any]]:
        facts = {"due": overdue, "every_s": c.every_s,
                 "last": {a: None if t is None else iso(t) for a, t in last.items()}}  # fmt: skip
        if not overdue:  # the words of a resolved reminder: nothing is due any more
            return f"{c.task}: every result is up to date", facts
        names = ", ".join(LAB_WORDS[a][1] for a in overdue)
        latest = "; ".join(
            f"{LAB_WORDS[a][1]} {'never' if last[a] is None else v.clock(last[a] or 0.0)}"
            for a in overdue
        )
        return f"{c.task}: due {names} (last: {latest})", facts

    return Finding(bool(overdue), explain, due=min(waiting) if waiting else None)


def episode_armed(gate: r.EpisodeGate, v: BedView) -> tuple[bool, float | None]:
    """Whether a rule gated on episode markers runs now, and when that next changes."""
    near = False
    change: float | None = None
    span = gate.within_h * 3600.0
    for marker in gate.markers:
        for t in v.bed.markers.get(marker, ()):
            if t <= v.now < t + span:
                near = True
            for edge in (t, t + span):
                if edge > v.now and (change is None or edge < change):
                    change = edge
    return near == (gate.armed == "with_marker"), change


CHECKS: dict[type, Callable[[Any, BedView], Finding]] = {
    r.HourlyAbove: hourly_above,
    r.VolumeAbove: volume_above,
    r.RateBelow: rate_below,
    r.VolumeBelow: volume_below,
    r.FlowStopped: flow_stopped,
    r.MeterSilent: meter_silent,
    r.BagFull: bag_full,
    r.NoUsableData: no_usable_data,
    r.ReplacementRatio: replacement_ratio,
    r.Hypovolaemia: hypovolaemia,
    r.LabAbove: lab_above,
    r.LabBelow: lab_below,
    r.LabRise: lab_rise,
    r.LabFall: lab_fall,
    r.Reminder: reminder,
}


# Checks that read no urine output: a meter reading can only end their condition
# (it breaks a silence), and each declares when time alone may change its answer.
OUTPUT_BLIND: frozenset[type] = frozenset(
    {r.MeterSilent, r.NoUsableData, r.LabAbove, r.LabBelow, r.LabRise, r.LabFall, r.Reminder}
)
# bag_full reads the meters' levels: a reading moves them by at most the meter's plausible
# flow a minute (beyond it, a confirmed jump or a bag change re-checks every rule)


# Checks that read neither the output nor the meters: only an input (which re-checks
# every rule) or time, at the wake-up each declares, can change their answer.
INPUT_ONLY: frozenset[type] = frozenset((r.LabAbove, r.LabBelow, r.LabRise, r.LabFall))


def evaluate(rule: r.RuleDef, view: BedView) -> Finding:
    return CHECKS[type(rule.check)](rule.check, view)


__all__ = ["BedView", "DeviceSeen", "Finding", "Window", "evaluate"]
