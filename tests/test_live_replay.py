"""Live and replay give the same events; a snapshot in the middle changes nothing later.

DESIGN §2: the engine declares its next wake-up; replay advances a virtual clock to
min(next logged message, next wake-up), the live shell's timer calls `advance(wall)`
whenever it gets round to it. Both must give the same alarm events and advice, to the
byte. And every stateful part can snapshot and resume.

The messages: one invented bed (a diuresis, then a meter that falls silent), with the
intake issue's faults (noise, duplicates, reordering, a bag change), vitals, labs,
intake and an acknowledgement. ALL DATA HERE IS INVENTED.
"""

from __future__ import annotations

import json
import pickle
from datetime import UTC, datetime
from functools import cache
from pathlib import Path
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.engine.alarms import AlarmEvent
from daemon.engine.effects import Effect
from daemon.engine.engine import Engine
from daemon.engine.lifecycle import AlarmBook
from daemon.logfile import LogRecord, read_log
from daemon.replay import drive
from simulator.meterlog import MeterFaults, context_record, iso_z, simulate, write_log
from tests.ruletools import POLICY, PROFILES, REFERENCE, RULES, event_lines
from tests.test_fast_paths import _ward

START = datetime(2026, 3, 14, 20, 0, tzinfo=UTC)  # invented
T0 = START.timestamp()
BED, DEVICE = "b05", "rc-0505"
END = T0 + 10 * 3600.0  # the clock runs on after the meter's last message

Message = tuple[float, str, Any]


def flow(minute: float) -> float:
    """Invented: 60 mL/h, then a post-obstructive diuresis of 420 mL/h from 01:00."""
    return 60.0 if minute < 60 else 420.0


def _base_messages() -> list[Message]:
    sim = simulate(
        REFERENCE, DEVICE, START, 5.0, flow,
        MeterFaults(noise_sd_ml=1.0, duplicate_p=0.05, reorder_p=0.05,
                    bag_change_every_s=3 * 3600.0, spike_times_s=[4000.0]),
        seed=5,
    )  # fmt: skip
    # the obstruction relieved at 01:00 (its first hour drains the retained content),
    # written into the context then, with a replacement order
    ctx = context_record(T0 - 20.0, BED, "icu-west", [DEVICE], weight_kg=75.0)
    relief = context_record(T0 + 3600.0 + 60.0, BED, "icu-west", [DEVICE], weight_kg=75.0,
                            relieved_at=T0 + 3600.0)  # fmt: skip
    relief[2]["replacement"] = {"fraction_low": 0.5, "fraction_high": 0.75,
                                "fluid": "0.45% NaCl", "ordered_by": "icu-physician-4 (invented)",
                                "ordered_at": iso_z(T0 + 3600.0)}  # fmt: skip
    msgs: list[Message] = [ctx, relief]
    msgs += sim.records
    bed = f"hourwatch/beds/{BED}"
    msgs += [
        # SI 1.1 (Mutschler 2013: >= 1.0 is a sign) with > 200 mL/h: hypovolaemia-risk, high
        (T0 + 2.5 * 3600 + 3.3, f"{bed}/vitals",
         {"time": iso_z(T0 + 2.5 * 3600), "heart_rate_bpm": 110, "systolic_mmhg": 100}),
        (T0 + 2.75 * 3600 + 1.1, f"{bed}/intake",
         {"time": iso_z(T0 + 2.75 * 3600), "volume_ml": 250, "fluid": "0.45% NaCl"}),
        # Na 147 > 145 (Adrogué & Madias, NEJM 2000): sodium-high; urine Na+K for projection
        (T0 + 3.2 * 3600 + 0.4, f"{bed}/labs",
         {"time": iso_z(T0 + 3.2 * 3600), "serum_na_mmol_l": 147, "urine_na_mmol_l": 40,
          "urine_k_mmol_l": 20}),
        # a message for a bed nobody knows, and a bad one: rejected, no events
        (T0 + 3.3 * 3600, "hourwatch/beds/b99/labs", {"time": iso_z(T0), "serum_na_mmol_l": 140}),
        (T0 + 3.4 * 3600, f"{bed}/vitals", "not json"),
    ]  # fmt: skip
    return sorted(msgs, key=lambda m: m[0])


