"""Engine snapshots (daemon/engine/snapshot.py) and restarts from them (daemon/recovery.py).

- An engine restored from a snapshot taken at any message goes on exactly as the one
  that never stopped: same events, same counts, same alarms, same minute series.
- A restart from the newest snapshot plus the journal after it equals a full re-feed,
  then and after more data.
- A snapshot of another format, class layout or configuration, or a damaged one, is
  skipped with its reason (and a log line), and the journal is re-fed in full.
- Round trip on states reached by random (and hostile) inputs; the walker refuses any
  type it does not know.

The scenario is tests/test_live_replay.py's invented bed (a diuresis, a meter that falls
silent, noise, duplicates, reordering, a spike held for confirmation, bag changes,
vitals, labs, intake, acknowledgements). ALL DATA HERE IS INVENTED.
"""

from __future__ import annotations

import dataclasses
import json
import re
import time
from collections import deque
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import structlog
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from daemon.engine import snapshot
from daemon.engine.alarms import AlarmEvent
from daemon.engine.cleaning import CumulativeCleaner
from daemon.engine.effects import Effect
from daemon.engine.engine import Engine
from daemon.engine.series import MinuteSeries
from daemon.journal import SqliteJournal
from daemon.recovery import recover
from daemon.service import journal_row
from daemon.web.marks import ReadingMarks
from tests import fuzzing
from tests.broker import broker, running_service  # noqa: F401  (the fixture)
from tests.ruletools import POLICY, PROFILES, RULES, event_lines
from tests.test_live_replay import END, messages

DAY = 86400.0


def new_engine(rules: Any = RULES) -> Engine:
    return Engine(PROFILES.values(), rules, POLICY)


def payload(p: Any) -> bytes:
    return p.encode() if isinstance(p, str) else json.dumps(p).encode()


def feed(engine: Engine, msgs: Any) -> list[Effect]:
    out: list[Effect] = []
    for t, topic, p in msgs:
        out += engine.advance(t)
        out += engine.step(topic, payload(p), t)
    return out


def outputs(engine: Engine) -> dict[str, Any]:
    """What the engine's state shows outside: counts, alarms, series, wake-up."""
    return {
        "quality": engine.quality(),
        "counted": engine.messages_counted(),
        "sanity": [w.to_json() for w in engine.sanity_history()],
        "alarms": engine.book.active(),
        "wakeup": engine.next_wakeup(),
        "hours": {b: list(s.series.completed_hours()) for b, s in engine.beds.items()},
        "minutes": {b: s.series.minutes(s.series.first_minute or 0,
                                        (s.series.latest_minute() or 0) + 1)[0].tolist()
                    for b, s in engine.beds.items()},
        "rejections": (dict(engine.unrouted), dict(engine.input_rejections),
                       dict(engine.context_rejections), dict(engine.applied)),
    }  # fmt: skip


def restored(engine: Engine, rules: Any = RULES) -> Engine:
    copy = new_engine(rules)
    snapshot.restore(copy, snapshot.take(engine))
    return copy


@pytest.fixture(scope="module")
def reference() -> tuple[list[str], dict[str, Any]]:
    engine = new_engine()
    effects = feed(engine, messages()) + engine.advance(END)
    return event_lines(effects), outputs(engine)


def split_run(split: int) -> tuple[list[str], dict[str, Any], Engine]:
    msgs = messages()
    engine = new_engine()
    first = feed(engine, msgs[:split])
    copy = restored(engine)
    rest = feed(copy, msgs[split:]) + copy.advance(END)
    return event_lines(first) + event_lines(rest), outputs(copy), engine


