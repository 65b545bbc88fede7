"""Safe advice through the whole engine (DESIGN §4, §6): no fluid without an order, a
recent sodium and a stable circulation; post-obstructive diuresis only after a recorded
relief; the residual drain is not diuresis; prompts follow the condition, not the latch.

All beds, meters, people, orders and results here are invented.
"""

from __future__ import annotations

import json
from typing import Any

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from daemon.engine.advice import FLUIDS, AdviceKind
from daemon.engine.alarms import AlarmEvent, Priority, State
from daemon.engine.effects import AdviceIssued, Effect
from daemon.rule_files import load_rules
from tests.ruletools import HOUR, MIN, ORDER, T0, Bed, Ward, at, iso

HYPOTONIC = [f for f, fluid in FLUIDS.items() if fluid.hypotonic()]


def started(weight_kg: float = 70.0, **bed: Any) -> Bed:
    b = Bed(Ward(), weight_kg=weight_kg, **bed)
    b.bind()
    b.start()
    return b


def text_of(e: Effect) -> str:
    """Everything a person could read of an effect."""
    if isinstance(e, AdviceIssued):
        return json.dumps(e.to_json())
    if isinstance(e, AlarmEvent):
        return json.dumps({"summary": e.summary, "pager": e.pager(), "advice": e.advice})
    return ""


def advice_kinds(bed: Bed) -> list[AdviceKind]:
    return [a.advice.kind for a in bed.ward.advice()]


# --- orders --------------------------------------------------------------------------


def test_without_an_order_the_page_gives_the_numbers_and_names_no_fluid() -> None:
    bed = started(order=None)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)  # in range (Adrogue & Madias 2000)
    bed.hours([300.0] * 3)  # > 200 mL/h for 2 h (Halbgewachs & Domes 2015)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    assert "No replacement order on file." in pod.pager()
    assert set(advice_kinds(bed)) == {AdviceKind.NO_ORDER}
    for e in w.effects:
        assert not any(f in text_of(e) for f in FLUIDS), text_of(e)
        if isinstance(e, AdviceIssued):
            assert e.advice.rate_high_ml_h is None


def test_an_order_arriving_later_brings_the_rate_at_once() -> None:
    bed = started(order=None)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([300.0] * 3)
    order = ORDER | {"ordered_at": iso(at(3))}
    bed.bind(at(3, seconds=5), replacement=order)
    last = bed.ward.advice()[-1]
    assert last.time == at(3, seconds=5) and last.advice.kind is AdviceKind.RATE
    assert last.advice.rate_high_ml_h == pytest.approx(225.0)  # 75% of 300 mL


# --- sodium ----------------------------------------------------------------------------


def test_low_sodium_holds_the_hypotonic_rate_and_pages_the_physician() -> None:
    bed = started()
    bed.hours([300.0] * 2)
    # source: hyponatraemia < 135 mmol/L (Spasovski G et al., Eur J Endocrinol 2014)
    bed.labs(at(2, minutes=5), serum_na_mmol_l=131.0)
    bed.hours([300.0])
    w = bed.ward
    low = w.first("sodium-low")
    assert low is not None and low.priority is Priority.MEDIUM
    assert "icu-physician" in low.notify and "bedside-nurse" in low.notify  # at tier 0
    assert "hypotonic replacement order on file: physician to review it" in low.summary
    assert "physician to review it" in low.pager()  # a short pager drops the details first
    assert "0.45% NaCl" not in low.pager()
    after = [a for a in w.advice() if a.time >= at(2, minutes=5)]
    assert after and all(a.advice.kind is AdviceKind.HELD_SODIUM for a in after)
    assert all(a.advice.rate_high_ml_h is None for a in after)


def test_no_sodium_on_file_names_no_hypotonic_fluid() -> None:
    bed = started()
    bed.hours([300.0] * 3)
    kinds = advice_kinds(bed)
    assert kinds and set(kinds) == {AdviceKind.HELD_SODIUM}
    assert "No serum sodium on file" in bed.ward.advice()[0].advice.summary


def test_a_stale_sodium_is_not_quoted_as_current() -> None:
    """12 h is the default limit (electrolytes every 4-12 h: common practice)."""
    bed = started()
    bed.labs(at(-13), serum_na_mmol_l=140.0)  # taken 13 h before monitoring
    bed.hours([300.0] * 3)
    first = bed.ward.advice()[0].advice
    assert first.kind is AdviceKind.HELD_SODIUM and first.serum_na is None
    assert "h old" in first.summary


