"""Profile sanity warnings (issue 19): each easy profile mistake raises its warning, naming
the profile key to fix, and a right profile stays silent, also on real low output. The
warnings never reject a reading: the low-output rules stay as they are. Also in the probe,
and in the service's log and metrics against a REAL Mosquitto.

Meters, beds and streams are invented (simulation only); no patient data.
"""

from __future__ import annotations

import time
import urllib.request
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import pytest
import structlog

from daemon.engine.alarms import AlarmEvent
from daemon.engine.engine import Engine
from daemon.engine.profiles import DeviceProfile
from daemon.engine.sanity import LOW_FLOW_ML_H, SanityWarning
from daemon.probe import ProbeTally
from daemon.rule_files import load_policy, load_rules
from simulator.encode import encode
from simulator.meterlog import FlowFn, MeterFaults, constant, simulate
from tests.broker import broker, publish_all, publisher, running_service  # noqa: F401
from tests.conftest import PROFILES, T0

KV = PROFILES["keyvalue-decilitre"]
REF = PROFILES["reference-cumulative"]
RULES, POLICY = load_rules(), load_policy()
START = datetime.fromtimestamp(T0, UTC)
# A normal adult output: 0.5-1 mL/kg/h (CLINICAL-REFERENCE.md section 3, FPnotebook) is
# 35-70 mL/h for 70 kg; 60 mL/h is inside it.
NORMAL_ML_H = 60.0
WEIGHT_KG = 70.0  # invented patient


def variant(profile: DeviceProfile, **sections: dict[str, Any]) -> DeviceProfile:
    data = profile.model_dump(by_alias=True, exclude_none=True)
    for section, keys in sections.items():
        merged = {**data.get(section, {}), **keys}
        data[section] = {k: v for k, v in merged.items() if v is not None}
    return DeviceProfile.model_validate(data)


def replay(profile_sent: DeviceProfile, profile_read: DeviceProfile, hours: float,
           flow: FlowFn, *, faults: MeterFaults | None = None, clock_s: float = 0.0,
           device: str = "m-19") -> tuple[Engine, list[Any]]:  # fmt: skip
    """A meter that really speaks `profile_sent`, read by an engine told `profile_read`,
    on a bed with the default rules. `clock_s` sets the meter's clock off by that much."""
    sim = simulate(profile_sent, device, START, hours, flow, faults or MeterFaults(), seed=3)
    if clock_s:
        sim = simulate(profile_sent, device, datetime.fromtimestamp(T0 + clock_s, UTC), hours,
                       flow, faults or MeterFaults(), seed=3)  # fmt: skip
        sim.records[:] = [(t - clock_s, topic, p) for t, topic, p in sim.records]
    engine = Engine([profile_read], RULES, POLICY)
    ctx = {"ward": "4-east", "device_ids": [device], "weight_kg": WEIGHT_KG,
           "weight_basis": "actual"}  # fmt: skip
    effects = engine.step("hourwatch/beds/b19/context", ctx, T0 - 60)
    for recv, topic, payload in sim.records:
        effects += engine.advance(recv)
        effects += engine.step(topic, payload, recv)
    return engine, effects


def codes(engine: Engine) -> dict[str, SanityWarning]:
    return {w.code: w for w in engine.sanity_history()}


# --- a unit too small: litres read as millilitres -------------------------------------------
LITRE = variant(KV, volume={"unit": "L"})  # the meter sends litres (0.1 mL resolution)


def test_litres_read_as_millilitres_warn_before_the_low_output_rules_page() -> None:
    engine, effects = replay(LITRE, variant(LITRE, volume={"unit": "mL"}), 8.0,
                             constant(NORMAL_ML_H))  # fmt: skip
    found = codes(engine)
    assert set(found) == {"flow_below_adult", "steps_below_resolution"}
    flow = found["flow_below_adult"]
    assert flow.key == "volume.unit" and flow.cleared is None
    assert flow.since - T0 <= 3.5 * 3600  # after one span of 3 h
    # the readings were not rejected, and the low-output rules stay as they are: the
    # output reads as 0.06 mL/h, so KDIGO stage 1 (6 h) pages, after the warning
    q = engine.quality()["m-19"]
    assert q["outcomes"] == {"accepted": q["received"]}
    low = [e for e in effects if isinstance(e, AlarmEvent) and e.rule.startswith("oliguria")]
    assert low and min(e.time for e in low) > flow.since
    assert "volume.unit" in flow.line() and "anuria" in flow.detail


def test_litres_declared_as_litres_are_silent() -> None:
    engine, effects = replay(LITRE, LITRE, 8.0, constant(NORMAL_ML_H))
    assert engine.sanity_history() == []
    assert not [e for e in effects if isinstance(e, AlarmEvent)]


