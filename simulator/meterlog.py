"""Simulated meter streams with known truth, for tests, benchmarks and demos.

All data here is invented for simulation; no patient data.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from daemon.engine.profiles import DeviceProfile, Semantics

from .encode import encode

FlowFn = Callable[[float], float]  # mL/h at a minute offset from the start


@dataclass
class MeterFaults:
    """What goes wrong with a meter, as probabilities per reading or fixed events."""

    noise_sd_ml: float = 0.0
    duplicate_p: float = 0.0
    reorder_p: float = 0.0
    bag_change_every_s: float | None = None
    spike_times_s: list[float] = field(default_factory=list)  # offsets of spike readings
    spike_ml: float = 300.0
    jitter_s: float = 0.0
    latency_s: tuple[float, float] = (0.2, 1.5)


@dataclass
class SimStream:
    """Messages in receive order, plus the true volume produced per minute."""

    start: float
    records: list[tuple[float, str, dict[str, Any] | str]]
    truth_per_min: npt.NDArray[np.float64]  # mL in each minute from `start`
    first_reading_s: float  # offset of the first reading (volume before is a baseline)
    last_reading_s: float

    def true_between(self, t0_s: float, t1_s: float) -> float:
        """True volume produced between two offsets from the start (linear within minutes)."""
        cum = np.concatenate([[0.0], np.cumsum(self.truth_per_min)])
        return float(
            np.interp(t1_s / 60.0, np.arange(cum.size), cum)
            - np.interp(t0_s / 60.0, np.arange(cum.size), cum)
        )


def constant(ml_h: float) -> FlowFn:
    return lambda _m: ml_h


def simulate(
    profile: DeviceProfile,
    device_id: str,
    start: datetime,
    hours: float,
    flow: FlowFn,
    faults: MeterFaults | None = None,
    seed: int = 0,
    initial_bag_ml: float = 0.0,
    levels: dict[str, str] | None = None,
) -> SimStream:
    """One meter of `profile` over `hours`, producing `flow(minute)` mL/h; `levels` fills
    the topic's metadata placeholders ({ward}, ...)."""
    faults = faults or MeterFaults()
    rng = np.random.default_rng(seed)
    t0 = start.timestamp()
    minutes = math.ceil(hours * 60)
    truth = np.array([flow(m) / 60.0 for m in range(minutes)])
    cum = np.concatenate([[0.0], np.cumsum(truth)])

    def produced(s: float) -> float:
        return float(np.interp(s / 60.0, np.arange(cum.size), cum))

    period = float(profile.timing.period_s)
    interval = profile.volume.semantics is Semantics.INTERVAL
    recs: list[tuple[float, str, dict[str, Any] | str]] = []
    bag_base = produced(0.0) - initial_bag_ml
    next_change = faults.bag_change_every_s
    pending_flag = False
    spikes = sorted(faults.spike_times_s)
    seq = 0
    s = period
    first_s = last_s = period
    while s <= minutes * 60:
        ts = s + (rng.uniform(-faults.jitter_s, faults.jitter_s) if faults.jitter_s else 0.0)
        ts = min(max(ts, 1.0), minutes * 60.0)
        if not interval and next_change is not None and ts >= next_change:
            bag_base = produced(next_change)  # the nurse empties the bag at that instant
            next_change += faults.bag_change_every_s or 0.0
            pending_flag = True
        if interval:
            value = produced(ts) - produced(max(0.0, ts - float(profile.volume.interval_s or 0)))
        else:
            value = produced(ts) - bag_base
        value += rng.normal(0.0, faults.noise_sd_ml) if faults.noise_sd_ml else 0.0
        value = max(value, 0.0)
        if spikes and ts >= spikes[0]:
            value += faults.spike_ml
            spikes.pop(0)
        seq += 1
        topic, payload = encode(
            profile, device_id, t0 + ts, value, seq=seq, bag_flag=pending_flag, levels=levels
        )
        pending_flag = False
        lo, hi = faults.latency_s
        recv = ts + rng.uniform(lo, hi)
        if faults.reorder_p and rng.random() < faults.reorder_p:
            recv += period * 1.5  # arrives after the next reading, within tolerance
        recs.append((t0 + recv, topic, payload))
        if faults.duplicate_p and rng.random() < faults.duplicate_p:
            recs.append((t0 + recv + rng.uniform(1.0, 30.0), topic, payload))
        last_s = ts
        s += period
    recs.sort(key=lambda r: r[0])
    return SimStream(t0, recs, truth, first_s, last_s)


def context_record(
    t: float,
    bed: str,
    ward: str,
    devices: Iterable[str],
    weight_kg: float | None = 80.0,
    prefix: str = "hourwatch",
    relieved_at: float | None = None,
) -> tuple[float, str, dict[str, Any]]:
    """A bed context; `relieved_at` adds an obstruction-relieved marker (which arms the
    post-obstructive rules)."""
    payload: dict[str, Any] = {"ward": ward, "device_ids": list(devices)}
    if weight_kg is not None:
        payload |= {"weight_kg": weight_kg, "weight_basis": "actual"}
    if relieved_at is not None:
        payload["episodes"] = [{"kind": "obstruction_relieved", "at": iso_z(relieved_at)}]
    return (t, f"{prefix}/beds/{bed}/context", payload)


def iso_z(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def write_log(path: Path, records: Iterable[tuple[float, str, dict[str, Any] | str]]) -> int:
    n = 0
    with path.open("w", encoding="utf-8") as fh:
        for t, topic, payload in sorted(records, key=lambda r: r[0]):
            fh.write(json.dumps({"time": iso_z(t), "topic": topic, "payload": payload}) + "\n")
            n += 1
    return n