def test_a_fresh_sodium_in_range_resumes_the_rate() -> None:
    bed = started()
    bed.hours([300.0] * 3)
    bed.labs(at(3, seconds=10), serum_na_mmol_l=139.0)
    last = bed.ward.advice()[-1]
    assert last.time == at(3, seconds=10) and last.advice.kind is AdviceKind.RATE


# --- circulation -------------------------------------------------------------------------


def test_hypovolaemia_holds_every_rate_until_the_signs_clear() -> None:
    """SI 1.45 (>= 1.4 severe, Mutschler 2013) and MAP 60 (< 65, Surviving Sepsis
    Campaign 2021) with > 200 mL/h: high priority, no fluid, no rate."""
    bed = started()
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([300.0] * 3)
    assert advice_kinds(bed)[-1] is AdviceKind.RATE
    bed.vitals(at(3, seconds=20), heart_rate_bpm=116, systolic_mmhg=80, mean_mmhg=60)
    w = bed.ward
    hypo = w.first("hypovolaemia-risk")
    assert hypo is not None and hypo.priority is Priority.HIGH
    assert "assess volume status" in hypo.pager()
    assert hypo.advice is None and not any(f in text_of(hypo) for f in FLUIDS)
    held = w.advice()[-1]
    assert held.time == at(3, seconds=20) and held.advice.kind is AdviceKind.HELD_CIRCULATION
    bed.hours([300.0])
    pod_pages = [e for e in w.alarms("pod-hourly") if e.notify and e.time > at(3, seconds=20)]
    assert all("mL/h" not in (e.advice or {}).get("pager", "") for e in pod_pages)
    assert all(a.advice.rate_high_ml_h is None for a in w.advice() if a.time >= at(3, 20))
    # signs clear: HR 80, SBP 125, MAP 90 (SI 0.64); once the alarm has ended (after its
    # 15-min clear-hold, alert_rules/hypovolaemia-risk.toml) the rate comes back
    bed.vitals(at(4, seconds=20), heart_rate_bpm=80, systolic_mmhg=125, mean_mmhg=90)
    assert w.advice()[-1].advice.kind is AdviceKind.HELD_CIRCULATION
    bed.hours([300.0])
    ended = w.first("hypovolaemia-risk", State.RESOLVED)
    assert ended is not None and ended.time == at(4, seconds=20) + 900
    back = w.advice()[-1]
    assert back.advice.kind is AdviceKind.RATE and back.time >= ended.time


# --- context ----------------------------------------------------------------------------


def test_without_a_relief_marker_high_output_names_no_cause() -> None:
    bed = started(relieved_at=None)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([300.0] * 3)  # e.g. after a diuretic: the same numbers, another cause
    w = bed.ward
    assert not {"pod-hourly", "pod-24h", "replacement-behind", "labs-due"} & w.fired()
    high = w.first("high-output")
    assert high is not None and high.priority is Priority.LOW
    assert "diuresis" not in high.title.lower() and "diuresis" not in high.pager().lower()
    assert w.advice() == []  # no replacement prompts without the criterion in context


def test_a_relief_marker_arms_the_post_obstructive_rules_instead() -> None:
    bed = started()
    bed.hours([300.0] * 3)
    assert "pod-hourly" in bed.ward.fired() and "high-output" not in bed.ward.fired()


def test_the_marker_arms_for_72_hours_only() -> None:
    """Observe at least 24 h after decompression (Halbgewachs & Domes 2015); 72 h is ours."""
    bed = started(relieved_at=T0 - 69 * HOUR)
    bed.hours([300.0] * 5)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None and pod.time < at(3)
    # at T0 + 3 h the 72 h have passed: the generic rule takes over, the latch stays
    high = w.first("high-output")
    assert high is not None and high.time == at(3)
    assert w.first("pod-hourly", State.RESOLVED) is None


def test_a_catheter_inserted_for_retention_arms_them_too() -> None:
    bed = Bed(Ward(), relieved_at=None)
    bed.bind(episodes=[{"kind": "catheter_inserted", "reason": "retention",
                        "at": iso(T0 - 2 * HOUR)}])  # fmt: skip
    bed.start()
    bed.hours([300.0] * 3)
    assert "pod-hourly" in bed.ward.fired()


