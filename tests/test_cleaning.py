"""Each cleaning rule (DESIGN §3) on small hand-written streams, for every shipped family.

Streams are written in each profile's own payload format by `simulator.encode`. Flows,
meters and beds are invented. A flow of 60 mL/h (1 mL/min) keeps the arithmetic readable.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from daemon.engine.effects import RejectedInput
from daemon.engine.outcomes import Outcome
from daemon.engine.series import ESTIMATED, MEASURED, UNKNOWN
from tests.conftest import (
    CUMULATIVE,
    FLAGGED,
    INTERVAL,
    PROFILES,
    T0,
    Meter,
    context_payload,
    send_steady,
)

ALL = sorted(PROFILES)
FLOW_ML_H = 60.0  # invented steady flow


def period(name: str) -> float:
    return float(PROFILES[name].timing.period_s)


def per_reading(name: str, flow_ml_h: float = FLOW_ML_H) -> float:
    return flow_ml_h * period(name) / 3600.0


def value(name: str, i: int, level: float = 100.0) -> float:
    """Reading i of a steady stream: the bag content, or an interval's volume."""
    step = per_reading(name)
    return step if name in INTERVAL else level + i * step


def true_volume(name: str, t_first: float, t_last: float, flow_ml_h: float = FLOW_ML_H) -> float:
    """What the patient produced between the first and last reading (an interval meter's
    first reading also covers the interval before it)."""
    p = PROFILES[name]
    if p.volume.semantics.value == "interval":
        t_first -= float(p.volume.interval_s or 0)
    return flow_ml_h * (t_last - t_first) / 3600.0


def grams_rounding(name: str) -> float:
    """Tolerance for payload rounding: 0.1 g or 0.1 mL per reading end, plus float noise."""
    return 0.15 if PROFILES[name].volume.semantics.value == "bag_weight" else 1e-6


def only(effects: list, reason: Outcome) -> RejectedInput:
    assert len(effects) == 1, effects
    (e,) = effects
    assert isinstance(e, RejectedInput) and e.reason is reason, e
    return e


# --- duplicates ----------------------------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_redelivered_message_is_a_counted_silent_duplicate(name: str) -> None:
    m = Meter(PROFILES[name])
    bodies = [m.payload(T0 + i * period(name), value(name, i)) for i in range(8)]
    for i, (topic, body) in enumerate(bodies):
        m.raw(topic, body, T0 + i * period(name) + 1)
        if i in (2, 5):  # QoS 1 redelivery: same seq, same time, same value
            assert m.raw(topic, body, T0 + i * period(name) + 4) == []
    assert m.outcomes().get("duplicate") == 2
    assert m.total() == pytest.approx(
        true_volume(name, T0, T0 + 7 * period(name)), abs=grams_rounding(name)
    )


@pytest.mark.parametrize("name", ALL)
def test_same_time_and_value_under_another_seq_is_a_duplicate(name: str) -> None:
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 5, per_reading(name), level=100)
    before = m.total()
    t, v = sent[3]
    assert m.send(t, v, seq=900, recv=t + 30) == []
    assert m.outcomes().get("duplicate") == 1
    assert m.total() == before


@pytest.mark.parametrize("name", ALL)
def test_same_time_other_value_is_a_conflicting_duplicate(name: str) -> None:
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 5, per_reading(name), level=100)
    before = m.total()
    t, v = sent[2]
    only(m.send(t, v + 7, seq=901, recv=t + 30), Outcome.CONFLICTING_DUPLICATE)
    assert m.outcomes().get("conflicting_duplicate") == 1
    assert m.total() == before


# --- order ---------------------------------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_reordering_within_tolerance_is_inserted_with_the_same_result(name: str) -> None:
    """Two meters, same readings; one receives reading 4 after reading 6."""
    p = period(name)
    inorder, shuffled = Meter(PROFILES[name]), Meter(PROFILES[name])
    readings = [(T0 + i * p, value(name, i)) for i in range(12)]
    for i, (t, v) in enumerate(readings):
        inorder.send(t, v, seq=i + 1)
    delay = 2 * p + 5
    assert delay <= PROFILES[name].timing.reorder_tolerance_s
    for i, (t, v) in enumerate(readings):
        if i != 4:
            shuffled.send(t, v, seq=i + 1, recv=t + 1)
        if i == 6:
            t4, v4 = readings[4]
            assert shuffled.send(t4, v4, seq=5, recv=t4 + delay) == []
    assert shuffled.outcomes().get("reordered") == 1
    assert shuffled.total() == pytest.approx(inorder.total(), abs=1e-9)
    assert shuffled.total() == pytest.approx(
        true_volume(name, T0, readings[-1][0]), abs=grams_rounding(name)
    )
    a, sa = inorder.minutes(T0 - 3600, T0 + 3600)
    b, sb = shuffled.minutes(T0 - 3600, T0 + 3600)
    np.testing.assert_allclose(b, a, atol=1e-9)
    np.testing.assert_array_equal(sb, sa)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_first_two_readings_swapped_within_tolerance_are_both_used(name: str) -> None:
    p = period(name)
    m = Meter(PROFILES[name])
    readings = [(T0 + i * p, value(name, i)) for i in range(10)]
    m.send(*readings[1], seq=2, recv=readings[1][0] + 1)
    m.send(*readings[0], seq=1, recv=readings[1][0] + 2)  # delayed by one period
    for i, (t, v) in enumerate(readings[2:], start=3):
        m.send(t, v, seq=i)
    assert "late" not in m.outcomes()
    assert m.total() == pytest.approx(
        true_volume(name, T0, readings[-1][0]), abs=grams_rounding(name)
    )


