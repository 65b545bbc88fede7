"""Intake integrity under hostile and broken input (issue 14), through Engine.step:

- a device id belongs to one meter family: messages for it on another family's topic are
  refused and leave its state alone;
- clinical times far ahead of the receive time are refused, and history is pruned by
  receive time;
- JSON strings are never read as numbers;
- acknowledgements: only roles the escalation policy names; the acknowledger from the
  per-user topic `{prefix}/ack/{user}`;
- bed ids and ward names follow a pattern; a refused identifier never reaches an effect;
- moving a meter held by another bed needs the new context to say so, and is noted;
- unbound device state is forgotten after a while and never grows without bound.

All meters, beds, wards and people are invented; no patient data.
"""

from __future__ import annotations

import json
from typing import Any

import pytest

from daemon.engine.alarms import AlarmEvent, State
from daemon.engine.effects import RejectedInput
from daemon.engine.engine import Engine
from daemon.engine.evaluator import Notice
from daemon.engine.outcomes import Outcome
from simulator.encode import encode
from tests.conftest import PROFILES, T0, Meter, context_payload, send_steady
from tests.ruletools import WARD, Bed, Ward, at, iso

REF = PROFILES["reference-cumulative"]
NEST = PROFILES["nested-telemetry"]
FLOW_ML_H = 60.0  # invented steady flow


def rejections(effects: list[Any], reason: Outcome | str | None = None) -> list[RejectedInput]:
    return [
        e
        for e in effects
        if isinstance(e, RejectedInput) and (reason is None or str(e.reason) == str(reason))
    ]


# --- 2. one device, one family -----------------------------------------------------------


def _other_family_payloads(device: str, t: float) -> list[Any]:
    """What may arrive for a reference meter's id on the nested-telemetry topic: a
    well-formed reading of that family, junk, and nothing at all."""
    _, good = encode(NEST, device, t, 5.0, seq=1)
    return [good, b"\x00junk", "", {"hdr": {}}]


@pytest.mark.parametrize("which", range(4))
def test_a_message_on_another_familys_topic_leaves_the_device_alone(which: int) -> None:
    m = Meter(REF, device="rc-1")
    p = float(REF.timing.period_s)
    step = FLOW_ML_H * p / 3600
    sent = send_steady(m, T0, 30, step, level=100)
    before = m.engine.quality()["rc-1"]
    # a message for rc-1 on the nested-telemetry topic, between two readings
    t = sent[-1][0] + p / 2
    topic = NEST.topic.replace("{device_id}", "rc-1")
    eff = m.raw(topic, _other_family_payloads("rc-1", t)[which], t)
    (rej,) = rejections(eff)
    assert rej.reason == Outcome.WRONG_PROFILE and rej.device_id == "rc-1"
    assert m.engine.unrouted[Outcome.WRONG_PROFILE] == 1
    # the device's state is untouched: counts, baseline, duplicate memory
    assert m.engine.quality()["rc-1"] == before
    for i in range(30, 60):
        m.send(T0 + i * p, 100 + i * step)
    topic0, body0 = m.payload(*sent[5], seq=6)
    assert m.raw(topic0, body0, T0 + 60 * p) == []  # a redelivery is still a duplicate
    q = m.engine.quality()["rc-1"]
    assert q["profile"] == "reference-cumulative"
    assert q["outcomes"] == {"accepted": 60, "duplicate": 1}
    assert m.total() == pytest.approx(FLOW_ML_H * 59 * p / 3600, abs=1e-6)


def test_the_bed_context_may_name_a_meters_family() -> None:
    """Named in the context, the family holds even before the meter's first message."""
    engine = Engine(PROFILES.values())
    ctx = context_payload(["d-1"]) | {"device_profiles": {"d-1": "reference-cumulative"}}
    assert engine.step("hourwatch/beds/b01/context", ctx, T0) == []
    topic, body = encode(NEST, "d-1", T0 + 10, 5.0, seq=1)
    (rej,) = rejections(engine.step(topic, body, T0 + 11))
    assert rej.reason == Outcome.WRONG_PROFILE
    topic, body = encode(REF, "d-1", T0 + 60, 5.0, seq=1)
    assert engine.step(topic, body, T0 + 61) == []
    assert engine.quality()["d-1"]["outcomes"] == {"accepted": 1}
    bad = context_payload(["d-2"]) | {"device_profiles": {"d-2": "no-such-family"}}
    (rej,) = rejections(engine.step("hourwatch/beds/b02/context", bad, T0))
    assert rej.reason == Outcome.BAD_CONTEXT and "no-such-family" in rej.detail


