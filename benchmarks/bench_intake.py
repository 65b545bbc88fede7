"""Intake throughput: decode + clean for the reference profile.

Measures, in one run and on the same simulated payloads:

- engine:      `Engine.step(topic, payload_bytes, now)` for every message;
- json.loads:  `json.loads(payload_bytes)` alone, the floor any JSON meter pays;
- replay:      `daemon.replay.replay_file` on the same messages as a JSON Lines
               file (file read + log-line validation + engine);
- line parse:  `json.loads` of every line of that file, the floor of replay;
- with rules:  the engine path again with the default alert rules loaded, for
               reference (the alarm engine's cost on top of intake).

Each figure is the best of N runs (time.perf_counter), as readings per second.
Benchmarks are not tests: nothing here asserts a time. All data is simulated.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import io
import json
import pstats
import tempfile
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from benchmarks.table import Row as Table
from benchmarks.table import add
from daemon.engine.engine import Engine
from daemon.engine.profiles import DeviceProfile
from daemon.profile_files import load_profiles
from daemon.replay import replay_file
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, constant, context_record, simulate, write_log

GOAL = 100_000  # readings/s on one core (intake issue)
PROFILE = "reference-cumulative"
START = datetime(2026, 3, 1, 0, 0, tzinfo=UTC)  # invented


@dataclass
class Workload:
    profiles: list[DeviceProfile]
    contexts: list[tuple[float, str, bytes]]
    messages: list[tuple[float, str, bytes]]  # (receive time, topic, payload bytes)
    records: list[tuple[float, str, dict[str, Any] | str]]  # the same, for a log file


def make_workload(readings: int, meters: int, seed: int = 1) -> Workload:
    """`readings` meter messages spread over `meters` bound reference meters.

    Realistic messiness: 1 mL noise, a bag change every 4 h, ~2% duplicates,
    ~1% reordered; one bed per meter, 80 kg (invented).
    """
    profiles = load_profiles()
    prof = next(p for p in profiles if p.name == PROFILE)
    per_meter = -(-readings // meters)
    hours = per_meter * prof.timing.period_s / 3600.0
    faults = MeterFaults(
        noise_sd_ml=1.0, duplicate_p=0.02, reorder_p=0.01, bag_change_every_s=4 * 3600.0,
        jitter_s=2.0,
    )  # fmt: skip
    t0 = START.timestamp()
    contexts: list[tuple[float, str, bytes]] = []
    records: list[tuple[float, str, dict[str, Any] | str]] = []
    for i in range(meters):
        dev = f"rc-{i:04d}"
        ctx = context_record(t0 - 60.0, f"bed-{i:03d}", "bench", [dev], weight_kg=80.0)
        contexts.append((ctx[0], ctx[1], json.dumps(ctx[2]).encode()))
        records.append(ctx)
        flow = constant(40.0 + 10.0 * (i % 7))  # mL/h, a different steady flow per bed
        s = simulate(prof, dev, START, hours, flow, faults, seed=seed + i)
        records += s.records
    records.sort(key=lambda r: r[0])
    messages = [
        (t, topic, json.dumps(p).encode()) for t, topic, p in records if "/beds/" not in topic
    ]
    return Workload(profiles, contexts, messages, records)


def best_of(repeats: int, setup: Callable[[], Any], run: Callable[[Any], None]) -> float:
    """Least wall time of `repeats` runs of run(setup()); setup is not timed."""
    best = float("inf")
    for _ in range(repeats):
        state = setup()
        gc.collect()
        t = time.perf_counter()
        run(state)
        best = min(best, time.perf_counter() - t)
    return best


def _fresh_engine(w: Workload, rules: bool = False) -> Engine:
    eng = Engine(w.profiles, load_rules(), load_policy()) if rules else Engine(w.profiles)
    for t, topic, payload in w.contexts:
        eng.step(topic, payload, t)
    return eng


def _engine_run(w: Workload) -> Callable[[Engine], None]:
    msgs = w.messages

    def run(eng: Engine) -> None:
        step = eng.step
        for t, topic, payload in msgs:
            step(topic, payload, t)

    return run


def _json_run(w: Workload) -> Callable[[None], None]:
    payloads = [p for _, _, p in w.messages]

    def run(_: None) -> None:
        loads = json.loads
        for p in payloads:
            loads(p)

    return run


@dataclass
class Row:
    path: str
    seconds: float
    readings: int

    @property
    def rate(self) -> float:
        return self.readings / self.seconds


def measure(w: Workload, repeats: int, tmp: Path, with_rules: bool = True) -> list[Row]:
    n = len(w.messages)
    rows = [
        Row("engine: Engine.step(topic, bytes, now)", best_of(
            repeats, lambda: _fresh_engine(w), _engine_run(w)), n),
        Row("baseline: json.loads(bytes) alone", best_of(
            repeats, lambda: None, _json_run(w)), n),
    ]  # fmt: skip
    log = tmp / "bench.jsonl"
    write_log(log, w.records)

    def replay(_: None) -> None:
        replay_file(log, w.profiles, warn=None)

    def lines(_: None) -> None:
        loads = json.loads
        with log.open("rb") as fh:
            for raw in fh:
                loads(raw)

    rows.append(Row("replay: replay_file(JSON Lines)", best_of(repeats, lambda: None, replay), n))
    rows.append(Row("baseline: read + json.loads per line", best_of(
        repeats, lambda: None, lines), n))  # fmt: skip
    if with_rules:
        rows.append(Row("engine + default alert rules", best_of(
            repeats, lambda: _fresh_engine(w, rules=True), _engine_run(w)), n))  # fmt: skip
    return rows


def check_counts(w: Workload) -> dict[str, int]:
    """One untimed pass: what happened to the readings (proves the work was real)."""
    eng = _fresh_engine(w)
    _engine_run(w)(eng)
    totals: dict[str, int] = {}
    for q in eng.quality().values():
        outcomes = q["outcomes"]
        assert isinstance(outcomes, dict)
        for k, v in outcomes.items():
            totals[k] = totals.get(k, 0) + int(v)
    return dict(sorted(totals.items(), key=lambda kv: -kv[1]))


def profile_engine(w: Workload, top: int = 15) -> str:
    eng = _fresh_engine(w)
    prof = cProfile.Profile()
    prof.enable()
    _engine_run(w)(eng)
    prof.disable()
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("tottime").print_stats(top)
    return out.getvalue()


def report(
    rows: list[Row], counts: dict[str, int], readings: int, meters: int, repeats: int
) -> str:
    eng, base, rep, lines = rows[:4]
    out = [
        f"Intake benchmark: {PROFILE}, {readings:,} messages over {meters} bound meters "
        f"(simulated), best of {repeats} runs, one process",
        "",
        f"  {'path':<42} {'seconds':>8} {'readings/s':>12}",
    ]
    for r in rows:
        out.append(f"  {r.path:<42} {r.seconds:8.3f} {r.rate:12,.0f}")
    out += [
        "",
        f"  engine cost / json.loads cost:     {eng.seconds / base.seconds:6.1f} x",
        f"  replay cost / line-parse cost:     {rep.seconds / lines.seconds:6.1f} x",
    ]
    if len(rows) > 4:
        out.append(f"  engine with rules / without:       {rows[4].seconds / eng.seconds:6.1f} x")
    out += [
        f"  goal: >= {GOAL:,} readings/s (engine path): "
        + ("met" if eng.rate >= GOAL else f"NOT met ({eng.rate / GOAL:.0%} of goal)"),
        "",
        "  outcomes of one pass: " + ", ".join(f"{k} {v:,}" for k, v in counts.items()),
    ]
    return "\n".join(out)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="decode + clean throughput, reference profile")
    ap.add_argument("--readings", type=int, default=200_000)
    ap.add_argument("--meters", type=int, default=20)
    ap.add_argument("--repeats", type=int, default=3)
    ap.add_argument("--profile", action="store_true", help="also print a cProfile of the engine")
    ap.add_argument("--no-rules", action="store_true", help="skip the engine-with-rules row")
    args = ap.parse_args(argv)
    w = make_workload(args.readings, args.meters)
    with tempfile.TemporaryDirectory() as tmp:
        rows = measure(w, args.repeats, Path(tmp), with_rules=not args.no_rules)
    print(report(rows, check_counts(w), len(w.messages), args.meters, args.repeats))
    eng, base = rows[0], rows[1]
    add(Table(f"intake: decode + clean, {args.meters} meters", f"{eng.rate:,.0f} readings/s",
              f"{base.rate:,.0f}/s {base.path}", f"{eng.seconds / base.seconds:.1f} x the time",
              f">= {GOAL:,} readings/s", eng.rate >= GOAL))  # fmt: skip
    if args.profile:
        print("\ncProfile of the engine path (sorted by own time):")
        print(profile_engine(w))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
