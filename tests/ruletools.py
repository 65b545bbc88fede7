"""Helpers for the rule, alarm and replay tests: hour-by-hour streams with exact volumes.

A `Ward` is one engine with the shipped rules and escalation policy; `Bed` binds one
invented bed to one invented reference-cumulative meter (60-s readings). `Bed.hours`
feeds a list of clock-hour volumes as one reading per minute, each minute holding
1/60 of its hour, so the volume in any run of minutes is known exactly.

By default a bed's context carries an obstruction relieved two hours before T0 (so the
post-obstructive rules are armed and the residual drain lies before monitoring) and a
replacement order of 50-75% as 0.45% NaCl; `relieved_at=None` or `order=None` leave
them out.

All beds, meters, people and volumes here are invented; no patient data.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np
import numpy.typing as npt

from daemon.engine.advice import Advice
from daemon.engine.alarms import AlarmEvent, State
from daemon.engine.effects import AdviceIssued, Effect, RejectedInput
from daemon.engine.engine import Engine
from daemon.engine.escalation import EscalationPolicy
from daemon.engine.evaluator import Notice
from daemon.engine.profiles import DeviceProfile
from daemon.engine.rules import RuleDef
from daemon.profile_files import load_profiles
from daemon.rule_files import load_policy, load_rules
from simulator.encode import encode

# An invented night starting on a clock hour, so hour and minute indices are easy to read.
T0 = datetime(2026, 3, 14, 0, 0, tzinfo=UTC).timestamp()
M0 = int(T0 // 60)  # minute index of T0
HOUR = 3600.0
MIN = 60.0
WARD = "icu-east"
# An invented clinician's order: 50-75% of the last hour's output as 0.45% NaCl (the
# range commonly used, CLINICAL-REFERENCE §1, from memory).
ORDER: dict[str, Any] = {
    "fraction_low": 0.5, "fraction_high": 0.75, "fluid": "0.45% NaCl",
    "ordered_by": "icu-physician-1 (invented)", "ordered_at": "2026-03-13T22:00:00Z",
}  # fmt: skip

PROFILES: dict[str, DeviceProfile] = {p.name: p for p in load_profiles()}
REFERENCE = PROFILES["reference-cumulative"]
PERIOD = float(REFERENCE.timing.period_s)  # 60 s
RULES: list[RuleDef] = load_rules()
RULES_BY_ID: dict[str, RuleDef] = {r.id: r for r in RULES}
POLICY: EscalationPolicy = load_policy()


def rule(rule_id: str, **check: Any) -> RuleDef:
    """A shipped rule, optionally with some check parameters changed (e.g. mode)."""
    base = RULES_BY_ID[rule_id]
    if not check:
        return base
    return base.model_copy(update={"check": base.check.model_copy(update=check)})


def ruleset(*replace: RuleDef, drop: Iterable[str] = ()) -> list[RuleDef]:
    """The shipped rules with some replaced (by id) and some left out."""
    new = {r.id: r for r in replace}
    gone = set(drop)
    return [new.get(r.id, r) for r in RULES if r.id not in gone]


def iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat().replace("+00:00", "Z")


def at(hours: float = 0.0, minutes: float = 0.0, seconds: float = 0.0) -> float:
    """Epoch seconds at an offset from T0."""
    return T0 + hours * HOUR + minutes * MIN + seconds


@dataclass
class Ward:
    """One engine and everything it emitted, in order."""

    rules: list[RuleDef] = field(default_factory=lambda: list(RULES))
    policy: EscalationPolicy = field(default_factory=lambda: POLICY)
    engine: Engine = field(init=False)
    effects: list[Effect] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.engine = Engine(PROFILES.values(), self.rules, self.policy)

    def _keep(self, eff: list[Effect]) -> list[Effect]:
        self.effects.extend(eff)
        return eff

    def advance(self, t: float) -> list[Effect]:
        return self._keep(self.engine.advance(t))

    def send(self, topic: str, payload: Any, t: float) -> list[Effect]:
        """Like the live shell and replay: fire what fell due, then the message."""
        out = self.advance(t)
        return out + self._keep(self.engine.step(topic, payload, t))

    def ack(self, alarm_id: str, t: float, by: str = "nurse-7", role: str = "bedside-nurse"):
        payload = {"alarm_id": alarm_id, "by": by, "role": role}
        return self.send("hourwatch/ack", payload, t)

    # --- reading the effects --------------------------------------------------
    def alarms(self, rule_id: str | None = None, bed: str | None = None) -> list[AlarmEvent]:
        return [
            e
            for e in self.effects
            if isinstance(e, AlarmEvent)
            and (rule_id is None or e.rule == rule_id)
            and (bed is None or e.bed == bed)
        ]

    def first(self, rule_id: str, state: State = State.ACTIVE) -> AlarmEvent | None:
        return next((e for e in self.alarms(rule_id) if e.state is state), None)

    def fired(self) -> set[str]:
        """Rules that reached the active state at least once."""
        return {e.rule for e in self.alarms() if e.state is State.ACTIVE}

    def advice(self) -> list[AdviceIssued]:
        return [e for e in self.effects if isinstance(e, AdviceIssued)]

    def notices(self) -> list[Notice]:
        return [e for e in self.effects if isinstance(e, Notice)]

    def rejected(self) -> list[RejectedInput]:
        return [e for e in self.effects if isinstance(e, RejectedInput)]


@dataclass
class Bed:
    """One invented bed with one reference-cumulative meter on a ward engine."""

    ward: Ward
    bed: str = "b01"
    device: str = "rc-0101"
    weight_kg: float | None = 70.0
    context: dict[str, Any] = field(default_factory=dict)
    relieved_at: float | None = T0 - 2 * HOUR  # an obstruction relieved (episode marker)
    order: dict[str, Any] | None = field(default_factory=lambda: dict(ORDER))
    level: float = 0.0  # what the meter's bag holds now (mL)
    t: float | None = None  # device time of the last reading sent
    seq: int = 0

    def bind(self, t: float = T0 - 30.0, **extra: Any) -> list[Effect]:
        payload: dict[str, Any] = {"ward": WARD, "device_ids": [self.device]}
        if self.weight_kg is not None:
            payload |= {"weight_kg": self.weight_kg, "weight_basis": "actual"}
        if self.relieved_at is not None:
            payload["episodes"] = [{"kind": "obstruction_relieved", "at": iso(self.relieved_at)}]
        if self.order is not None:
            payload["replacement"] = self.order
        payload |= self.context | extra
        return self.ward.send(f"hourwatch/beds/{self.bed}/context", payload, t)

    def reading(self, t: float, level: float | None = None, recv: float | None = None):
        """One reading of the bag content at device time t (received at `recv`, default t)."""
        if level is not None:
            self.level = level
        self.seq += 1
        topic, payload = encode(REFERENCE, self.device, t, self.level, seq=self.seq, decimals=4)
        self.t = t
        return self.ward.send(topic, payload, t if recv is None else recv)

    def start(self, t: float = T0) -> list[Effect]:
        """The first reading: the baseline of an empty bag."""
        return self.reading(t, 0.0)

    def minutes(self, per_minute: Sequence[float], t: float | None = None) -> list[Effect]:
        """One reading per minute after `t` (default: the last reading), each adding
        the given volume, so minute k after `t` holds exactly per_minute[k]."""
        t = self.t if t is None else t
        assert t is not None, "start() first"
        out: list[Effect] = []
        for k, ml in enumerate(per_minute, start=1):
            out += self.reading(t + k * PERIOD, self.level + ml)
        return out

    def hours(self, hourly_ml: Sequence[float]) -> list[Effect]:
        """Clock-hour volumes, spread evenly over each hour's 60 minutes."""
        return self.minutes(per_minute(hourly_ml))

    def empty_bag(self) -> None:
        """The nurse empties the bag right at the last reading: the next reading counts
        from zero. (Done so the bag never exceeds the meter's 4000 mL range.)"""
        self.level = 0.0

    def send(self, what: str, payload: dict[str, Any], t: float) -> list[Effect]:
        return self.ward.send(f"hourwatch/beds/{self.bed}/{what}", payload, t)

    def vitals(self, t: float, **values: float) -> list[Effect]:
        return self.send("vitals", {"time": iso(t)} | values, t)

    def labs(self, t: float, **values: float) -> list[Effect]:
        return self.send("labs", {"time": iso(t)} | values, t)

    def intake(self, t: float, volume_ml: float, fluid: str = "0.45% NaCl") -> list[Effect]:
        return self.send("intake", {"time": iso(t), "volume_ml": volume_ml, "fluid": fluid}, t)