# --- 3. clinical times ahead of the receive time ----------------------------------------


def _bed_with_history() -> Bed:
    bed = Bed(Ward())
    bed.bind()
    bed.start()
    bed.hours([80.0] * 3)
    return bed


def test_a_result_dated_a_year_ahead_is_refused_and_prunes_nothing() -> None:
    bed = _bed_with_history()
    now = at(3, 1)
    bed.labs(at(2, 30), serum_na_mmol_l=140.0)  # source: normal 135-145 (Adrogué 2000)
    bed.intake(at(2, 40), 250.0)  # invented
    typo = at(3, 1) + 365 * 86400.0  # a year typed wrong
    for what, body in [
        ("labs", {"time": iso(typo), "serum_na_mmol_l": 139.0}),
        ("intake", {"time": iso(typo), "volume_ml": 100.0, "fluid": "0.9% NaCl"}),
        ("vitals", {"time": iso(typo), "heart_rate_bpm": 90.0}),
    ]:
        (rej,) = rejections(bed.send(what, body, now), Outcome.FUTURE_TIME)
        assert rej.topic == f"hourwatch/beds/b01/{what}"
    state = bed.ward.engine.beds["b01"]
    assert state.labs["serum_na_mmol_l"] == [(at(2, 30), 140.0)]
    assert state.intake_between(at(2), at(3)) == 250.0
    assert state.latest_lab("serum_na_mmol_l", now) == (at(2, 30), 140.0)
    assert not state.vitals


def test_a_context_episode_dated_ahead_is_refused() -> None:
    bed = Bed(Ward())
    eff = bed.bind(episodes=[{"kind": "obstruction_relieved", "at": iso(T0 + 30 * 86400.0)}])
    (rej,) = rejections(eff, Outcome.FUTURE_TIME)
    assert rej.detail.startswith("time is") and "b01" not in bed.ward.engine.beds


def test_history_is_pruned_by_receive_time_not_by_the_newest_value() -> None:
    """Even with a generous tolerance ahead, an accepted far-ahead value must not push
    the real history out of the window the rules read."""
    ward = Ward()
    ward.engine = Engine(PROFILES.values(), ward.rules, ward.policy, clinical_ahead_s=10 * 86400)
    bed = Bed(ward)
    bed.bind()
    bed.start()
    bed.labs(at(0, 10), serum_na_mmol_l=140.0)  # source: normal 135-145 (Adrogué 2000)
    bed.intake(at(0, 20), 250.0)  # invented
    ahead = 5 * 86400.0  # accepted: within the 10 days allowed here
    bed.send("labs", {"time": iso(at(0, 30) + ahead), "serum_na_mmol_l": 141.0}, at(0, 30))
    bed.send("intake", {"time": iso(at(0, 40) + ahead), "volume_ml": 100.0,
                        "fluid": "0.9% NaCl"}, at(0, 40))  # fmt: skip
    state = ward.engine.beds["b01"]
    assert (at(0, 10), 140.0) in state.labs["serum_na_mmol_l"]
    assert state.intake_between(at(0), at(1)) == 250.0


# --- 4. strict JSON numbers in clinical inputs --------------------------------------------


@pytest.mark.parametrize(
    ("what", "body"),
    [
        ("intake", {"volume_ml": "12", "fluid": "0.9% NaCl"}),
        ("labs", {"serum_na_mmol_l": "150"}),
        ("vitals", {"heart_rate_bpm": "80"}),
        ("vitals", {"systolic_mmhg": True}),
    ],
)
def test_a_string_number_in_a_clinical_input_is_refused(what: str, body: dict[str, Any]) -> None:
    bed = _bed_with_history()
    t = at(3, 1)
    (rej,) = rejections(bed.send(what, {"time": iso(t)} | body, t))
    assert rej.reason == Outcome.BAD_CLINICAL_INPUT
    assert body.keys() & {rej.detail.split(":")[0]}


def test_a_string_sodium_raises_no_alarm() -> None:
    # source: serum Na > 145 mmol/L is hypernatraemia (Adrogué & Madias, NEJM 2000)
    bed = _bed_with_history()
    bed.send("labs", {"time": iso(at(3, 1)), "serum_na_mmol_l": "150"}, at(3, 1))
    bed.ward.advance(at(4))
    assert bed.ward.first("sodium-high") is None
    bed.send("labs", {"time": iso(at(4, 1)), "serum_na_mmol_l": 150}, at(4, 1))
    assert bed.ward.first("sodium-high") is not None  # the same value as a number


