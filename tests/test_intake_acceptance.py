"""Issue 2, "Done when": `hourwatch replay LOG --hourly --json` on a 24-hour reference-meter
log with bag changes every 4 h, ~5% duplicated and some reordered messages, meter noise of
SD 1 mL on each cumulative reading and two single-reading spike artefacts gives every
clock-hour total within 4% or 4 mL (whichever is larger) of the true production and the
24-hour total within 1%, with the duplicates and the artefacts counted in the summary.

All data are simulated (invented flows, meters and beds); the simulator knows the truth.
The 4%/4 mL and 1% bounds are the issue's acceptance criteria (our own, no clinical source).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from collections import Counter
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest

from daemon.cli import main
from daemon.engine.engine import Engine
from daemon.engine.outcomes import Outcome
from simulator.meterlog import MeterFaults, SimStream, context_record, simulate, write_log
from tests.conftest import PROFILES, T0

START = datetime.fromtimestamp(T0, UTC)
HOURS = 24
SPIKES_S = [5 * 3600 + 600, 17 * 3600 + 1230]  # two single-reading artefacts (invented)


def hour_tolerance(true_ml: float) -> float:
    return max(4.0, 0.04 * true_ml)  # issue 2 acceptance: 4% or 4 mL, whichever is larger


def faults(*, noise: float = 1.0, bags: bool = True, spikes: bool = True) -> MeterFaults:
    return MeterFaults(
        noise_sd_ml=noise,
        duplicate_p=0.05,
        reorder_p=0.03,
        bag_change_every_s=4 * 3600 + 17 if bags else None,  # every 4 h, off the minute
        spike_times_s=list(SPIKES_S) if spikes else [],
    )


def expected_duplicates(records: list[tuple[float, str, Any]]) -> int:
    seen = Counter(json.dumps([topic, body], sort_keys=True) for _, topic, body in records)
    return sum(n - 1 for n in seen.values())


def replay_json(log: Path, capsys: pytest.CaptureFixture[str]) -> tuple[list, dict]:
    rc = main(["replay", str(log), "--hourly", "--json"])
    out, _ = capsys.readouterr()
    assert rc == 0
    objs = [json.loads(line) for line in out.splitlines()]
    hourly = [o for o in objs if "hour_start" in o]
    quality = {o["device"]: o["quality"] for o in objs if "device" in o}
    return hourly, quality


def check_bed(hourly: list[dict], bed: str, sim: SimStream, first_covered_s: float) -> None:
    """Every clock hour and the 24-h total against the simulator's truth."""
    rows = [r for r in hourly if r["bed"] == bed]
    assert len(rows) == HOURS, [r["hour_start"] for r in rows]
    failures = []
    for r in rows:
        off = datetime.fromisoformat(r["hour_start"]).timestamp() - sim.start
        true = sim.true_between(max(off, first_covered_s), off + 3600)  # first hour: partial
        if abs(r["volume_ml"] - true) > hour_tolerance(true):
            failures.append((r["hour_start"], r["volume_ml"], round(true, 1)))
    assert not failures, failures
    total = sum(r["volume_ml"] for r in rows)
    true_total = sim.true_between(first_covered_s, sim.last_reading_s)
    assert abs(total - true_total) <= 0.01 * true_total, (total, true_total)


def check_counts(q: dict, sim: SimStream, spikes: int) -> None:
    outcomes = q["outcomes"]
    dups = expected_duplicates(sim.records)
    late = outcomes.get("late", 0)
    assert dups > 0
    # a redelivered copy of a reading that was itself late is late again, not a duplicate
    assert dups - late <= outcomes.get("duplicate", 0) <= dups
    # the spikes, plus at most one noise outlier: a fall of more than noise_fall_ml (5 mL)
    # between two readings is ~3.5 SD of their difference at SD 1 mL, about one a day
    assert spikes <= outcomes.get("artefact_dropped", 0) <= spikes + 1
    assert q["held"] == 0
    assert q["received"] == len(sim.records) == sum(outcomes.values())


def artefact_times(log: Path, meter: str) -> list[float]:
    """Receive times at which the engine dropped an artefact of `meter` (in-process)."""
    engine = Engine(PROFILES.values())
    times = []
    for line in log.read_text(encoding="utf-8").splitlines():
        rec = json.loads(line)
        now = datetime.fromisoformat(rec["time"]).timestamp()
        for e in engine.step(rec["topic"], rec["payload"], now):
            if e.reason is Outcome.ARTEFACT_DROPPED and e.device_id == meter:
                times.append(now)
    return times


