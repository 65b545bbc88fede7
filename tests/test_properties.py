"""Hypothesis properties of the intake engine.

(a) Whatever the pattern of bag changes, duplicates and reordering within tolerance, a
    bed's minute series sums to the volume truly produced between the first and the last
    reading (constant flow per example, no noise), for every cumulative family.
(b) No byte string, text or JSON value crashes decoding or `Engine.step`.
(c) The monotone fit is non-decreasing, never below its floor, and keeps the sum when the
    floor does not bind.

Flows, meters and beds are invented.
"""

from __future__ import annotations

import itertools
import json
import math
from typing import Any

from hypothesis import assume, given, settings
from hypothesis import strategies as st

from daemon.engine.cleaning import isotonic_fit
from daemon.engine.decode import Decoder, Reading, Rejected
from daemon.engine.effects import RejectedInput
from daemon.engine.engine import Engine
from tests.conftest import CUMULATIVE, FLAGGED, PROFILES, T0, Meter
from tests.fuzzing import json_values, payloads

# Nurses empty a bag that holds something; an invented floor for the simulation.
MIN_BAG_AT_CHANGE_ML = 100.0


@st.composite
def streams(draw: st.DrawFn, name: str) -> dict[str, Any]:
    p = PROFILES[name]
    period = float(p.timing.period_s)
    n = draw(st.integers(12, 150))
    # source for the range: up to 600 mL/h covers oliguria to a diuresis above the
    # 200 mL/h POD line (Halbgewachs & Domes, Can Fam Physician 2015)
    flow = draw(st.floats(0, 600))
    start_level = draw(st.floats(0, 1500))
    # a bag change between reading k-1 and k, at fraction u of the period
    changes = draw(
        st.lists(
            st.tuples(st.integers(1, n - 1), st.floats(0.05, 0.95)),
            max_size=6,
            unique_by=lambda c: c[0],
        )
    )
    send_flag = name in FLAGGED and draw(st.booleans())
    dups = draw(st.sets(st.integers(0, n - 1), max_size=n // 4))
    dup_delay = draw(st.floats(1, p.timing.reorder_tolerance_s))
    # any adjacent pair may arrive swapped, the first two included
    swaps = draw(st.sets(st.integers(0, n - 2), max_size=n // 6))
    return {
        "period": period, "n": n, "flow": flow, "start_level": start_level,
        "changes": sorted(changes), "send_flag": send_flag, "dups": dups,
        "dup_delay": dup_delay, "swaps": swaps,
    }  # fmt: skip


def _run_stream(name: str, s: dict[str, Any]) -> tuple[Meter, float]:
    period, n, rate = s["period"], s["n"], s["flow"] / 3600.0
    times = [T0 + i * period for i in range(n)]
    # bag content at each reading, with the changes the nurse actually made
    last_change_t, base = None, s["start_level"]
    change_times = []
    prev_k = 0
    for k, u in s["changes"]:
        # the unseen volume at a change is estimated from the flow before it, which
        # needs readings of the same bag to judge: at least three per bag
        if k < prev_k + 3:
            continue
        tc = times[k - 1] + u * period
        since = tc - (last_change_t if last_change_t is not None else times[0])
        held = (base if last_change_t is None else 0.0) + rate * since
        if held < MIN_BAG_AT_CHANGE_ML:
            continue
        change_times.append((k, tc))
        last_change_t, base, prev_k = tc, 0.0, k
    values, flags = [], []
    for i, t in enumerate(times):
        past = [(k, tc) for k, tc in change_times if tc <= t]
        if past:
            values.append(rate * (t - past[-1][1]))
        else:
            values.append(s["start_level"] + rate * (t - times[0]))
        flags.append(s["send_flag"] and any(k == i for k, _ in change_times))

    # the nurse empties a bag before the meter's capacity is reached
    assume(max(values) <= PROFILES[name].limits.max_ml - 10)
    m = Meter(PROFILES[name])
    msgs = []  # (receive time, order, topic, body)
    for i, t in enumerate(times):
        topic, body = m.payload(t, values[i], seq=i + 1, bag_flag=flags[i])
        recv = t + 1.0
        if i in s["swaps"] and (i - 1) not in s["swaps"]:
            recv = times[i + 1] + 2.0  # arrives after the next reading, within tolerance
        msgs.append((recv, i, topic, body))
        if i in s["dups"]:
            msgs.append((recv + s["dup_delay"], i + 0.5, topic, body))
    for recv, _, topic, body in sorted(msgs, key=lambda x: (x[0], x[1])):
        m.raw(topic, body, recv)
    # A last reading that fell to near zero without a flag waits for the next one (one
    # reading period, DEVELOPERS.md section 2), so the truth runs to the newest reading
    # in the series.
    newest = m.series.latest_time
    assert newest is not None and newest >= times[-2]
    return m, rate * (newest - times[0])


def _tolerance(name: str) -> float:
    """The profile's resolution, plus payload rounding (0.1 mL or 0.1 g at each end)."""
    return 2 * PROFILES[name].volume.resolution_ml + 0.5


def _check_stream(name: str, s: dict[str, Any]) -> None:
    m, true = _run_stream(name, s)
    q = m.engine.quality()[m.device]
    outcomes = q["outcomes"]
    assert isinstance(outcomes, dict)
    assert q["received"] == sum(outcomes.values()) + q["held"]
    # a redelivered copy of a reading that was itself late is late again
    late = outcomes.get("late", 0)
    assert len(s["dups"]) - late <= outcomes.get("duplicate", 0) <= len(s["dups"])
    assert abs(m.total() - true) <= _tolerance(name), (m.total(), true, outcomes)


@settings(max_examples=30)
@given(streams("reference-cumulative"))
def test_sum_equals_truth_reference_cumulative(s: dict[str, Any]) -> None:
    _check_stream("reference-cumulative", s)


@settings(max_examples=30)
@given(streams("gravimetric-text"))
def test_sum_equals_truth_gravimetric_text(s: dict[str, Any]) -> None:
    _check_stream("gravimetric-text", s)


@settings(max_examples=30)
@given(streams("nested-telemetry"))
def test_sum_equals_truth_nested_telemetry(s: dict[str, Any]) -> None:
    _check_stream("nested-telemetry", s)


@settings(max_examples=30)
@given(streams("keyvalue-decilitre"))
def test_sum_equals_truth_keyvalue_decilitre(s: dict[str, Any]) -> None:
    _check_stream("keyvalue-decilitre", s)


def test_every_cumulative_family_has_a_sum_property() -> None:
    covered = {"reference-cumulative", "gravimetric-text", "nested-telemetry",
               "keyvalue-decilitre"}  # fmt: skip
    assert set(CUMULATIVE) <= covered, "add a property test for the new cumulative family"


# --- (b) nothing crashes ----------------------------------------------------------------

# strategies for any payload: tests/fuzzing.py (shared with the fuzz suite)


@given(st.data())
def test_decoding_never_raises(data: st.DataObject) -> None:
    name = data.draw(st.sampled_from(sorted(PROFILES)))
    payload = data.draw(payloads(name))
    r = Decoder(PROFILES[name]).decode("dev", payload)
    assert isinstance(r, Reading | Rejected)
    if isinstance(r, Reading):
        assert math.isfinite(r.device_time) and math.isfinite(r.volume_ml)
        p = PROFILES[name]
        assert p.limits.min_ml <= r.volume_ml <= p.limits.max_ml


def _topics() -> st.SearchStrategy[str]:
    device = st.text(st.characters(blacklist_characters="/"), min_size=1, max_size=10)
    routed = st.sampled_from(sorted(PROFILES)).flatmap(
        lambda n: device.map(lambda d: PROFILES[n].topic_for(d))
    )
    beds = st.sampled_from(["b1", "b2", "x/y"]).map(lambda b: f"hourwatch/beds/{b}/context")
    return routed | beds | st.text(max_size=40)


@given(st.lists(st.tuples(_topics(), st.data()), min_size=1, max_size=15))
def test_engine_step_never_raises(msgs: list[tuple[str, st.DataObject]]) -> None:
    engine = Engine(PROFILES.values())
    engine.step("hourwatch/beds/b1/context", {"ward": "w", "device_ids": ["d1", "d2"]}, T0)
    now = T0
    for topic, data in msgs:
        name = next((n for n, p in PROFILES.items() if p.topic_regex().match(topic)), None)
        payload = data.draw(payloads(name) if name else json_values.map(json.dumps))
        now += data.draw(st.floats(0, 600))
        effects = engine.step(topic, payload, now)
        assert all(isinstance(e, RejectedInput) for e in effects)
    for q in engine.quality().values():
        outcomes = q["outcomes"]
        assert isinstance(outcomes, dict)
        assert q["received"] == sum(outcomes.values()) + q["held"]


# --- (c) the monotone fit ---------------------------------------------------------------


@given(
    st.lists(st.floats(-1e6, 1e6, allow_nan=False), max_size=50),
    st.floats(-1e6, 1e6, allow_nan=False),
)
def test_isotonic_fit_is_non_decreasing_and_above_the_floor(ys: list[float], floor: float) -> None:
    fit = isotonic_fit(ys, floor)
    assert len(fit) == len(ys)
    assert all(f >= floor for f in fit)
    assert all(b >= a - 1e-9 * max(1.0, abs(a)) for a, b in itertools.pairwise(fit))
    if ys and floor <= min(ys):  # the floor cannot bind: pooling keeps the sum
        assert math.isclose(sum(fit), sum(ys), rel_tol=1e-9, abs_tol=1e-6)
    if ys == sorted(ys) and all(y >= floor for y in ys):  # already monotone: unchanged
        assert fit == ys