def test_a_string_weight_in_a_context_is_refused() -> None:
    engine = Engine(PROFILES.values())
    ctx = {"ward": WARD, "device_ids": ["d-1"], "weight_kg": "80", "weight_basis": "actual"}
    (rej,) = rejections(engine.step("hourwatch/beds/b01/context", ctx, T0))
    assert rej.reason == Outcome.BAD_CONTEXT and rej.detail.startswith("weight_kg")
    assert "b01" not in engine.beds


# --- 5. acknowledgements ------------------------------------------------------------------


def _alarmed() -> tuple[Bed, AlarmEvent]:
    bed = Bed(Ward())
    bed.bind()
    bed.start()
    bed.hours([300.0] * 3)  # > 200 mL/h for 2 h (Halbgewachs & Domes 2015)
    pod = bed.ward.first("pod-hourly")
    assert pod is not None
    return bed, pod


def test_a_role_the_escalation_policy_does_not_name_cannot_acknowledge() -> None:
    bed, pod = _alarmed()
    w = bed.ward
    t = at(3, seconds=20)
    out = w.send("hourwatch/ack/visitor-1", {"alarm_id": pod.alarm_id, "role": "visitor"}, t)
    (rej,) = rejections(out)
    assert rej.reason == Outcome.UNKNOWN_ROLE
    assert not [e for e in out if isinstance(e, AlarmEvent)]
    # the chain goes on: our default policy pages the charge nurse at 15 min (medium)
    w.advance(at(3, 30))
    assert [e for e in w.alarms("pod-hourly") if e.state is State.ESCALATED]


def test_the_acknowledger_comes_from_the_per_user_topic() -> None:
    bed, pod = _alarmed()
    t = at(3, seconds=20)
    out = bed.ward.send(
        "hourwatch/ack/nurse-12", {"alarm_id": pod.alarm_id, "role": "bedside-nurse"}, t
    )
    (ack,) = [e for e in out if isinstance(e, AlarmEvent) and e.state is State.ACKNOWLEDGED]
    assert (ack.by, ack.role) == ("nurse-12", "bedside-nurse")


@pytest.mark.parametrize(
    ("topic", "body"),
    [
        # the payload names someone else than the authenticated user
        ("hourwatch/ack/nurse-12", {"by": "nurse-99", "role": "bedside-nurse"}),
        # a user level that is no identifier
        ("hourwatch/ack/nurse 12", {"role": "bedside-nurse"}),
        ("hourwatch/ack/nurse-12/extra", {"role": "bedside-nurse"}),
    ],
)
def test_an_acknowledgement_that_is_not_the_users_own_is_refused(
    topic: str, body: dict[str, Any]
) -> None:
    bed, pod = _alarmed()
    out = bed.ward.send(topic, {"alarm_id": pod.alarm_id} | body, at(3, seconds=20))
    assert not [e for e in out if isinstance(e, AlarmEvent)]
    (rej,) = rejections(out)
    assert rej.reason in (Outcome.BAD_ACK, Outcome.UNKNOWN_TOPIC)
    assert "nurse 12" not in rej.topic


def test_a_staff_list_limits_each_user_to_their_roles() -> None:
    ward = Ward()
    staff = {"nurse-12": ["bedside-nurse"], "charge-3": ["charge-nurse", "bedside-nurse"]}
    ward.engine = Engine(PROFILES.values(), ward.rules, ward.policy, ack_users=staff)
    bed = Bed(ward)
    bed.bind()
    bed.start()
    bed.hours([300.0] * 3)  # > 200 mL/h for 2 h (Halbgewachs & Domes 2015)
    pod = ward.first("pod-hourly")
    assert pod is not None
    t = at(3, seconds=20)
    for user, role in [("nurse-12", "charge-nurse"), ("cleaner-1", "bedside-nurse")]:
        out = ward.send(f"hourwatch/ack/{user}", {"alarm_id": pod.alarm_id, "role": role}, t)
        (rej,) = rejections(out)
        assert rej.reason == Outcome.UNKNOWN_ROLE
    out = ward.send("hourwatch/ack/charge-3", {"alarm_id": pod.alarm_id, "role": "charge-nurse"}, t)
    assert [e.state for e in out if isinstance(e, AlarmEvent)] == [State.ACKNOWLEDGED]
    with pytest.raises(ValueError, match="visitor"):
        Engine(PROFILES.values(), ward.rules, ward.policy, ack_users={"v-1": ["visitor"]})


