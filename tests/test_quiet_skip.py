"""Rules that prove themselves quiet are not re-checked at every reading or wake-up.
That must never change an alarm: the engine with the shortcut and the engine without
it give identical events on messy simulated streams (invented data)."""

from __future__ import annotations

import math
from datetime import UTC, datetime
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from daemon.engine.engine import Engine
from daemon.engine.timefmt import iso
from daemon.profile_files import load_profiles
from daemon.rule_files import load_policy, load_rules
from simulator.meterlog import MeterFaults, context_record, simulate

PROFILES = {p.name: p for p in load_profiles()}
START = datetime(2026, 3, 14, tzinfo=UTC)


def _events(engine: Engine, records: list[tuple[float, str, Any]]) -> list[dict[str, object]]:
    out: list[dict[str, object]] = []
    for t, topic, payload in records:
        for e in engine.advance(t) + engine.step(topic, payload, t):
            if hasattr(e, "to_json"):
                out.append(e.to_json())
    return out


def _no_shortcut(engine: Engine) -> Engine:
    """Every rule re-checked at every reading and wake-up."""
    run = engine.evaluator.run

    def every_rule(bed: Any, now: float, devices: Any, shortcut: bool = False) -> Any:
        out = run(bed, now, devices)
        bed.quiet_floor = -1  # and no reading skipped for the whole bed
        return out

    engine.evaluator.run = every_rule  # type: ignore[method-assign]
    return engine


@settings(max_examples=16, deadline=None)
@given(
    profile=st.sampled_from(["reference-cumulative", "gravimetric-text", "nested-telemetry"]),
    # mL/h: around the KDIGO lines for 70 kg (21 and 35 mL/h), or around the
    # post-obstructive diuresis line (200 mL/h, 3 L/24 h)
    base=st.one_of(st.floats(5, 90), st.floats(100, 320)),
    swing=st.floats(0, 60),
    stop_at=st.one_of(st.none(), st.integers(60, 600)),  # a blocked catheter (invented)
    seed=st.integers(0, 1000),
    # bed inputs at minutes of the run (invented values): vitals with a raised shock
    # index, documented intake, a serum sodium result
    inputs=st.lists(
        st.tuples(st.integers(1, 839), st.sampled_from(["vitals", "intake", "labs"])),
        max_size=4,
    ),
)
def test_the_quiet_shortcut_changes_no_alarm(
    profile: str,
    base: float,
    swing: float,
    stop_at: int | None,
    seed: int,
    inputs: list[tuple[int, str]],
) -> None:
    def flow(m: float) -> float:
        if stop_at is not None and stop_at <= m < stop_at + 120:
            return 0.0
        return max(0.0, base + swing * math.sin(m / 90))

    s = simulate(PROFILES[profile], "m-1", START, 14, flow,
                 MeterFaults(noise_sd_ml=1.0, duplicate_p=0.03, reorder_p=0.02,
                             bag_change_every_s=3 * 3600 + 7 * seed,
                             spike_times_s=[5 * 3600.0 + seed]), seed=seed)  # fmt: skip
    records = [context_record(START.timestamp() - 60, "bed-1", "ward-q", ["m-1"], 70.0)]
    records += s.records
    t0 = START.timestamp()
    for minute, what in inputs:
        t = t0 + minute * 60.0 + 17.0
        payload: dict[str, Any] = {
            "vitals": {"heart_rate_bpm": 118, "systolic_mmhg": 88, "diastolic_mmhg": 50},
            "intake": {"volume_ml": 150, "fluid": "0.45% sodium chloride"},
            "labs": {"serum_na_mmol_l": 147},
        }[what] | {"time": iso(t)}
        records.append((t, f"hourwatch/beds/bed-1/{what}", payload))
    records.sort(key=lambda r: r[0])  # stable: meter messages keep their order

    def make() -> Engine:
        return Engine(list(PROFILES.values()), load_rules(), load_policy())

    fast = _events(make(), records)
    slow = _events(_no_shortcut(make()), records)
    assert fast == slow