def test_decilitres_read_as_millilitres_show_steps_far_below_the_resolution() -> None:
    engine, _ = replay(KV, variant(KV, volume={"unit": "mL"}), 4.0, constant(NORMAL_ML_H))
    found = codes(engine)
    assert found["steps_below_resolution"].key == "volume.unit"
    assert "declared resolution of 1" in found["steps_below_resolution"].detail


def test_an_interval_meter_in_litres_read_as_millilitres() -> None:
    ivl = variant(PROFILES["interval-10min"], fields={"unit": None}, volume={"unit": "L"})
    engine, _ = replay(ivl, variant(ivl, volume={"unit": "mL"}), 7.0, constant(NORMAL_ML_H))
    assert codes(engine)["flow_below_adult"].key == "volume.unit"
    engine, _ = replay(ivl, ivl, 7.0, constant(NORMAL_ML_H))
    assert engine.sanity_history() == []


@pytest.mark.parametrize(
    "ml_h",
    [
        # oliguria: < 0.5 mL/kg/h (KDIGO 2012 AKI guideline, Table 2) = 35 mL/h at 70 kg;
        # 5 mL/h is far below it, a real patient's output
        5.0,
        # anuria: under 50-100 mL/day (CLINICAL-REFERENCE.md section 3, common practice)
        0.0,
    ],
)
def test_real_low_output_on_a_right_profile_is_no_profile_mistake(ml_h: float) -> None:
    noisy = MeterFaults(noise_sd_ml=0.3)  # a float sensor's jitter (invented)
    for prof, faults in ((KV, noisy), (REF, noisy), (KV, MeterFaults())):
        engine, effects = replay(prof, prof, 8.0, constant(ml_h), faults=faults)
        assert engine.sanity_history() == [], (prof.name, ml_h)
        # the low-output rules see it as they always did (KDIGO stage 1 after 6 h)
        assert any(isinstance(e, AlarmEvent) and e.rule.startswith("oliguria") for e in effects)


def test_the_flow_line_is_far_below_anuria() -> None:
    # source: CLINICAL-REFERENCE.md section 3, anuria under 50-100 mL/day (textbooks vary;
    # common practice, no single source): the warning's line is under half the lowest
    assert LOW_FLOW_ML_H * 24 <= 50 / 2


# --- an epoch in the wrong unit, a clock in the wrong zone -----------------------------------


def test_epoch_seconds_read_as_milliseconds_say_time_format() -> None:
    engine, _ = replay(KV, variant(KV, time={"format": "epoch_ms"}), 1.0, constant(NORMAL_ML_H))
    found = codes(engine)
    assert found["device_time_far"].key == "time.format"
    assert "years behind" in found["device_time_far"].detail
    assert found["every_reading_late"].key == "time.format"
    q = engine.quality()["m-19"]["outcomes"]
    assert q == {"too_old": engine.quality()["m-19"]["received"]}  # all late, none lost quietly


def test_a_local_clock_sent_as_utc_says_utc_offset() -> None:
    # the meter's clock reads 2 h behind UTC (a local time sent as if it were UTC)
    engine, _ = replay(REF, REF, 1.0, constant(NORMAL_ML_H), clock_s=-7200.0)
    found = codes(engine)
    assert set(found) == {"every_reading_late"}
    assert found["every_reading_late"].key == "fields.utc_offset"
    assert "2 h behind" in found["every_reading_late"].detail


def test_an_epoch_meter_on_local_time_says_time_format_not_an_offset_field() -> None:
    # an epoch counted from a local clock 2 h behind UTC: an epoch family cannot declare
    # fields.utc_offset (the profile checker refuses it), so the hint is the meter's clock
    engine, _ = replay(KV, KV, 1.0, constant(NORMAL_ML_H), clock_s=-7200.0)
    found = codes(engine)
    assert set(found) == {"every_reading_late"}
    assert found["every_reading_late"].key == "time.format"
    assert "2 h behind" in found["every_reading_late"].detail
    assert "Set the meter's clock to UTC" in found["every_reading_late"].detail