def records(msgs: list[Message]) -> list[tuple[int, LogRecord]]:
    return [
        (n, LogRecord(time=datetime.fromtimestamp(t, UTC), topic=topic, payload=payload))
        for n, (t, topic, payload) in enumerate(msgs, start=1)
    ]


def new_engine() -> Engine:
    return Engine(PROFILES.values(), RULES, POLICY)


@cache
def messages() -> tuple[Message, ...]:
    """The base messages plus acknowledgements of the first pod-hourly alarm (20 min
    after it was raised) and of the first escalated alarm, by id from a first run."""
    base = _base_messages()
    first = drive(new_engine(), records(base), until=END).effects
    alarms = [e for e in first if isinstance(e, AlarmEvent)]
    pod = next(e for e in alarms if e.rule == "pod-hourly" and e.state == "active")
    esc = next(e for e in alarms if e.state == "escalated" and e.rule != "pod-hourly")
    acks = [
        (pod.time + 1200.0 + 0.25, "hourwatch/ack",
         {"alarm_id": pod.alarm_id, "by": "nurse-5", "role": "bedside-nurse"}),
        (esc.time + 61.0, "hourwatch/ack",
         {"alarm_id": esc.alarm_id, "by": "charge-1", "role": "charge-nurse"}),
    ]  # fmt: skip
    return tuple(sorted(base + acks, key=lambda m: m[0]))


def replayed(msgs: tuple[Message, ...] | list[Message]) -> list[Effect]:
    return drive(new_engine(), records(list(msgs)), until=END).effects


@cache
def reference() -> tuple[str, ...]:
    return tuple(event_lines(replayed(messages())))


def wall_clock(engine: Engine, msgs: tuple[Message, ...] | list[Message], step_s: float,
               until: float, phase_s: float = 0.0) -> list[Effect]:  # fmt: skip
    """A live shell on a simulated wall clock: each message is handled when it arrives,
    at its receive time (after whatever fell due before it), and the timer wakes every
    `step_s` seconds and calls advance(wall). The timer never runs ahead of a message
    already received: in the live shell a message is handled as it arrives."""
    out: list[Effect] = []
    i = 0
    wall = msgs[0][0] - 60.0 + phase_s
    while wall < until + step_s:
        wall = min(wall + step_s, until)
        while i < len(msgs) and msgs[i][0] <= wall:
            t, topic, payload = msgs[i]
            out += engine.advance(t)
            out += engine.step(topic, payload, t)
            i += 1
        out += engine.advance(wall)
        if wall >= until:
            break
    assert i == len(msgs)
    return out


def test_the_scenario_has_something_to_compare() -> None:
    ref = reference()
    text = "\n".join(ref)
    for rule in ("pod-hourly", "replacement-behind", "hypovolaemia-risk", "sodium-high",
                 "labs-due", "meter-offline", "data-gap"):  # fmt: skip
        assert f'"rule": "{rule}"' in text, rule
    for state in ("active", "escalated", "acknowledged"):
        assert f'"state": "{state}"' in text, state
    assert '"type": "advice"' in text
    assert len(ref) > 40


def test_replay_is_deterministic() -> None:
    assert tuple(event_lines(replayed(messages()))) == reference()


def test_a_wall_clock_driver_gives_the_same_events() -> None:
    live = wall_clock(new_engine(), messages(), step_s=7.0, until=END)
    assert tuple(event_lines(live)) == reference()


@settings(max_examples=8)
@given(step_s=st.floats(0.5, 900.0), phase_s=st.floats(0.0, 60.0))
def test_any_timer_interval_gives_the_same_events(step_s: float, phase_s: float) -> None:
    live = wall_clock(new_engine(), messages(), step_s=step_s, until=END, phase_s=phase_s)
    assert tuple(event_lines(live)) == reference()


