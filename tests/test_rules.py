"""Each default rule against its criterion, through the Engine.

A bed is bound with a weight on its context topic; an invented reference-cumulative
meter sends one reading a minute (tests/ruletools.py), so the volume in every minute is
known exactly; the alarm events the engine emits are read back. The worked examples
E1-E4 and E7 of CLINICAL-REFERENCE.md are the test vectors.

Windows are rolling (DESIGN §3: "hourly output" is the rolling 60-minute volume), so a
vector stated in clock hours is first met at the minute where the rolling windows cross;
that minute is computed here with numpy from the true minute volumes, and the engine
must raise the alarm within one reading period (60 s) of it.

All beds, meters and people here are invented; no patient data.
"""

from __future__ import annotations

import numpy as np
import pytest

from daemon.engine.advice import CAUTION
from daemon.engine.alarms import Priority, State
from daemon.engine.timefmt import iso
from simulator.encode import encode
from tests.ruletools import (
    HOUR,
    M0,
    MIN,
    PERIOD,
    PROFILES,
    T0,
    Bed,
    Ward,
    at,
    first_true,
    minute_done,
    per_minute,
    rolling,
    rule,
    ruleset,
)

LOW_OUTPUT = ("oliguria-kdigo-1", "oliguria-kdigo-2", "oliguria-kdigo-3", "anuria-12h")


def started(weight_kg: float | None = 70.0, offset_s: float = 0.0, **kw: object) -> Bed:
    """A bed bound on a fresh ward engine, its meter's baseline reading sent."""
    bed = Bed(Ward(**kw), weight_kg=weight_kg)  # type: ignore[arg-type]
    bed.bind()
    bed.start(T0 + offset_s)
    return bed


def test_the_helpers_build_exact_minutes() -> None:
    """Guard for the helpers: each minute holds exactly its hour's share, measured."""
    bed = started(70.0)
    bed.hours([60.0, 120.0])
    vol, state = bed.ward.engine.beds["b01"].series.minutes(M0, M0 + 120)
    assert vol.tolist() == pytest.approx([1.0] * 60 + [2.0] * 60)
    assert set(state.tolist()) == {2}  # all measured


# --- KDIGO urine-output criteria (KDIGO 2012 AKI guideline, Table 2) -------------------


def test_e1_kdigo_stage_1() -> None:
    """E1: 70 kg at 28 mL/h = 0.40 mL/kg/h for 7 h is stage 1 (< 0.5 mL/kg/h for 6 h)."""
    # source: KDIGO 2012 AKI guideline, Table 2; worked example E1 (CLINICAL-REFERENCE.md)
    bed = started(70.0)
    bed.hours([28.0] * 7)
    w = bed.ward
    ev = w.first("oliguria-kdigo-1")
    assert ev is not None
    # KDIGO's "for 6 h" needs 6 h since the first reading (DESIGN §3), not just a window
    # 90% measured: not at 05:24, at 06:00.
    assert ev.time == at(6)
    assert ev.priority is Priority.LOW
    assert ev.evidence["rate_ml_kg_h"] < 0.5  # source: KDIGO 2012, Table 2
    assert ev.evidence["weight_kg"] == 70.0 and ev.evidence["weight_basis"] == "actual"
    assert w.first("oliguria-kdigo-1", State.RESOLVED) is None  # still oliguric at 7 h
    assert not {"oliguria-kdigo-2", "oliguria-kdigo-3", "anuria-12h"} & w.fired()


def test_e1_is_not_judged_before_6_hours() -> None:
    """28 mL/h (0.40 mL/kg/h at 70 kg) for 5 h 59 min raises nothing: KDIGO stage 1 is
    < 0.5 mL/kg/h FOR 6 h (KDIGO 2012 AKI guideline, Table 2)."""
    bed = started(70.0)
    bed.minutes(per_minute([28.0] * 6)[:359])
    assert "oliguria-kdigo-1" not in bed.ward.fired()
    bed.minutes(per_minute([28.0])[:1])
    assert "oliguria-kdigo-1" in bed.ward.fired()


def test_a_gap_inside_the_window_is_forgiven_but_not_time_before_monitoring() -> None:
    """The 90% rule forgives 30 missing minutes inside 6 h; it never counts the time
    before the first reading (DESIGN §3; KDIGO 2012, Table 2: < 0.5 mL/kg/h for 6 h)."""
    bed = started(70.0)
    bed.hours([28.0] * 2)
    assert bed.t is not None
    # silent for 35 min (longer than the 30-min interpolation gap: estimated minutes),
    # then it catches up: 325 of 360 minutes measured, 90.3% (DESIGN §3)
    bed.level += 28.0 * 35 / 60
    bed.reading(bed.t + 35 * MIN, bed.level)
    bed.hours([28.0] * 4)
    ev = bed.ward.first("oliguria-kdigo-1")
    assert ev is not None and ev.time == at(6)
    assert ev.evidence["window"]["coverage"] == pytest.approx(325 / 360, abs=0.001)


