"""Restart recovery (DESIGN §2, §5): rebuild the engine from the journal, then say what
is still to be published.

0. From a snapshot, when there is one to read: the newest engine snapshot in the journal
   (daemon/engine/snapshot.py) whose format, class layout and configuration are this
   start's is loaded, and only the messages journaled after it (ids above its
   `message_id`) are fed, from its engine time on, then steps 4 and 5 below over that
   tail. The snapshot's state is the live engine's, so nothing is rebuilt and nothing is
   guessed: restart time no longer grows with the rule windows or the journal's length.
   A snapshot that cannot be read as it was written (another version or layout, other
   rules or profiles, damaged bytes, older than the retention) is skipped with its reason
   in `snapshots_ignored` (the service logs each), and the next older one is tried; with
   none left, steps 1-5 re-feed the window in full, as before.
1. Where to start: the longest rule window plus a margin before now, or earlier, so
   that every alarm episode the journal last saw open is rebuilt from a full rule
   window before its onset (same alarm id, same escalation clock). Never further back
   than the retention.
2. The bed contexts in force at the start (they are retained on the broker and may be
   days old) are fed first, as if received at the start.
3. The journal's messages from the start are re-fed in receive order, each after
   `engine.advance(recv_time)`, exactly as live and replay drive the engine. Nothing is
   published or journaled for them.
4. `engine.advance(now)` runs the clock over the downtime: an escalation that fell due
   while the service was down comes out here.
5. Reconcile with the journal. An event already journaled is never published again.
   One that is not is new, and is journaled and published once, if it can only come from
   the downtime or from a crash between journaling a batch of messages and journaling
   its effects: that is, if it falls at or after the last journaled event (the live
   service journals effects in time order, one transaction per batch). The live service
   journals each message with the time its engine used, so the re-feed reproduces live
   events exactly (same ids, same times). When the journal reaches back before the
   start, events in the first `guard_s` (the longest rule window) may differ from what
   ran live (the rebuilt windows are still filling): those are counted and logged, never
   published, so nobody is paged twice for an old condition.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

from .engine import snapshot
from .engine.alarms import AlarmEvent
from .engine.effects import AdviceIssued, Effect
from .engine.engine import Engine
from .engine.evaluator import Notice
from .engine.rules import (
    BagFull,
    FlowStopped,
    HourlyAbove,
    Hypovolaemia,
    LabAbove,
    LabBelow,
    LabFall,
    LabRise,
    MeterSilent,
    NoUsableData,
    RateBelow,
    Reminder,
    ReplacementRatio,
    RuleDef,
    VolumeAbove,
    VolumeBelow,
)
from .engine.timefmt import iso
from .journal import BedFilter, StoredEvent, StoredSnapshot
from .journal_api import Journal

HOUR = 3600.0


def rule_window_s(rule: RuleDef) -> float:
    """How far back a rule looks, in seconds (what a restart must re-feed)."""
    c = rule.check
    if isinstance(c, HourlyAbove):
        return c.consecutive_hours * HOUR
    if isinstance(c, VolumeAbove | RateBelow | VolumeBelow | ReplacementRatio | LabRise | LabFall):
        return c.window_h * HOUR
    if isinstance(c, FlowStopped):
        return (c.stopped_min + c.before_min) * 60.0
    if isinstance(c, MeterSilent):
        return float(c.min_silence_s)
    if isinstance(c, BagFull):
        return 0.0  # the bag's level comes with the next reading
    if isinstance(c, NoUsableData):
        return float(c.max_gap_s)
    if isinstance(c, Hypovolaemia):
        return max(c.balance_window_h * HOUR, float(c.vitals_max_age_s))
    if isinstance(c, LabAbove | LabBelow):
        return float(c.max_age_s)
    if isinstance(c, Reminder):
        return float(c.every_s)
    raise TypeError(f"no window known for check {type(c).__name__}")  # a new check type


def longest_window_s(rules: list[RuleDef]) -> float:
    return max((rule_window_s(r) for r in rules if r.enabled), default=24 * HOUR)


# minutes of output an engine keeps per bed in the service and in a timeline replay: the
# rule windows, and the board's last 24 h and the hour being filled (daemon/web/board.py);
# older minutes are forgotten (bounded memory). Window sums are exact (whole nanolitres),
# so what an engine keeps never changes its events (tests/test_live_replay.py).
SERIES_KEEP_S = 25 * 3600.0


def series_keep_s(rules: list[RuleDef], margin_s: float = 0.0) -> float:
    return max(longest_window_s(rules) + margin_s, SERIES_KEEP_S)


class _LatestContexts(BedFilter):
    """Keeps every message in range, and remembers the newest context per bed topic
    from before the range (the journal hands those to `see`)."""

    def __init__(self, prefix: str) -> None:
        super().__init__("", prefix)
        self.latest: dict[str, bytes] = {}

    def see(self, topic: str, payload: bytes) -> None:
        if topic.startswith(self._beds) and topic.endswith("/context"):
            self.latest[topic] = payload

    def keep(self, topic: str, payload: bytes) -> bool:
        return True


@dataclass
class Recovery:
    """What recovery found, and what the service must still publish."""

    window_start: float
    now: float
    contexts: int = 0
    messages: int = 0
    complete: bool = True  # the journal holds nothing older than the window
    last_message_time: float | None = None
    last_event_time: float | None = None
    to_publish: list[Effect] = field(default_factory=list)  # new: journal, then publish
    already_journaled: int = 0
    differs: list[AlarmEvent] = field(default_factory=list)  # re-fed, not journaled, old
    undelivered: list[StoredEvent] = field(default_factory=list)  # journaled, never confirmed
    engine_errors: list[str] = field(default_factory=list)  # messages the engine choked on
    seconds: float = 0.0
    snapshot_id: int | None = None  # the snapshot loaded (None: a full re-feed)
    snapshot_time: float | None = None  # its engine time
    snapshots_ignored: list[str] = field(default_factory=list)  # why each was skipped
    last_message_id: int | None = None  # the newest message fed (from the snapshot on)


def _key(e: AlarmEvent) -> tuple[str, str, str, float]:
    return (e.alarm_id, str(e.state), e.reason, e.time)


def _other_key(e: Effect) -> tuple[object, ...] | None:
    if isinstance(e, AdviceIssued):
        return ("advice", e.bed, e.time, iso(e.advice.hour_start), str(e.advice.kind))
    if isinstance(e, Notice):
        return ("notice", e.bed, e.time, e.code)
    return None


def _journaled_key(ev: StoredEvent) -> tuple[object, ...] | None:
    if ev.kind == "advice":
        return ("advice", ev.bed, ev.time, ev.body.get("hour_start"), ev.body.get("kind"))
    if ev.kind == "notice":
        return ("notice", ev.bed, ev.time, ev.body.get("code"))
    return None


def _has_older(journal: Journal, t0: float) -> bool:
    older = journal.messages_between(None, t0)
    try:
        return next(older, None) is not None
    finally:
        older.close()  # type: ignore[attr-defined]


@dataclass
class _Journaled:
    """What the journal says about events since the lookback start."""

    last_time: float | None = None
    other_keys: set[tuple[object, ...]] = field(default_factory=set)
    first_seen: dict[str, float] = field(default_factory=dict)  # alarm id -> first event
    last_state: dict[str, str] = field(default_factory=dict)  # alarm id -> latest state

    def open_onsets(self) -> list[float]:
        """Onsets of the alarm episodes the journal last saw still open."""
        return [self.first_seen[a] for a, st in self.last_state.items() if st not in _ENDED_STATES]


_ENDED_STATES = frozenset({"resolved", "inactive"})
# Events the engine made, journaled in engine time order. Others (a paging channel's
# technical alarm, a publish failure) are journaled by the service at its own clock,
# possibly ahead of the engine's last event: they must not move the recovery's cut.
ENGINE_KINDS = frozenset({"alarm", "advice", "notice"})


def _read_events(journal: Journal, since: float | None) -> _Journaled:
    out = _Journaled()
    for ev in journal.events_between(since, None):
        if ev.kind in ENGINE_KINDS:  # the service's own events run on its clock, not the engine's
            out.last_time = ev.time if out.last_time is None else max(out.last_time, ev.time)
        if ev.kind == "alarm" and ev.alarm_id is not None:
            out.first_seen.setdefault(ev.alarm_id, ev.time)
            out.last_state[ev.alarm_id] = str(ev.body.get("state", ""))
        k = _journaled_key(ev)
        if k is not None:
            out.other_keys.add(k)
    return out


# what the shell snapshots beside the engine: name -> loader of the saved value
Extras = Mapping[str, Callable[[Any], None]]


def _load_snapshot(engine: Engine, journal: Journal, floor: float | None,
                   ignored: list[str], extras: Extras) -> StoredSnapshot | None:  # fmt: skip
    """The newest snapshot the engine could load (loaded into it, its extras handed to
    their loaders), or None."""
    for snap in journal.snapshots():
        what = f"snapshot {snap.id} of {iso(snap.taken_at)}"
        if floor is not None and snap.taken_at < floor:
            ignored.append(f"{what}: older than the journal's retention")
            continue
        try:  # leaves the engine untouched if it fails
            found = snapshot.restore(engine, snap.body, sorted(extras))
        except snapshot.Mismatch as exc:
            ignored.append(f"{what}: {exc}")
            continue
        except snapshot.Corrupt as exc:
            ignored.append(f"{what}: damaged: {exc}")
            continue
        for name, load in extras.items():  # before the tail: it adds to them
            load(found[name])
        return snap
    return None


def _reconcile(rec: Recovery, journal: Journal, effects: list[Effect], since: float,
               seen: _Journaled, cut: float) -> None:  # fmt: skip
    """Step 5: what the journal holds already, what is new, what differs."""
    journaled = journal.alarm_event_keys(since)
    for e in effects:
        if isinstance(e, AlarmEvent):
            if _key(e) in journaled:
                rec.already_journaled += 1
            elif e.time >= cut:
                rec.to_publish.append(e)
            else:
                rec.differs.append(e)
        elif (k := _other_key(e)) is not None:
            if k in seen.other_keys:
                rec.already_journaled += 1
            elif e.time >= cut:
                rec.to_publish.append(e)
        # rejected input was reported live; a rejection is not news after a restart


# Messages after a snapshot are read from this long before its engine time on (by id):
# their receive times are the engine's, which never runs backwards, so none is older.
TAIL_SLACK_S = 3600.0


def _from_snapshot(engine: Engine, journal: Journal, snap: StoredSnapshot, now: float,
                   window_s: float, rec: Recovery) -> None:  # fmt: skip
    """Steps 0, 4 and 5: the journal's tail after a loaded snapshot."""
    t0 = snap.taken_at
    rec.snapshot_id, rec.snapshot_time = snap.id, t0
    rec.window_start, rec.complete = t0, True
    seen = _read_events(journal, t0)
    rec.last_event_time = seen.last_time
    refed: list[Effect] = []
    t = t0
    last_id = snap.message_id
    for m in journal.messages_between(t0 - TAIL_SLACK_S, None):
        if m.id <= snap.message_id:
            continue  # in the snapshot already
        t = max(t, m.recv_time)
        try:
            refed += engine.advance(t)
            refed += engine.step(m.topic, m.payload, t)
        except Exception as exc:  # as live
            rec.engine_errors.append(f"message {m.id} on {m.topic[:100]}: {exc!r}"[:300])
        rec.messages += 1
        last_id = m.id
    rec.last_message_time = t if rec.messages else None
    rec.last_message_id = last_id
    downtime = engine.advance(max(now, t))
    cut = seen.last_time if seen.last_time is not None else -math.inf
    _reconcile(rec, journal, refed + downtime, t0, seen, cut)
    lo = min(t0, now - window_s)  # what was never confirmed, as far back as a full re-feed
    rec.undelivered = [ev for ev in journal.undelivered_events() if ev.time >= lo]