def test_a_right_clock_and_a_store_and_forward_burst_are_silent() -> None:
    engine, _ = replay(REF, REF, 3.0, constant(NORMAL_ML_H))
    assert engine.sanity_history() == []
    # a 40-minute outage whose readings arrive together when the meter is back: every
    # one of them is stored, but they arrive within seconds, not reading after reading
    sim = simulate(REF, "m-19", START, 3.0, constant(NORMAL_ML_H), seed=3)
    back = T0 + 2 * 3600 + 30  # the store is sent oldest first, then the meter goes on
    stored = [r for r in sim.records if T0 + 4800 < r[0] <= back]
    recs = [r for r in sim.records if r not in stored]
    recs += [(back + 0.01 * k, topic, p) for k, (_, topic, p) in enumerate(stored)]
    engine = Engine([REF], RULES, POLICY)
    engine.step("hourwatch/beds/b19/context", {"ward": "w", "device_ids": ["m-19"]}, T0 - 60)
    for recv, topic, payload in sorted(recs, key=lambda r: r[0]):
        engine.advance(recv)
        engine.step(topic, payload, recv)
    assert engine.quality()["m-19"]["outcomes"]["store_forward"] >= 30
    assert engine.sanity_history() == []


def test_a_clock_that_comes_right_clears_its_warning() -> None:
    engine = Engine([KV])
    engine.step("hourwatch/beds/b1/context", {"ward": "w", "device_ids": ["kv-1"]}, T0 - 60)
    year_2000 = 946684800.0  # a reset clock (invented)
    for i in range(4):
        engine.step(*encode(KV, "kv-1", year_2000 + 60 * i, 10.0 + i, seq=i + 1), T0 + 60 * i)
    assert [w.code for w in engine.sanity_warnings()] == ["device_time_far"]
    for i in range(4, 8):
        engine.step(*encode(KV, "kv-1", T0 + 60 * i, 10.0 + i, seq=i + 1), T0 + 60 * i + 1)
    assert engine.sanity_warnings() == []
    changes = engine.take_sanity_changes()
    assert [(what, w.code) for what, w in changes] == [
        ("raised", "device_time_far"),
        ("cleared", "device_time_far"),
    ]
    assert engine.take_sanity_changes() == []
    assert engine.sanity_history()[0].cleared == pytest.approx(T0 + 60 * 6 + 1)


# --- the probe ----------------------------------------------------------------------------------


def test_the_probe_shows_the_warning_and_the_key() -> None:
    wrong = variant(KV, time={"format": "epoch_ms"})
    tally = ProbeTally(wrong)
    for i in range(5):
        topic, payload = encode(KV, "kv-1", T0 + 60 * i, 10.0 + i, seq=i + 1)
        assert isinstance(payload, str)
        tally.observe(topic, payload.encode(), T0 + 60 * i + 1)
    text = "\n".join(tally.report())
    assert "WARNING device_time_far: check time.format" in text


# --- the service: log and metrics, on a real broker ----------------------------------------------


def test_the_service_logs_and_counts_a_wrong_unit(broker, tmp_path: Path) -> None:  # noqa: F811
    folder = tmp_path / "profiles"
    folder.mkdir()
    wrong = variant(LITRE, volume={"unit": "mL"})
    text = Path(__file__).parent.parent / "device_profiles" / "keyvalue-decilitre.toml"
    (folder / "keyvalue-decilitre.toml").write_text(
        text.read_text().replace('unit = "dL"', 'unit = "mL"')
    )
    assert wrong.volume.unit == "mL"
    now = time.time()
    # 4 h of a litre meter's readings, buffered and uploaded at once (store-and-forward)
    sim = simulate(LITRE, "kv-0419", datetime.fromtimestamp(now - 4 * 3600, UTC), 4.0,
                   constant(NORMAL_ML_H), levels={"ward": "4-east"})  # fmt: skip
    msgs: list[tuple[str, object]] = [
        ("hourwatch/beds/b04/context", {"ward": "4-east", "device_ids": ["kv-0419"]}),
        *[(topic, payload) for _, topic, payload in sim.records],
    ]
    with structlog.testing.capture_logs() as logs, running_service(
        broker, tmp_path / "j.db", profiles=str(folder)
    ) as svc:  # fmt: skip
        pub = publisher(broker)
        publish_all(pub, msgs)
        deadline = time.monotonic() + 20
        while svc.metrics.acked < len(msgs) and time.monotonic() < deadline:
            time.sleep(0.05)
        host, port = svc.health.address
        with urllib.request.urlopen(f"http://{host}:{port}/metrics", timeout=5) as r:
            metrics = r.read().decode()
        pub.disconnect()
    assert "hourwatch_profile_sanity_warnings 2" in metrics, metrics
    assert 'hourwatch_profile_sanity_warnings_total{code="flow_below_adult"} 1' in metrics
    raised = [e for e in logs if e["event"] == "profile_sanity_raised"]
    assert {(e["code"], e["key"], e["device_id"]) for e in raised} == {
        ("flow_below_adult", "volume.unit", "kv-0419"),
        ("steps_below_resolution", "volume.unit", "kv-0419"),
    }
    assert all(e["log_level"] == "warning" for e in raised)
