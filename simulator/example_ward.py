"""Write the bundled example log: one invented ward over 24 hours.

    python -m simulator.example_ward OUT.jsonl [--seed N]

ALL DATA HERE IS INVENTED FOR THE DEMO. "Ward 4-East", its beds and meters do
not exist; the patients have no names, and every number is simulated. The
clinical pictures are chosen so that the hourly table shows something worth
reading (CLINICAL-REFERENCE.md §1-§3):

- bed-01, reference-cumulative meter: normal output, about 0.55-0.9 mL/kg/h
  (lower overnight).
- bed-02, gravimetric-text meter: post-obstructive diuresis after the bladder
  was decompressed just before the log starts (an episode marker in the bed
  context; the retained content drained in those 15 minutes); several hundred
  mL/h decaying over the day towards ~100 mL/h. A replacement order (50-75% of
  the last hour's output as 0.45% NaCl) is on file and labs come every 4 hours;
  from the third hour the nurse documents replacement fluid each hour (about
  60% of the previous hour's output).
- bed-03, interval-10min meter: oliguria, output drifting from ~0.8 to
  ~0.25 mL/kg/h (below 0.5 mL/kg/h after about 6 hours).
- bed-04, nested-telemetry meter: normal output, with a ~40-minute silence
  (meter off the network) part-way through.

Messiness on top: bag changes, a few duplicates and reordered messages,
reading noise, one spike artefact (bed-01), and a spare meter on the bench
that is bound to no bed. The same seed always gives the same file.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from daemon.profile_files import load_profiles
from simulator.meterlog import (
    FlowFn,
    MeterFaults,
    constant,
    context_record,
    iso_z,
    simulate,
    write_log,
)

WARD = "4-East"
START = datetime(2026, 3, 14, 18, 0, tzinfo=UTC)  # invented date
HOURS = 24.25  # a quarter hour past 24 h, so the 24th clock hour completes on every bed
HOUR_S = 3600.0

Record = tuple[float, str, dict[str, Any] | str]


def _wobble(seed: int, depth: float) -> FlowFn:
    """A slow, smooth multiplicative variation around 1 (no two beds alike)."""
    phase_a = (seed * 2.399963) % (2 * math.pi)  # golden-angle steps: spread, repeatable
    phase_b = (seed * 1.618034) % (2 * math.pi)

    def f(m: float) -> float:
        return 1.0 + depth * (
            0.6 * math.sin(2 * math.pi * m / 97.0 + phase_a)
            + 0.4 * math.sin(2 * math.pi * m / 311.0 + phase_b)
        )

    return f


def normal_flow(weight_kg: float, ml_kg_h: float, seed: int) -> FlowFn:
    """Normal output with a mild day/night swing (lower overnight)."""
    w = _wobble(seed, 0.15)

    def f(m: float) -> float:
        night = 0.85 + 0.15 * math.cos(2 * math.pi * (m - 18 * 60) / 1440.0)
        return weight_kg * ml_kg_h * night * w(m)

    return f


def diuresis_flow(seed: int) -> FlowFn:
    """Post-obstructive diuresis: ~700 mL/h after decompression, halving every ~4 h."""
    w = _wobble(seed, 0.08)
    return lambda m: (80.0 + 620.0 * math.exp(-m / 360.0)) * w(m)


def oliguria_flow(weight_kg: float, seed: int) -> FlowFn:
    """Output drifting from ~0.78 towards ~0.2 mL/kg/h over the day."""
    w = _wobble(seed, 0.10)
    return lambda m: weight_kg * (0.18 + 0.60 * math.exp(-m / 600.0)) * w(m)


def _hourly_replacement(
    bed: str, flow: FlowFn, t0: float, first_hour: int, hours: int, fraction: float
) -> list[Record]:
    """Intake documented at hh:05 for the fluid given over the hour, as a fraction of
    the previous clock hour's true output (the replacement practice of §1)."""
    out: list[Record] = []
    for h in range(first_hour, hours):
        produced = sum(flow(m) / 60.0 for m in range((h - 1) * 60, h * 60))
        t = t0 + h * HOUR_S + 300.0
        payload: dict[str, Any] = {
            "time": iso_z(t), "volume_ml": round(fraction * produced),
            "fluid": "0.45% sodium chloride", "route": "iv",
        }  # fmt: skip
        out.append((t, f"hourwatch/beds/{bed}/intake", payload))
    return out


def _labs(bed: str, t0: float, seed: int) -> list[Record]:
    """Invented results every 4 h from 18:15, each inside its usual adult reference
    interval (CLINICAL-REFERENCE §5, §5b), resulted 50 minutes after sampling. Only
    samples resulted inside the 24-hour log are kept, so the log ends on a meter reading."""
    out: list[Record] = []
    for k in range(6):
        t = t0 + 900.0 + k * 4 * HOUR_S
        payload: dict[str, Any] = {
            "time": iso_z(t), "serum_na_mmol_l": 140 - (k + seed) % 3,
            "serum_k_mmol_l": 3.9, "serum_mg_mmol_l": 0.82, "serum_phosphate_mmol_l": 1.0,
            "serum_creatinine_umol_l": 104, "urine_na_mmol_l": 70, "urine_k_mmol_l": 25,
        }  # fmt: skip
        out.append((t + 50 * 60.0, f"hourwatch/beds/{bed}/labs", payload))
    return out


