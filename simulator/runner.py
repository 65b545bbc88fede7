"""Turn a scenario into time-ordered messages, then write them as a JSON Lines
log (the replay format) or publish them live over MQTT.

Reproducible: every random stream is seeded from (seed, bed, stream), so the
same scenario and seed always give the same messages and the same log bytes.
"""

from __future__ import annotations

import json
import math
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.reasoncodes import ReasonCode

from daemon.engine.profiles import DeviceProfile
from daemon.errors import UserError

from . import clinical
from .meterlog import write_log as _write_records
from .meters import MeterRun, simulate_meter
from .scenario import Bed, Scenario
from .wire import Clock, Message

# Random streams per bed, so adding vitals to a bed does not change its meter noise.
_FLOW, _METER, _INTAKE, _VITALS, _LABS = range(5)


@dataclass
class BedRun:
    bed: Bed
    ward: str
    plan: clinical.Plan
    meters: list[MeterRun]


@dataclass
class Built:
    scenario: Scenario
    start: float  # simulated epoch seconds of the run's start
    hours: float
    beds: list[BedRun]
    messages: list[Message] = field(default_factory=list)  # in receive order

    @property
    def end(self) -> float:
        return self.start + self.hours * 3600.0


def expand_beds(beds: list[Bed], n: int | None) -> list[Bed]:
    """The first n beds; beyond the file's own, copies with new bed and meter ids."""
    if n is None:
        return list(beds)
    out: list[Bed] = []
    for i in range(n):
        template = beds[i % len(beds)]
        copy = i // len(beds)
        if copy == 0:
            out.append(template)
            continue
        meters = [
            m.model_copy(update={"device_id": f"{m.device_id}-{copy}"}) for m in template.meters
        ]
        out.append(template.model_copy(update={"bed": f"{template.bed}-{copy}", "meters": meters}))
    return out


def _rng(seed: int, bed: int, stream: int, sub: int = 0) -> np.random.Generator:
    return np.random.default_rng([seed, bed, stream, sub])


def build(
    scenario: Scenario,
    profiles: dict[str, DeviceProfile],
    *,
    seed: int = 0,
    beds: int | None = None,
    hours: float | None = None,
    start: float | None = None,
    prefix: str = "hourwatch",
) -> Built:
    """Every message of the run, sorted by simulated receive time (stable)."""
    t0 = scenario.start.timestamp() if start is None else start
    run_h = scenario.hours if hours is None else hours
    minutes = math.ceil(run_h * 60) + 1
    built = Built(scenario, t0, run_h, [])
    messages: list[Message] = []
    for i, bed in enumerate(expand_beds(scenario.beds, beds)):
        ward = bed.ward or scenario.ward
        plan = clinical.plan_output(bed, t0, minutes, _rng(seed, i, _FLOW))
        runs = [
            simulate_meter(profiles[m.profile], m, plan.to_bag_ml_min, t0, run_h,
                           _rng(seed, i, _METER, j), ward)
            for j, m in enumerate(bed.meters)
        ]  # fmt: skip
        messages += clinical.context_messages(bed, ward, plan, run_h, prefix, order_s=i * 0.01)
        for r in runs:
            messages += r.messages
        # intake first: it books the volumes the vitals and sodium models read
        messages += clinical.intake_messages(bed, plan, run_h, prefix, _rng(seed, i, _INTAKE))
        messages += clinical.vitals_messages(bed, plan, run_h, prefix, _rng(seed, i, _VITALS))
        messages += clinical.labs_messages(bed, plan, run_h, prefix, _rng(seed, i, _LABS))
        built.beds.append(BedRun(bed, ward, plan, runs))
    end = built.end
    built.messages = sorted((m for m in messages if m.recv <= end), key=lambda m: m.recv)
    return built


# --- JSON Lines log --------------------------------------------------------------------


def records(messages: Iterable[Message]) -> list[tuple[float, str, dict[str, Any] | str]]:
    """(receive time, topic, payload) with payload times on the simulated clock."""
    return [(m.recv, m.topic, m.payload()) for m in messages]