def test_the_residual_drain_is_not_diuresis() -> None:
    """1200 mL of retained urine drained in the first 40 min after relief, then 80 mL/h:
    neither > 200 mL/h for 2 h nor > 3 L in 24 h (Halbgewachs & Domes 2015)."""
    bed = started(relieved_at=T0)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.minutes([30.0] * 40 + [80.0 / 60] * 20)  # 30 mL/min = 1800 mL/h, under the 2500 limit
    for _ in range(26):
        bed.hours([80.0])
        if bed.level > 3000:
            bed.empty_bag()
    w = bed.ward
    assert not {"pod-hourly", "pod-24h", "high-output", "high-output-24h"} & w.fired()
    assert w.advice() == []
    beds = w.engine.beds["b01"]
    assert beds.residual == ((int(T0 // 60), int(T0 // 60) + 60),)


def test_the_same_drain_without_its_marker_would_count() -> None:
    """The control: without the relief marker the drained volume is output."""
    bed = started(relieved_at=None)
    bed.minutes([30.0] * 40 + [80.0 / 60] * 20)
    bed.hours([80.0] * 2)
    assert "high-output" in bed.ward.fired()


# --- ending ----------------------------------------------------------------------------


def test_prompts_follow_the_condition_not_the_latch() -> None:
    bed = started()
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([300.0] * 3)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    assert w.first("replacement-behind") is not None  # no intake documented
    bed.hours([90.0] * 4)  # back under 200 mL/h for hours; nobody acknowledges
    kinds = advice_kinds(bed)
    assert kinds.count(AdviceKind.ENDED) == 1 and kinds[-1] is AdviceKind.ENDED
    ended_at = w.advice()[-1].time
    assert all(a.time <= ended_at for a in w.advice())
    assert w.first("pod-hourly", State.RESOLVED) is None  # the latch stays until acked
    behind = w.first("replacement-behind", State.RESOLVED)
    assert behind is not None and behind.time <= ended_at + 900  # its clear-hold (15 min)
    later = [e for e in w.alarms() if e.time > ended_at and e.notify]
    assert later and all(e.advice is None for e in later)
    assert all("mL/h" not in e.pager().split(":", 1)[1].split(".")[-2] for e in later)


# --- words -------------------------------------------------------------------------------


def test_every_page_ends_with_its_caution_and_titles_assert_no_disease() -> None:
    bed = started()
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([300.0] * 3)
    for e in bed.ward.alarms():
        assert e.pager().endswith("Decision support: verify per local protocol.")
    for r in load_rules():
        what = r.title.split(":")[0].lower()
        if r.id.startswith(("pod-", "oliguria-", "anuria")):
            assert what.endswith("criterion met"), r.title  # a criterion, not a diagnosis
        assert not what.startswith(("oliguria", "hypovolaemia")), r.title


def test_pager_and_advice_round_the_same_way() -> None:
    """E4: 50-75% of 230 mL is 115-172.5 mL/h: both read 115-173 (one rounding)."""
    # source: CLINICAL-REFERENCE worked example E4 (derived)
    bed = started()
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)
    bed.hours([250.0, 250.0, 230.0])
    w = bed.ward
    adv = w.advice()[-1]
    assert adv.advice.hour_output_ml == pytest.approx(230.0, abs=0.01)
    assert "115–173 mL/h" in adv.advice.summary
    bed.hours([230.0] * 2)  # the re-notification pages carry the hour's advice
    pages = [e for e in w.alarms("pod-hourly") if e.notify and e.advice
             and e.advice["hour_output_ml"] == pytest.approx(230.0, abs=0.01)]  # fmt: skip
    assert pages and all("115-173 mL/h" in e.pager() for e in pages)


# --- electrolytes ------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("rule", "analyte", "low", "ok", "priority"),
    [
        # source: Spasovski G et al., Eur J Endocrinol 2014 (hyponatraemia < 135 mmol/L)
        ("sodium-low", "serum_na_mmol_l", 134.0, 135.0, Priority.MEDIUM),
        # from memory: usual adult reference interval K 3.5-5.0 mmol/L
        ("potassium-low", "serum_k_mmol_l", 3.4, 3.5, Priority.MEDIUM),
        # from memory: usual adult reference interval Mg about 0.7-1.0 mmol/L
        ("magnesium-low", "serum_mg_mmol_l", 0.65, 0.7, Priority.LOW),
        # from memory: usual adult reference interval phosphate about 0.8-1.5 mmol/L
        ("phosphate-low", "serum_phosphate_mmol_l", 0.75, 0.8, Priority.LOW),
    ],
)
def test_low_electrolytes(rule: str, analyte: str, low: float, ok: float,
                          priority: Priority) -> None:  # fmt: skip
    bed = started()
    bed.labs(at(0, 10), **{analyte: ok})  # the limit itself is in range
    assert rule not in bed.ward.fired()
    bed.labs(at(0, 20), **{analyte: low})
    ev = bed.ward.first(rule)
    assert ev is not None and ev.priority is priority and ev.time == at(0, 20)
    bed.labs(at(0, 30), **{analyte: ok})
    assert bed.ward.first(rule, State.RESOLVED) is not None


def test_a_sodium_fall_of_more_than_10_in_24_hours() -> None:
    """A fall of the same order as the correction-rate limits (Verbalis 2013; Spasovski
    2014): > 10 mmol/L in 24 h pages high, to the physician too (common practice)."""
    bed = started()
    bed.labs(at(0), serum_na_mmol_l=144.0)
    bed.labs(at(12), serum_na_mmol_l=134.0)  # a fall of 10: not more than 10
    assert "sodium-fall" not in bed.ward.fired()
    bed.labs(at(20), serum_na_mmol_l=133.0)  # 11 in 20 h
    ev = bed.ward.first("sodium-fall")
    assert ev is not None and ev.priority is Priority.HIGH and "icu-physician" in ev.notify
    assert "fell 11 mmol/L (144 -> 133)" in ev.summary


def test_creatinine_is_a_result_of_its_own() -> None:
    bed = started()
    bed.labs(at(0, 10), serum_creatinine_umol_l=95.0)  # invented
    assert bed.ward.engine.beds["b01"].labs["serum_creatinine_umol_l"] == [(at(0, 10), 95.0)]
    assert bed.ward.rejected() == []


# --- the safety rules over random beds --------------------------------------------------

beds_strategy = st.fixed_dictionaries(
    {
        "ordered": st.booleans(),
        "fluid": st.sampled_from(sorted(FLUIDS)),
        "na": st.none() | st.floats(120.0, 155.0),
        "na_age_h": st.floats(0.0, 30.0),
        "shocked": st.booleans(),
        "relieved": st.booleans(),
        "hours": st.lists(st.sampled_from([60.0, 150.0, 250.0, 400.0]), min_size=2, max_size=5),
    }
)


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(beds_strategy)
def test_no_message_breaks_the_safety_rules(spec: dict[str, Any]) -> None:
    """Over random invented beds: no message names a fluid without an order on file; none
    names a hypotonic fluid while sodium is below range, unknown or stale; none suggests
    a rate while hypovolaemia signs hold (DESIGN §6)."""
    order = ORDER | {"fluid": spec["fluid"]} if spec["ordered"] else None
    bed = started(order=order, relieved_at=T0 - HOUR if spec["relieved"] else None)
    if spec["na"] is not None:
        bed.labs(at(-spec["na_age_h"]) if spec["na_age_h"] else at(seconds=30),
                 serum_na_mmol_l=spec["na"])  # fmt: skip
    if spec["shocked"]:  # SI 1.45, MAP 60 (Mutschler 2013; Surviving Sepsis Campaign 2021)
        bed.vitals(at(seconds=40), heart_rate_bpm=116, systolic_mmhg=80, mean_mmhg=60)
    bed.hours(spec["hours"])
    w = bed.ward
    hypo_on = [(e.time, e.state) for e in w.alarms("hypovolaemia-risk")]
    for e in w.effects:
        words = text_of(e)
        named = {f for f in FLUIDS if f in words}
        if order is None:
            assert not named, words
        if isinstance(e, AdviceIssued):
            a = e.advice
            if a.fluid is not None:
                assert order is not None
                na = a.serum_na
                fresh_ok = na is not None and e.time - na.time <= 12 * HOUR and na.value >= 135
                assert fresh_ok or a.fluid not in HYPOTONIC
            holding = _hypovolaemia_holds(w, e.time)
            if holding:
                assert a.rate_high_ml_h is None, (e.time, hypo_on)
        if isinstance(e, AlarmEvent) and e.advice and _hypovolaemia_holds(w, e.time):
            assert e.advice.get("rate_ml_h") is None
    assert MIN  # the helpers' minute is one minute


def _hypovolaemia_holds(w: Ward, t: float) -> bool:
    """Whether the hypovolaemia condition held at t, from its events (a pending or open
    alarm whose condition had not cleared)."""
    state = False
    for e in w.alarms("hypovolaemia-risk"):
        if e.time > t:
            break
        state = e.state not in (State.RESOLVED, State.INACTIVE)
    return state