def per_minute(hourly_ml: Sequence[float]) -> npt.NDArray[np.float64]:
    """Minute volumes for clock-hour totals, evenly within each hour."""
    return np.repeat(np.asarray(hourly_ml, dtype=float) / 60.0, 60)


def rolling(truth: npt.NDArray[np.float64], length: int) -> npt.NDArray[np.float64]:
    """out[m] = truth[m - length + 1 .. m] (the window (m - length, m] in minutes);
    NaN while the window reaches before the first minute."""
    cum = np.concatenate([[0.0], np.cumsum(truth)])
    out = np.full(truth.size, np.nan)
    if truth.size >= length:
        out[length - 1 :] = cum[length:] - cum[:-length]
    return out


def first_true(mask: npt.NDArray[np.bool_]) -> int | None:
    idx = np.flatnonzero(mask)
    return int(idx[0]) if idx.size else None


def minute_done(m: int, start: float = T0) -> float:
    """Time at which minute m (counted from `start`) has ended: a reading then shows it."""
    return start + (m + 1) * MIN


def event_lines(effects: Iterable[Effect]) -> list[str]:
    """Alarm events and advice as JSON text, for comparing two runs exactly."""
    out = []
    for e in effects:
        if isinstance(e, AlarmEvent):
            out.append(json.dumps({"type": "alarm"} | e.to_json(), sort_keys=True))
        elif isinstance(e, AdviceIssued):
            out.append(json.dumps({"type": "advice"} | e.to_json(), sort_keys=True))
    return out


def advice_of(e: AdviceIssued) -> Advice:
    return e.advice


Driver = Callable[[Engine, list[tuple[float, str, Any]]], list[Effect]]