def e2_ward(mode: str) -> Bed:
    bed = started(70.0, rules=ruleset(rule("oliguria-kdigo-1", mode=mode)))
    bed.hours([60.0, 20.0, 20.0, 20.0, 20.0, 20.0])  # source: worked example E2
    return bed


def test_e2_mean_mode_gives_stage_1() -> None:
    """E2: 70 kg, hourly [60, 20, 20, 20, 20, 20] = 160 mL in 6 h, mean 0.381 mL/kg/h."""
    # source: KDIGO 2012, Table 2 (< 0.5 mL/kg/h for 6 h); worked example E2
    bed = e2_ward("mean")
    ev = bed.ward.first("oliguria-kdigo-1")
    assert ev is not None and ev.time <= at(6)
    assert ev.evidence["mode"] == "mean"


def test_e2_every_hour_mode_does_not_give_stage_1_at_hour_6() -> None:
    """E2: hour 1 is 0.857 mL/kg/h, so only 5 consecutive low hours: not stage 1 yet."""
    bed = e2_ward("every_hour")
    assert "oliguria-kdigo-1" not in bed.ward.fired()
    # ... and it comes once the 60-mL hour has left the oldest rolling hour: at 70 kg
    # each of the six rolling hours must hold < 35 mL (0.5 mL/kg/h, KDIGO 2012 Table 2).
    bed.hours([20.0])
    truth = per_minute([60.0] + [20.0] * 6)
    truth[0] = 0.0  # the first reading at T0 is the baseline: minute 0 is never seen
    hours = np.stack([np.roll(rolling(truth, 60), 60 * k) for k in range(6)])
    hours[:, :360] = np.inf  # not all six hours exist yet
    m = first_true(np.all(hours < 35.0, axis=0))
    assert m is not None
    ev = bed.ward.first("oliguria-kdigo-1")
    assert ev is not None
    assert abs(ev.time - minute_done(m)) <= PERIOD
    assert ev.evidence["mode"] == "every_hour"


def test_e3_stage_2_at_hour_12_never_stage_3() -> None:
    """E3: 80 kg at 30 mL/h (0.375 mL/kg/h) for 12 h is stage 2; stage 3 needs
    < 24 mL/h for 24 h, so 30 mL/h never reaches it."""
    # source: KDIGO 2012 AKI guideline, Table 2; worked example E3
    bed = started(80.0)
    bed.hours([30.0] * 12)
    w = bed.ward
    ev = w.first("oliguria-kdigo-2")
    assert ev is not None
    assert ev.time == at(12)  # "for >= 12 h" (KDIGO 2012, Table 2): 12 h after the start
    assert ev.priority is Priority.MEDIUM
    bed.hours([30.0] * 13)  # on to 25 h: the 24-h window is full
    assert "oliguria-kdigo-3" not in w.fired()
    assert w.alarms("oliguria-kdigo-3") == []


def test_e3_no_urine_for_12_hours_is_anuria() -> None:
    """E3: 0 mL for 12 h is stage 3 (anuria >= 12 h, KDIGO 2012, Table 2)."""
    bed = started(80.0)
    bed.hours([0.0] * 12)
    ev = bed.ward.first("anuria-12h")
    assert ev is not None
    assert ev.time == at(12)  # "for >= 12 h": not before 12 h of monitoring
    assert ev.priority is Priority.HIGH
    assert "flow-stopped" not in bed.ward.fired()  # there was no flow to stop


@pytest.mark.parametrize(("ml_h", "anuric"), [(4.2, False), (4.1, True), (0.9, True)])
def test_anuria_threshold_on_a_full_window(ml_h: float, anuric: bool) -> None:
    """Anuria is below 100 mL/day (Klahr & Miller, NEJM 1998, from memory; texts use 50 or
    100): 4.2 mL/h is 50.4 mL in 12 h, not anuric; 4.1 mL/h (49.2 mL) and near-anuric
    0.9 mL/h (10.8 mL, which the old 10-mL line missed) are."""
    bed = started(80.0)
    bed.hours([60.0] + [ml_h] * 14)  # judged once the first hour has left the window
    assert ("anuria-12h" in bed.ward.fired()) is anuric


# --- post-obstructive diuresis (Halbgewachs & Domes, Can Fam Physician 2015) -----------