def interesting_splits() -> dict[str, int]:
    """Split points where the state holds the hard parts: a reading held for
    confirmation, a bag change in progress, an alarm escalated and not acknowledged,
    an acknowledged one, one waiting out its clear-hold."""
    found: dict[str, int] = {}
    engine = new_engine()
    for i, (t, topic, p) in enumerate(messages(), start=1):
        engine.advance(t)
        engine.step(topic, payload(p), t)
        cleaners = [d.cleaner for d in engine.devices.values()]
        cum = [c for c in cleaners if isinstance(c, CumulativeCleaner)]
        records = [s.record for s in engine.book._live.values() if s.record is not None]
        marks = {
            "held": any(c.held is not None for c in cum),
            "bag change provisional": any(c.provisional is not None for c in cum),
            "escalated": any(r.state == "escalated" for r in records),
            "acknowledged": any(r.state == "acknowledged" for r in records),
            "clear-hold": any(r.clear_since is not None for r in records),
        }
        for name, hit in marks.items():
            if hit:
                found.setdefault(name, i)
    return found


def test_the_scenario_reaches_every_hard_state() -> None:
    found = interesting_splits()
    assert set(found) >= {"held", "escalated", "acknowledged", "clear-hold",
                          "bag change provisional"}, found


@pytest.mark.parametrize("what", ["held", "escalated", "acknowledged", "clear-hold",
                                  "bag change provisional"])  # fmt: skip
def test_resume_from_a_snapshot_in_a_hard_state_changes_nothing(reference, what) -> None:
    split = interesting_splits()[what]
    if split is None:
        pytest.skip(f"the scenario never reaches {what}")
    lines, out, _ = split_run(split)
    assert lines == reference[0]
    assert out == reference[1]


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.data())
def test_resume_from_a_snapshot_at_any_message_changes_nothing(reference, data) -> None:
    split = data.draw(st.integers(1, len(messages()) - 1), label="split")
    lines, out, _ = split_run(split)
    assert lines == reference[0]
    assert out == reference[1]


