"""Review speed: a month of a 20-bed unit replayed with the HTML report.

Measures, in one run and on the same simulated log (written once to a temp dir):

- report:    `hourwatch replay LOG --report OUT.html` as the command does it: the
             replay with the review observer (every alarm followed, every reading's
             outcome filed), then one plot per bed and the HTML;
- replay:    the same replay without report or observer (alarms only), for reference;
- line parse: read + json.loads of every line, the floor of any replay of this file;
- numpy:     a plain numpy pass over the same readings: per-minute volumes from the
             cumulative values, then rolling 60-minute sums by cumsum difference.

Default: 20 beds x 30 days of 60-s reference-meter readings = 864,000 minute readings
(issue 6). All data is simulated (invented unit, beds and flows). Nothing here
asserts a time; the goal is printed beside the measurement.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import json
import math
import pstats
import tempfile
import time
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from benchmarks.table import Row, add
from daemon.profile_files import load_profiles
from daemon.review import report as html_report
from daemon.review.explain import review
from daemon.review.recorder import replay_alarms
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, iso_z, simulate, write_log

GOAL_S = 60.0  # "well under a minute on one core" (issue 6)
WELL_UNDER_S = 45.0  # what we take "well under" to mean: at most three quarters of it
START = datetime(2026, 2, 1, tzinfo=UTC)  # invented
PROFILE = "reference-cumulative"
WARD = "bench-unit"  # invented
HOUR_S = 3600.0

Record = tuple[float, str, dict[str, Any] | str]


def _flow(bed: int, weight: float, days: int) -> Any:
    """Invented output pictures: mostly normal with a day/night swing; two beds with a
    post-obstructive diuresis episode, one with an oliguric spell (so the report has
    alarms of each kind to draw)."""
    base = weight * (0.6 + 0.05 * (bed % 8))  # mL/h, 0.6-0.95 mL/kg/h
    phase = bed * 0.7
    pod_day = {3: 5, 11: 18}.get(bed)
    olig = (10 * 1440, 12 * 1440) if bed == 7 else None

    def f(m: float) -> float:
        swing = 0.85 + 0.15 * math.cos(2 * math.pi * m / 1440.0 + phase)
        out = base * swing
        if pod_day is not None and m >= pod_day * 1440:
            out += 620.0 * math.exp(-(m - pod_day * 1440) / 360.0)
        if olig is not None and olig[0] <= m < olig[1]:
            out = weight * 0.25
        return out

    return f


def make_log(path: Path, beds: int, days: int, seed: int = 6) -> tuple[int, int, int]:
    """Write the month; return (minute readings, meter messages, all messages)."""
    prof = next(p for p in load_profiles() if p.name == PROFILE)
    t0 = START.timestamp()
    recs: list[Record] = []
    readings = meter_messages = 0
    for b in range(beds):
        dev, bed = f"rc-{b:04d}", f"bed-{b:02d}"
        weight = 60.0 + 2.5 * b
        recs.append(context_record(t0 - 60.0, bed, WARD, [dev], weight_kg=weight))
        faults = MeterFaults(
            noise_sd_ml=1.0,
            duplicate_p=0.01,
            reorder_p=0.005,
            bag_change_every_s=6 * HOUR_S,
            spike_times_s=[(d * 7 + 3) * 86400.0 + b * 600.0 for d in range(days // 7)],
            spike_ml=300.0,
            jitter_s=2.0,
        )
        s = simulate(prof, dev, START, days * 24.0, _flow(b, weight, days), faults, seed=seed + b)
        meter = list(s.records)
        if b == 15:  # two hours off the network on day 20
            lo, hi = t0 + 20 * 86400.0, t0 + 20 * 86400.0 + 2 * HOUR_S
            meter = [r for r in meter if not lo <= r[0] < hi]
        meter_messages += len(meter)
        readings += len({r[2]["seq"] for r in meter if isinstance(r[2], dict)})  # not redeliveries
        recs += meter
        day = {3: 5, 11: 18}.get(b, days)
        if day < days:  # replacement documented each hour of the diuresis day (invented)
            for h in range(2, 24):
                t = t0 + day * 86400.0 + h * HOUR_S + 300.0
                payload = {"time": iso_z(t), "volume_ml": 200, "fluid": "0.45% sodium chloride"}
                recs.append((t, f"hourwatch/beds/{bed}/intake", payload))
    n = write_log(path, recs)
    return readings, meter_messages, n


def _line_parse(path: Path) -> list[dict[str, Any]]:
    out = []
    loads = json.loads
    with path.open("rb") as fh:
        for raw in fh:
            out.append(loads(raw))
    return out


class Clock:
    """Wall and CPU seconds since it was made: the machine may be shared, and CPU time
    is what one core spends on the work whatever else runs beside it."""

    def __init__(self) -> None:
        self.wall, self.cpu = time.perf_counter(), time.process_time()

    def lap(self) -> Lap:
        return Lap(time.perf_counter() - self.wall, time.process_time() - self.cpu)


@dataclass(frozen=True)
class Lap:
    wall: float
    cpu: float

    def __add__(self, other: Lap) -> Lap:
        return Lap(self.wall + other.wall, self.cpu + other.cpu)


def numpy_pass(lines: list[dict[str, Any]]) -> tuple[Lap, int]:
    """Per-minute volumes from each meter's cumulative readings (a fall = a new bag),
    then rolling 60-minute sums by cumsum difference. Returns (seconds, minutes summed)."""
    per_dev: dict[str, tuple[list[float], list[float]]] = {}
    for rec in lines:
        p = rec["payload"]
        if isinstance(p, dict) and "volume_ml" in p and "device_id" in p:
            ts, vs = per_dev.setdefault(p["device_id"], ([], []))
            ts.append(p["time"])
            vs.append(p["volume_ml"])
    arrays = {
        d: (np.array([datetime.fromisoformat(t).timestamp() for t in ts]), np.array(vs))
        for d, (ts, vs) in per_dev.items()
    }
    t = Clock()
    minutes = 0
    for ts, vs in arrays.values():
        order = np.argsort(ts, kind="stable")
        ts, vs = ts[order], vs[order]
        inc = np.diff(vs, prepend=vs[0])
        inc = np.where(inc < 0, np.maximum(vs, 0.0), inc)  # a fall: the new bag's content
        m = np.floor(ts / 60.0).astype(np.int64)
        m -= m[0]
        vol = np.bincount(m, weights=inc)
        cum = np.concatenate([[0.0], np.cumsum(vol)])
        hi = np.arange(1, vol.size + 1)
        rolling = cum[hi] - cum[np.maximum(hi - 60, 0)]
        minutes += int(rolling.size)
    return t.lap(), minutes


@dataclass
class Timing:
    replay: Lap
    render: Lap
    html_bytes: int
    alarms: int
    messages: int

    @property
    def total(self) -> Lap:
        return self.replay + self.render


def report_run(log: Path, out: Path) -> Timing:
    """What `hourwatch replay LOG --report OUT` does, timed in two parts."""
    profiles, rules, policy = load_profiles(), load_rules(), load_policy()
    t = Clock()
    rv = review(log, profiles, rules, policy)
    replay = t.lap()
    t = Clock()
    inp = html_report.ReportInput(rv, log, "shipped defaults", "shipped defaults", rv.bad_lines)
    text = html_report.render(inp)
    html_report.write(out, text)
    render = t.lap()
    alarms = sum(1 for e in rv.episodes if e.raised)
    return Timing(replay, render, len(text.encode()), alarms, rv.messages)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="replay + HTML report of a simulated unit-month")
    ap.add_argument("--beds", type=int, default=20)
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--profile", action="store_true", help="also print a cProfile of the report")
    ap.add_argument(
        "--keep", type=Path, default=None,
        help="write the log and report here (and reuse a log an earlier run left there)",
    )  # fmt: skip
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        where = args.keep or Path(tmp)
        where.mkdir(parents=True, exist_ok=True)
        log = where / f"unit-{args.beds}beds-{args.days}d.jsonl"
        t = time.perf_counter()
        counts_file = log.with_suffix(".counts.json")
        if args.keep and log.is_file() and counts_file.is_file():  # a log kept by an earlier run
            readings, meter_messages, messages = json.loads(counts_file.read_text())
            made = f"reused the log {log}"
        else:
            readings, meter_messages, messages = make_log(log, args.beds, args.days)
            counts_file.write_text(json.dumps([readings, meter_messages, messages]))
            made = f"simulating and writing the log took {time.perf_counter() - t:.0f} s"
        timing = report_run(log, where / "report.html")
        t = Clock()
        replay_alarms(log, load_profiles(), load_rules(), load_policy())
        plain = t.lap()
        t = Clock()
        lines = _line_parse(log)
        parse = t.lap()
        np_lap, minutes = numpy_pass(lines)
        del lines
        laps = {"plain": plain, "parse": parse, "numpy": np_lap}
        print(_report(args, (readings, meter_messages, messages), made, timing, laps, minutes))
        full = (args.beds, args.days) == (20, 30)
        add(Row(f"replay + HTML report, {args.beds} beds x {args.days} d",
                f"{timing.total.cpu:.1f} s CPU", f"{parse.cpu:.2f} s read+json.loads",
                f"{timing.total.cpu / parse.cpu:.1f} x", f"< {GOAL_S:.0f} s (20 beds x 30 d)",
                timing.total.cpu <= WELL_UNDER_S if full else None))  # fmt: skip
        if args.profile:
            print("\ncProfile of replay + report (top 25 by own time):")
            print(_profile(log, where / "report-profiled.html"))
    return 0


def _report(
    args: argparse.Namespace, counts: tuple[int, int, int], made: str, tm: Timing,
    laps: dict[str, Lap], minutes: int,
) -> str:  # fmt: skip
    readings, meter_messages, messages = counts

    def row(name: str, lap: Lap) -> str:
        return (f"  {name:<42} {lap.wall:8.2f} {lap.cpu:8.2f} "
                f"{readings / max(lap.cpu, 1e-9):12,.0f}")  # fmt: skip

    total = tm.total
    verdict = (
        f"met ({total.cpu:.0f} CPU s, at most {WELL_UNDER_S:.0f} s counts as well under)"
        if total.cpu <= WELL_UNDER_S
        else f"NOT met ({total.cpu:.0f} CPU s; well under means at most {WELL_UNDER_S:.0f} s)"
    )
    np_cpu, parse_cpu = laps["numpy"].cpu, laps["parse"].cpu
    return "\n".join([
        f"Review benchmark: {args.beds} beds x {args.days} days, {readings:,} minute readings "
        f"of the {PROFILE} profile (simulated)",
        f"  {meter_messages:,} meter messages with redeliveries, {messages:,} messages in all; "
        "one process, one run; readings/s below counts minute readings",
        f"  ({made}; not counted)",
        "",
        f"  {'path':<42} {'wall s':>8} {'CPU s':>8} {'readings/CPU s':>14}",
        row("replay + report (replay --report)", total),
        row("  of which replay with review observer", tm.replay),
        row("  of which plots + HTML", tm.render),
        row("replay alone (alarms only, no observer)", laps["plain"]),
        row("baseline: read + json.loads per line", laps["parse"]),
        row("baseline: numpy rolling 60-min sums", laps["numpy"]),
        "",
        f"  report: {tm.alarms} alarms raised, {tm.html_bytes / 1e6:.1f} MB of HTML, "
        f"{minutes:,} bed-minutes in the numpy pass",
        f"  replay + report / numpy pass (CPU):  {total.cpu / max(np_cpu, 1e-9):10,.0f} x",
        f"  replay + report / line parse (CPU):  {total.cpu / parse_cpu:10.1f} x",
        f"  goal: well under {GOAL_S:.0f} s for a 20-bed month on one core: "
        + (verdict if (args.beds, args.days) == (20, 30) else "(not this size of run)"),
    ])  # fmt: skip


def _profile(log: Path, out: Path, top: int = 25) -> str:
    prof = cProfile.Profile()
    prof.enable()
    report_run(log, out)
    prof.disable()
    buf = io.StringIO()
    pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(top)
    return buf.getvalue()


if __name__ == "__main__":
    raise SystemExit(main())