def test_e4_pod_hourly_and_advice() -> None:
    """E4: hourly [180, 250, 230]: hours 2 and 3 are both > 200 mL. In rolling windows
    the criterion is first met inside hour 3, once the rolling hour before the latest
    has shed enough of hour 1; the alarm is on at the end of hour 3, not before hour 3."""
    # source: Halbgewachs & Domes, Can Fam Physician 2015 (> 200 mL/h for 2 h); E4
    hourly = [180.0, 250.0, 230.0]
    bed = started(80.0)
    # a recent serum sodium in range (135-145 mmol/L, Adrogue & Madias NEJM 2000): without
    # one no hypotonic rate is suggested (DESIGN §6)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours(hourly[:2])
    assert "pod-hourly" not in bed.ward.fired()  # at 02:00: 180 then 250, only one above
    bed.hours(hourly[2:])
    truth = per_minute(hourly)
    truth[0] = 0.0
    last = rolling(truth, 60)
    before = np.concatenate([np.zeros(60), last[:-60]])
    m = first_true((last > 200.0) & (before > 200.0))
    assert m is not None and 120 <= m < 180  # inside hour 3
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    assert abs(ev.time - minute_done(m)) <= PERIOD
    assert ev.time <= at(3)
    assert ev.priority is Priority.MEDIUM
    assert ev.evidence["threshold_ml_h"] == 200.0
    assert ev.evidence["comparator"] == "gt"
    # When the alarm opens it carries advice from the last completed clock hour (hour 2,
    # 250 mL); at the next completed clock hour, advice from hour 3: 50-75% of 230 mL =
    # 115-172.5 mL/h of 0.45% NaCl (E4; 50-75% replacement is common practice).
    advice = bed.ward.advice()
    assert [x.time for x in advice] == [ev.time, at(3)]
    opening = advice[0].advice
    assert opening.hour_start == at(1) and opening.hour_output_ml == pytest.approx(250.0)
    assert (opening.rate_low_ml_h, opening.rate_high_ml_h) == pytest.approx((125.0, 187.5))
    first = advice[1]
    a = first.advice
    assert a.hour_start == at(2)
    assert a.hour_output_ml == pytest.approx(230.0, abs=0.01)
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == pytest.approx((115.0, 172.5), abs=0.01)
    assert a.fluid == "0.45% NaCl"
    # Na 77 mmol/L in 0.45% NaCl (CLINICAL-REFERENCE §5): 8.9-13.3 mmol/h (E4)
    assert a.sodium_mmol_h == pytest.approx((8.855, 13.2825), abs=0.001)
    # free water ~57.5-86 mL/h (E4, relative to 0.9% NaCl)
    assert a.free_water_ml_h == pytest.approx((57.5, 86.25), abs=0.01)
    assert a.caution == CAUTION and "treating clinician" in a.caution
    assert "treating clinician" in a.summary and len(a.summary) <= 160
    assert first.because_of == (ev.alarm_id,)
    assert a.order is not None and a.order.ordered_by == "icu-physician-1 (invented)"
    assert a.serum_na is not None and a.serum_na.value == 140.0


def test_pod_24h_alone() -> None:
    """A steady 130 mL/h is 3120 mL in 24 h: > 3 L with no hour above 200 mL."""
    # source: Halbgewachs & Domes, Can Fam Physician 2015 (> 3 L in 24 h); worked example E4
    bed = started(80.0)
    bed.hours([130.0] * 24)
    w = bed.ward
    ev = w.first("pod-24h")
    assert ev is not None
    # "since monitoring began, if shorter": 130/60 mL a minute passes 3000 mL in minute 1385
    assert ev.time == at(minutes=1385)
    assert ev.priority is Priority.MEDIUM
    assert "pod-hourly" not in w.fired() and w.alarms("pod-hourly") == []
    # no replacement prompts: replacement starts when output stays above 200 mL/h (common
    # practice, CLINICAL-REFERENCE §1); the 24-h criterion pages, the hourly one advises
    assert w.advice() == [] and "replacement-behind" not in w.fired()


def _burst_hours(per_hour_ml: float, hours: int = 2) -> list[float]:
    """Each clock hour's volume produced in its minutes 10-49 only, so a window whose
    edges move by a minute either way still holds exactly one hour's volume."""
    hour = [0.0] * 10 + [per_hour_ml / 40.0] * 40 + [0.0] * 10
    return hour * hours


def test_exactly_200_ml_in_each_of_two_hours_is_not_pod() -> None:
    # source: Halbgewachs & Domes 2015: "more than 200 mL/h" (StatPearls says >= 200)
    bed = started(80.0)
    bed.minutes(_burst_hours(200.0))
    bed.minutes([0.0] * 5)
    assert "pod-hourly" not in bed.ward.fired()


def test_201_ml_in_each_of_two_hours_is_pod() -> None:
    bed = started(80.0)
    bed.minutes(_burst_hours(201.0))
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    # the second hour's volume is complete at the end of its minute 49 (01:50)
    assert abs(ev.time - at(1, 50)) <= PERIOD
    vols = [w["volume_ml"] for w in ev.evidence["windows"]]  # type: ignore[index, union-attr]
    assert vols == [pytest.approx(201.0, abs=0.05)] * 2


def test_exactly_200_ml_is_pod_with_the_at_least_comparator() -> None:
    """The comparator is a setting (sources disagree); `ge` makes 200 mL count."""
    # source: StatPearls / LITFL use ">= 200 mL" (CLINICAL-REFERENCE §1)
    bed = started(80.0, rules=ruleset(rule("pod-hourly", comparator="ge")))
    bed.minutes(_burst_hours(200.0))
    assert "pod-hourly" in bed.ward.fired()


