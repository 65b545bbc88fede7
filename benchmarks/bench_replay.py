"""Replay throughput of the whole engine (intake + rules + lifecycle) on a
simulated ward, beside a plain numpy pass computing the same rolling 60-minute
sums over the same per-minute data, in the same run.

Default: 100 beds x 1 day of reference-meter readings (144,000 messages);
`--days 7` gives the issue's full 100-bed week (~1,000,000 messages, minutes to
run). All data is simulated. Nothing here asserts a time.
"""

from __future__ import annotations

import argparse
import math
import tempfile
import time
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from daemon.engine.engine import Engine
from daemon.logfile import read_log
from daemon.profile_files import load_profiles
from daemon.replay import drive
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, simulate, write_log

GOAL = 100_000  # readings/s end to end (alarm-engine issue), for now
START = datetime(2026, 3, 1, tzinfo=UTC)  # invented


def make_log(path: Path, beds: int, days: float, seed: int = 3) -> tuple[int, np.ndarray]:
    """Write the log; return its message count and the true per-minute output (beds x min)."""
    prof = next(p for p in load_profiles() if p.name == "reference-cumulative")
    recs = []
    truth = []
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
        truth.append(s.truth_per_min)
    n = write_log(path, recs)
    return n, np.array(truth)


def numpy_rolling(per_min: np.ndarray) -> np.ndarray:
    """Rolling 60-minute sums at every minute of every bed, by cumsum difference."""
    c = np.cumsum(per_min, axis=1)
    out = c.copy()
    out[:, 60:] = c[:, 60:] - c[:, :-60]
    return out


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="replay throughput, engine with the default rules")
    ap.add_argument("--beds", type=int, default=100)
    ap.add_argument("--days", type=float, default=1.0)
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        log = Path(tmp) / "ward.jsonl"
        t = time.perf_counter()
        n, truth = make_log(log, args.beds, args.days)
        print(f"Replay benchmark: {args.beds} beds x {args.days:g} days, {n:,} messages "
              f"(simulated in {time.perf_counter() - t:.0f} s)")  # fmt: skip
        records = list(read_log(log))
        engine = Engine(load_profiles(), load_rules(), load_policy())
        t = time.perf_counter()
        result = drive(engine, records)
        replay_s = time.perf_counter() - t
        t = time.perf_counter()
        for _ in range(5):
            numpy_rolling(truth)
        numpy_s = (time.perf_counter() - t) / 5
    events = sum(1 for e in result.effects if type(e).__name__ == "AlarmEvent")
    rate = n / replay_s
    print(
        f"  engine replay (parsed records, rules on)  {replay_s:8.2f} s  {rate:10,.0f} readings/s"
    )
    print(f"  numpy rolling 60-min sums, same minutes    {numpy_s:8.4f} s")
    print(f"  engine / numpy time: {replay_s / numpy_s:,.0f} x   alarm events: {events:,}")
    verdict = "met" if rate >= GOAL else f"NOT met ({rate / GOAL:.0%} of goal)"
    print(f"  goal: >= {GOAL:,} readings/s end to end: {verdict}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