def _silence(records: list[Record], topic: str, t0: float, t1: float) -> list[Record]:
    """Drop one meter's messages received in [t0, t1): the meter was off the network."""
    return [r for r in records if not (r[1] == topic and t0 <= r[0] < t1)]


def build(seed: int, profile_dir: Path | None = None) -> list[Record]:
    profiles = {p.name: p for p in load_profiles(profile_dir)}
    t0 = START.timestamp()
    records: list[Record] = []

    # Bed context first: which meter is on which bed, weight and its basis.
    beds = [
        ("bed-01", "rc-0101", 76.0, "actual"),
        ("bed-02", "gs-0201", 82.0, "actual"),
        ("bed-03", "iv-0301", 68.0, "ideal"),
        ("bed-04", "nt-0401", 91.0, "adjusted"),
    ]
    for i, (bed, meter, kg, basis) in enumerate(beds):
        ctx = context_record(t0 - 120.0 + i, bed, WARD, [meter], weight_kg=kg)
        ctx[2]["weight_basis"] = basis
        if bed == "bed-02":  # the retained urine was drained 15 minutes before the log
            relieved = {"kind": "obstruction_relieved", "at": iso_z(t0 - 900.0),
                        "residual_drain_min": 15}  # fmt: skip
            ctx[2]["episodes"] = [relieved]
            ctx[2]["replacement"] = {
                "fraction_low": 0.5, "fraction_high": 0.75, "fluid": "0.45% NaCl",
                "ordered_by": "icu-physician on call (invented)", "ordered_at": iso_z(t0 - 600.0),
            }  # fmt: skip
        records.append(ctx)
    records += _labs("bed-02", t0, seed)

    # bed-01: normal output, noise of 1 mL, bag emptied every 6 h, one spike.
    s = simulate(
        profiles["reference-cumulative"], "rc-0101", START, HOURS,
        normal_flow(76.0, 0.85, seed + 1),
        MeterFaults(
            noise_sd_ml=1.0, duplicate_p=0.02, reorder_p=0.01,
            bag_change_every_s=6 * HOUR_S, spike_times_s=[9 * HOUR_S + 17 * 60],
            spike_ml=300.0, jitter_s=2.0,
        ),
        seed=seed + 1, initial_bag_ml=35.0,
    )  # fmt: skip
    records += s.records

    # bed-02: post-obstructive diuresis; the scale's bag is emptied every 2 h.
    pod = diuresis_flow(seed + 2)
    s = simulate(
        profiles["gravimetric-text"], "gs-0201", START, HOURS, pod,
        MeterFaults(
            noise_sd_ml=1.0, duplicate_p=0.01, reorder_p=0.005,
            bag_change_every_s=2 * HOUR_S, jitter_s=1.0,
        ),
        seed=seed + 2,
    )  # fmt: skip
    records += s.records + _hourly_replacement("bed-02", pod, t0, 2, 24, 0.6)

    # bed-03: oliguria on a 10-minute interval meter (no bag to change).
    s = simulate(
        profiles["interval-10min"], "iv-0301", START, HOURS, oliguria_flow(68.0, seed + 3),
        MeterFaults(noise_sd_ml=0.5, duplicate_p=0.03, reorder_p=0.02, jitter_s=1.0),
        seed=seed + 3,
    )  # fmt: skip
    records += s.records

    # bed-04: normal output; bag swapped every 8 h; 40 minutes off the network.
    s = simulate(
        profiles["nested-telemetry"], "nt-0401", START, HOURS, normal_flow(91.0, 0.85, seed + 4),
        MeterFaults(
            noise_sd_ml=1.0, duplicate_p=0.02, reorder_p=0.01,
            bag_change_every_s=8 * HOUR_S, jitter_s=2.0,
        ),
        seed=seed + 4, initial_bag_ml=120.0,
    )  # fmt: skip
    quiet_from = t0 + 13 * HOUR_S + 10 * 60
    records += _silence(s.records, "bedside/nt-0401/telemetry", quiet_from, quiet_from + 40 * 60)

    # A spare meter tested on the bench for half an hour, bound to no bed.
    bench_start = datetime.fromtimestamp(t0 + 2 * HOUR_S, UTC)
    bench = profiles["reference-cumulative"]
    s = simulate(bench, "rc-0199", bench_start, 0.5, constant(60.0), seed=seed + 5)
    records += s.records
    return records


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(
        prog="python -m simulator.example_ward",
        description="Write the invented 24-hour example log of ward 4-East (demo data only).",
    )
    ap.add_argument("out", type=Path, help="JSON Lines file to write")
    ap.add_argument("--seed", type=int, default=4, help="random seed (default 4)")
    ap.add_argument("--profiles", type=Path, default=None, help="device profile folder")
    args = ap.parse_args(argv)
    n = write_log(args.out, build(args.seed, args.profiles))
    print(f"{args.out}: {n} messages, ward {WARD}, 24 h from {START:%Y-%m-%d %H:%M} UTC")
    return 0


if __name__ == "__main__":
    sys.exit(main())