def test_a_steady_201_ml_per_hour_for_two_hours_is_pod() -> None:
    """Readings on the minute: each window must hold exactly 60 minutes of output (once it
    held 59 and an empty minute: 201 mL/h read 197.7 mL per hour)."""
    # source: Halbgewachs & Domes, Can Fam Physician 2015: > 200 mL/h for 2 consecutive h
    bed = started(80.0)
    bed.hours([201.0] * 3)
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    assert ev.time == at(2)  # (00:00, 01:00] and (01:00, 02:00] each hold 201 mL


def test_pod_hourly_from_the_first_reading() -> None:
    """205 mL/h from the first reading. High-output rules count any window (the volume
    counted is real, DESIGN §3): at 01:59 the rolling hour (23:59, 00:59] holds 59 minutes
    of output, 201.6 mL, and (00:59, 01:59] 205 mL; a minute earlier the older one holds
    198.2 mL. So the criterion is first met at 01:59, not earlier."""
    # source: Halbgewachs & Domes, Can Fam Physician 2015 (> 200 mL/h for 2 consecutive h)
    bed = started(80.0)
    bed.hours([205.0] * 3)
    ev = bed.ward.first("pod-hourly")
    assert ev is not None and ev.time == at(1, 59)


# --- hypovolaemia risk (E7) ------------------------------------------------------------


def diuresis(ml_h: float = 300.0, hours: int = 2) -> Bed:
    bed = started(70.0)
    bed.hours([ml_h] * hours)
    return bed


def hypo_events(bed: Bed) -> list[tuple[State, Priority]]:
    return [(e.state, e.priority) for e in bed.ward.alarms("hypovolaemia-risk")]


def test_e7_shock_index_is_a_sign() -> None:
    """E7: HR 110 / SBP 100 gives SI 1.10 >= 1.0 (Mutschler class moderate)."""
    # source: Mutschler M et al., Crit Care 2013;17:R172 (SI >= 1.0); worked example E7
    bed = diuresis()
    assert "hypovolaemia-risk" not in bed.ward.fired()  # high output alone is not enough
    bed.vitals(at(2, seconds=30), heart_rate_bpm=110, systolic_mmhg=100, diastolic_mmhg=70)
    ev = bed.ward.first("hypovolaemia-risk")
    assert ev is not None
    assert ev.time == at(2, seconds=30)
    assert ev.priority is Priority.HIGH  # with a haemodynamic sign (DESIGN §4)
    assert ev.evidence["shock_index"] == pytest.approx(1.10)
    assert "shock index 1.10" in ev.evidence["signs"]  # type: ignore[operator]


def test_e7_low_map_is_a_sign() -> None:
    """E7: BP 90/50 gives a cuff MAP of 50 + 40/3 = 63.3 mmHg < 65."""
    # source: Surviving Sepsis Campaign 2021 (MAP >= 65 mmHg); worked example E7
    bed = diuresis()
    # HR 80: SI 0.89 < 1.0 and HR <= 100, so MAP is the only sign
    bed.vitals(at(2, seconds=30), heart_rate_bpm=80, systolic_mmhg=90, diastolic_mmhg=50)
    ev = bed.ward.first("hypovolaemia-risk")
    assert ev is not None and ev.priority is Priority.HIGH
    assert ev.evidence["map_mmhg"] == pytest.approx(63.3)
    assert ev.evidence["signs"] == ["MAP 63 mmHg"]


def test_e7_normal_vitals_and_no_intake_raise_nothing() -> None:
    """E7: HR 88 / SBP 130 is SI 0.68 (normal); MAP 96.7; no intake, so no balance."""
    # source: Mutschler 2013 (SI < 1.0); Surviving Sepsis Campaign 2021 (MAP >= 65)
    bed = diuresis()
    bed.vitals(at(2, seconds=30), heart_rate_bpm=88, systolic_mmhg=130, diastolic_mmhg=80)
    bed.hours([300.0])
    assert hypo_events(bed) == []


def test_a_sign_without_high_output_raises_nothing() -> None:
    # 150 mL/h is not above 200 mL/h (the rule's own output condition, DESIGN §4)
    bed = diuresis(150.0)
    bed.vitals(at(2, seconds=30), heart_rate_bpm=110, systolic_mmhg=100, diastolic_mmhg=70)
    bed.hours([150.0])
    assert hypo_events(bed) == []


def test_negative_balance_alone_is_medium() -> None:
    """Net balance over 6 h below -15 mL/kg (Hourwatch's own threshold), no vitals sign."""
    bed = started(70.0)
    bed.intake(at(0, 30), 100.0)
    bed.hours([300.0] * 4)  # 1200 out, 100 in: -1100 mL = -15.7 mL/kg at 70 kg
    ev = bed.ward.first("hypovolaemia-risk")
    assert ev is not None and ev.priority is Priority.MEDIUM
    assert ev.evidence["balance_low"] is True
    assert ev.evidence["balance_ml_kg"] < -15.0  # Hourwatch's own threshold