@pytest.mark.parametrize("name", CUMULATIVE)
def test_reading_delayed_past_a_bag_change_within_tolerance_is_not_late(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    send_steady(m, T0, 19, step, level=200)
    t_a = T0 + 19 * p
    t_change = t_a + p / 2
    rate = FLOW_ML_H / 3600
    m.send(t_a + p, rate * p / 2, seq=21, recv=t_a + p + 1)  # the first empty-bag reading
    m.send(t_a, 200 + 19 * step, seq=20, recv=t_a + p + 3)  # the last full-bag one, delayed
    for i in range(2, 6):
        m.send(t_a + i * p, rate * (t_a + i * p - t_change), seq=20 + i)
    assert m.outcomes().get("bag_change") == 1
    assert "late" not in m.outcomes()
    assert m.total() == pytest.approx(true_volume(name, T0, t_a + 5 * p), abs=0.3)


@pytest.mark.parametrize("name", ALL)
def test_later_than_the_reorder_tolerance_is_rejected_as_late(name: str) -> None:
    p = period(name)
    tol = PROFILES[name].timing.reorder_tolerance_s
    m = Meter(PROFILES[name])
    n = math.ceil(tol / p) + 4
    sent = [(T0 + i * p, value(name, i)) for i in range(n)]
    for i, (t, v) in enumerate(sent):
        if i != 1:
            m.send(t, v, seq=i + 1)
    t1, v1 = sent[1]
    assert sent[-1][0] - t1 > tol
    only(m.send(t1, v1, seq=2, recv=sent[-1][0] + 2), Outcome.LATE)
    assert m.outcomes().get("late") == 1
    expected = true_volume(name, T0, sent[-1][0])
    if name in INTERVAL:  # the late interval's volume is lost, not guessed
        expected -= per_reading(name)
    assert m.total() == pytest.approx(expected, abs=grams_rounding(name))


# --- bag changes ---------------------------------------------------------------------


def _bag_stream(name: str, m: Meter, *, flag: bool, pause_s: float = 0.0) -> tuple[float, float]:
    """20 readings from a 200-mL bag, the nurse empties it half a period after reading 19
    (taking `pause_s` more, during which the meter sends nothing usable), then 10 more.
    Returns (time of the last reading before the change, time of the last reading)."""
    p, step = period(name), per_reading(name)
    sent = send_steady(m, T0, 20, step, level=200)
    t_a = sent[-1][0]
    t_change = t_a + p / 2 + pause_s / 2
    t_b = t_a + p + pause_s
    if pause_s and PROFILES[name].fields.status is not None:
        fault = "MOV" if "MOV" not in PROFILES[name].status.ok else "paused"
        only(m.send(t_a + p, 123.0, status=fault), Outcome.DEVICE_FAULT)
    rate = FLOW_ML_H / 3600
    m.send(t_b, rate * (t_b - t_change), bag_flag=flag)
    for i in range(1, 10):
        t = t_b + i * p
        m.send(t, rate * (t - t_change))
    return t_a, t_b + 9 * p


@pytest.mark.parametrize("name", FLAGGED)
def test_bag_change_by_flag(name: str) -> None:
    m = Meter(PROFILES[name])
    _, t_last = _bag_stream(name, m, flag=True)
    assert m.outcomes().get("bag_change") == 1
    assert m.total() == pytest.approx(true_volume(name, T0, t_last), abs=0.3)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_bag_change_by_fall_to_near_zero(name: str) -> None:
    m = Meter(PROFILES[name])
    _, t_last = _bag_stream(name, m, flag=False)
    assert m.outcomes().get("bag_change") == 1
    assert "bag_change_inferred" not in m.outcomes()
    assert m.total() == pytest.approx(true_volume(name, T0, t_last), abs=0.3)
    assert m.effects == []  # a bag change is normal, not a rejection


@pytest.mark.parametrize(
    ("name", "flag"), [(n, False) for n in CUMULATIVE] + [(n, True) for n in FLAGGED]
)
def test_unseen_volume_of_a_slow_emptying_is_estimated_and_marked(name: str, flag: bool) -> None:
    m = Meter(PROFILES[name])
    pause = 6 * 60.0
    t_a, t_last = _bag_stream(name, m, flag=flag, pause_s=pause)
    assert m.outcomes().get("bag_change") == 1
    # the 6 minutes between the last full-bag reading and the first empty-bag reading:
    # volume from the flow before (1 mL/min), state estimated
    vol, state = m.minutes(t_a + 60, t_a + pause)
    assert list(state) == [ESTIMATED] * len(state) and len(state) >= 5
    np.testing.assert_allclose(vol, FLOW_ML_H / 60, atol=0.05)
    assert m.total() == pytest.approx(true_volume(name, T0, t_last), abs=0.3)
    # outside the emptying, minutes are measured
    _, before = m.minutes(T0, t_a)
    assert set(before.tolist()) == {MEASURED}


@pytest.mark.parametrize("name", CUMULATIVE)
def test_small_fall_is_noise_and_nothing_is_counted_twice(name: str) -> None:
    p, step = period(name), per_reading(name)
    dip = PROFILES[name].bag_change.noise_fall_ml * 0.6
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 6, step, level=300)
    t, v = sent[-1]
    m.send(t + p, v - dip)  # the float sensor or the scale wobbles down
    for i in range(2, 8):
        m.send(t + i * p, v + i * step)
    assert m.outcomes().get("noise_fall") == 1
    assert m.effects == []
    # the baseline held: the total is the rise from the first to the last reading, once
    assert m.total() == pytest.approx(true_volume(name, T0, t + 7 * p), abs=grams_rounding(name))
    vol, _ = m.minutes(T0, t + 7 * p)
    assert (vol >= -1e-9).all()


