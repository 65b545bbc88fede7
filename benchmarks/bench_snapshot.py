"""Restart from an engine snapshot, and the engine's memory per bed (issue 18, parts 2-3).

A 100-bed ward is run as the live service runs it, without a broker: every batch of
messages is journaled, fed to the engine, its effects journaled, and an engine snapshot
journaled every 15 min of engine time (the service's default). Then the restart is
timed as `daemon/recovery.py` does it (a fresh Engine, then `recover`), in the same run:
- baseline: the full re-feed of the longest rule window (24 h + 1 h margin), as before
  snapshots (`use_snapshots=False`);
- measured: the newest snapshot + the journal's tail after it.
Goal: under 2 s for 100 beds, whether the journal holds 1 day or 30 days.

The 1-day journal is all live. The 30-day journal has the same live last 25 h, and before
it 28 days SYNTHESISED by writing journal rows directly (each bed's simulated day again,
its device times shifted by 2 to 29 days, and the day's events again, each alarm episode
of a copied day ended that day): simulating 28 more days through the engine would take
minutes. A day without rows separates them from the live part, so the full re-feed of the
baseline (which reaches a rule window before the onset of the oldest open alarm) never
feeds a synthesised row the snapshot's engine has not seen; its outcome is compared.
Events are marked delivered as the service marks them on the broker's confirmation.

Memory per bed: tracemalloc, the Python heap (numpy buffers included) the engine holds
after the 25 simulated hours (its steady state: windows full, dedup horizon full),
divided by the beds; measured on its own engine, after a collection. Goal < 100 KB.

All meters, beds and flows are invented. Benchmarks are not tests: nothing asserts a time.
`python -m benchmarks.bench_snapshot [--days 30] [--beds 100]`.
"""

from __future__ import annotations

import argparse
import gc
import json
import statistics
import sys
import tempfile
import time
import tracemalloc
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from benchmarks import table
from daemon.engine import snapshot
from daemon.engine.engine import Engine
from daemon.engine.timefmt import iso
from daemon.journal import SqliteJournal
from daemon.profile_files import load_profiles
from daemon.recovery import longest_window_s, recover, series_keep_s
from daemon.rule_files import load_advice, load_policy, load_rules
from daemon.service import journal_row
from simulator.meterlog import constant, simulate

PROFILES = load_profiles()
PROFILE = next(p for p in PROFILES if p.name == "reference-cumulative")
RULES = load_rules()
POLICY = load_policy()
ADVICE = load_advice(None)
GUARD_S = longest_window_s(RULES)
WINDOW_S = GUARD_S + 3600.0  # the service's default recovery margin
HOURS = WINDOW_S / 3600.0  # the live day covers the whole re-feed window
SNAPSHOT_EVERY_S = 900.0
BATCH = 200  # messages per journal transaction (the service's group commit)
DOWN_S = 300.0  # the restart comes this long after the last message
GOAL_RESTART_S = 2.0
GOAL_BYTES_PER_BED = 100 * 1024
TRIALS = 3
Row = tuple[str, str, str, str, str, bool | None]


def engine() -> Engine:
    """As the service builds it (its series keep what the rules and the board read)."""
    return Engine(PROFILES, RULES, POLICY, advice_policy=ADVICE,
                  series_keep_s=series_keep_s(RULES, WINDOW_S - GUARD_S))  # fmt: skip


def ward(beds: int, start: float) -> list[tuple[float, str, bytes]]:
    """Contexts, then every bed's meter by receive time (invented flows, 30 to 130 mL/h;
    an obstruction relieved on every tenth bed, so alarms open and escalate)."""
    msgs: list[tuple[float, str, Any]] = []
    for i in range(beds):
        bed, dev = f"sb{i:03d}", f"rc-sb{i:03d}"
        ctx: dict[str, Any] = {"ward": "bench", "device_ids": [dev], "weight_kg": 80,
                               "weight_basis": "actual"}  # fmt: skip
        flow = 30.0 + i
        if i % 10 == 0:
            ctx["episodes"] = [{"kind": "obstruction_relieved", "at": iso(start - 3600)}]
            flow = 300.0
        msgs.append((start - 60, f"hourwatch/beds/{bed}/context", ctx))
        sim = simulate(PROFILE, dev, datetime.fromtimestamp(start, UTC), HOURS, constant(flow),
                       seed=i)  # fmt: skip
        msgs += [(ts + 2.0, topic, p) for ts, topic, p in sim.records]
    msgs.sort(key=lambda m: m[0])
    return [(t, topic, json.dumps(p).encode()) for t, topic, p in msgs]


