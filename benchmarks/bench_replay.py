"""Replay cost of the whole engine (log reading + intake + rules + lifecycle) on a
simulated ward, against a plain Python pass that reads the same log file and
json-parses every line, measured in the same run (CPU time of this process).

Default: 100 beds x 2 days of reference-meter readings with the intake faults the
issue names (noise, redeliveries, reorders, bag changes), ~290,000 messages; then
the scaling line: CPU cost per reading at 10, 100 and 1,000 beds over a few
simulated hours. All data is simulated. Nothing here asserts a time.
"""

from __future__ import annotations

import argparse
import json
import math
import tempfile
import time
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from pathlib import Path

from benchmarks.table import Row, add, print_table
from daemon.engine.engine import Engine
from daemon.profile_files import load_profiles
from daemon.replay import replay_file
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, simulate, write_log

GOAL_RATIO = 3.0  # replay CPU <= 3 x read + json.loads of the same log (issue 18)
GOAL_RATE = 100_000  # readings/s end to end (alarm-engine issue)
START = datetime(2026, 3, 1, tzinfo=UTC)  # invented
SCALING_BEDS = (10, 100, 1000)


def make_log(path: Path, beds: int, days: float, seed: int = 3) -> int:
    """Write the log; return its message count."""
    prof = next(p for p in load_profiles() if p.name == "reference-cumulative")
    recs = []
    for b in range(beds):
        dev = f"rc-{b:04d}"
        recs.append(context_record(START.timestamp() - 60, f"bed-{b:03d}", "ward-b", [dev]))

        def flow(m: float, b: int = b) -> float:  # invented: a daily swing, some high beds
            base = 45 + 30 * math.sin(m / 240 + b)
            return base + (260 if b % 10 == 0 and m > 720 else 0)

        s = simulate(prof, dev, START, days * 24, flow,
                     MeterFaults(noise_sd_ml=1.0, duplicate_p=0.02, reorder_p=0.01,
                                 bag_change_every_s=4 * 3600 + 97 * b), seed=seed + b)  # fmt: skip
        recs += s.records
    return write_log(path, recs)


def cpu(fn: Callable[[], object], repeats: int = 1) -> float:
    """The least CPU time of `repeats` calls."""
    best = math.inf
    for _ in range(repeats):
        t = time.process_time()
        fn()
        best = min(best, time.process_time() - t)
    return best


def plain_pass(path: Path) -> int:
    """The baseline: read every line of the file and json.loads it, nothing else."""
    n = 0
    with path.open("rb") as fh:
        for line in fh:
            json.loads(line)
            n += 1
    return n


def replay_cpu(path: Path, repeats: int, rules: bool = True) -> float:
    """The least CPU time of `repeats` replays of the log file by a new engine with the
    shipped profiles and rules (made before the clock starts: loading rule files is
    not replay); without `rules`, the engine's path alone (decode, clean, series)."""
    best = math.inf
    for _ in range(repeats):
        engine = Engine(load_profiles(), load_rules() if rules else [], load_policy())
        t = time.process_time()
        replay_file(path, engine, warn=None)
        best = min(best, time.process_time() - t)
    return best


def measure(path: Path, repeats: int) -> tuple[float, float]:
    """(replay CPU s, plain pass CPU s), each the best of `repeats` (the plain pass,
    being short, of at least 3)."""
    base = cpu(lambda: plain_pass(path), max(3, repeats))
    return replay_cpu(path, repeats), base


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="replay cost, engine with the default rules")
    ap.add_argument("--beds", type=int, default=100)
    ap.add_argument("--days", type=float, default=2.0)
    ap.add_argument("--repeats", type=int, default=1, help="best of N replays")
    ap.add_argument("--scaling-hours", type=float, default=3.0,
                    help="simulated hours of each scaling run (0: no scaling line)")  # fmt: skip
    ap.add_argument("--no-table", action="store_true", help="no summary table at the end")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        log = Path(tmp) / "ward.jsonl"
        t = time.perf_counter()
        n = make_log(log, args.beds, args.days)
        print(f"Replay benchmark: {args.beds} beds x {args.days:g} days, {n:,} messages with "
              f"redeliveries, reorders and bag changes "
              f"(simulated in {time.perf_counter() - t:.0f} s), CPU time")  # fmt: skip
        rep, base = measure(log, args.repeats)
        ratio = rep / base
        print(f"  read + json.loads every line (baseline)  {base:8.2f} s  "
              f"{base / n * 1e6:6.2f} us/line")  # fmt: skip
        print(f"  hourwatch replay, default rules          {rep:8.2f} s  "
              f"{rep / n * 1e6:6.2f} us/line  {n / rep:10,.0f} readings/s")  # fmt: skip
        print(f"  replay / baseline: {ratio:.1f} x   goal <= {GOAL_RATIO:g} x")
        bare = replay_cpu(log, args.repeats, rules=False)
        print(f"  the same replay with no rules             {bare:8.2f} s  "
              f"{bare / n * 1e6:6.2f} us/line  ({bare / base:.1f} x; rules take "
              f"{(rep - bare) / rep:.0%} of the replay)")  # fmt: skip
        add(Row(f"replay {args.beds} beds x {args.days:g} d vs read+json.loads", f"{rep:.2f} s CPU",
                f"{base:.2f} s CPU", f"{ratio:.1f} x", f"<= {GOAL_RATIO:g} x",
                ratio <= GOAL_RATIO))  # fmt: skip
        add(Row("the same replay with no rules (where time goes)", f"{bare:.2f} s CPU",
                f"{base:.2f} s CPU", f"{bare / base:.1f} x", "no goal set", None))  # fmt: skip
        add(Row("replay throughput (same run)", f"{n / rep:,.0f} readings/s", "-", "-",
                f">= {GOAL_RATE:,} readings/s", n / rep >= GOAL_RATE))  # fmt: skip
        if args.scaling_hours > 0:
            costs: list[float] = []
            bases: list[float] = []
            for beds in SCALING_BEDS:
                path = Path(tmp) / f"scale-{beds}.jsonl"
                m = make_log(path, beds, args.scaling_hours / 24)
                r, b = measure(path, 1)
                costs.append(r / m * 1e6)
                bases.append(b / m * 1e6)
                print(
                    f"  scaling: {beds:5,} beds x {args.scaling_hours:g} h, {m:8,} messages: "
                    f"{costs[-1]:6.2f} us CPU/reading (baseline {bases[-1]:.2f} us/line)"
                )
            shown = " / ".join(f"{c:.1f}" for c in costs)
            add(Row(f"replay cost per reading at {'/'.join(map(str, SCALING_BEDS))} beds",
                    f"{shown} us", " / ".join(f"{b:.1f}" for b in bases) + " us",
                    f"{costs[-1] / costs[0]:.2f} x (1,000 vs 10)", "flat: no goal set",
                    None))  # fmt: skip
    if not args.no_table:
        print()
        print_table()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