def test_alarm_messages_say_where_to_acknowledge() -> None:
    ward = Ward()
    ward.engine = Engine(PROFILES.values(), ward.rules, ward.policy,
                         ack_topic="hourwatch/ack/{user}")  # fmt: skip
    bed = Bed(ward)
    bed.bind()
    bed.start()
    bed.hours([300.0] * 3)
    pod = ward.first("pod-hourly")
    assert pod is not None
    how = pod.to_json()["acknowledge"]
    assert isinstance(how, dict) and how["topic"] == "hourwatch/ack/{user}"
    assert how["payload"] == {"alarm_id": pod.alarm_id, "role": "<your role>"}


# --- 8. identifiers -------------------------------------------------------------------------


@pytest.mark.parametrize("bed", ["bed 07", "b" * 65, "bed+1", "bed#1", "bett\u00e9-1", ""])
def test_a_bed_id_outside_the_pattern_is_refused_and_never_echoed(bed: str) -> None:
    engine = Engine(PROFILES.values())
    for what, body in [
        ("context", context_payload(["d-1"])),
        ("labs", {"time": iso(T0), "serum_na_mmol_l": 140.0}),
    ]:
        (rej,) = rejections(engine.step(f"hourwatch/beds/{bed}/{what}", body, T0))
        assert rej.reason in (Outcome.BAD_IDENTIFIER, Outcome.UNKNOWN_TOPIC)
        if bed:
            assert bed not in rej.topic and bed not in rej.detail
    assert engine.beds == {} and not engine.context_rejections


@pytest.mark.parametrize("ward", ["4 East", "w/1", "w+", "x" * 65])
def test_a_ward_name_outside_the_pattern_is_refused(ward: str) -> None:
    engine = Engine(PROFILES.values())
    ctx = {"ward": ward, "device_ids": ["d-1"]}
    (rej,) = rejections(engine.step("hourwatch/beds/b01/context", ctx, T0))
    assert rej.reason == Outcome.BAD_CONTEXT and rej.detail.startswith("ward")
    assert ward not in rej.detail


def test_the_identifier_pattern_is_configurable() -> None:
    engine = Engine(PROFILES.values(), id_pattern=r"^[A-Z]{2}-[0-9]{2}$")
    ctx = {"ward": "NW-01", "device_ids": []}
    assert engine.step("hourwatch/beds/IC-01/context", ctx, T0) == []
    (rej,) = rejections(engine.step("hourwatch/beds/icu-01/context", context_payload([]), T0))
    assert rej.reason == Outcome.BAD_IDENTIFIER


def test_a_refused_context_never_quotes_its_content() -> None:
    engine = Engine(PROFILES.values())
    marker = "sensitive-marker-7f3a"  # stands for a field a site must never send
    ctx = context_payload(["d-1"]) | {marker: marker}
    (rej,) = rejections(engine.step("hourwatch/beds/b01/context", ctx, T0))
    assert rej.reason == Outcome.BAD_CONTEXT
    assert marker not in json.dumps(rej.to_json())


# --- 9. moving a meter between beds -------------------------------------------------------


def test_a_meter_held_by_another_bed_is_not_moved_silently() -> None:
    m = Meter(REF, device="rc-1", bed="b01")
    p = float(REF.timing.period_s)
    step = FLOW_ML_H * p / 3600
    send_steady(m, T0, 10, step, level=100)
    eff = m.engine.step("hourwatch/beds/b02/context", context_payload(["rc-1", "rc-2"]), T0 + 600)
    (rej,) = rejections(eff)
    assert rej.reason == Outcome.DEVICE_ON_OTHER_BED and rej.device_id == "rc-1"
    assert m.engine.quality()["rc-1"]["bed"] == "b01"
    assert m.engine.beds["b02"].context.device_ids == ["rc-2"]  # the rest of it applies
    for i in range(10, 20):
        m.send(T0 + i * p, 100 + i * step)
    assert m.engine.beds["b01"].series.total() == pytest.approx(19 * step, abs=1e-6)
    assert m.engine.beds["b02"].series.total() == 0