@dataclass
class Live:
    messages: int = 0
    events: int = 0
    snapshots: int = 0
    snapshot_bytes: list[int] = field(default_factory=list)
    take_s: list[float] = field(default_factory=list)
    pack_s: list[float] = field(default_factory=list)
    feed_s: float = 0.0
    last_t: float = 0.0


def run_live(path: Path, msgs: list[tuple[float, str, bytes]]) -> tuple[Live, Engine]:
    """As the service: journal a batch, feed it, journal its effects, snapshot on time."""
    live = Live()
    eng = engine()
    next_snap = msgs[0][0] + SNAPSHOT_EVERY_S
    started = time.perf_counter()
    with SqliteJournal(path, retention_days=31) as j:
        for k in range(0, len(msgs), BATCH):
            batch = msgs[k : k + BATCH]
            ids = j.append_messages([(t, topic, p, 1) for t, topic, p in batch])
            effects = []
            for t, topic, p in batch:
                effects += eng.advance(t)
                effects += eng.step(topic, p, t)
            ev_ids = j.append_events([journal_row(e) for e in effects])
            j.mark_delivered(ev_ids, batch[-1][0])  # the broker confirms (PUBACK)
            live.events += len(ev_ids)
            live.messages += len(batch)
            live.last_t = batch[-1][0]
            if live.last_t >= next_snap:
                t0 = time.perf_counter()
                captured = snapshot.take_captured(eng)  # the service: under the engine lock
                live.take_s.append(time.perf_counter() - t0)
                t0 = time.perf_counter()
                body = captured.pack()  # ... and this after it
                live.pack_s.append(time.perf_counter() - t0)
                live.snapshot_bytes.append(len(body))
                j.save_snapshot(live.last_t, ids[-1], body)
                live.snapshots += 1
                next_snap = live.last_t + SNAPSHOT_EVERY_S
    live.feed_s = time.perf_counter() - started
    return live, eng


def synthesise_past(path: Path, msgs: list[tuple[float, str, bytes]], days: int) -> int:
    """Days 2..days+1 before the live part, as journal rows (see the module text)."""
    start = msgs[0][0]
    day = [(t, topic, json.loads(p)) for t, topic, p in msgs if not topic.endswith("/context")]
    day = [m for m in day if m[0] < start + 86400.0]
    rows_n = 0
    with SqliteJournal(path, retention_days=31) as j:
        events = [ev for ev in j.events_between(None, start + 86400.0)]
        for k in range(days + 1, 1, -1):
            shift = k * 86400.0
            rows = []
            for t, topic, p in day:
                q = dict(p)
                if isinstance(q.get("time"), str):
                    q["time"] = iso(datetime.fromisoformat(q["time"]).timestamp() - shift)
                rows.append((t - shift, topic, json.dumps(q).encode(), 1))
            for n in range(0, len(rows), 20_000):
                j.append_messages(rows[n : n + 20_000])
            rows_n += len(rows)
            copied = [(ev.time - shift, ev.kind, ev.bed,
                       f"{ev.alarm_id}-d{k}" if ev.alarm_id else None, ev.body)
                      for ev in events]  # fmt: skip
            ended = {}  # each copied episode ends within its day
            for t, kind, bed, alarm, body in copied:
                if kind == "alarm" and alarm is not None:
                    ended[alarm] = (t, bed, body)
            copied += [(start - shift + 86000.0, "alarm", bed, alarm, dict(body, state="resolved"))
                       for alarm, (t, bed, body) in ended.items()]  # fmt: skip
            ids = j.append_events(copied)
            j.mark_delivered(ids, start - shift + 86000.0)
    return rows_n


def timed_restart(path: Path, now: float, use: bool) -> tuple[float, Any, Engine]:
    times = []
    rec: Any = None
    eng = engine()
    for _ in range(TRIALS):
        gc.collect()
        t0 = time.perf_counter()
        eng = engine()
        with SqliteJournal(path, retention_days=31) as j:
            rec = recover(eng, j, now, WINDOW_S, GUARD_S, "hourwatch",
                          max_lookback_s=31 * 86400.0, use_snapshots=use)  # fmt: skip
        times.append(time.perf_counter() - t0)
    return statistics.median(times), rec, eng


def same_outcome(a: Engine, b: Engine) -> bool:
    return (a.quality() == b.quality() and a.book.active() == b.book.active()
            and a.next_wakeup() == b.next_wakeup()
            and all(list(a.beds[k].series.completed_hours())
                    == list(b.beds[k].series.completed_hours()) for k in a.beds))  # fmt: skip