# --- technical alarms --------------------------------------------------------------------

FLOW_ML_H = 140.0  # 2 mL/kg/h at 70 kg; 2.33 mL a minute, above the rule's 2-mL "no flow"


def test_flow_stopped_after_60_minutes_on_minute_readings() -> None:
    """Exactly 60 min after the flow stopped (once: never, as the last window minute was
    always the empty one a boundary reading opens)."""
    # common practice, no single source: 60 min without flow after >= 0.5 mL/kg/h
    bed = started(70.0)
    bed.hours([FLOW_ML_H] * 2)
    bed.minutes([0.0] * 90)
    ev = bed.ward.first("flow-stopped")
    assert ev is not None
    assert ev.time == at(3)  # flow stopped at 02:00:00; minutes 02:00-02:59 all empty


@pytest.mark.parametrize(("ml_h", "stopped"), [(30.0, True), (29.0, False)])
def test_flow_stopped_on_a_bed_without_a_weight(ml_h: float, stopped: bool) -> None:
    """A catheter blocked for 4 h on a bed with no weight: flow before the stop of at
    least 30 mL/h (common practice, no single source: often quoted as the least adequate
    adult output, about 0.5 mL/kg/h at 60 kg) then 60 min without flow."""
    bed = started(None)
    bed.hours([ml_h] * 2)
    bed.minutes([0.0] * 240)
    ev = bed.ward.first("flow-stopped")
    assert (ev is not None) is stopped
    if ev is not None:
        # 60 min holding at most 2 mL (the rule's "no flow"): at 30 mL/h the last 4 min
        # of flow (2 mL) already count, so from 02:56
        assert at(2, 56) <= ev.time <= at(3)
        assert ev.evidence["before_rate_unit"] == "mL/h" and ev.evidence["before_line"] == 30.0


def test_flow_stopped_suppresses_low_output_until_acknowledged() -> None:
    """Readings half a minute off the clock (so the windows see every minute)."""
    # common practice, no single source: 60 min without flow after >= 0.5 mL/kg/h
    bed = started(100.0, offset_s=30.0)
    # 140 mL/h is 1.4 mL/kg/h at 100 kg; 280 mL over 6 h is below 0.5 mL/kg/h
    # (300 mL; KDIGO 2012 Table 2), so stage 1 follows once the 6-h window is covered
    bed.hours([FLOW_ML_H] * 2)
    stop = bed.t
    assert stop == at(2, seconds=30)
    bed.minutes([0.0] * 240)  # the meter keeps reporting: the catheter is blocked
    w = bed.ward
    tech = w.first("flow-stopped")
    assert tech is not None
    assert abs(tech.time - (stop + HOUR)) <= PERIOD
    assert tech.kind == "technical" and tech.priority is Priority.MEDIUM
    assert tech.evidence["stopped_min"] >= 60
    low = [e for e in w.alarms("oliguria-kdigo-1")]
    assert low, "stage 1 should be recorded, suppressed"
    assert all(e.state is State.PENDING for e in low)
    assert low[0].reason == "suppressed"
    assert low[0].suppressed_by == tech.alarm_id
    assert all(e.notify == () for e in low)  # nobody paged twice for one fault
    # the nurse acknowledges the technical alarm: the low-output alarm is annunciated
    t_ack = bed.t + 20.0
    w.ack(tech.alarm_id, t_ack)
    lifted = w.first("oliguria-kdigo-1", State.ACTIVE)
    assert lifted is not None and lifted.time == t_ack
    assert lifted.reason == "suppression_lifted"
    assert lifted.suppressed_by is None and "bedside-nurse" in lifted.notify


def test_meter_offline_and_data_gap_fire_from_wake_ups_alone() -> None:
    bed = started(70.0)
    bed.hours([70.0] * 2)
    last = at(2, 1)
    last_recv = last + 0.7  # the last message: taken at 02:01:00, received 0.7 s later
    bed.reading(last, bed.level + 70.0 / 60.0, recv=last_recv)
    w = bed.ward
    n = len(w.effects)
    # max(5 min, 5 x 60-s period) after the last message: Hourwatch's own threshold
    offline_due = last_recv + 300.0
    # the engine declares it (perhaps after an earlier wake-up that finds nothing to do)
    assert (w.engine.next_wakeup() or 0.0) <= offline_due
    w.advance(offline_due - 1.0)
    assert w.alarms("meter-offline") == []
    assert w.engine.next_wakeup() == offline_due
    w.advance(offline_due)
    ev = w.first("meter-offline")
    assert ev is not None and ev.time == offline_due
    assert ev.kind == "technical" and ev.priority is Priority.LOW
    # no usable reading for 3 h after the last one (Jin K et al., Chest 2017, from memory)
    gap_due = last + 3 * HOUR
    w.advance(gap_due - 1.0)
    assert w.first("data-gap") is None
    w.advance(at(10))
    gap = w.first("data-gap")
    assert gap is not None and gap.time == gap_due
    assert gap.priority is Priority.MEDIUM
    # nothing but time-driven events came out: no message arrived in between
    assert all(e.time >= offline_due for e in w.effects[n:])
    assert not set(LOW_OUTPUT) & w.fired()


