"""Shared fixtures and a small harness for driving the engine by hand.

All meters, beds and volumes in the tests are invented; no patient data.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np
import pytest
from hypothesis import HealthCheck, settings

from daemon.engine.effects import Effect, RejectedInput
from daemon.engine.engine import Engine
from daemon.engine.profiles import DeviceProfile, Semantics
from daemon.engine.series import MinuteSeries
from daemon.profile_files import load_profiles
from simulator.encode import encode

# Keep the whole suite fast on two cores: few, deadline-free examples by default.
settings.register_profile(
    "hourwatch",
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large],
)
settings.load_profile("hourwatch")

# An invented night, on a minute boundary so expectations are easy to read.
T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC).timestamp()

PROFILES: dict[str, DeviceProfile] = {p.name: p for p in load_profiles()}
CUMULATIVE = sorted(n for n, p in PROFILES.items() if p.volume.semantics is not Semantics.INTERVAL)
INTERVAL = sorted(n for n, p in PROFILES.items() if p.volume.semantics is Semantics.INTERVAL)
# Families that can say "bag changed" in the payload (flag field or status code).
FLAGGED = sorted(
    n
    for n in CUMULATIVE
    if PROFILES[n].fields.bag_change_flag is not None or PROFILES[n].status.bag_change
)


@pytest.fixture(scope="session")
def profiles() -> dict[str, DeviceProfile]:
    return PROFILES


def context_payload(devices: list[str], ward: str = "icu-east") -> dict[str, Any]:
    return {"ward": ward, "device_ids": devices, "weight_kg": 80, "weight_basis": "actual"}


@dataclass
class Meter:
    """One invented meter of a given profile, bound to a bed of its own engine."""

    profile: DeviceProfile
    device: str = "m-01"
    bed: str = "b01"
    engine: Engine = field(init=False)
    effects: list[Effect] = field(default_factory=list)
    _seq: int = 0

    def __post_init__(self) -> None:
        self.engine = Engine(PROFILES.values())
        self.bind(self.bed)

    def bind(self, bed: str, devices: list[str] | None = None, at: float = T0 - 60) -> None:
        eff = self.engine.step(
            f"hourwatch/beds/{bed}/context", context_payload(devices or [self.device]), at
        )
        assert eff == [], eff

    def payload(self, t: float, ml: float, **kw: Any) -> tuple[str, dict[str, Any] | str]:
        """The profile's own wire format for a reading of `ml` at device time t."""
        if "seq" not in kw:
            self._seq += 1
            kw["seq"] = self._seq
        return encode(self.profile, self.device, t, ml, **kw)

    def send(self, t: float, ml: float, recv: float | None = None, **kw: Any) -> list[Effect]:
        topic, body = self.payload(t, ml, **kw)
        return self.raw(topic, body, t + 1.0 if recv is None else recv)

    def raw(self, topic: str, body: Any, recv: float) -> list[Effect]:
        eff = self.engine.step(topic, body, recv)
        self.effects.extend(eff)
        return eff

    @property
    def series(self) -> MinuteSeries:
        return self.engine.beds[self.bed].series

    def total(self) -> float:
        return self.series.total()

    def outcomes(self, device: str | None = None) -> dict[str, int]:
        q = self.engine.quality()[device or self.device]
        out = q["outcomes"]
        assert isinstance(out, dict)
        return out

    def reasons(self) -> list[str]:
        return [str(e.reason) for e in self.effects if isinstance(e, RejectedInput)]

    def minutes(self, t0: float, t1: float) -> tuple[np.ndarray, np.ndarray]:
        return self.series.minutes(math.floor(t0 / 60), math.ceil(t1 / 60))


def send_steady(
    meter: Meter, t_start: float, n: int, per_reading_ml: float, level: float = 0.0
) -> list[tuple[float, float]]:
    """Send n readings one period apart at a constant flow; return (time, value) pairs.

    For a cumulative meter `level` is the bag content at the first reading and the value
    grows by `per_reading_ml`; for an interval meter every value is `per_reading_ml`.
    """
    period = float(meter.profile.timing.period_s)
    interval = meter.profile.volume.semantics is Semantics.INTERVAL
    sent = []
    for i in range(n):
        t = t_start + i * period
        v = per_reading_ml if interval else level + i * per_reading_ml
        meter.send(t, v)
        sent.append((t, v))
    return sent