def recover(
    engine: Engine,
    journal: Journal,
    now: float,
    window_s: float,
    guard_s: float,
    prefix: str,
    max_lookback_s: float | None = None,
    use_snapshots: bool = True,
    extras: Extras | None = None,
) -> Recovery:
    """Rebuild `engine` from the journal (see the module text): from its newest readable
    snapshot and the messages after it, or else by a full re-feed. The re-feed starts at
    now - window_s, or earlier: `guard_s` (the longest rule window) before the onset of
    the oldest alarm episode the journal says is still open, so that episode is rebuilt
    with its own id and escalation clock. Never further back than `max_lookback_s`.
    `extras`: loaders of what the shell snapshots beside the engine (see snapshot.take),
    by name; a snapshot is used only if it holds every one."""
    started = time.perf_counter()
    floor = now - max_lookback_s if max_lookback_s is not None else None
    ignored: list[str] = []
    snap = _load_snapshot(engine, journal, floor, ignored, extras or {}) if use_snapshots else None
    if snap is not None:
        rec = Recovery(snap.taken_at, now, snapshots_ignored=ignored)
        _from_snapshot(engine, journal, snap, now, window_s, rec)
        rec.seconds = time.perf_counter() - started
        return rec
    seen = _read_events(journal, floor)
    t0 = min([now - window_s] + [t - guard_s for t in seen.open_onsets()])
    if floor is not None:
        t0 = max(t0, floor)
    rec = Recovery(t0, now, complete=not _has_older(journal, t0), snapshots_ignored=ignored)
    rec.last_event_time = seen.last_time
    refed: list[Effect] = []
    memory = _LatestContexts(prefix)
    messages = journal.messages_between(t0, None, bed_topics=memory)
    first = True
    t = t0
    for m in messages:
        if first:  # `see` has run over the contexts before t0 by now
            first = False
            for topic, payload in sorted(memory.latest.items()):
                refed += engine.step(topic, payload, t0)
                rec.contexts += 1
        t = max(t, m.recv_time)  # the engine's clock never runs backwards
        try:
            refed += engine.advance(t)
            refed += engine.step(m.topic, m.payload, t)
        except Exception as exc:  # as live: one bad message must not stop every restart
            rec.engine_errors.append(f"message {m.id} on {m.topic[:100]}: {exc!r}"[:300])
        rec.messages += 1
        rec.last_message_id = m.id
    if first:  # no message in the window: still bind the beds
        for topic, payload in sorted(memory.latest.items()):
            refed += engine.step(topic, payload, t0)
            rec.contexts += 1
    rec.last_message_time = t if rec.messages else None
    downtime = engine.advance(max(now, t))
    cut = seen.last_time if seen.last_time is not None else -math.inf
    if not rec.complete:
        cut = max(cut, t0 + guard_s)
    _reconcile(rec, journal, refed + downtime, t0, seen, cut)
    rec.undelivered = [ev for ev in journal.undelivered_events() if ev.time >= t0]
    rec.seconds = time.perf_counter() - started
    return rec