def test_a_blind_meter_is_as_offline_as_a_silent_one() -> None:
    """Every message after 02:00 is a cumulative value above the meter's range (4000 mL,
    device_profiles/reference-cumulative.toml): out_of_range, never usable. After
    max(5 min, 5 periods) without a usable reading the technical alarm names why."""
    bed = started(70.0)
    bed.hours([70.0] * 2)
    assert bed.t is not None
    last_usable = bed.t  # received at its device time
    for k in range(1, 11):
        bed.reading(last_usable + k * PERIOD, 5000.0)
    w = bed.ward
    ev = w.first("meter-offline")
    assert ev is not None and ev.time == last_usable + 300.0  # Hourwatch's own limit
    assert "no usable reading" in ev.summary and "out_of_range" in ev.summary
    # the 5th comes with the wake-up itself: 4 were in before it
    assert ev.evidence["silent"][0]["sent_since"]["out_of_range"] == 4  # type: ignore[index]
    bed.reading(last_usable + 11 * PERIOD, 200.0)  # a usable reading again
    assert w.first("meter-offline", State.RESOLVED) is not None


def test_a_nearly_full_bag_prompts_emptying_before_readings_fail() -> None:
    """90% of the 3500-mL capacity the profile declares (Hourwatch's own line)."""
    bed = started(70.0)
    bed.reading(at(0, 1), 3100.0)  # an invented bag already holding 3.1 L
    bed.minutes([2.0] * 30)  # 3160 mL: past 3150
    w = bed.ward
    ev = w.first("bag-full")
    assert ev is not None and ev.kind == "reminder" and "empty the bag" in ev.summary
    assert ev.time == at(0, 26)  # 3100 + 25 x 2 = 3150 mL at 00:26
    bed.empty_bag()
    bed.minutes([2.0] * 2)
    assert w.first("bag-full", State.RESOLVED) is not None
    assert not set(LOW_OUTPUT) & w.fired()  # a reminder, not a technical alarm


def test_meter_offline_scales_with_a_slow_meter_period() -> None:
    """A 10-minute interval meter is offline after 5 x 600 s, not after 5 min."""
    prof = PROFILES["interval-10min"]
    w = Ward()
    bed = Bed(w, device="iv-0202")
    t = T0 + 600.0
    bed.bind(t)  # bound just before its first message: until then its period is unknown
    topic, payload = encode(prof, "iv-0202", t, 12.0, seq=1)
    w.send(topic, payload, t + 1.0)
    w.advance(t + 1.0 + 3000.0 - 1.0)
    assert w.first("meter-offline") is None
    w.advance(t + 1.0 + 3000.0)
    ev = w.first("meter-offline")
    assert ev is not None and ev.time == t + 1.0 + 3000.0


def test_a_silent_meter_never_looks_like_oliguria() -> None:
    """8 h without a message: technical alarms only, never a low-output alarm."""
    bed = started(70.0)
    bed.hours([70.0] * 2)  # 1 mL/kg/h
    w = bed.ward
    w.advance(at(10))
    assert w.fired() == {"meter-offline", "data-gap"}
    # it comes back with what the bag gathered meanwhile (8 h at 70 mL/h)
    bed.reading(at(10), bed.level + 8 * 70.0)
    bed.hours([70.0] * 14)
    assert not set(LOW_OUTPUT) & w.fired()
    assert w.alarms("oliguria-kdigo-1") == []


@pytest.mark.parametrize(
    ("rule_id", "ml_h", "hours"),
    [
        # 0.514 mL/kg/h at 70 kg: above the stage-1 line (KDIGO 2012, Table 2)
        ("oliguria-kdigo-1", 36.0, 8),
        # 51.6 mL per 12 h: not < 50 mL (anuria < 100 mL/day: Klahr & Miller, NEJM 1998,
        # from memory)
        ("anuria-12h", 4.3, 13),
    ],
)
def test_unmeasured_minutes_never_look_like_oliguria(rule_id: str, ml_h: float, hours: int) -> None:
    """From the first reading on, the output is above the rule's line; the minutes before
    monitoring began are unknown, and DESIGN §3 says missing data must never look like
    oliguria. (Once counted as no urine: 36 mL/h read 0.46 mL/kg/h at 5.4 h of data.)"""
    bed = started(70.0)
    bed.hours([ml_h] * hours)
    assert bed.ward.alarms(rule_id) == []