def check_spikes_dropped(log: Path, meter: str, sim: SimStream, period_s: float) -> None:
    """Each simulated spike is the reading dropped: judged when the next one arrives."""
    dropped = artefact_times(log, meter)
    for spike in SPIKES_S:
        t = sim.start + spike
        assert any(t < d <= t + 3 * period_s for d in dropped), (spike, dropped)


def reference_log(path: Path, seed: int) -> SimStream:
    def flow(minute: float) -> float:  # invented, 20-100 mL/h over the day
        return 60 + 40 * math.sin(minute / 200 + seed)

    sim = simulate(
        PROFILES["reference-cumulative"], "rc-0101", START, HOURS, flow, faults(), seed=seed
    )
    write_log(path, [context_record(T0 - 60, "b12", "icu-east", ["rc-0101"]), *sim.records])
    return sim


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_reference_meter_day(tmp_path: Path, capsys, seed: int) -> None:
    log = tmp_path / "day.jsonl"
    sim = reference_log(log, seed)
    hourly, quality = replay_json(log, capsys)
    check_bed(hourly, "b12", sim, sim.first_reading_s)
    q = quality["rc-0101"]
    check_counts(q, sim, spikes=2)
    check_spikes_dropped(log, "rc-0101", sim, PROFILES["reference-cumulative"].timing.period_s)
    assert q["outcomes"].get("bag_change", 0) == HOURS * 3600 // (4 * 3600 + 17)  # 5 changes
    assert q["outcomes"].get("reordered", 0) > 0


def test_the_installed_command_gives_the_same_rows(tmp_path: Path, capsys) -> None:
    log = tmp_path / "day.jsonl"
    sim = reference_log(log, seed=7)
    script = Path(sys.executable).with_name("hourwatch")
    cmd = [str(script)] if script.exists() else [sys.executable, "-m", "daemon.cli"]
    done = subprocess.run(
        [*cmd, "replay", str(log), "--hourly", "--json"],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=Path(__file__).resolve().parent.parent,
    )
    assert done.returncode == 0, done.stderr
    assert done.stderr == ""
    objs = [json.loads(line) for line in done.stdout.splitlines()]
    hourly = [o for o in objs if "hour_start" in o]
    check_bed(hourly, "b12", sim, sim.first_reading_s)
    in_process, _ = replay_json(log, capsys)
    assert hourly == in_process


@pytest.mark.parametrize("seed", [0, 1])
def test_mixed_families_on_three_beds(tmp_path: Path, capsys, seed: int) -> None:
    """A gravimetric meter, a nested-telemetry meter and an interval meter, one bed each."""
    setups = {
        # bed: (family, meter, fault model)
        "b21": ("gravimetric-text", "gs-0201", faults()),
        "b22": ("nested-telemetry", "nt-0202", faults()),
        # the interval family gets no per-interval noise: independent noise on each
        # interval's volume is the simulator's, not something any cleaning can remove
        "b23": ("interval-10min", "iv-0203", faults(noise=0.0, bags=False, spikes=False)),
    }
    records: list = []
    sims: dict[str, SimStream] = {}
    for k, (bed, (family, meter, f)) in enumerate(setups.items()):

        def flow(minute: float, k: int = k) -> float:  # invented, 30-110 mL/h
            return 70 + 40 * math.sin(minute / (150 + 30 * k) + k + seed)

        sims[bed] = simulate(PROFILES[family], meter, START, HOURS, flow, f, seed=10 * seed + k)
        records += [context_record(T0 - 60, bed, "icu-west", [meter]), *sims[bed].records]
    log = tmp_path / "ward.jsonl"
    write_log(log, records)
    hourly, quality = replay_json(log, capsys)

    for bed, (family, meter, f) in setups.items():
        sim = sims[bed]
        first = sim.first_reading_s
        interval_s = PROFILES[family].volume.interval_s
        if interval_s:  # an interval meter's first reading covers the interval before it
            first -= interval_s
        check_bed(hourly, bed, sim, first)
        check_counts(quality[meter], sim, spikes=len(f.spike_times_s))
        assert quality[meter]["bed"] == bed
        if f.spike_times_s:
            check_spikes_dropped(log, meter, sim, PROFILES[family].timing.period_s)