def memory_per_bed(msgs: list[tuple[float, str, bytes]], beds: int) -> tuple[float, float]:
    """(bytes per bed held by the engine after the live day, of which minute series)."""
    gc.collect()
    tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0]
    eng = engine()
    for t, topic, p in msgs:
        eng.advance(t)
        eng.step(topic, p, t)
    eng.advance(msgs[-1][0] + 60)
    gc.collect()
    held = tracemalloc.get_traced_memory()[0] - base
    snap = tracemalloc.take_snapshot()
    tracemalloc.stop()
    series = sum(s.size for s in snap.filter_traces(
        [tracemalloc.Filter(True, "*daemon/engine/series.py")]).statistics("filename"))  # fmt: skip
    del eng
    return held / beds, series / beds


def measure(beds: int, days: tuple[int, ...], out: list[Row], verbose: bool) -> None:
    now_wall = time.time()
    start = now_wall - HOURS * 3600.0 - DOWN_S
    t0 = time.perf_counter()
    msgs = ward(beds, start)
    if verbose:
        print(f"simulated {beds} beds x {HOURS:g} h: {len(msgs):,} messages "
              f"in {time.perf_counter() - t0:.1f} s")  # fmt: skip
    with tempfile.TemporaryDirectory(prefix="hw-bench-snap-") as tmp:
        live_path = Path(tmp) / "live.db"
        live, _ = run_live(live_path, msgs)
        now = live.last_t + DOWN_S
        if verbose:
            print(f"live run: {live.messages:,} messages, {live.events:,} events, "
                  f"{live.snapshots} snapshots, {live.feed_s:.1f} s")  # fmt: skip
        for d in days:
            path = Path(tmp) / f"j{d}.db"
            path.write_bytes(live_path.read_bytes())
            past = synthesise_past(path, msgs, d - 2) if d > 2 else 0
            before, full, b = timed_restart(path, now, use=False)
            after, fast, a = timed_restart(path, now, use=True)
            same = same_outcome(a, b) and [str(e) for e in fast.to_publish] == [
                str(e) for e in full.to_publish]  # fmt: skip
            if verbose:
                print(f"{d:>2}-day journal ({past:,} synthesised rows before the live part): "
                      f"full re-feed {before:.2f} s ({full.messages:,} messages), snapshot + "
                      f"tail {after:.2f} s ({fast.messages:,} messages after snapshot "
                      f"{fast.snapshot_id}); same outcome: {same}")  # fmt: skip
            out.append((f"restart, {beds} beds, {d}-day journal (snapshot + tail)",
                        f"{after:.2f} s", f"{before:.2f} s (full re-feed)",
                        f"{before / after:.1f}x faster", f"< {GOAL_RESTART_S:g} s",
                        after < GOAL_RESTART_S and same))  # fmt: skip
    size = statistics.median(live.snapshot_bytes)
    take = statistics.median(live.take_s)
    out.append((f"snapshot size, {beds} beds", f"{size / 1024:.0f} KiB "
                f"({size / beds / 1024:.1f} KiB/bed)", "", "", "", None))  # fmt: skip
    pack = statistics.median(live.pack_s)
    out.append((f"snapshot encode under the engine lock, {beds} beds (median, max)",
                f"{take * 1000:.0f} ms, {max(live.take_s) * 1000:.0f} ms",
                f"then compressed outside it: {pack * 1000:.0f} ms", "", "", None))  # fmt: skip
    per_bed, series = memory_per_bed(msgs, beds)
    goal = f"< {GOAL_BYTES_PER_BED // 1024} KiB"
    out.append((f"engine memory per bed, {beds} beds, steady state (tracemalloc)",
                f"{per_bed / 1024:.1f} KiB", f"of which minute series {series / 1024:.1f} KiB",
                "", goal, per_bed < GOAL_BYTES_PER_BED))  # fmt: skip


def rows(beds: int = 100, days: tuple[int, ...] = (1, 30), verbose: bool = False) -> list[Row]:
    out: list[Row] = []
    measure(beds, days, out, verbose)
    return out


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="bench_snapshot")
    ap.add_argument("--beds", type=int, default=100)
    ap.add_argument("--days", type=int, nargs="*", default=[1, 30])
    args = ap.parse_args(sys.argv[1:] if argv is None else argv)
    print("Restart from a snapshot, and memory per bed (issue 18)")
    result = rows(args.beds, tuple(args.days), verbose=True)
    for r in result:
        table.add(table.Row(*r))
    width = max(len(r[0]) for r in result)
    for name, measured, baseline, ratio, goal, met in result:
        verdict = "" if met is None else ("met" if met else "NOT met")
        print(f"  {name:<{width}}  {measured:>22}  {baseline:>28}  {ratio:>14}  {goal:>8}  "
              f"{verdict}")  # fmt: skip
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