def test_a_context_that_says_it_takes_the_meter_over_moves_it_with_a_notice() -> None:
    m = Meter(REF, device="rc-1", bed="b01")
    send_steady(m, T0, 5, 1.0, level=100)
    ctx = context_payload(["rc-1"]) | {"replaces": ["rc-1"]}
    eff = m.engine.step("hourwatch/beds/b02/context", ctx, T0 + 600)
    assert not rejections(eff)
    notes = [e for e in eff if isinstance(e, Notice)]
    assert [(n.bed, n.code) for n in notes] == [("b02", "device_moved")]
    assert "rc-1" in notes[0].text and "b01" in notes[0].text
    assert m.engine.quality()["rc-1"]["bed"] == "b02"
    assert m.engine.beds["b01"].context.device_ids == []


def test_a_meter_released_by_its_bed_may_be_bound_elsewhere() -> None:
    m = Meter(REF, device="rc-1", bed="b01")
    send_steady(m, T0, 5, 1.0, level=100)
    assert m.engine.step("hourwatch/beds/b01/context", context_payload([]), T0 + 500) == []
    eff = m.engine.step("hourwatch/beds/b02/context", context_payload(["rc-1"]), T0 + 600)
    assert not rejections(eff) and m.engine.quality()["rc-1"]["bed"] == "b02"


# --- 6. bounded engine state ----------------------------------------------------------------


def test_unbound_devices_are_forgotten_and_never_grow_without_bound() -> None:
    engine = Engine(PROFILES.values(), unbound_expiry_s=3600, max_unbound_devices=500)
    for i in range(2000):  # 2,000 invented ids within a few minutes
        topic, body = encode(REF, f"x-{i}", T0 + i * 0.1, 1.0, seq=1)
        (rej,) = rejections(engine.step(topic, body, T0 + i * 0.1))
        assert rej.reason == Outcome.UNBOUND
    assert len(engine.devices) <= 500
    assert engine.devices_forgotten == 1500
    # an hour later, a message of one new id: every other entry has expired
    topic, body = encode(REF, "x-new", T0 + 7200, 1.0, seq=1)
    engine.step(topic, body, T0 + 7200)
    assert list(engine.devices) == ["x-new"]
    # bound meters are never forgotten
    engine.step("hourwatch/beds/b01/context", context_payload(["rc-1"]), T0 + 7200)
    topic, body = encode(REF, "rc-1", T0 + 7260, 1.0, seq=1)
    engine.step(topic, body, T0 + 7261)
    topic, body = encode(REF, "x-late", T0 + 20000, 1.0, seq=1)
    engine.step(topic, body, T0 + 20000)
    assert set(engine.devices) == {"rc-1", "x-late"}


def test_a_held_reading_of_a_meter_that_leaves_its_bed_is_still_counted() -> None:
    """received = sum of outcomes + held, also when the cleaner holding a reading goes."""
    m = Meter(REF, device="rc-1", bed="b01")
    p = float(REF.timing.period_s)
    send_steady(m, T0, 5, 1.0, level=400)
    m.send(T0 + 5 * p, 0.0)  # a fall to near zero: held for the next reading
    assert m.engine.quality()["rc-1"]["held"] == 1
    m.engine.step("hourwatch/beds/b01/context", context_payload([]), T0 + 6 * p)
    q = m.engine.quality()["rc-1"]
    assert q["held"] == 0 and q["outcomes"] == {"accepted": 5, "artefact_dropped": 1}
    assert q["received"] == 6


@pytest.mark.parametrize("name", sorted(PROFILES))
@pytest.mark.parametrize("huge", [1e27, -1e30, 1.7e308])
def test_a_reading_too_large_to_round_is_out_of_range(name: str, huge: float) -> None:
    """A volume of 1e27 mL or more once raised decimal.InvalidOperation while the decoder
    wrote its refusal ("... mL outside physical range"): an exception where an outcome was
    due, and a replay that stopped on the line. Every family refuses it with a reason."""
    m = Meter(PROFILES[name])
    out = m.send(T0, huge)
    assert [e.reason for e in out if isinstance(e, RejectedInput)] == [Outcome.OUT_OF_RANGE]
    assert m.outcomes() == {"out_of_range": 1}


def test_half_up_leaves_a_whole_float_as_it_is() -> None:
    from daemon.engine.numbers import half_up, num

    for x in (2.0**52, 1e27, -1e30, 1.7e308):
        assert half_up(x, 0) == half_up(x, 6) == x
    assert num(1e27, 1) == f"{1e27:.1f}"