def test_a_restored_engine_snapshots_to_the_same_bytes() -> None:
    engine = new_engine()
    feed(engine, messages()[: len(messages()) // 2])
    blob = snapshot.take(engine)
    assert snapshot.take(restored(engine)) == blob
    assert len(blob) < 64 * 1024  # one bed, hours of data: compact


def test_shared_objects_stay_shared() -> None:
    """A meter's cleaner writes into its bed's series: after a restore, still the same one."""
    engine = new_engine()
    feed(engine, messages()[:200])
    copy = restored(engine)
    for dev in copy.devices.values():
        if dev.cleaner is not None and dev.bed is not None:
            assert dev.cleaner.series is copy.beds[dev.bed].series
        if dev.sanity is not None:
            assert dev.sanity._changes is copy._sanity_changes
        assert dev.decoder is copy._decoders[dev.decoder.profile.name]  # configuration: linked
    assert copy.evaluator.book is copy.book


# --- restarts: snapshot + tail equals a full re-feed ------------------------------------
def journal_live(path: Path, msgs: Any, snapshot_after: tuple[int, ...] = (),
                 lost_from: int | None = None) -> Engine:  # fmt: skip
    """Journal as the live service does (each message, then its effects), with a snapshot
    after the messages named (every effect journaled by then). From message `lost_from`
    on, the effects are lost (a crash between journaling messages and their effects)."""
    engine = new_engine()
    with SqliteJournal(path) as j:
        for i, (t, topic, p) in enumerate(msgs, start=1):
            (mid,) = j.append_messages([(t, topic, payload(p), 1)])
            eff = engine.advance(t) + engine.step(topic, payload(p), t)
            if lost_from is None or i < lost_from:
                j.append_events([journal_row(e) for e in eff])
            if i in snapshot_after:
                j.save_snapshot(t, mid, snapshot.take(engine))
    return engine


def restart(path: Path, now: float, use: bool = True, rules: Any = RULES) -> tuple[Any, Engine]:
    engine = new_engine(rules)
    with SqliteJournal(path) as j:
        rec = recover(engine, j, now, 30 * DAY, DAY, "hourwatch", use_snapshots=use)
    return rec, engine


def keys(effects: list[Effect]) -> list[tuple[Any, ...]]:
    return [(e.alarm_id, str(e.state), e.reason, e.time) for e in effects
            if isinstance(e, AlarmEvent)]  # fmt: skip


@pytest.mark.parametrize("where", [0.3, 0.55, 0.8])
def test_restart_from_snapshot_and_tail_equals_a_full_re_feed(tmp_path, where) -> None:
    """Down after message k with a snapshot taken earlier at s < k; restarted 20 min later
    (escalations fall due in the downtime); then the rest of the night arrives. The
    restart from the snapshot publishes what the full re-feed publishes, and both go on
    to give the same events and the same state."""
    msgs = messages()
    k = int(len(msgs) * where)
    s = max(2, k - 150)
    journal_live(tmp_path / "j.db", msgs[:k], snapshot_after=(s // 2, s))
    now = msgs[k - 1][0] + 1200.0
    fast, a = restart(tmp_path / "j.db", now)
    full, b = restart(tmp_path / "j.db", now, use=False)
    assert fast.snapshot_id == 2 and full.snapshot_id is None  # the newer of the two
    assert fast.messages == k - s < full.messages
    assert keys(fast.to_publish) == keys(full.to_publish)
    assert fast.differs == full.differs == []
    assert outputs(a) == outputs(b)
    rest = [m for m in msgs[k:] if m[0] >= now]
    after_a = feed(a, rest) + a.advance(END)
    assert event_lines(after_a) == event_lines(feed(b, rest) + b.advance(END))
    assert outputs(a) == outputs(b)


def test_the_boards_bag_changes_travel_in_the_snapshot(tmp_path) -> None:
    """The board's bag-change marks are the shell's, seen through the engine's observer: a
    restart from a snapshot taken with them shows the same bag changes as a full re-feed
    (before, only those in the journal's tail); a snapshot without them, or one taken with
    them read by a shell that keeps none, is refused for a full re-feed, never misread."""
    msgs = messages()
    s = int(len(msgs) * 0.65)  # after the scenario's bag change at 23:00 (a 3-hour bag)
    k = s + 90
    live, live_engine = ReadingMarks(), Engine(PROFILES.values(), RULES, POLICY)
    live_engine.observe = live.observe
    with SqliteJournal(tmp_path / "j.db") as j:
        for i, (t, topic, p) in enumerate(msgs[:k], start=1):
            (mid,) = j.append_messages([(t, topic, payload(p), 1)])
            eff = live_engine.advance(t) + live_engine.step(topic, payload(p), t)
            j.append_events([journal_row(e) for e in eff])
            if i == s:
                j.save_snapshot(t, mid, snapshot.take(live_engine, {"marks": live.state()}))
    now = msgs[k - 1][0] + 1200.0

    def restart(use: bool, extras: bool = True) -> tuple[Any, ReadingMarks]:
        marks = ReadingMarks()
        engine = Engine(PROFILES.values(), RULES, POLICY, observe=marks.observe)
        with SqliteJournal(tmp_path / "j.db") as j:
            rec = recover(engine, j, now, 30 * DAY, DAY, "hourwatch", use_snapshots=use,
                          extras={"marks": marks.load} if extras else None)  # fmt: skip
        return rec, marks

    fast, a = restart(True)
    full, b = restart(False)
    assert fast.snapshot_id == 1 and full.snapshot_id is None
    assert a.bags == b.bags == live.bags and a._held == b._held == live._held
    marked = [t for ts in live.bags.values() for t in ts]
    assert marked and min(marked) < msgs[s - 1][0]  # some before the snapshot
    other, _ = restart(True, extras=False)
    assert other.snapshot_id is None and "other state attributes" in other.snapshots_ignored[0]


def test_effects_lost_in_a_crash_after_the_snapshot_are_published(tmp_path) -> None:
    """The tail's events the journal lacks (a crash between journaling messages and their
    effects) come out of a restart from a snapshot, as from a full re-feed."""
    msgs = messages()
    path = tmp_path / "j.db"
    engine = new_engine()
    k = next(i for i in range(1, len(msgs)) if keys(feed(engine, msgs[i - 1 : i])))
    journal_live(path, msgs[: k + 40], snapshot_after=(k - 60,), lost_from=k)
    now = msgs[k + 39][0] + 1
    fast, _ = restart(path, now)
    full, _ = restart(path, now, use=False)
    assert fast.snapshot_id is not None
    assert fast.to_publish, "the crash lost some events"
    assert keys(fast.to_publish) == keys(full.to_publish)


# --- snapshots that must not be read ---------------------------------------------------
def rewrite(blob: bytes, change: Any) -> bytes:
    """The snapshot with its document changed (the binary part as it was)."""
    doc, blobs = snapshot._open(blob)
    change(doc)
    return snapshot.Captured(json.dumps(doc).encode(), blobs).pack()


def older_format(doc: dict[str, Any]) -> None:
    doc["format"] = snapshot.FORMAT - 1


def renamed_field(doc: dict[str, Any]) -> None:
    """As if MinuteSeries had had another field when the snapshot was written (the
    layout hash recomputed, so only the class check can tell)."""
    for entry in doc["classes"]:
        if entry[0] == "daemon.engine.series:MinuteSeries":
            entry[1] = [f if f != "_vol_nl" else "_volume" for f in entry[1]]
    doc["layout"] = snapshot._digest([doc["classes"], sorted(doc["extra"].items())])


def gone_class(doc: dict[str, Any]) -> None:
    doc["classes"][0][0] = "daemon.engine.series:NoSuchThing"
    doc["layout"] = snapshot._digest([doc["classes"], sorted(doc["extra"].items())])


def engine_attribute(doc: dict[str, Any]) -> None:
    doc["extra"][snapshot.ENGINE_CLASS].append("_from_an_older_engine")
    doc["layout"] = snapshot._digest([doc["classes"], sorted(doc["extra"].items())])


@pytest.mark.parametrize("change, why", [
    (older_format, "format"),
    (renamed_field, "other fields"),
    (gone_class, "is gone"),
    (engine_attribute, "state attributes"),
])  # fmt: skip
def test_a_snapshot_of_another_version_is_refused(change, why) -> None:
    engine = new_engine()
    feed(engine, messages()[:300])
    blob = rewrite(snapshot.take(engine), change)
    fresh = new_engine()
    before = snapshot.take(fresh)
    with pytest.raises(snapshot.Mismatch, match=why):
        snapshot.restore(fresh, blob)
    assert snapshot.take(fresh) == before  # untouched


def test_a_snapshot_made_with_other_rules_is_refused() -> None:
    engine = new_engine()
    feed(engine, messages()[:300])
    other = [r for r in RULES if r.id != "labs-due"]
    with pytest.raises(snapshot.Mismatch, match="rules"):
        snapshot.restore(new_engine(other), snapshot.take(engine))


@pytest.mark.parametrize("cut", [1, 100, 0.5, -1])
def test_a_truncated_snapshot_is_refused(cut) -> None:
    engine = new_engine()
    feed(engine, messages()[:300])
    blob = snapshot.take(engine)
    n = int(len(blob) * cut) if isinstance(cut, float) else cut
    with pytest.raises(snapshot.Corrupt):
        snapshot.restore(new_engine(), blob[:n])


def test_a_snapshot_with_damaged_content_is_refused() -> None:
    engine = new_engine()
    feed(engine, messages()[:300])

    def damage(doc: dict[str, Any]) -> None:
        doc["state"][1][1] = ["O", 0]  # a value the class table cannot hold

    with pytest.raises(snapshot.Corrupt):
        snapshot.restore(new_engine(), rewrite(snapshot.take(engine), damage))


def test_unreadable_snapshots_are_skipped_with_their_reason_and_the_journal_re_fed(tmp_path):
    """The newest is truncated, the one before is of an older format: both are named in
    `snapshots_ignored` and the restart re-feeds in full, giving the full re-feed's result."""
    msgs = messages()
    k = len(msgs) // 2
    path = tmp_path / "j.db"
    journal_live(path, msgs[:k])
    engine = new_engine()
    feed(engine, msgs[: k - 50])
    blob = snapshot.take(engine)
    with SqliteJournal(path) as j:
        mid = k - 50
        j.save_snapshot(msgs[mid - 1][0], mid, rewrite(blob, older_format))
        j.save_snapshot(msgs[mid - 1][0], mid, blob[: len(blob) // 2])
    now = msgs[k - 1][0] + 600
    rec, a = restart(path, now)
    full, b = restart(path, now, use=False)
    assert rec.snapshot_id is None
    assert len(rec.snapshots_ignored) == 2
    assert "damaged" in rec.snapshots_ignored[0] and "format" in rec.snapshots_ignored[1]
    assert rec.messages == full.messages == k
    assert keys(rec.to_publish) == keys(full.to_publish)
    assert outputs(a) == outputs(b)


def test_an_older_readable_snapshot_is_used_when_the_newest_is_damaged(tmp_path) -> None:
    msgs = messages()
    k = len(msgs) // 2
    path = tmp_path / "j.db"
    journal_live(path, msgs[:k], snapshot_after=(k - 80,))
    with SqliteJournal(path) as j:
        j.save_snapshot(msgs[k - 1][0], k, b"\x78\x9c garbage")
    rec, a = restart(path, msgs[k - 1][0] + 60)
    _, b = restart(path, msgs[k - 1][0] + 60, use=False)
    assert rec.snapshot_id == 1 and len(rec.snapshots_ignored) == 1
    assert rec.messages == 80
    assert outputs(a) == outputs(b)


def test_snapshots_beyond_the_last_few_are_pruned(tmp_path) -> None:
    with SqliteJournal(tmp_path / "j.db") as j:
        for i in range(6):
            j.save_snapshot(float(i), i, b"x%d" % i)
        assert [s.message_id for s in j.snapshots()] == [5, 4, 3]


def test_the_service_logs_an_ignored_snapshot_and_re_feeds(broker, tmp_path):  # noqa: F811
    path = tmp_path / "j.db"
    with SqliteJournal(path) as j:
        j.save_snapshot(time.time() - 60, 0, b"not a snapshot")
    with structlog.testing.capture_logs() as logs, running_service(broker, path) as svc:
        rec = svc.stats.recovery
    assert rec is not None and rec.snapshot_id is None
    ignored = [e for e in logs if e["event"] == "snapshot_ignored"]
    assert len(ignored) == 1 and "damaged" in ignored[0]["why"]
    assert ignored[0]["log_level"] == "warning"
    saved = [e for e in logs if e["event"] == "snapshot_saved"]
    assert saved, "a clean stop writes a snapshot"
    with structlog.testing.capture_logs() as logs, running_service(broker, path) as svc:
        assert svc.stats.recovery is not None and svc.stats.recovery.snapshot_id is not None
    assert not [e for e in logs if e["event"] == "snapshot_ignored"]


def test_a_service_with_the_board_keeps_its_bag_changes_over_a_restart(broker, tmp_path):  # noqa: F811
    """The service's own wiring: its stop's snapshot holds the board's bag changes and the
    next start shows them. Invented bed: 90 minutes of readings, a bag emptied at 45."""
    from simulator.meterlog import MeterFaults, constant, simulate
    from tests.broker import publish_all, publisher

    path = tmp_path / "j.db"
    start = datetime.fromtimestamp(time.time() - 5400, UTC)
    sim = simulate(PROFILES["reference-cumulative"], "rc-0909", start, 1.5, constant(80.0),
                   MeterFaults(bag_change_every_s=2700.0), seed=9)  # fmt: skip
    with running_service(broker, path, board__listen="127.0.0.1:0") as svc:
        pub = publisher(broker, "marks-feed")
        publish_all(pub, [("hourwatch/beds/b09/context",
                           {"ward": "icu-east", "device_ids": ["rc-0909"]})])  # fmt: skip
        publish_all(pub, [(t, p) for _, t, p in sim.records])
        pub.disconnect()
        deadline = time.monotonic() + 10

        def received() -> int:
            with svc.lock:
                dev = svc.engine.devices.get("rc-0909")
                return 0 if dev is None else dev.quality.received

        while received() < len(sim.records) and time.monotonic() < deadline:
            time.sleep(0.05)
        with svc.lock:
            before = svc.marks.state()
    assert before["bags"], "the bag change was seen"
    with running_service(broker, path, board__listen="127.0.0.1:0") as svc:
        assert svc.stats.recovery is not None and svc.stats.recovery.snapshot_id is not None
        assert svc.stats.recovery.messages == 0  # nothing after the stop's snapshot
        assert svc.marks.state() == before


# --- round trip on random states --------------------------------------------------------
@st.composite
def random_run(draw: st.DrawFn) -> tuple[fuzzing.GoodStream, list[Any], int]:
    profile = draw(st.sampled_from(fuzzing.NAMES), label="profile")
    good = fuzzing.good_stream(profile, hours=1.5, seed=draw(st.integers(0, 5)))
    n = len(good.records)
    bad = st.one_of(fuzzing.meter_message(), fuzzing.context_message(),
                    fuzzing.clinical_message(), fuzzing.ack_message(),
                    fuzzing.junk_message())  # fmt: skip
    fuzz = draw(st.lists(st.tuples(st.integers(0, n - 1), bad), max_size=25), label="fuzz")
    return good, fuzz, draw(st.integers(1, n - 1), label="split")


def run_messages(good: fuzzing.GoodStream, fuzz: list[Any]) -> Iterator[tuple[float, str, Any]]:
    """fuzzing.drive's order, as (time, topic, payload)."""
    t = fuzzing.T0 - 60.0
    yield t, f"hourwatch/beds/{fuzzing.GOOD_BED}/context", good.context
    for bed, ctx in good.other_contexts:
        yield t, f"hourwatch/beds/{bed}/context", ctx
    after: dict[int, list[Any]] = {}
    for index, msg in fuzz:
        after.setdefault(index, []).append(msg)
    for i, (recv, topic, p) in enumerate(good.records):
        t = max(t, recv)
        yield t, topic, p
        for f_topic, f_payload in after.get(i, ()):
            if f_topic == "replay":
                _, r_topic, r_payload = good.records[int(f_payload) % (i + 1)]
                yield t, r_topic, r_payload
            else:
                yield t, f_topic, f_payload


def raw(p: Any) -> Any:
    return p if isinstance(p, bytes) else payload(p)


@settings(max_examples=25, deadline=None,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])  # fmt: skip
@given(random_run())
def test_round_trip_on_states_reached_by_random_input(run) -> None:
    good, fuzz, split = run
    msgs = list(run_messages(good, fuzz))
    cut = min(split + 2, len(msgs) - 1)
    engine = Engine(fuzzing.PROFILES.values(), RULES, POLICY)
    for t, topic, p in msgs[:cut]:
        engine.advance(t)
        engine.step(topic, raw(p), t)
    blob = snapshot.take(engine)
    copy = Engine(fuzzing.PROFILES.values(), RULES, POLICY)
    snapshot.restore(copy, blob)
    assert snapshot.take(copy) == blob
    assert outputs(copy) == outputs(engine)
    a: list[Effect] = []
    b: list[Effect] = []
    for t, topic, p in msgs[cut:]:
        a += engine.advance(t) + engine.step(topic, raw(p), t)
        b += copy.advance(t) + copy.step(topic, raw(p), t)
    end = msgs[-1][0] + 3 * 3600.0
    assert event_lines(a + engine.advance(end)) == event_lines(b + copy.advance(end))
    assert [repr(e) for e in a] == [repr(e) for e in b]  # the rejections too
    assert outputs(copy) == outputs(engine)


# --- the walker refuses what it does not know --------------------------------------------
@dataclasses.dataclass
class Foreign:  # a dataclass, but not the engine's
    x: int = 1


class Unslotted:
    pass


Unslotted.__module__ = "daemon.engine.fake"  # an engine class with a __dict__, no fields


@pytest.mark.parametrize("value", [
    lambda: 1,
    re.compile("x"),
    datetime(2026, 1, 1, tzinfo=UTC),
    Foreign(),
    Unslotted(),
    np.array([object()]),
    type("F", (float,), {})(1.0),
    b"bytes",
    {"nested": [1, 2, {3: (4, print)}]},
], ids=["function", "regex", "datetime", "foreign-dataclass", "unslotted", "object-array",
        "float-subclass", "bytes", "nested-builtin"])  # fmt: skip
def test_the_walker_refuses_unknown_types(value) -> None:
    with pytest.raises(snapshot.Unsupported):
        snapshot.encode({"state": value}, {})


def test_an_engine_attribute_of_an_unknown_type_fails_the_snapshot() -> None:
    engine = new_engine()
    engine.new_cache = {"b01": lambda: None}  # type: ignore[attr-defined]
    with pytest.raises(snapshot.Unsupported):
        snapshot.take(engine)


def test_every_configuration_attribute_named_exists() -> None:
    """A stale name in ENGINE_CONFIG would hide nothing, but says the split is out of date."""
    assert set(vars(new_engine())) >= snapshot.ENGINE_CONFIG


def test_the_walker_carries_what_it_knows() -> None:
    series = MinuteSeries()
    series.spread(0.0, 600.0, 10.0, 2)
    shared = [1.5, 2.5]
    state = {
        "ints": list(range(20)), "floats": [0.1 * i for i in range(20)], "mixed": [1, 1.0, "1"],
        "big": [2**70, -(2**70)], "specials": [float("inf"), -0.0, float("nan")],
        "tuple": (1, (2, 3)), "set": {1, 2}, "frozen": frozenset({"a"}),
        "array": np.arange(6, dtype=np.uint8).reshape(2, 3), "scalar": np.float32(1.5),
        "series": series, "a": shared, "b": shared, 7.5: None, (1, "x"): True,
        "rows": deque([(0.5 * i, 1.0 + i) for i in range(12)], maxlen=20),
        "odd rows": [(1.0, 2.0)] * 7 + [(1.0, 2)],
    }  # fmt: skip
    back = snapshot.decode(snapshot.encode(state, {}), {})
    assert back["a"] is back["b"]
    assert back["ints"] == state["ints"] and back["floats"] == state["floats"]
    assert [type(v) for v in back["mixed"]] == [int, float, str]
    assert back["big"] == state["big"]
    assert back["specials"][0] == float("inf") and str(back["specials"][1]) == "-0.0"
    assert back["specials"][2] != back["specials"][2]
    assert back["tuple"] == (1, (2, 3)) and back["set"] == {1, 2} and back[7.5] is None
    assert back[(1, "x")] is True and back["frozen"] == frozenset({"a"})
    assert back["array"].dtype == np.uint8 and back["array"].tolist() == [[0, 1, 2], [3, 4, 5]]
    assert type(back["scalar"]) is np.float32 and back["scalar"] == 1.5
    assert back["series"].sums(0, 10) == series.sums(0, 10)
    assert back["rows"] == state["rows"] and back["rows"].maxlen == 20
    assert [type(v) for v in back["odd rows"][-1]] == [float, int]