def test_a_bed_without_weight_runs_no_weight_based_rule() -> None:
    bed = started(None)
    w = bed.ward
    notices = w.notices()
    assert [n.code for n in notices] == ["no_weight"]
    assert "weight" in notices[0].text and notices[0].time == T0 - 30.0
    bed.hours([0.0] * 8)  # anuric for 8 h: stage 1 would have fired with a weight
    assert not {"oliguria-kdigo-1", "oliguria-kdigo-2", "flow-stopped"} & w.fired()
    assert len(w.notices()) == 1  # said once, not every minute
    # with a weight in a new context, the rules run at once
    bed.weight_kg = 70.0
    bed.bind(at(8, seconds=10))
    ev = w.first("oliguria-kdigo-1")
    assert ev is not None and ev.time == at(8, seconds=10)
    assert ev.evidence["weight_kg"] == 70.0


# --- serum sodium (Adrogué & Madias, N Engl J Med 2000) -----------------------------------


@pytest.mark.parametrize(("na", "fires"), [(146.0, True), (145.0, False)])
def test_sodium_high(na: float, fires: bool) -> None:
    # source: hypernatraemia = serum Na > 145 mmol/L (Adrogué & Madias, NEJM 2000)
    bed = started(70.0)
    bed.labs(at(0, 10), serum_na_mmol_l=na)
    ev = bed.ward.first("sodium-high")
    assert (ev is not None) is fires
    if ev is not None:
        assert ev.time == at(0, 10) and ev.priority is Priority.MEDIUM


def test_a_lab_timed_ahead_counts_from_its_own_time() -> None:
    """A result that arrives before its stated time counts when that time comes, by
    the rule's own wake-up: readings alone do not re-check rules on labs."""
    # source: hypernatraemia = serum Na > 145 mmol/L (Adrogué & Madias, NEJM 2000)
    bed = started(70.0)
    bed.send("labs", {"time": iso(at(0, 52, 30)), "serum_na_mmol_l": 151.0}, at(0, 20))
    assert bed.ward.first("sodium-high") is None
    bed.hours([60.0])  # steady readings through the hour (invented)
    ev = bed.ward.first("sodium-high")
    assert ev is not None and ev.time == at(0, 52, 30)  # not at a reading


def test_a_high_sodium_ends_when_its_result_ages_out() -> None:
    """The result counts for the rule's 24 h: then the alarm ends by the rule's own
    wake-up, between readings, and the rule waits quietly after it."""
    # source: hypernatraemia = serum Na > 145 mmol/L (Adrogué & Madias, NEJM 2000)
    bed = started(70.0)
    bed.hours([60.0])  # steady readings (invented)
    taken = at(1)
    bed.labs(taken, serum_na_mmol_l=151.0)
    assert bed.ward.first("sodium-high") is not None
    bed.hours([60.0] * 26)
    ended = bed.ward.first("sodium-high", State.RESOLVED)
    max_age_s = 86400  # the rule file's max_age_s: Hourwatch's own choice, no single source
    assert ended is not None and ended.time == taken + max_age_s
    assert bed.ward.alarms("sodium-high")[-1] == ended  # nothing after it


@pytest.mark.parametrize(
    ("later", "after_h", "fires"),
    [(149.0, 20.0, True), (148.0, 20.0, False), (149.0, 25.0, False)],
)
def test_sodium_rise(later: float, after_h: float, fires: bool) -> None:
    """> 10 mmol/L within 24 h: 138 -> 149 in 20 h rises 11 (fires); 138 -> 148 rises
    exactly 10 (not more than 10); 138 -> 149 over 25 h is outside the 24-h window."""
    # source: correction-rate limit ~10 mmol/L per 24 h (Adrogué & Madias, NEJM 2000)
    bed = started(70.0)
    bed.labs(at(0, 10), serum_na_mmol_l=138.0)
    t = at(after_h, 10)
    bed.labs(t, serum_na_mmol_l=later)
    ev = bed.ward.first("sodium-rise")
    assert (ev is not None) is fires
    if ev is not None:
        assert ev.time == t and ev.priority is Priority.HIGH


# --- rules that run while a post-obstructive diuresis alarm is open ----------------------


ALL_LABS = {  # invented results, each inside its usual adult reference interval
    "serum_na_mmol_l": 141.0, "serum_k_mmol_l": 3.9, "serum_mg_mmol_l": 0.85,
    "serum_phosphate_mmol_l": 1.1, "serum_creatinine_umol_l": 90.0,
}  # fmt: skip


def test_labs_due_every_4_hours_while_pod_is_open() -> None:
    # common practice (Na, K, Mg, phosphate and creatinine every 4-12 h during a
    # diuresis; CLINICAL-REFERENCE §1), no single source
    bed = diuresis(300.0, hours=3)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    due = pod.time + 4 * HOUR
    w.advance(due - 1.0)
    assert w.first("labs-due") is None
    w.advance(due)
    ev = w.first("labs-due")
    assert ev is not None and ev.time == due
    assert ev.kind == "reminder" and ev.priority is Priority.LOW
    t_labs = due + 10 * MIN
    bed.labs(t_labs, **ALL_LABS)
    done = w.first("labs-due", State.RESOLVED)
    assert done is not None and done.time == t_labs
    # the resolved page says so, not "due  (last: )"
    assert done.summary == "check serum electrolytes and creatinine: every result is up to date"
    w.advance(t_labs + 4 * HOUR + 1.0)
    again = [e for e in w.alarms("labs-due") if e.state is State.ACTIVE]
    assert [e.time for e in again] == [due, t_labs + 4 * HOUR]


