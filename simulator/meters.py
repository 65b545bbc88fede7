"""One simulated meter on a bed: what it measures and how it misbehaves.

Readings are written in the meter's own profile format (simulator.encode), so
any shipped profile, and any new one, can be simulated. Behaviour (all
invented for simulation): reporting period and jitter, measurement noise, bag
changes by a nurse at irregular intervals and whenever the bag is nearly full,
occasional duplicates and reordering, store-and-forward bursts after a network
outage, clock drift, sensor faults with status codes, and silence.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from daemon.engine.profiles import DeviceProfile, Semantics

from .clinical import HOUR_S, Floats
from .encode import encode
from .scenario import Meter
from .wire import Clock, Message, Payload, Render

NOISE_MEMORY = 0.8  # reading noise is correlated: a level sensor drifts, it does not jump


@dataclass(frozen=True, slots=True)
class SimReading:
    """What the meter measured and sent (the truth a round-trip test checks)."""

    taken: float  # simulated epoch seconds when the meter measured
    clock_offset_s: float  # device clock error at that moment (drift)
    value_ml: float  # the value it reports, in mL (bag content or interval volume)
    seq: int
    bag_flag: bool
    status: str | None  # a fault code, or None when the meter is fine


@dataclass
class MeterRun:
    spec: Meter
    profile: DeviceProfile
    readings: list[SimReading]
    messages: list[Message]  # receive order not guaranteed; the runner sorts


def _render(profile: DeviceProfile, spec: Meter, r: SimReading, levels: dict[str, str]
            ) -> Render:  # fmt: skip
    def render(clock: Clock) -> Payload:
        _, payload = encode(
            profile, spec.device_id, clock(r.taken) + r.clock_offset_s, r.value_ml,
            seq=r.seq, bag_flag=r.bag_flag, status=r.status, unit=spec.unit,
            utc_offset_min=spec.utc_offset_min, levels=levels,
        )  # fmt: skip
        return payload

    return render


def _uniform(rng: np.random.Generator, span: tuple[float, float]) -> float:
    return float(rng.uniform(span[0], span[1]))


def simulate_meter(
    profile: DeviceProfile,
    spec: Meter,
    to_bag_ml_min: Floats,
    start: float,
    hours: float,
    rng: np.random.Generator,
    ward: str | None = None,
) -> MeterRun:
    """Readings of one meter over its time on the bed, from the urine reaching it. A
    `{ward}` level in the profile's topic says the bed's ward."""
    cum = np.concatenate([[0.0], np.cumsum(to_bag_ml_min)])
    grid = np.arange(cum.size, dtype=np.float64)

    def produced(s: float) -> float:  # mL reached the bag by offset s (seconds)
        return float(np.interp(s / 60.0, grid, cum))

    period = float(spec.period_s or profile.timing.period_s)
    interval = profile.volume.semantics is Semantics.INTERVAL
    begin = spec.from_h * HOUR_S
    end = min(spec.until_h if spec.until_h is not None else hours, hours) * HOUR_S
    full = spec.bag_full_ml or min(2000.0, 0.8 * profile.limits.max_ml)
    changes = spec.bag_change_h

    base = produced(begin) - spec.initial_bag_ml
    next_change = begin + _uniform(rng, changes) * HOUR_S if changes else math.inf
    flag_due = False
    noise = 0.0
    levels = {"ward": ward} if ward else {}
    topic = profile.topic_for(spec.device_id, levels)
    readings: list[SimReading] = []
    messages: list[Message] = []
    burst: dict[float, int] = {}  # outage end -> readings sent in its burst so far
    seq = 0
    prev_ts = begin
    nominal = begin + float(rng.uniform(0.0, min(period, 60.0)))  # soon after it is bound
    while nominal <= end:
        jitter = float(rng.uniform(-spec.jitter_s, spec.jitter_s)) if spec.jitter_s else 0.0
        if interval:  # intervals close on the meter's own grid; only the sending jitters
            ts, send_delay = nominal, abs(jitter)
        else:
            ts, send_delay = min(max(nominal + jitter, prev_ts + 0.5), end), 0.0
        nominal += period
        h = ts / HOUR_S
        if not interval:  # the nurse empties the bag, on a round or because it is full
            while next_change <= ts:
                base = produced(next_change)
                flag_due = True
                next_change += _uniform(rng, changes) * HOUR_S if changes else math.inf
            if produced(ts) - base >= full:
                emptied = max(prev_ts + 0.1, ts - float(rng.uniform(0.1, 0.9)) * min(period, 600))
                base = produced(emptied)
                flag_due = True
                if changes:
                    next_change = emptied + _uniform(rng, changes) * HOUR_S
        if any(w.contains(h) for w in spec.offline):
            prev_ts = ts
            continue  # switched off or unplugged: nothing measured, nothing sent
        if interval:
            value = produced(ts) - produced(max(begin, ts - float(profile.volume.interval_s or 0)))
        else:
            value = produced(ts) - base
        if spec.noise_ml:
            noise = NOISE_MEMORY * noise + float(rng.normal(0.0, spec.noise_ml)) * math.sqrt(
                1 - NOISE_MEMORY**2
            )
            value += noise
        value = max(0.0, value)
        fault = next((f.status for f in spec.faults if f.contains(h)), None)
        seq += 1
        reading = SimReading(
            start + ts, spec.clock_drift_s_per_h * (ts - begin) / HOUR_S, value, seq,
            flag_due and fault is None, fault,
        )  # fmt: skip
        if fault is None:
            flag_due = False
        readings.append(reading)
        prev_ts = ts
        recv = ts + send_delay + _uniform(rng, spec.latency_s)
        outage = next((o for o in spec.outages if o.contains(h)), None)
        if outage is not None:
            if not outage.store_forward:
                continue  # lost in the outage
            back = (outage.at_h + outage.for_h) * HOUR_S
            burst[back] = burst.get(back, 0) + 1
            recv = back + 0.5 + 0.05 * burst[back]  # the buffer is sent oldest first
        elif spec.reorder_p and rng.random() < spec.reorder_p:
            recv += 1.5 * period  # overtaken by the next reading, within the reorder tolerance
        render = _render(profile, spec, reading, levels)
        messages.append(Message(start + recv, topic, render))
        if spec.duplicate_p and rng.random() < spec.duplicate_p:
            messages.append(Message(start + recv + float(rng.uniform(1.0, 30.0)), topic, render))
    return MeterRun(spec, profile, readings, messages)