def write_log(built: Built, path: Path) -> int:
    try:
        return _write_records(path, records(built.messages))
    except OSError as exc:
        raise UserError(f"{path}: cannot write: {exc.strerror}") from None


# --- live publishing ---------------------------------------------------------------------


def wire_bytes(payload: dict[str, Any] | str) -> bytes:
    if isinstance(payload, str):
        return payload.encode("utf-8")
    return json.dumps(payload, separators=(",", ":")).encode("utf-8")


@dataclass
class LiveStats:
    published: int = 0
    confirmed: int = 0
    wall_s: float = 0.0


def live_clock(sim_start: float, wall_start: float, speed: float) -> Clock:
    """Simulated time -> wall clock: `speed` simulated minutes per wall-clock second.

    The service takes each message's receive time as `now` and treats a device time
    far from it as clock skew or store-and-forward, so payload times are stamped on
    the wall clock and the clinical timeline is compressed instead. A meter's own
    quirks (clock drift, a store-and-forward burst) stay relative to that clock.
    """
    per_s = 60.0 * speed

    def clock(t: float) -> float:
        return wall_start + (t - sim_start) / per_s

    return clock


def connect(
    host: str,
    port: int,
    *,
    client_id: str = "",
    username: str | None = None,
    password: str | None = None,
    protocol: str = "3.1.1",
    timeout_s: float = 10.0,
) -> mqtt.Client:
    """A connected paho client with its network loop running; UserError if refused."""
    version = mqtt.MQTTv5 if protocol == "5" else mqtt.MQTTv311
    client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=version)
    if username is not None:
        client.username_pw_set(username, password)
    done = threading.Event()
    result: list[ReasonCode] = []

    def on_connect(_c: mqtt.Client, _u: Any, _f: Any, rc: ReasonCode, _p: Any) -> None:
        result.append(rc)
        done.set()

    client.on_connect = on_connect
    try:
        client.connect(host, port, keepalive=30)
    except OSError as exc:
        raise UserError(f"--broker {host}:{port}: cannot connect: {exc}") from None
    client.loop_start()
    if not done.wait(timeout_s):
        client.loop_stop()
        raise UserError(f"--broker {host}:{port}: no answer from the broker in {timeout_s:g} s")
    if result[0].is_failure:
        client.loop_stop()
        raise UserError(f"--broker {host}:{port}: connection refused: {result[0]}")
    return client


def publish_live(
    built: Built,
    client: mqtt.Client,
    *,
    speed: float,
    stop: threading.Event | None = None,
    on_hour: Callable[[int, LiveStats], None] | None = None,
    wall: Callable[[], float] = time.time,
) -> LiveStats:
    """Publish every message at QoS 1 when its (compressed) time comes round."""
    stop = stop or threading.Event()
    wall_start = wall()
    clock = live_clock(built.start, wall_start, speed)
    stats = LiveStats()
    pending: list[mqtt.MQTTMessageInfo] = []
    hour = 0
    for m in built.messages:
        due = clock(m.recv)
        while (left := due - wall()) > 0:
            if stop.wait(min(left, 0.5)):
                break
        if stop.is_set():
            break
        info = client.publish(m.topic, wire_bytes(m.payload(clock)), qos=1, retain=m.retain)
        pending.append(info)
        stats.published += 1
        h = int((m.recv - built.start) // 3600)
        if h > hour:
            hour = h
            if on_hour is not None:
                on_hour(hour, stats)
        if len(pending) >= 1000:
            stats.confirmed += _settle(pending)
    stats.confirmed += _settle(pending)
    stats.wall_s = wall() - wall_start
    return stats


def _settle(pending: list[mqtt.MQTTMessageInfo], timeout_s: float = 30.0) -> int:
    """Wait for the broker's PUBACKs; count the confirmed ones."""
    confirmed = 0
    deadline = time.monotonic() + timeout_s
    for info in pending:
        try:
            info.wait_for_publish(max(0.0, deadline - time.monotonic()))
        except (RuntimeError, ValueError):
            continue
        confirmed += info.is_published()
    pending.clear()
    return confirmed
