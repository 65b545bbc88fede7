"""Fuzz: hostile and broken messages on every inbound topic, interleaved with a good meter
stream (strategies and driver in tests/fuzzing.py). For every generated run:

- no exception escapes the engine (step or advance);
- every message is counted exactly once by its outcome (per device: received = sum of
  outcomes + held; overall: Engine.messages_counted() = messages sent);
- the good bed's minute volumes, states and completed clock hours are exactly those of
  the same good stream without the fuzz.

A few thousand generated messages here (`make test`); benchmarks/bench_fuzz.py runs at
least 100,000 (`make bench`). Meters, beds and volumes are invented; no patient data.
"""

from __future__ import annotations

from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.rule_files import load_policy, load_rules
from tests.fuzzing import (
    NAMES,
    PROFILES,
    Screen,
    check,
    drive,
    good_stream,
    hostile_message,
)

RULES = load_rules()
POLICY = load_policy()
GOOD = {name: good_stream(name, hours=2.0) for name in NAMES}
CLEAN = {name: drive(GOOD[name], [], RULES, POLICY) for name in NAMES}
SCREENS = {name: Screen(GOOD[name]) for name in NAMES}
SENT: list[int] = []  # fuzz messages per example, for the summary test below
SEEN: set[str] = set()  # outcomes the fuzz reached


def fuzz_for(name: str) -> st.SearchStrategy[list[tuple[int, tuple[str, Any]]]]:
    screen = SCREENS[name]
    message = hostile_message.filter(lambda m: screen.allowed(*m)) | st.tuples(
        st.just("replay"), st.integers(0, 10**6)
    )
    return st.lists(st.tuples(st.integers(0, 10**6), message), min_size=40, max_size=200)


@settings(max_examples=70)
@given(st.data())
def test_fuzz_leaves_the_good_bed_and_the_counts_intact(data: st.DataObject) -> None:
    name = data.draw(st.sampled_from(NAMES))
    fuzz = data.draw(fuzz_for(name))
    fuzzed = drive(GOOD[name], fuzz, RULES, POLICY)
    check(CLEAN[name], fuzzed)
    SENT.append(fuzzed.fuzz)
    e = fuzzed.engine
    SEEN.update(str(k) for k in e.unrouted)
    SEEN.update(str(k) for k in e.input_rejections)
    SEEN.update(f"applied:{k}" for k in e.applied)
    SEEN.update("bad_context" for _ in e.context_rejections)
    for q in e.quality().values():
        SEEN.update(q["outcomes"])  # type: ignore[arg-type]


def test_the_good_streams_are_real_streams() -> None:
    """The comparison is worth something: each family's good stream (bag changes and
    redeliveries included) fills the good bed with the true volume, as the simulator's
    minute-by-minute truth sums it with numpy."""
    from tests.fuzzing import GOOD_BED

    for name in NAMES:
        sim = GOOD[name].sim
        series = CLEAN[name].engine.beds[GOOD_BED].series
        first = sim.first_reading_s
        if PROFILES[name].volume.interval_s:  # an interval meter's first reading covers
            first -= PROFILES[name].volume.interval_s  # the interval before it
        truth = sim.true_between(first, sim.last_reading_s)
        tol = 2 * PROFILES[name].volume.resolution_ml + 1  # rounding of the payloads
        assert abs(series.total() - truth) <= tol, (name, series.total(), truth)
        assert len(list(series.completed_hours())) >= 1


def test_the_fuzz_sent_a_few_thousand_messages_and_reached_every_kind_of_refusal() -> None:
    # runs after the property above (pytest keeps file order)
    assert sum(SENT) >= 2000, SENT
    wanted = {
        "wrong_profile", "unbound", "unknown_topic", "bad_identifier", "bad_context",
        "bad_clinical_input", "unknown_bed", "bad_ack", "duplicate", "bad_payload",
        "missing_field", "bad_number", "bad_time", "applied:context",
    }  # fmt: skip
    assert wanted <= SEEN, sorted(wanted - SEEN)