def _split_run(split: int, resume: Any) -> list[str]:
    """Run the first `split` messages, resume a copy, run the rest on the copy."""
    all_records = records(list(messages()))
    engine = new_engine()
    first = drive(engine, all_records[:split]).effects
    copy = resume(engine)
    assert copy is not engine
    rest = drive(copy, all_records[split:], until=END).effects
    return event_lines(first) + event_lines(rest)


def _pickled(engine: Engine) -> Engine:
    copy: Engine = pickle.loads(pickle.dumps(engine))
    return copy


def _book_restored(engine: Engine) -> Engine:
    """The engine's alarm book through its own snapshot format (plain JSON-able data),
    swapped into a pickled copy of the rest of the engine."""
    import json

    data = json.loads(json.dumps(engine.book.snapshot()))
    copy = _pickled(engine)
    book = AlarmBook.restore(data, POLICY)
    copy.book = book
    copy.evaluator.book = book
    return copy


@settings(max_examples=6)
@given(st.data())
def test_pickle_resume_at_any_message_gives_the_same_events(data: st.DataObject) -> None:
    split = data.draw(st.integers(1, len(messages()) - 1), label="split")
    assert tuple(_split_run(split, _pickled)) == reference()


@settings(max_examples=6)
@given(st.data())
def test_alarm_book_snapshot_restore_gives_the_same_events(data: st.DataObject) -> None:
    split = data.draw(st.integers(1, len(messages()) - 1), label="split")
    assert tuple(_split_run(split, _book_restored)) == reference()


def test_resume_right_after_the_alarms_open() -> None:
    """The split points where the book holds the most: just after pod-hourly and the
    acknowledgement, and during the silence before the time-driven alarms."""
    msgs = messages()
    ack_at = next(i for i, m in enumerate(msgs) if m[1] == "hourwatch/ack")
    for split in (ack_at, ack_at + 1, len(msgs) - 1):
        assert tuple(_split_run(split, _pickled)) == reference()
        assert tuple(_split_run(split, _book_restored)) == reference()


def test_the_timer_must_not_run_ahead_of_received_messages() -> None:
    """The contract for the live shell: a message received before a timer tick is
    handled before it. A shell that ticks first (here every 10 min) sees the meter
    silent and raises a meter-offline alarm that replay never raised."""
    msgs = messages()
    engine = new_engine()
    out: list[Effect] = []
    i, wall = 0, msgs[0][0]
    while i < len(msgs):
        wall += 600.0
        out += engine.advance(wall)  # wrong order: the tick before the queued messages
        while i < len(msgs) and msgs[i][0] <= wall:
            t, topic, payload = msgs[i]
            out += engine.advance(t) + engine.step(topic, payload, t)
            i += 1
    early = [line for line in event_lines(out) if '"rule": "meter-offline"' in line]
    ref = [line for line in reference() if '"rule": "meter-offline"' in line]
    assert early[0] not in ref


def test_a_live_engine_that_forgets_old_minutes_pages_as_replay_does(tmp_path: Path) -> None:
    """The service keeps a day and a bit of minutes per bed (bounded memory) where replay
    keeps them all: its sums start elsewhere, and must still come out the same to the
    last bit, so that a replayed night shows the very alarms and numbers paged.
    Invented ward: 6 beds over 36 h, low and high output, redeliveries, reorders, bag
    changes; the kept span is the longest window (24 h) and a minute. (With volumes
    summed in floats, this ward's live page said "246 mL" where replay said "245 mL".)"""
    log = tmp_path / "ward.jsonl"
    write_log(log, _ward(6, 36.0, 105, 40.0, 2))

    def events(keep_s: float | None) -> tuple[list[str], Engine]:
        engine = Engine(list(PROFILES.values()), RULES, POLICY, series_keep_s=keep_s)
        result = drive(engine, read_log(log))
        return [json.dumps(e.to_json()) for e in result.effects if hasattr(e, "to_json")], engine

    live, live_engine = events(24 * 3600.0 + 60.0)
    replayed, _ = events(None)
    assert sum('"alarm_id"' in line for line in replayed) >= 4
    assert live == replayed
    forgot = [b.series for b in live_engine.beds.values()]
    assert all(s._base is not None and s.first_minute is not None and s._base > s.first_minute
               for s in forgot)  # fmt: skip