@pytest.mark.parametrize("name", CUMULATIVE)
def test_noisy_readings_leave_no_unknown_minute_between_readings(name: str) -> None:
    p, step = period(name), per_reading(name, 20.0)  # invented low flow, 20 mL/h
    wobble = [0.0, 2.0, -1.5, 1.0, -2.0, 0.5, 1.5, -1.0]  # invented meter noise, mL
    m = Meter(PROFILES[name])
    n = int(2 * 3600 / p)
    for i in range(n):
        m.send(T0 + i * p, 200 + i * step + wobble[i % len(wobble)])
    assert m.outcomes().get("noise_fall", 0) > 0
    _, state = m.minutes(T0, T0 + (n - 1) * p)
    assert (state == MEASURED).all(), f"{int((state != MEASURED).sum())} minutes not measured"
    (h,) = [h for h in m.series.completed_hours() if h.hour_start_min * 60 == T0]
    assert h.measured_fraction == 1.0


# --- implausible jumps and falls ------------------------------------------------------


def _level_stream(name: str, m: Meter, n: int = 10, level: float = 500.0) -> list:
    return send_steady(m, T0, n, per_reading(name), level=level)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_spike_is_held_then_dropped_when_the_next_reading_returns(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    sent = _level_stream(name, m)
    t, v = sent[-1]
    max_per_period = PROFILES[name].limits.max_flow_ml_h * p / 3600
    spike = 300.0
    assert spike > max_per_period  # beyond the maximum plausible flow
    assert m.send(t + p, v + step + spike) == []  # held, not yet judged
    assert m.engine.quality()[m.device]["held"] == 1
    assert "spike_held" not in m.outcomes()
    only(m.send(t + 2 * p, v + 2 * step), Outcome.ARTEFACT_DROPPED)
    m.send(t + 3 * p, v + 3 * step)
    assert m.outcomes().get("artefact_dropped") == 1
    assert m.engine.quality()[m.device]["held"] == 0
    assert m.total() == pytest.approx(true_volume(name, T0, t + 3 * p), abs=grams_rounding(name))


@pytest.mark.parametrize("name", CUMULATIVE)
def test_spike_confirmed_by_the_next_reading_is_counted(name: str) -> None:
    """A catheter bolus after a blockage is cleared: the jump is real and stays."""
    p = period(name)
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 10, 0.0, level=400)  # blocked: no flow for 10 periods
    t, v = sent[-1]
    bolus = 250.0  # invented
    assert bolus > PROFILES[name].limits.max_flow_ml_h * p / 3600
    assert m.send(t + p, v + bolus) == []
    m.send(t + 2 * p, v + bolus + 1)
    m.send(t + 3 * p, v + bolus + 2)
    assert m.outcomes().get("spike_confirmed") == 1
    assert "artefact_dropped" not in m.outcomes()
    assert m.total() == pytest.approx(bolus + 2, abs=grams_rounding(name) + 0.1)
    # the bolus lands in the period where the meter saw it
    vol, _ = m.minutes(t, t + p)
    assert vol.sum() == pytest.approx(bolus, abs=0.2)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_large_fall_not_to_near_zero_is_held_then_dropped_if_refuted(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, v = _level_stream(name, m)[-1]
    assert m.send(t + p, 250.0) == []  # a sudden reading half the bag lower
    assert m.engine.quality()[m.device]["held"] == 1
    only(m.send(t + 2 * p, v + 2 * step), Outcome.ARTEFACT_DROPPED)
    assert "bag_change_inferred" not in m.outcomes()
    assert m.total() == pytest.approx(true_volume(name, T0, t + 2 * p), abs=grams_rounding(name))


@pytest.mark.parametrize("name", CUMULATIVE)
def test_large_fall_confirmed_by_the_next_reading_is_an_inferred_bag_change(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, _ = _level_stream(name, m)[-1]
    low = 250.0
    m.send(t + p, low)
    m.send(t + 2 * p, low + step)
    assert m.outcomes().get("bag_change_inferred") == 1
    assert m.engine.quality()[m.device]["held"] == 0
    # nothing is lost: at least what the patient produced is counted
    assert m.total() >= true_volume(name, T0, t + 2 * p) - grams_rounding(name)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_sample_taken_from_the_bag_adds_no_volume(name: str) -> None:
    """A nurse draws 30 mL from the bag's sampling port: the level falls and stays."""
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, v = _level_stream(name, m)[-1]
    sample = 30.0  # invented
    for i in range(1, 6):
        m.send(t + i * p, v + i * step - sample)
    produced = true_volume(name, T0, t + 5 * p)
    # at most what the profile's own maximum plausible flow allows over the fall
    slack = PROFILES[name].limits.max_flow_ml_h * p / 3600
    assert m.total() <= produced + slack


# --- clocks ----------------------------------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_device_clock_in_the_future_uses_the_receive_time(name: str) -> None:
    p = period(name)
    skew = 2 * 3600.0  # the meter's clock runs two hours ahead
    assert skew > PROFILES[name].timing.clock_tolerance_s
    m = Meter(PROFILES[name])
    for i in range(6):
        recv = T0 + i * p + 1
        assert m.send(recv - 1 + skew, value(name, i), recv=recv) == []
    assert m.outcomes() == {"clock_skew": 6}
    assert m.series.latest_time == T0 + 5 * p + 1
    _, future = m.minutes(T0 + skew - 600, T0 + skew + 3600)
    assert (future == UNKNOWN).all()  # nothing booked at the meter's own times
    assert m.total() == pytest.approx(true_volume(name, T0, T0 + 5 * p), abs=grams_rounding(name))


@pytest.mark.parametrize("name", ALL)
def test_device_clock_slightly_ahead_within_tolerance_is_trusted(name: str) -> None:
    p = period(name)
    ahead = PROFILES[name].timing.clock_tolerance_s / 2
    m = Meter(PROFILES[name])
    for i in range(4):
        t = T0 + i * p
        m.send(t, value(name, i), recv=t - ahead)
    assert m.outcomes() == {"accepted": 4}
    assert m.series.latest_time == T0 + 3 * p


@pytest.mark.parametrize("name", ALL)
def test_store_and_forward_burst_is_accepted_in_order_at_device_times(name: str) -> None:
    """A meter offline for 3 h uploads its buffer within seconds, then reports live."""
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    n = int(3 * 3600 / p)  # buffered: device times T0 .. T0 + 3 h
    back_online = T0 + 3 * 3600.0 + 20 * 60  # the upload starts 20 min after the last
    for i in range(n):
        assert m.send(T0 + i * p, value(name, i), recv=back_online + i * 0.01) == []
    live = int((back_online - T0) / p) + 1
    for i in range(live, live + 3):
        m.send(T0 + i * p, value(name, i))
    assert m.outcomes() == {"store_forward": n, "accepted": 3}
    expected = true_volume(name, T0, T0 + (live + 2) * p)
    if name in INTERVAL:  # the intervals never sent stay unknown
        expected = (n + 3) * step
    assert m.total() == pytest.approx(expected, abs=grams_rounding(name))
    # the volume lands in the hours it was produced, as measured
    lo = T0 - (PROFILES[name].volume.interval_s or 0)
    hi = math.floor((T0 + (n - 1) * p) / 60) * 60.0
    vol, state = m.minutes(lo, hi)
    assert (state == MEASURED).all()
    assert vol.sum() == pytest.approx(FLOW_ML_H * (hi - lo) / 3600, abs=grams_rounding(name))


@pytest.mark.parametrize("name", ALL)
def test_older_than_the_store_and_forward_limit_is_too_old(name: str) -> None:
    m = Meter(PROFILES[name])
    limit = PROFILES[name].timing.store_forward_max_s
    only(m.send(T0, 100.0, recv=T0 + limit + 3600), Outcome.TOO_OLD)
    assert m.outcomes() == {"too_old": 1}
    assert m.total() == 0 and m.series.latest_time is None


# --- range, binding -------------------------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_outside_the_physical_range_is_rejected_and_counted(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 4, step, level=100)
    before = m.total()
    only(m.send(sent[-1][0] + p, PROFILES[name].limits.max_ml + 50), Outcome.OUT_OF_RANGE)
    only(m.send(sent[-1][0] + 2 * p, -40.0), Outcome.OUT_OF_RANGE)
    assert m.outcomes().get("out_of_range") == 2
    assert m.total() == before


@pytest.mark.parametrize("name", ALL)
def test_unbound_meter_is_counted_and_never_guessed_onto_a_bed(name: str) -> None:
    m = Meter(PROFILES[name])
    stranger = Meter(PROFILES[name], device="m-99")
    stranger.engine = m.engine  # same engine, never named in any context
    for i in range(5):
        t = T0 + i * period(name)
        only(stranger.send(t, 100 + i * 5.0), Outcome.UNBOUND)
    assert m.outcomes("m-99") == {"unbound": 5}
    assert m.engine.quality()["m-99"]["bed"] is None
    for bed in m.engine.beds.values():
        assert bed.series.total() == 0
        assert bed.series.first_minute is None and bed.series.latest_time is None


@pytest.mark.parametrize("name", ALL)
def test_meter_moved_to_another_bed_starts_a_fresh_baseline(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    interval = name in INTERVAL
    send_steady(m, T0, 5, step, level=300)
    first_bed = m.total()
    # the new bed's context says it takes the meter over (else the move is refused)
    ctx = context_payload([m.device]) | {"replaces": [m.device]}
    eff = m.engine.step("hourwatch/beds/b02/context", ctx, T0 + 5 * p)
    assert [getattr(e, "code", None) for e in eff] == ["device_moved"]
    # on the new bed the bag already holds 300+ mL of the previous patient's urine
    for i in range(5, 10):
        m.send(T0 + i * p, value(name, i, level=300))
    assert m.engine.quality()[m.device]["bed"] == "b02"
    assert m.engine.beds["b01"].series.total() == first_bed
    new = m.engine.beds["b02"].series.total()
    expected = 5 * step if interval else 4 * step
    assert new == pytest.approx(expected, abs=grams_rounding(name))


@pytest.mark.parametrize("name", CUMULATIVE)
def test_repeated_identical_context_keeps_the_baseline(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    send_steady(m, T0, 5, step, level=300)
    m.bind("b01", at=T0 + 5 * p)  # a retained context redelivered after a reconnect
    for i in range(5, 10):
        m.send(T0 + i * p, 300 + i * step)
    assert m.total() == pytest.approx(true_volume(name, T0, T0 + 9 * p), abs=grams_rounding(name))


@pytest.mark.parametrize("name", ALL)
def test_meter_removed_from_its_bed_becomes_unbound(name: str) -> None:
    m = Meter(PROFILES[name])
    send_steady(m, T0, 3, per_reading(name), level=100)
    before = m.total()
    eff = m.engine.step("hourwatch/beds/b01/context", {"ward": "icu-east", "device_ids": []}, T0)
    assert eff == []
    only(m.send(T0 + 10 * period(name), 150.0), Outcome.UNBOUND)
    assert m.total() == before


def test_bad_context_and_unknown_topics_are_counted_outcomes() -> None:
    m = Meter(PROFILES["reference-cumulative"])
    e = only(
        m.raw("hourwatch/beds/b05/context", {"ward": "x", "device_ids": "m-01"}, T0),
        Outcome.BAD_CONTEXT,
    )
    assert "device_ids" in e.detail
    only(m.raw("hourwatch/beds/b05/context", b"\xff{", T0), Outcome.BAD_CONTEXT)
    assert m.engine.context_rejections["b05"] == 2
    assert "b05" not in m.engine.beds
    only(m.raw("hourwatch/beds/b05/vitals/extra", "{}", T0), Outcome.UNKNOWN_TOPIC)
    only(m.raw("elsewhere/m-01/volume", "{}", T0), Outcome.UNKNOWN_TOPIC)
    assert m.engine.unrouted[Outcome.UNKNOWN_TOPIC] == 2


# --- interval meters ------------------------------------------------------------------


@pytest.mark.parametrize("name", INTERVAL)
def test_overlapping_interval_is_refused(name: str) -> None:
    p = period(name)
    m = Meter(PROFILES[name])
    send_steady(m, T0, 4, 10.0)
    before = m.total()
    only(m.send(T0 + 3 * p + p / 2, 6.0), Outcome.CONFLICTING_DUPLICATE)
    only(m.send(T0 + p + p / 3, 6.0, recv=T0 + 3 * p + 2), Outcome.CONFLICTING_DUPLICATE)
    assert m.outcomes().get("conflicting_duplicate") == 2
    assert m.total() == before


@pytest.mark.parametrize("name", INTERVAL)
def test_interval_jitter_of_a_few_seconds_keeps_the_volume(name: str) -> None:
    """Device times jitter and local-time stamps are truncated to the second: an
    interval that overlaps the one before by a few seconds is the next interval, not
    a second report of the same urine."""
    p = period(name)
    m = Meter(PROFILES[name])
    send_steady(m, T0, 3, 10.0)
    assert m.send(T0 + 3 * p - 20, 10.0) == []  # 20 s early: overlaps by 20 s
    assert m.send(T0 + 4 * p + 7, 10.0) == []  # 7 s late
    assert m.outcomes() == {"accepted": 5}
    assert m.total() == pytest.approx(50.0)
    vol, _ = m.minutes(T0 - p, T0 + 4 * p + 60)
    assert (vol >= 0).all()


@pytest.mark.parametrize("name", INTERVAL)
def test_interval_volume_beyond_the_maximum_flow_is_implausible(name: str) -> None:
    p = PROFILES[name]
    m = Meter(p)
    too_much = p.limits.max_flow_ml_h * (p.volume.interval_s or 0) / 3600 + 20
    assert too_much <= p.limits.max_ml  # in range, but not in 10 minutes
    only(m.send(T0, too_much), Outcome.IMPLAUSIBLE_FLOW)
    assert m.total() == 0


@pytest.mark.parametrize("name", INTERVAL)
def test_interval_volume_covers_the_interval_before_the_reading(name: str) -> None:
    p = PROFILES[name]
    m = Meter(p)
    m.send(T0 + 600, 12.0)
    vol, state = m.minutes(T0, T0 + 600)
    np.testing.assert_allclose(vol, 12.0 / 10)
    assert (state == MEASURED).all()


# --- what the series says about time ---------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_minutes_after_the_latest_reading_are_unknown_not_zero(name: str) -> None:
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0 + 20 * 60, 10, per_reading(name), level=100)
    t_last = sent[-1][0]
    assert m.series.latest_time == t_last
    vol, state = m.minutes(t_last + 60, t_last + 4 * 3600)
    assert (state == UNKNOWN).all() and (vol == 0).all()
    # the clock hour holding the latest reading is not complete, so it is not reported
    hours = list(m.series.completed_hours())
    assert all(h.hour_start_min * 60 + 3600 <= t_last for h in hours)


@pytest.mark.parametrize("name", CUMULATIVE)
def test_gap_longer_than_the_interpolation_limit_is_estimated(name: str) -> None:
    p, step = period(name), per_reading(name)
    max_gap = PROFILES[name].timing.max_interpolation_gap_s
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 3, step, level=100)
    t, v = sent[-1]
    gap = max_gap + 15 * 60.0  # 45 min without a reading
    m.send(t + gap, v + FLOW_ML_H * gap / 3600)
    m.send(t + gap + p, v + FLOW_ML_H * gap / 3600 + step)
    vol, state = m.minutes(t + 60, t + gap - 60)
    assert (state == ESTIMATED).all()
    np.testing.assert_allclose(vol, FLOW_ML_H / 60, atol=0.02)  # spread evenly
    assert m.total() == pytest.approx(true_volume(name, T0, t + gap + p), abs=grams_rounding(name))


@pytest.mark.parametrize("name", CUMULATIVE)
def test_gap_within_the_interpolation_limit_stays_measured(name: str) -> None:
    step = per_reading(name)
    max_gap = PROFILES[name].timing.max_interpolation_gap_s
    m = Meter(PROFILES[name])
    t, v = send_steady(m, T0, 3, step, level=100)[-1]
    gap = max_gap - 10 * 60.0
    m.send(t + gap, v + FLOW_ML_H * gap / 3600)
    _, state = m.minutes(t, t + gap)
    assert (state == MEASURED).all()


@pytest.mark.parametrize("name", INTERVAL)
def test_interval_gap_is_unknown_not_zero(name: str) -> None:
    p = period(name)
    m = Meter(PROFILES[name])
    send_steady(m, T0, 3, 10.0)
    m.send(T0 + 2 * p + 3600, 10.0)
    vol, state = m.minutes(T0 + 2 * p + 60, T0 + 2 * p + 3600 - p - 60)
    assert (state == UNKNOWN).all() and (vol == 0).all()


# --- the accounting --------------------------------------------------------------------


@pytest.mark.parametrize("name", ALL)
def test_every_message_is_counted_exactly_once(name: str) -> None:
    """received = sum of outcomes (+ held) whatever mix of faults arrives."""
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    sent = send_steady(m, T0, 10, step, level=100)
    t, v = sent[-1]
    m.raw(*m.payload(*sent[3], seq=4), recv=t + 2)  # duplicate
    m.send(t + p, 99999.0)  # out of range
    m.send(sent[0][0], v, seq=500, recv=t + 3 * 3600)  # conflicting or late
    m.send(t + 2 * p, v + 2 * step + 500)  # spike (held on cumulative meters)
    q = m.engine.quality()[m.device]
    outcomes = q["outcomes"]
    assert isinstance(outcomes, dict)
    assert q["received"] == sum(outcomes.values()) + q["held"] == 14


# --- artefacts that look like bag changes or surges (issue 14) -------------------------
# An invented steady flow of 150 mL/h: the rate of the fault-injection run that found
# these defects (invented for the test, not a clinical value).
GLITCH_FLOW_ML_H = 150.0


def _glitch_stream(
    name: str, m: Meter, glitches: dict[int, float], n: int, level: float = 400.0
) -> list[tuple[float, float]]:
    """n readings at GLITCH_FLOW_ML_H from `level`; reading i is replaced by the value
    glitches[i] (the meter's true content is unchanged). Returns the true (t, content)."""
    p, step = period(name), per_reading(name, GLITCH_FLOW_ML_H)
    truth = []
    for i in range(n):
        t, v = T0 + i * p, level + i * step
        m.send(t, glitches.get(i, v))
        truth.append((t, v))
    return truth


@pytest.mark.parametrize("name", CUMULATIVE)
def test_a_single_zero_reading_then_back_at_the_level_is_an_artefact(name: str) -> None:
    m = Meter(PROFILES[name])
    truth = _glitch_stream(name, m, {10: 0.0}, 30)
    out = m.outcomes()
    assert out.get("artefact_dropped") == 1
    assert "bag_change" not in out and "bag_change_inferred" not in out
    assert "spike_confirmed" not in out
    assert m.total() == pytest.approx(
        truth[-1][1] - truth[0][1], abs=2 * grams_rounding(name) + 1e-6
    )


@pytest.mark.parametrize("name", CUMULATIVE)
def test_two_zero_readings_then_back_at_the_level_are_artefacts(name: str) -> None:
    m = Meter(PROFILES[name])
    truth = _glitch_stream(name, m, {10: 0.0, 11: 0.0}, 30)
    out = m.outcomes()
    assert out.get("artefact_dropped") == 2, out
    assert "bag_change" not in out and "spike_confirmed" not in out
    assert m.total() == pytest.approx(
        truth[-1][1] - truth[0][1], abs=2 * grams_rounding(name) + 1e-6
    )
    q = m.engine.quality()[m.device]
    assert q["received"] == sum(out.values()) + q["held"] == 30


@pytest.mark.parametrize("name", CUMULATIVE)
def test_a_two_reading_surge_that_falls_back_to_the_level_is_an_artefact(name: str) -> None:
    """Two readings 300 mL too high, then the meter reads the true content again: no
    urine was made by the surge, and nothing is counted for it."""
    m = Meter(PROFILES[name])
    step = per_reading(name, GLITCH_FLOW_ML_H)
    surge = 300.0  # invented, beyond the maximum plausible flow in one period
    assert surge > PROFILES[name].limits.max_flow_ml_h * period(name) / 3600
    truth = _glitch_stream(name, m, {10: 400 + 10 * step + surge, 11: 400 + 11 * step + surge}, 30)
    out = m.outcomes()
    assert out.get("artefact_dropped") == 2, out
    assert "spike_confirmed" not in out and "bag_change_inferred" not in out
    assert m.total() == pytest.approx(
        truth[-1][1] - truth[0][1], abs=2 * grams_rounding(name) + 1e-6
    )


@pytest.mark.parametrize("name", CUMULATIVE)
def test_zero_glitches_an_hour_apart_leave_hourly_volumes_at_the_truth(name: str) -> None:
    """The fault-injection case: a glitch to 0 mL in each of two hours at a true
    150 mL/h. Every completed clock hour is compared with a numpy sum of the truth."""
    p = period(name)
    per_hour = round(3600 / p)
    glitches = {per_hour + 7: 0.0, 2 * per_hour + 11: 0.0}
    m = Meter(PROFILES[name])
    n = 4 * per_hour + 1
    _glitch_stream(name, m, glitches, n)
    minutes = np.full(4 * 60, GLITCH_FLOW_ML_H / 60)  # the true volume, minute by minute
    truth = minutes.reshape(4, 60).sum(axis=1)
    hours = [h for h in m.series.completed_hours() if T0 <= h.hour_start_min * 60 < T0 + 4 * 3600]
    assert len(hours) == 4
    np.testing.assert_allclose([h.volume_ml for h in hours], truth, atol=1.0)
    assert m.outcomes().get("artefact_dropped") == 2


@pytest.mark.parametrize("name", CUMULATIVE)
def test_an_emptying_is_recognised_one_reading_after_the_fall(name: str) -> None:
    """A real bag change without a flag: the fall to near zero waits for one reading,
    which continues from near zero, and is then a bag change at the fall's time."""
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, _ = send_steady(m, T0, 10, step, level=400)[-1]
    assert m.send(t + p, 1.0) == []
    assert m.engine.quality()[m.device]["held"] == 1  # waits one reading period at most
    assert m.send(t + 2 * p, 1.0 + step) == []
    assert m.outcomes().get("bag_change") == 1
    assert m.engine.quality()[m.device]["held"] == 0
    assert m.series.latest_time == t + 2 * p
    for i in range(3, 12):  # and the new bag is never taken back
        m.send(t + i * p, 1.0 + (i - 1) * step)
    assert m.outcomes().get("bag_change") == 1 and "artefact_dropped" not in m.outcomes()


@pytest.mark.parametrize("name", FLAGGED)
def test_a_flagged_bag_change_is_believed_at_once(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, _ = send_steady(m, T0, 10, step, level=400)[-1]
    assert m.send(t + p, 0.5, bag_flag=True) == []
    assert m.outcomes().get("bag_change") == 1
    assert m.engine.quality()[m.device]["held"] == 0
    assert m.series.latest_time == t + p


@pytest.mark.parametrize("name", CUMULATIVE)
def test_one_wild_reading_at_the_old_level_does_not_undo_a_real_emptying(name: str) -> None:
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, v = send_steady(m, T0, 10, step, level=400)[-1]
    # emptied half a period after t: the new bag holds what was made since
    m.send(t + p, step / 2)
    m.send(t + 2 * p, step * 1.5)
    m.send(t + 3 * p, v + 3 * step)  # one reading back at the old bag's level
    for i in range(4, 10):
        m.send(t + i * p, step * (i - 0.5))
    out = m.outcomes()
    assert out.get("bag_change") == 1 and out.get("artefact_dropped") == 1, out
    # the old bag up to t, the emptying's estimate, the new bag from its first reading
    assert m.total() == pytest.approx(
        true_volume(name, T0, t + 9 * p), abs=2 * grams_rounding(name) + 0.2
    )


@pytest.mark.parametrize("name", CUMULATIVE)
def test_a_reading_older_than_a_held_one_is_judged_first(name: str) -> None:
    """The first empty-bag reading arrives before the last full-bag one (reordered in
    the network): the full-bag reading is used, and the emptying is still recognised."""
    p, step = period(name), per_reading(name)
    m = Meter(PROFILES[name])
    t, v = send_steady(m, T0, 10, step, level=400)[-1]
    # emptied half a period after t + p: the new bag holds what was made since
    m.send(t + 2 * p, step / 2, recv=t + 2 * p + 1)  # held: a fall to near zero
    assert m.send(t + p, v + step, recv=t + 2 * p + 2) == []  # the older one, late
    m.send(t + 3 * p, step * 1.5)
    m.send(t + 4 * p, step * 2.5)
    out = m.outcomes()
    assert out.get("bag_change") == 1 and "artefact_dropped" not in out, out
    assert m.series.latest_time == t + 4 * p
    assert m.total() == pytest.approx(
        true_volume(name, T0, t + 4 * p), abs=2 * grams_rounding(name) + 0.2
    )


def test_review_shows_readings_taken_back_as_artefacts() -> None:
    """The review tools file each reading's final outcome: readings first counted (a
    bag change by two zero readings) and taken back later show as artefacts."""
    from daemon.engine.engine import Engine
    from daemon.review.recorder import OUTCOMES, Recorder

    name = "reference-cumulative"
    rec = Recorder(keep_traces_for="b01")
    m = Meter(PROFILES[name])
    m.engine = Engine(PROFILES.values(), observe=rec.observe)
    m.bind("b01")
    _glitch_stream(name, m, {10: 0.0, 11: 0.0}, 20)
    codes = [str(OUTCOMES[c]) for c in rec.readings["b01"].codes]
    assert codes[10:12] == ["artefact_dropped", "artefact_dropped"]
    assert "bag_change" not in codes
    assert [str(o) for _, o in rec.traces[10:12]] == ["artefact_dropped"] * 2
    assert codes.count("accepted") == 18


@pytest.mark.parametrize("name", CUMULATIVE)
def test_a_late_reading_while_a_return_to_the_level_waits_changes_nothing(name: str) -> None:
    """Two zero readings (taken as an emptying, still undoable), then the meter back on
    its level (held: the emptying may never have happened), then a reading delayed from
    before the second zero. The late one is refused, not the emptying's undo: the next
    reading on the level takes the emptying back and the bag's volume stays what the
    patient made. (Before, the late reading made the emptying final and the next one
    raised an AssertionError in the cleaner.) Invented glitch on an invented flow."""
    m = Meter(PROFILES[name])
    p = period(name)
    truth = _glitch_stream(name, m, {10: 0.0, 11: 0.0}, 13)  # 12: back on the level
    late_t, late_v = T0 + 11 * p - 1, truth[11][1]
    assert m.send(late_t, late_v, recv=T0 + 12 * p + 2) == [
        RejectedInput(T0 + 12 * p + 2, m.payload(late_t, late_v, seq=999)[0], m.device,
                      Outcome.LATE, "older than the reorder tolerance")
    ]  # fmt: skip
    step = per_reading(name, GLITCH_FLOW_ML_H)
    for i in range(13, 20):  # the meter goes on from its level
        m.send(T0 + i * p, 400.0 + i * step)
    out = m.outcomes()
    assert "bag_change" not in out and "bag_change_inferred" not in out
    assert "spike_confirmed" not in out
    assert out.get("late") == 1 and out.get("artefact_dropped") == 2
    assert m.total() == pytest.approx(
        19 * step, abs=2 * grams_rounding(name) + 1e-6
    )  # what the patient made from the first reading to the last