def test_one_analyte_does_not_satisfy_another() -> None:
    """A lone urine sodium, or serum Na and K alone, leave the other analytes due."""
    bed = diuresis(300.0, hours=3)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    due = pod.time + 4 * HOUR
    w.advance(due)
    bed.labs(due + MIN, urine_na_mmol_l=60.0)  # invented
    assert w.first("labs-due", State.RESOLVED) is None
    bed.labs(due + 2 * MIN, serum_na_mmol_l=141.0, serum_k_mmol_l=3.9)
    assert w.first("labs-due", State.RESOLVED) is None
    still = next(a for a in w.engine.book.active("b01") if a.rule == "labs-due")
    assert still.evidence["due"] == [
        "serum_mg_mmol_l", "serum_phosphate_mmol_l", "serum_creatinine_umol_l"]  # fmt: skip
    assert "Mg, phosphate, creatinine" in still.summary
    bed.labs(due + 3 * MIN, serum_mg_mmol_l=0.85, serum_phosphate_mmol_l=1.1,
             serum_creatinine_umol_l=90.0)  # fmt: skip
    done = w.first("labs-due", State.RESOLVED)
    assert done is not None and done.time == due + 3 * MIN
    # Na and K fall due 4 h after their own result, not after the later ones
    w.advance(due + 2 * MIN + 4 * HOUR)
    back = [e for e in w.alarms("labs-due") if e.state is State.ACTIVE]
    assert back[-1].time == due + 2 * MIN + 4 * HOUR
    assert back[-1].evidence["due"] == ["serum_na_mmol_l", "serum_k_mmol_l"]


def test_no_labs_reminder_without_a_diuresis() -> None:
    bed = started(70.0)
    bed.hours([70.0] * 6)
    assert "labs-due" not in bed.ward.fired()


def test_replacement_behind_when_no_intake_is_documented() -> None:
    # common practice: replace 50-75% of the output during a diuresis (DESIGN §4, §6)
    bed = diuresis(300.0, hours=3)
    w = bed.ward
    pod = w.first("pod-hourly")
    behind = w.first("replacement-behind")
    assert pod is not None and behind is not None
    # pending from the moment the diuresis alarm opens; active after its alarm-condition
    # delay (a setting in alert_rules/replacement-behind.toml)
    pending = w.first("replacement-behind", State.PENDING)
    assert pending is not None and pending.time == pod.time
    delay = rule("replacement-behind").condition_delay_s
    assert behind.time == pod.time + delay
    assert behind.evidence["intake_ml"] == 0.0
    assert "replacement-excess" not in w.fired()


def test_replacement_documented_in_time_keeps_behind_quiet() -> None:
    """Intake of 60% of the output, charted every half hour: never below 50%."""
    # common practice: replace 50-75% of the output during a diuresis (DESIGN §4, §6)
    bed = started(70.0)
    for h in range(4):
        for half in (0, 30):
            bed.intake(at(h, half, 1), 90.0)  # 180 mL an hour against 300 mL out: 60%
            bed.minutes(per_minute([300.0])[:30])
    assert "pod-hourly" in bed.ward.fired()
    assert "replacement-behind" not in bed.ward.fired()


def test_replacement_excess_when_intake_exceeds_output() -> None:
    # common practice, no single source: over-replacement prolongs the diuresis
    bed = started(70.0)
    for h in range(4):
        bed.intake(at(h, 30), 400.0)  # 400 mL each hour against 300 mL of output
        bed.hours([300.0])
    w = bed.ward
    excess = w.first("replacement-excess")
    pod = w.first("pod-hourly")
    assert excess is not None and pod is not None
    assert excess.time == pod.time
    assert excess.evidence["intake_share"] > 1.0  # type: ignore[operator]
    assert "replacement-behind" not in w.fired()


def test_gated_rules_stay_quiet_without_pod() -> None:
    bed = started(70.0)
    bed.hours([120.0] * 5)
    assert not {"replacement-behind", "replacement-excess", "labs-due"} & bed.ward.fired()


@pytest.mark.parametrize("second", [1.0, 30.0])
def test_a_steady_201_ml_per_hour_is_pod_whatever_second_the_meter_reads(second: float) -> None:
    """A meter whose readings fall 1 s or 30 s past the minute: each completed rolling
    hour still holds 201 mL, so the alarm comes within a couple of minutes of 02:00."""
    # source: Halbgewachs & Domes, Can Fam Physician 2015: > 200 mL/h for 2 consecutive h
    bed = started(80.0, offset_s=second)
    bed.hours([201.0] * 3)
    ev = bed.ward.first("pod-hourly")
    assert ev is not None and ev.time <= at(2, 2)
