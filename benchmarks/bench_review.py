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

from daemon.profile_files import load_profiles
from daemon.review import report as html_report
from daemon.review.explain import review
from daemon.review.recorder import replay_alarms
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, iso_z, simulate, write_log

GOAL_S = 60.0  # "well under a minute on one core" (issue 6)
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
        if b in (3, 11):  # replacement documented each hour of the diuresis day (invented)
            day = {3: 5, 11: 18}[b]
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


def numpy_pass(lines: list[dict[str, Any]]) -> tuple[float, int]:
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
    t = time.perf_counter()
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
    return time.perf_counter() - t, minutes


@dataclass
class Timing:
    replay_s: float
    render_s: float
    html_bytes: int
    alarms: int
    messages: int

    @property
    def total_s(self) -> float:
        return self.replay_s + self.render_s


def report_run(log: Path, out: Path) -> Timing:
    profiles, rules, policy = load_profiles(), load_rules(), load_policy()
    t = time.perf_counter()
    rv = review(log, profiles, rules, policy)
    t1 = time.perf_counter()
    inp = html_report.ReportInput(rv, log, "shipped defaults", "shipped defaults", rv.bad_lines)
    text = html_report.render(inp)
    html_report.write(out, text)
    t2 = time.perf_counter()
    alarms = sum(1 for e in rv.episodes if e.raised)
    return Timing(t1 - t, t2 - t1, len(text.encode()), alarms, rv.messages)


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description="replay + HTML report of a simulated unit-month")
    ap.add_argument("--beds", type=int, default=20)
    ap.add_argument("--days", type=int, default=30)
    ap.add_argument("--profile", action="store_true", help="also print a cProfile of the report")
    ap.add_argument("--keep", type=Path, default=None, help="write the log and report here")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        where = args.keep or Path(tmp)
        where.mkdir(parents=True, exist_ok=True)
        log = where / f"unit-{args.beds}beds-{args.days}d.jsonl"
        t = time.perf_counter()
        readings, meter_messages, messages = make_log(log, args.beds, args.days)
        gen_s = time.perf_counter() - t
        timing = report_run(log, where / "report.html")
        t = time.perf_counter()
        replay_alarms(log, load_profiles(), load_rules(), load_policy())
        plain_s = time.perf_counter() - t
        t = time.perf_counter()
        lines = _line_parse(log)
        parse_s = time.perf_counter() - t
        np_s, minutes = numpy_pass(lines)
        del lines
        print(_report(args, (readings, meter_messages, messages), gen_s, timing, plain_s,
                      parse_s, np_s, minutes))  # fmt: skip
        if args.profile:
            print("\ncProfile of replay + report (top 25 by own time):")
            print(_profile(log, where / "report-profiled.html"))
    return 0


def _report(
    args: argparse.Namespace, counts: tuple[int, int, int], gen_s: float, tm: Timing,
    plain_s: float, parse_s: float, np_s: float, minutes: int,
) -> str:  # fmt: skip
    readings, meter_messages, messages = counts

    def row(name: str, s: float) -> str:
        return f"  {name:<46} {s:9.2f} {readings / s:12,.0f}"

    verdict = (
        f"met ({tm.total_s:.0f} s)"
        if tm.total_s < GOAL_S
        else f"NOT met ({tm.total_s:.0f} s, {tm.total_s / GOAL_S:.1f}x the minute)"
    )
    return "\n".join([
        f"Review benchmark: {args.beds} beds x {args.days} days, {readings:,} minute readings "
        f"of the {PROFILE} profile (simulated)",
        f"  {meter_messages:,} meter messages with redeliveries, {messages:,} messages in all; "
        "one process, one run; readings/s below counts minute readings",
        f"  (simulating and writing the log took {gen_s:.1f} s; not counted)",
        "",
        f"  {'path':<46} {'seconds':>9} {'readings/s':>12}",
        row("replay + report (replay --report)", tm.total_s),
        row("  of which replay with review observer", tm.replay_s),
        row("  of which plots + HTML", tm.render_s),
        row("replay alone (alarms only, no observer)", plain_s),
        row("baseline: read + json.loads per line", parse_s),
        row("baseline: numpy rolling 60-min sums", np_s),
        "",
        f"  report: {tm.alarms} alarms raised, {tm.html_bytes / 1e6:.1f} MB of HTML, "
        f"{minutes:,} bed-minutes in the numpy pass",
        f"  replay + report / numpy pass:      {tm.total_s / np_s:10,.0f} x",
        f"  replay + report / line parse:      {tm.total_s / parse_s:10.1f} x",
        f"  goal: well under {GOAL_S:.0f} s for the month: {verdict}",
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
