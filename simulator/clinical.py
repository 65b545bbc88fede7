"""A simulated patient: urine output over time, and the clinical streams around it
(bed context, documented fluid intake, vital signs, serum sodium).

Everything here is invented for simulation and demos; the shapes are chosen to be
plausible against CLINICAL-REFERENCE.md (normal 0.5-1 mL/kg/h; post-obstructive
diuresis of several hundred up to ~2,000 mL/h; KDIGO urine-output stages), never
taken from a patient.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from daemon.engine.advice import FLUIDS, delta_na_from_infusate, delta_na_from_loss

from .scenario import Bed, Blocked, Level, Normal, Oliguria, Pod
from .wire import Clock, Message, Payload, iso_ms

HOUR_S = 3600.0
MAX_ML_H = 2400.0  # the simulator never makes more than this (severe diuresis ~2,000 mL/h)
Floats = npt.NDArray[np.float64]


@dataclass
class Plan:
    """One bed's simulated truth, per minute from the run's start."""

    start: float  # epoch seconds of minute 0
    kidney_ml_min: Floats  # urine made by the kidneys
    to_bag_ml_min: Floats  # urine reaching the meter (a blocked catheter holds it back)
    baseline_ml_h: float
    episodes: list[tuple[float, str]] = field(default_factory=list)  # (epoch s, kind)
    intake_ml_min: Floats | None = None  # documented intake, booked at its minute

    def hourly_to_bag(self, t0: float, t1: float) -> float:
        """Urine that reached the bag in [t0, t1) (whole minutes)."""
        lo = max(0, math.floor((t0 - self.start) / 60))
        hi = min(self.to_bag_ml_min.size, math.floor((t1 - self.start) / 60))
        return float(self.to_bag_ml_min[lo:hi].sum()) if hi > lo else 0.0


def _levels(bed: Bed, minutes: int) -> Floats:
    """The underlying output rate (mL/h) set by normal / level / oliguria events."""
    base = bed.weight_kg * bed.baseline_ml_kg_h
    level = np.full(minutes, base)
    m = np.arange(minutes, dtype=np.float64)
    for ev in bed.timeline:
        if isinstance(ev, Normal):
            target = base
        elif isinstance(ev, Level):
            target = ev.ml_h if ev.ml_h is not None else (ev.ml_kg_h or 0.0) * bed.weight_kg
        elif isinstance(ev, Oliguria):
            target = ev.ml_kg_h * bed.weight_kg
        else:
            continue
        i0 = min(round(ev.at_h * 60), minutes)
        if i0 >= minutes:
            continue
        now = level[i0]
        ramp = max(ev.ramp_h * 60.0, 1.0)
        share = np.clip((m[i0:] - i0) / ramp, 0.0, 1.0)
        level[i0:] = now + (target - now) * share
    return level


def _variation(start: float, minutes: int, depth: float, rng: np.random.Generator) -> Floats:
    """Slow variation around 1: a day/night swing (lower at night) and two slow waves
    with random phases, so no two beds look alike."""
    m = np.arange(minutes, dtype=np.float64)
    hour_of_day = ((start / 60.0 + m) / 60.0) % 24.0
    swing = 1.0 + 0.1 * np.cos(2 * np.pi * (hour_of_day - 15.0) / 24.0)
    a, b = rng.uniform(0, 2 * np.pi, 2)
    waves = 0.6 * np.sin(2 * np.pi * m / 97.0 + a) + 0.4 * np.sin(2 * np.pi * m / 311.0 + b)
    out: Floats = swing * (1.0 + depth * waves)
    return out


def _pod_curve(ev: Pod, minutes: int) -> Floats:
    """Rise within the hour to the peak, then halving every half-life towards 0
    (physiological) or towards the persisting plateau (pathological)."""
    m = np.arange(minutes, dtype=np.float64) - ev.at_h * 60.0
    floor = ev.plateau_ml_h or 0.0
    rising = ev.peak_ml_h * np.clip(m / ev.rise_min, 0.0, 1.0)
    after = np.maximum(m - ev.rise_min, 0.0)
    decay = floor + (ev.peak_ml_h - floor) * np.power(0.5, after / (ev.half_life_h * 60.0))
    curve: Floats = np.where(m < 0, 0.0, np.where(m < ev.rise_min, rising, decay))
    return curve


def plan_output(bed: Bed, start: float, minutes: int, rng: np.random.Generator) -> Plan:
    kidney = _levels(bed, minutes) * _variation(start, minutes, bed.wobble, rng)
    episodes: list[tuple[float, str]] = []
    for ev in bed.timeline:
        if isinstance(ev, Pod):
            curve = _pod_curve(ev, minutes) * _variation(start, minutes, 0.05, rng)
            kidney = np.maximum(kidney, curve)
            if ev.episode:
                episodes.append((start + ev.at_h * HOUR_S, "obstruction_relieved"))
    kidney = np.clip(kidney, 0.0, MAX_ML_H) / 60.0  # mL/h -> mL per minute
    to_bag = kidney.copy()
    for ev in bed.timeline:  # the retained content drains first: in the bag, not the kidneys'
        if isinstance(ev, Pod) and ev.residual_ml > 0:
            i0 = min(round(ev.at_h * 60), minutes)
            n = max(1, round(ev.residual_min))
            if i0 < minutes:
                to_bag[i0 : i0 + n] += ev.residual_ml / min(n, minutes - i0)
    for ev in bed.timeline:
        if isinstance(ev, Blocked):
            i0 = min(round(ev.at_h * 60), minutes)
            i1 = min(round((ev.at_h + ev.for_h) * 60), minutes)
            held = float(to_bag[i0:i1].sum())
            to_bag[i0:i1] = 0.0
            n = max(1, round(ev.bolus_min))
            if i1 < minutes:
                to_bag[i1 : i1 + n] += held / min(n, minutes - i1)
                if ev.episode:
                    episodes.append((start + i1 * 60.0, "catheter_changed"))
    base = bed.weight_kg * bed.baseline_ml_kg_h
    return Plan(start, kidney, to_bag, base, sorted(episodes))


# --- bed context ------------------------------------------------------------------------


def context_messages(
    bed: Bed, ward: str, plan: Plan, hours: float, prefix: str, order_s: float
) -> list[Message]:
    """The retained context at the start (before any meter speaks), and again whenever
    the set of meters on the bed changes or an episode marker is added."""
    if not bed.context.publish:
        return []
    topic = f"{prefix}/beds/{bed.bed}/context"
    t0, end = plan.start, plan.start + hours * HOUR_S
    changes = {t0 - 60.0 + order_s}
    changes |= {t for t, _ in plan.episodes if t0 < t < end}
    order = bed.context.order
    if order is not None and 0 < order.at_h < hours:
        changes.add(t0 + order.at_h * HOUR_S)
    for m in bed.meters:
        for h in (m.from_h, m.until_h):
            if h is not None and 0 < h < hours:
                changes.add(t0 + h * HOUR_S)
    out: list[Message] = []
    for t in sorted(changes):
        h = (t - t0) / HOUR_S
        devices = [
            m.device_id
            for m in bed.meters
            if m.from_h <= max(h, 0.0) and (m.until_h is None or max(h, 0.0) < m.until_h)
        ]
        episodes = [(at, kind) for at, kind in plan.episodes if at <= t]
        ordered = order is not None and t0 + order.at_h * HOUR_S <= t
        order_t = t0 + order.at_h * HOUR_S if order is not None and ordered else None
        out.append(Message(t, topic, _context_render(bed, ward, devices, episodes, order_t),
                           retain=True))  # fmt: skip
    return out


def _context_render(
    bed: Bed, ward: str, devices: list[str], episodes: list[tuple[float, str]],
    order_t: float | None,
) -> Any:  # fmt: skip
    def render(clock: Clock) -> Payload:
        body: dict[str, Any] = {"schema": 1, "ward": ward, "device_ids": devices}
        if bed.context.weight:
            body |= {"weight_kg": bed.weight_kg, "weight_basis": bed.weight_basis}
        if bed.context.disabled_rules:
            body["disabled_rules"] = list(bed.context.disabled_rules)
        order = bed.context.order
        if order is not None and order_t is not None:
            body["replacement"] = order.as_order(clock(order_t)).model_dump(mode="json")
        body["tbw_fraction"] = bed.tbw_fraction
        if episodes:
            body["episodes"] = [{"kind": k, "at": iso_ms(clock(at))} for at, k in episodes]
        return body

    return render


# --- fluid intake -----------------------------------------------------------------------


def intake_messages(
    bed: Bed, plan: Plan, hours: float, prefix: str, rng: np.random.Generator
) -> list[Message]:
    """Replacement by infusion, its rate reset at each clock hour from what the meter
    showed, documented every `every_min`. Books each volume into
    `plan.intake_ml_min` for the vitals and sodium models."""
    spec = bed.intake
    minutes = plan.to_bag_ml_min.size
    booked = np.zeros(minutes)
    plan.intake_ml_min = booked
    if spec is None:
        return []
    topic = f"{prefix}/beds/{bed.bed}/intake"
    t0, end = plan.start, plan.start + hours * HOUR_S
    step = spec.every_min * 60.0
    begin = t0 + spec.from_h * HOUR_S
    stop = end if spec.until_h is None else min(end, t0 + spec.until_h * HOUR_S)
    lag = spec.lag_h * HOUR_S

    def rate_at(t: float) -> float:  # mL/h set at the last clock hour at or before t
        h = math.floor(t / HOUR_S) * HOUR_S
        replace = spec.fraction * plan.hourly_to_bag(h - HOUR_S - lag, h - lag)
        if spec.max_ml_h is not None:
            replace = min(replace, spec.max_ml_h)
        return replace + spec.maintenance_ml_h

    out: list[Message] = []
    t = math.ceil(begin / step) * step  # period ends on the clock: hh:00, hh:15, ...
    while t + step <= stop:
        t += step
        volume = round(rate_at(t - step) * step / HOUR_S)
        if volume >= 1:
            booked[min(minutes - 1, int((t - t0) // 60))] += volume
            out.append(Message(t + rng.uniform(2.0, 90.0), topic, _intake_render(t, volume, spec)))
    return out


def _intake_render(t: float, volume: float, spec: Any) -> Any:
    def render(clock: Clock) -> Payload:
        return {"schema": 1, "time": iso_ms(clock(t)), "volume_ml": volume,
                "fluid": spec.fluid, "route": spec.route}  # fmt: skip

    return render


def deficit_ml(plan: Plan) -> Floats:
    """Unreplaced loss (mL) at the end of each minute: output above the patient's
    baseline, less the documented intake. Below zero means nothing to the models."""
    intake = plan.intake_ml_min if plan.intake_ml_min is not None else 0.0
    excess = plan.kidney_ml_min - plan.baseline_ml_h / 60.0
    out: Floats = np.cumsum(excess - intake)
    return out


# --- vital signs ------------------------------------------------------------------------


def vitals_messages(
    bed: Bed, plan: Plan, hours: float, prefix: str, rng: np.random.Generator
) -> list[Message]:
    spec = bed.vitals
    if spec is None:
        return []
    topic = f"{prefix}/beds/{bed.bed}/vitals"
    deficit = deficit_ml(plan)
    out: list[Message] = []
    step = spec.every_min * 60.0
    t = plan.start + step
    end = plan.start + hours * HOUR_S
    while t < end:
        i = min(deficit.size - 1, int((t - plan.start) // 60))
        behind = max(0.0, float(deficit[i])) / bed.weight_kg  # mL/kg
        d0 = spec.saturation_ml_kg
        d = d0 * (1.0 - math.exp(-behind / d0))
        hr = spec.heart_rate + spec.hr_per_ml_kg * d + rng.normal(0.0, 1.5)
        sbp = spec.systolic - spec.sbp_per_ml_kg * d + rng.normal(0.0, 2.5)
        dbp = spec.diastolic - 0.6 * spec.sbp_per_ml_kg * d + rng.normal(0.0, 2.0)
        hr = float(np.clip(hr, 30, 220))
        sbp = float(np.clip(sbp, 50, 250))
        dbp = float(np.clip(dbp, 20, sbp - 15))
        values = {"heart_rate_bpm": round(hr), "systolic_mmhg": round(sbp),
                  "diastolic_mmhg": round(dbp)}  # fmt: skip
        out.append(Message(t + rng.uniform(2.0, 30.0), topic, _timed(t, values)))
        t += step
    return out


def _timed(t: float, values: dict[str, Any]) -> Any:
    def render(clock: Clock) -> Payload:
        return {"schema": 1, "time": iso_ms(clock(t))} | values

    return render


# --- serum sodium -----------------------------------------------------------------------


def sodium_course(bed: Bed, plan: Plan) -> Floats:
    """Serum Na (mmol/L) at the start of each hour, stepped one hour at a time with
    the Adrogué-Madias single-litre formulas (CLINICAL-REFERENCE §5): a litre of
    urine with Na+K u changes serum Na by (Na - u)/(TBW - 1); a litre of infusate
    with Na+K f by (f - Na)/(TBW + 1). Only output above the baseline counts as a
    loss (the baseline is matched by the patient's ordinary intake)."""
    assert bed.labs is not None
    labs = bed.labs
    tbw = bed.tbw_fraction * bed.weight_kg
    fluid = FLUIDS[bed.intake.fluid] if bed.intake is not None else None
    intake = plan.intake_ml_min if plan.intake_ml_min is not None else np.zeros(1)
    hours = math.ceil(plan.kidney_ml_min.size / 60) + 1
    na = np.empty(hours)
    na[0] = labs.serum_na
    for h in range(1, hours):
        sl = slice((h - 1) * 60, h * 60)
        lost_l = max(0.0, float(plan.kidney_ml_min[sl].sum()) - plan.baseline_ml_h) / 1000.0
        given_l = float(intake[sl].sum()) / 1000.0 if intake.size > 1 else 0.0
        prev = na[h - 1]
        # the engine's own formulas, so the simulated course and the advice agree
        change = delta_na_from_loss(prev, tbw, labs.urine_na, labs.urine_k, lost_l)
        if fluid is not None and given_l > 0:
            change += delta_na_from_infusate(prev, tbw, fluid, given_l)
        na[h] = prev + change
    return na


def labs_messages(
    bed: Bed, plan: Plan, hours: float, prefix: str, rng: np.random.Generator
) -> list[Message]:
    spec = bed.labs
    if spec is None:
        return []
    topic = f"{prefix}/beds/{bed.bed}/labs"
    course = sodium_course(bed, plan)
    out: list[Message] = []
    h = spec.first_h
    while h < hours:
        na = float(np.interp(h, np.arange(course.size), course)) + rng.normal(0.0, 0.4)
        values: dict[str, Any] = {"serum_na_mmol_l": round(float(np.clip(na, 100, 200)))}
        if spec.serum_k is not None:
            values["serum_k_mmol_l"] = round(spec.serum_k + rng.normal(0.0, 0.1), 1)
        if spec.serum_mg is not None:
            values["serum_mg_mmol_l"] = round(spec.serum_mg + rng.normal(0.0, 0.03), 2)
        if spec.serum_phosphate is not None:
            values["serum_phosphate_mmol_l"] = round(spec.serum_phosphate
                                                     + rng.normal(0.0, 0.04), 2)  # fmt: skip
        if spec.serum_creatinine is not None:
            values["serum_creatinine_umol_l"] = round(spec.serum_creatinine
                                                      + rng.normal(0.0, 3.0))  # fmt: skip
        if spec.report_urine:
            values["urine_na_mmol_l"] = spec.urine_na
            values["urine_k_mmol_l"] = spec.urine_k
        t = plan.start + h * HOUR_S
        recv = t + spec.turnaround_min * 60.0 + rng.uniform(0.0, 300.0)
        out.append(Message(recv, topic, _timed(t, values)))
        h += spec.every_h
    return out
