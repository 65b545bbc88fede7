"""The windows a rule looked at, recomputed from a bed's minute series at one moment.

Window edges come from the engine's one definition (`windows.measure`); on top of
the alarm evidence this adds the minute-level picture a reviewer needs: how many
minutes were measured, estimated or unknown, where the unmeasured runs were, and
the threshold each window was held against.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from ..engine import rules as r
from ..engine.bedstate import BedState
from ..engine.numbers import half_up, ml, num, pct
from ..engine.series import ESTIMATED, MEASURED, UNKNOWN
from ..engine.timefmt import iso
from ..engine.windows import (
    COVERED_FRACTION,
    Window,
    above,
    below,
    hours_ending,
    measure,
    window_bounds,
)

STATE_NAMES = {UNKNOWN: "unknown", ESTIMATED: "estimated", MEASURED: "measured"}


@dataclass(frozen=True, slots=True)
class WindowFact:
    label: str
    key: str  # where the alarm's evidence holds the same window, e.g. "windows[1]"
    window: Window
    threshold: dict[str, Any]  # the numbers the window is held against, and how
    meets: bool  # this window satisfies its part of the condition
    minute_volume_ml: float  # the same volume summed minute by minute (a cross-check)
    unmeasured_runs: list[dict[str, Any]]  # runs of estimated / unknown minutes

    @property
    def unknown_min(self) -> int:
        w = self.window
        return w.length_min - w.measured_min - w.estimated_min

    @property
    def span(self) -> tuple[float, float]:
        """(from, to] in epoch seconds."""
        lo, hi = window_bounds(self.window.end_minute, self.window.length_min)
        return lo * 60.0, hi * 60.0

    def to_json(self) -> dict[str, Any]:
        w = self.window
        return {
            "label": self.label,
            "evidence_key": self.key,
            **w.to_json(),
            "measured_min": w.measured_min,
            "estimated_min": w.estimated_min,
            "unknown_min": self.unknown_min,
            "covered": w.covered,
            "minute_volume_ml": half_up(self.minute_volume_ml, 1),
            "threshold": self.threshold,
            "meets_condition": self.meets,
            "unmeasured_runs": self.unmeasured_runs,
        }


def _runs(bed: BedState, w: Window) -> tuple[float, list[dict[str, Any]]]:
    lo, hi = window_bounds(w.end_minute, w.length_min)
    vol, st = bed.series.minutes(lo, hi)
    runs: list[dict[str, Any]] = []
    if st.size:
        edges = np.flatnonzero(np.diff(st.astype(np.int16))) + 1
        starts = np.concatenate([[0], edges])
        ends = np.concatenate([edges, [st.size]])
        for a, b in zip(starts.tolist(), ends.tolist(), strict=True):
            if st[a] != MEASURED:
                runs.append(
                    {
                        "from": iso((lo + a) * 60.0),
                        "to": iso((lo + b) * 60.0),
                        "minutes": b - a,
                        "state": STATE_NAMES[int(st[a])],
                    }
                )
    return float(vol.sum()), runs


def _fact(
    bed: BedState, label: str, key: str, w: Window, thr: dict[str, Any], meets: bool
) -> WindowFact:
    total, runs = _runs(bed, w)
    return WindowFact(label, key, w, thr, meets, total, runs)


def _rate_below(w: Window, ml_per_h: float) -> bool:
    """The check's own comparison: the window's volume against the line over the minutes
    with data, to the tenth of a mL."""
    return below(w.volume_ml, ml_per_h * max(w.known_min, 1) / 60)


def windows_at(rule: r.RuleDef, bed: BedState) -> list[WindowFact]:
    """The windows `rule` evaluates on `bed` as the series stands now (empty for
    rules that look at no window: meters, labs, reminders)."""
    c = rule.check
    series = bed.series
    end = series.latest_minute()
    if end is None:
        return []
    kg = bed.context.weight_kg
    covered = {"coverage_at_least": COVERED_FRACTION}
    if isinstance(c, r.HourlyAbove):
        sign = ">" if c.comparator == "gt" else ">="
        thr = {"volume_ml": c.threshold_ml_h, "comparator": sign}
        wins = hours_ending(series, end, c.consecutive_hours, bed.residual)
        n = len(wins)
        return [
            _fact(
                bed,
                f"hour {i + 1} of {n}",
                f"windows[{i}]",
                w,
                thr,
                above(w.volume_ml, c.threshold_ml_h, c.comparator == "gt"),
            )
            for i, w in enumerate(wins)
        ]
    if isinstance(c, r.VolumeAbove):
        length = c.window_h * 60
        first = series.first_minute
        if c.since_start_if_shorter and first is not None:
            length = min(length, end - first + 1)
        w = measure(series, end, length, bed.residual)
        thr = {"volume_ml": c.threshold_ml, "comparator": ">"}
        return [
            _fact(
                bed,
                f"last {num(length / 60, 1)} h",
                "window",
                w,
                thr,
                above(w.volume_ml, c.threshold_ml),
            )
        ]
    if isinstance(c, r.RateBelow):
        if kg is None:
            return []
        if c.mode == "mean":
            w = measure(series, end, c.window_h * 60)
            thr = covered | {
                "rate_ml_kg_h": c.threshold_ml_kg_h,
                "comparator": "<",
                "weight_kg": kg,
                "volume_ml": half_up(c.threshold_ml_kg_h * kg * c.window_h, 1),
            }
            meets = w.covered and _rate_below(w, c.threshold_ml_kg_h * kg)
            return [_fact(bed, f"last {c.window_h} h (mean)", "window", w, thr, meets)]
        thr = covered | {
            "rate_ml_kg_h": c.threshold_ml_kg_h,
            "comparator": "<",
            "weight_kg": kg,
            "volume_ml": half_up(c.threshold_ml_kg_h * kg, 1),
        }
        wins = hours_ending(series, end, c.window_h)
        return [
            _fact(
                bed,
                f"hour {i + 1} of {len(wins)}",
                f"windows[{i}]",
                w,
                thr,
                w.covered and _rate_below(w, c.threshold_ml_kg_h * kg),
            )
            for i, w in enumerate(wins)
        ]
    if isinstance(c, r.VolumeBelow):
        w = measure(series, end, c.window_h * 60)
        thr = covered | {"volume_ml": c.threshold_ml, "comparator": "<", "scaled_to_window": True}
        meets = w.covered and below(w.volume_over_length(), c.threshold_ml)
        return [_fact(bed, f"last {c.window_h} h", "window", w, thr, meets)]
    if isinstance(c, r.FlowStopped):
        run = series.trailing_quiet(end, c.max_ml, 1440)
        if kg is not None:  # the flow before the stop: mL/kg/h with a weight, else mL/h
            per_hour = c.before_min_ml_kg_h * kg
            before_line = {"rate_ml_kg_h": c.before_min_ml_kg_h, "comparator": ">=",
                           "weight_kg": kg}  # fmt: skip
        else:
            per_hour = c.before_min_ml_h
            before_line = {"rate_ml_h": c.before_min_ml_h, "comparator": ">="}
        quiet = measure(series, end, max(run, 1))
        before = measure(series, end - run, c.before_min)
        facts = [
            _fact(
                bed,
                f"no flow ({run} min)",
                "stopped_min",
                quiet,
                {"volume_ml": c.max_ml, "comparator": "<=", "minutes_at_least": c.stopped_min},
                run >= c.stopped_min,
            ),
            _fact(
                bed,
                f"{c.before_min} min before the stop",
                "before",
                before,
                covered | before_line,
                before.covered and not _rate_below(before, per_hour),
            ),
        ]
        return facts
    if isinstance(c, r.ReplacementRatio):
        w = measure(series, end, c.window_h * 60, bed.residual)
        lo, hi = window_bounds(end, c.window_h * 60)
        intake = bed.intake_between(lo * 60.0, hi * 60.0)
        judged = not below(w.volume_ml, c.min_output_ml)
        word = "<" if c.direction == "below" else ">"
        line = c.ratio * w.volume_ml
        meets = judged and (below(intake, line) if c.direction == "below" else above(intake, line))
        thr = {
            "intake_share": c.ratio,
            "comparator": word,
            "intake_ml": half_up(intake, 1),
            "min_output_ml": c.min_output_ml,
        }
        return [_fact(bed, f"last {c.window_h} h", "window", w, thr, meets)]
    if isinstance(c, r.Hypovolaemia):
        w = measure(series, end, 60, bed.residual)
        thr = {"volume_ml": c.hourly_above_ml, "comparator": ">"}
        return [_fact(bed, "last hour", "hour", w, thr, above(w.volume_ml, c.hourly_above_ml))]
    return []


def residual_drains(bed: BedState) -> list[dict[str, Any]]:
    """The bladder's retained content drained after each relief: its span and volume
    (left out of the high-output criteria and the advice)."""
    out = []
    for lo, hi in bed.residual:
        s = bed.series.sums(lo, hi)
        out.append({"from": iso(lo * 60.0), "to": iso(hi * 60.0),
                    "volume_ml": half_up(s.volume_ml, 1)})  # fmt: skip
    return out


def lookup(evidence: dict[str, Any], key: str) -> Any:
    """evidence["windows"][1] for key "windows[1]"; None when absent."""
    name, _, rest = key.partition("[")
    value = evidence.get(name)
    if rest and isinstance(value, list):
        i = int(rest.rstrip("]"))
        return value[i] if i < len(value) else None
    return value


def compare(facts: list[WindowFact], evidence: dict[str, Any]) -> list[dict[str, Any]]:
    """Each recomputed window beside the alarm event's own numbers."""
    out: list[dict[str, Any]] = []
    for f in facts:
        theirs = lookup(evidence, f.key)
        if f.key == "stopped_min":
            ours: Any = f.window.length_min  # the quiet run, in minutes
        else:
            ours = f.window.to_json()
        out.append(
            {"evidence_key": f.key, "event": theirs, "recomputed": ours, "equal": theirs == ours}
        )
    return out


def threshold_words(t: dict[str, Any]) -> str:
    """What a window is held against, in words (explain's text and the board's bed page)."""
    parts = []
    if "rate_ml_kg_h" in t:
        parts.append(f"{t['comparator']} {num(t['rate_ml_kg_h'], 2)} mL/kg/h at "
                     f"{num(t['weight_kg'], 1)} kg")  # fmt: skip
        if "volume_ml" in t:
            parts.append(f"(= {num(t['volume_ml'], 1)} mL)")
    elif "intake_share" in t:
        parts.append(f"intake {ml(t['intake_ml'])}; alarm when intake {t['comparator']} "
                     f"{pct(t['intake_share'])} of output (output >= "
                     f"{ml(t['min_output_ml'])})")  # fmt: skip
    elif "volume_ml" in t:
        parts.append(f"{t['comparator']} {ml(t['volume_ml'])}")
    if "minutes_at_least" in t:
        parts.append(f"for at least {t['minutes_at_least']} min")
    if "coverage_at_least" in t:
        parts.append(f"with at least {pct(t['coverage_at_least'])} measured")
    return " ".join(parts)
