"""The engine's alarm inputs and outputs: acknowledgements on `hourwatch/ack`, bad
clinical inputs, per-bed disabled rules, and what an alarm's evidence carries.

The lifecycle's own table (every transition, escalation timing, hysteresis) is tested in
tests/test_lifecycle.py; here everything goes through Engine.step / Engine.advance.
All beds, meters and people here are invented.
"""

from __future__ import annotations

import json
from typing import Any

import pytest

from daemon.engine.alarms import AlarmEvent, Kind, State
from daemon.engine.effects import RejectedInput
from daemon.engine.outcomes import Outcome
from tests.ruletools import HOUR, T0, WARD, Bed, Ward, at


def started(weight_kg: float | None = 70.0, **ctx: Any) -> Bed:
    bed = Bed(Ward(), weight_kg=weight_kg, context=dict(ctx))
    bed.bind()
    bed.start()
    return bed


def diuresis_bed(**ctx: Any) -> Bed:
    """300 mL/h for 3 h: pod-hourly on (> 200 mL/h for 2 h, Halbgewachs & Domes 2015)."""
    bed = started(70.0, **ctx)
    bed.hours([300.0] * 3)
    return bed


def rejected(effects: list[Any]) -> list[RejectedInput]:
    return [e for e in effects if isinstance(e, RejectedInput)]


# --- acknowledgements ---------------------------------------------------------------


def test_acknowledging_a_known_alarm() -> None:
    bed = diuresis_bed()
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    t = at(3, seconds=20)
    out = w.ack(pod.alarm_id, t, by="nurse-12", role="bedside-nurse")
    acks = [e for e in out if isinstance(e, AlarmEvent) and e.state is State.ACKNOWLEDGED]
    assert len(acks) == 1
    ack = acks[0]
    assert (ack.alarm_id, ack.time, ack.by, ack.role) == (pod.alarm_id, t, "nurse-12",
                                                          "bedside-nurse")  # fmt: skip
    assert ack.reason == "acknowledged" and ack.notify == ()
    assert ack.to_json()["by"] == "nurse-12" and ack.to_json()["role"] == "bedside-nurse"
    assert rejected(out) == []


def test_an_acknowledgement_stops_escalation() -> None:
    # our own escalation defaults (alert_rules/escalation.toml): medium -> charge nurse
    # at 15 min, physician at 30 min, then every 15 min
    bed = started(70.0)
    bed.hours([300.0] * 2)  # > 200 mL/h for 2 h (Halbgewachs & Domes 2015)
    w = bed.ward
    pod = w.first("pod-hourly")
    assert pod is not None
    t_ack = at(2, seconds=10)
    w.ack(pod.alarm_id, t_ack)
    bed.hours([300.0])
    w.advance(t_ack + 50 * 60.0)  # within the ack's 60 min, the condition still present
    later = [e for e in w.alarms("pod-hourly") if e.time > t_ack]
    assert [e.state for e in later if e.notify] == []  # nobody paged after the ack
    assert not [e for e in later if e.state is State.ESCALATED]


def test_acknowledging_an_unknown_alarm_is_rejected() -> None:
    bed = diuresis_bed()
    out = bed.ward.ack("b01/pod-hourly/20260314T000000Z", at(3, seconds=20))
    rej = rejected(out)
    assert [r.reason for r in rej] == ["unknown_alarm"]
    assert rej[0].topic == "hourwatch/ack" and rej[0].device_id is None
    assert [e for e in out if isinstance(e, AlarmEvent)] == []


def test_acknowledging_an_ended_alarm_is_rejected() -> None:
    """flow-stopped (non-latching) ends once the flow is back; a late ack is refused."""
    bed = Bed(Ward(), weight_kg=70.0)
    bed.bind()
    bed.start(T0 + 30.0)  # off the minute, so the windows see whole minutes
    bed.hours([140.0] * 2)  # 2 mL/kg/h
    bed.minutes([0.0] * 70)  # no flow for 70 min: common practice, no single source
    w = bed.ward
    tech = w.first("flow-stopped")
    assert tech is not None
    bed.hours([140.0])  # flowing again; resolves after its clear-hold
    assert w.first("flow-stopped", State.RESOLVED) is not None
    out = w.ack(tech.alarm_id, bed.t + 10.0)  # type: ignore[operator]
    assert [r.reason for r in rejected(out)] == ["alarm_ended"]


@pytest.mark.parametrize(
    "payload",
    [
        b"{not json",
        "",
        {"alarm_id": "x"},  # who and role missing
        {"alarm_id": "b01/pod-hourly/x", "by": "", "role": "bedside-nurse"},  # no author
        {"alarm_id": "b01/pod-hourly/x", "by": "n", "role": "r", "extra": 1},
        [1, 2, 3],
    ],
    ids=["not-json", "empty", "no-author", "blank-author", "extra-field", "array"],
)
def test_a_malformed_ack_is_rejected_not_raised(payload: Any) -> None:
    bed = diuresis_bed()
    w = bed.ward
    n_events = len(w.alarms())
    out = w.send("hourwatch/ack", payload, at(3, seconds=20))
    rej = rejected(out)
    assert len(rej) == 1 and rej[0].reason == Outcome.BAD_ACK
    assert rej[0].detail
    assert len(w.alarms()) == n_events  # nothing acknowledged


def test_acks_in_a_log_are_applied_by_replay(tmp_path: Any, capsys: Any) -> None:
    from daemon.cli import main
    from simulator.meterlog import write_log

    bed = diuresis_bed()
    pod = bed.ward.first("pod-hourly")
    assert pod is not None
    # the same messages again, as a log, with an ack after the alarm
    w2 = Ward()
    records: list[tuple[float, str, Any]] = []
    real_send = w2.send

    def record(topic: str, payload: Any, t: float) -> list[Any]:
        records.append((t, topic, payload))
        return real_send(topic, payload, t)

    w2.send = record  # type: ignore[method-assign]
    b2 = Bed(w2, weight_kg=70.0)
    b2.bind()
    b2.start()
    b2.hours([300.0] * 3)
    ack = {"alarm_id": pod.alarm_id, "by": "nurse-3", "role": "charge-nurse"}
    records.append((at(3, seconds=20), "hourwatch/ack", ack))
    log = tmp_path / "ack.jsonl"
    write_log(log, records)
    assert main(["replay", str(log), "--json"]) == 0
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    acked = [x for x in lines if x.get("state") == "acknowledged"]
    assert [(x["alarm_id"], x["by"], x["role"]) for x in acked] == [
        (pod.alarm_id, "nurse-3", "charge-nurse")
    ]


# --- clinical inputs ------------------------------------------------------------------

BAD_INPUTS = [
    ("vitals", {"time": "2026-03-14T01:00:00Z", "systolic_mmhg": 80, "diastolic_mmhg": 90}),
    ("vitals", {"time": "2026-03-14T01:00:00Z"}),  # no value at all
    ("vitals", {"time": "2026-03-14T01:00:00", "heart_rate_bpm": 80}),  # no UTC offset
    ("vitals", {"time": "2026-03-14T01:00:00Z", "heart_rate_bpm": 900}),
    ("labs", {"time": "2026-03-14T01:00:00Z", "serum_na_mmol_l": 300}),  # not physiology
    ("labs", {"time": "2026-03-14T01:00:00Z", "serum_na_mmol_l": "high"}),
    ("intake", {"time": "2026-03-14T01:00:00Z", "volume_ml": 0, "fluid": "0.45% NaCl"}),
    ("intake", {"time": "2026-03-14T01:00:00Z", "volume_ml": -50, "fluid": "0.45% NaCl"}),
    ("intake", {"time": "2026-03-14T01:00:00Z", "volume_ml": 250}),  # fluid missing
    ("intake", {"time": "2026-03-14T01:00:00Z", "volume_ml": 250, "fluid": "x", "pt": "y"}),
    ("intake", "not json at all"),
]


@pytest.mark.parametrize(("what", "payload"), BAD_INPUTS)
def test_bad_clinical_input_is_rejected_with_a_reason(what: str, payload: Any) -> None:
    bed = started(70.0)
    out = bed.send(what, payload, at(1))
    rej = rejected(out)
    assert len(rej) == 1
    assert rej[0].reason == Outcome.BAD_CLINICAL_INPUT
    assert rej[0].topic == f"hourwatch/beds/b01/{what}"
    assert rej[0].detail and len(rej[0].detail) <= 200
    assert rej[0].device_id is None  # no patient field is echoed (DESIGN §7)
    assert bed.ward.engine.input_rejections[Outcome.BAD_CLINICAL_INPUT] == 1


def test_clinical_input_for_an_unbound_bed_is_rejected() -> None:
    w = Ward()
    out = w.send("hourwatch/beds/b99/labs",
                 {"time": "2026-03-14T01:00:00Z", "serum_na_mmol_l": 150}, T0)  # fmt: skip
    assert [r.reason for r in rejected(out)] == [Outcome.UNKNOWN_BED]


def test_an_unknown_bed_topic_is_rejected() -> None:
    bed = started(70.0)
    out = bed.send("weather", {"time": "2026-03-14T01:00:00Z"}, at(1))
    assert [r.reason for r in rejected(out)] == [Outcome.UNKNOWN_TOPIC]


def test_a_bad_clinical_input_changes_no_alarm() -> None:
    """A typo'd sodium of 300 is rejected; it does not raise sodium-high."""
    bed = started(70.0)
    bed.labs(at(1), serum_na_mmol_l=300.0)
    bed.labs(at(1, 5), serum_na_mmol_l=140.0)  # normal: 135-145 mmol/L (Adrogué & Madias 2000)
    assert "sodium-high" not in bed.ward.fired()


# --- per-bed overrides ------------------------------------------------------------------


def test_disabled_rules_in_the_context_silence_a_rule() -> None:
    # > 200 mL/h for 2 h would raise pod-hourly (Halbgewachs & Domes 2015)
    bed = diuresis_bed(disabled_rules=["pod-hourly"])
    w = bed.ward
    assert w.alarms("pod-hourly") == []
    # the other rules still run on this bed: the hypovolaemia check sees the output
    bed.vitals(at(3, seconds=30), heart_rate_bpm=110, systolic_mmhg=100)  # SI 1.1: Mutschler 2013
    assert "hypovolaemia-risk" in w.fired()
    # ... and another bed on the same engine is not affected
    other = Bed(w, bed="b02", device="rc-0202", weight_kg=70.0)
    other.bind(at(3, minutes=1))
    other.start(at(3, minutes=1))
    other.hours([300.0] * 3)
    assert [e.bed for e in w.alarms("pod-hourly") if e.state is State.ACTIVE] == ["b02"]


def test_disabling_a_rule_ends_its_open_alarm() -> None:
    """Non-latching stage 1 ends after its clear-hold once the clinician disables it."""
    bed = started(70.0)
    bed.hours([20.0] * 6)  # 0.29 mL/kg/h: stage 1 (KDIGO 2012, Table 2)
    w = bed.ward
    assert "oliguria-kdigo-1" in w.fired()
    t = at(6, seconds=10)
    bed.bind(t, disabled_rules=["oliguria-kdigo-1"])
    bed.hours([20.0])
    ended = w.first("oliguria-kdigo-1", State.RESOLVED)
    assert ended is not None
    assert ended.time == t + 1800  # its clear-hold (alert_rules/oliguria-kdigo-1.toml)
    assert "disabled" in ended.summary


def test_a_per_bed_replacement_order_changes_the_advice() -> None:
    """A clinician's order of 40-60% of the output (invented order)."""
    order = {
        "fraction_low": 0.4,
        "fraction_high": 0.6,
        "fluid": "0.45% NaCl",
        "ordered_by": "icu-physician-2 (invented)",
        "ordered_at": "2026-03-13T23:00:00Z",
    }
    bed = started(70.0, replacement=order)
    bed.labs(at(seconds=30), serum_na_mmol_l=140.0)  # in range (Adrogue & Madias, NEJM 2000)
    bed.hours([300.0] * 4)
    adv = bed.ward.advice()
    assert adv
    a = adv[-1].advice
    assert (a.rate_low_ml_h, a.rate_high_ml_h) == pytest.approx((120.0, 180.0), abs=0.05)


def test_a_replacement_order_above_100_percent_is_refused() -> None:
    """No configuration can recommend replacing more than was lost (DESIGN §6)."""
    order = {
        "fraction_low": 0.8,
        "fraction_high": 1.2,
        "fluid": "0.45% NaCl",
        "ordered_by": "icu-physician-2 (invented)",
        "ordered_at": "2026-03-13T23:00:00Z",
    }
    bed = Bed(Ward(), context={"replacement": order})
    out = bed.bind()
    assert [r.reason for r in rejected(out)] == [Outcome.BAD_CONTEXT]
    assert "b01" not in bed.ward.engine.beds


# --- what an alarm carries --------------------------------------------------------------


def test_low_output_evidence_has_windows_thresholds_and_weight() -> None:
    bed = started(72.5, weight_basis="ideal")
    bed.hours([28.0] * 7)  # 0.39 mL/kg/h (KDIGO 2012 stage 1: < 0.5 for 6 h)
    ev = bed.ward.first("oliguria-kdigo-1")
    assert ev is not None
    e = ev.evidence
    assert e["weight_kg"] == 72.5 and e["weight_basis"] == "ideal"
    assert e["threshold_ml_kg_h"] == 0.5  # source: KDIGO 2012, Table 2
    assert e["mode"] == "mean"
    win = e["window"]
    assert isinstance(win, dict)
    assert win["length_min"] == 360
    assert win["coverage"] >= 0.9  # judged only on a covered window (DESIGN §3)
    # judged once the whole 6 h have passed since the first reading (KDIGO 2012: "for 6 h")
    assert ev.time == T0 + 6 * HOUR
    assert win["volume_ml"] == pytest.approx(28.0 * 6, abs=0.2)  # 360 measured min
    # the rate is over the minutes with data: here all of them
    known_h = 6 * (win["coverage"] + win["estimated_fraction"])
    assert known_h == pytest.approx(6.0)
    assert e["rate_ml_kg_h"] == pytest.approx(win["volume_ml"] / 72.5 / known_h, abs=0.001)
    assert {"from", "to"} <= set(win)


def test_pod_evidence_has_both_hours() -> None:
    bed = diuresis_bed()
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    wins = ev.evidence["windows"]
    assert isinstance(wins, list) and len(wins) == 2
    for w in wins:
        assert w["length_min"] == 60 and w["volume_ml"] > 200  # Halbgewachs & Domes 2015
        assert 0 <= w["coverage"] <= 1
    assert ev.evidence["threshold_ml_h"] == 200.0


def test_alarm_events_are_json_with_the_issue_fields() -> None:
    bed = diuresis_bed()
    bed.vitals(at(3, seconds=30), heart_rate_bpm=110, systolic_mmhg=100)  # SI 1.1
    events = bed.ward.alarms()
    assert {e.rule for e in events} >= {"pod-hourly", "replacement-behind", "hypovolaemia-risk"}
    for e in events:
        obj = json.loads(json.dumps(e.to_json()))
        for key in ("time", "alarm_id", "bed", "ward", "rule", "priority", "kind", "state",
                    "reason", "summary", "evidence"):  # fmt: skip
            assert key in obj, key
        assert obj["time"].endswith("Z") or obj["time"].endswith("+00:00")
        assert obj["ward"] == WARD and obj["bed"] == "b01"
        assert obj["kind"] in {k.value for k in Kind}
        assert obj["summary"]


def test_every_alarm_says_it_is_decision_support_and_how_to_acknowledge() -> None:
    from daemon.timeline import effect_json

    bed = diuresis_bed()
    events = bed.ward.alarms()
    assert events
    for e in events:
        line = effect_json(e)
        assert line is not None
        obj = json.loads(line)
        assert "treating clinician" in str(obj.get("caution", ""))
        assert "hourwatch/ack" in json.dumps(obj)  # where to send the acknowledgement
        assert e.alarm_id in json.dumps(obj.get("acknowledge"))
        pager = obj.get("pager")
        # one pager line: plain ASCII, at most 200 characters (ours), ending in its caution
        assert isinstance(pager, str) and 0 < len(pager) <= 200 and pager.isascii()
        assert pager.startswith(f"{e.clock} {e.bed} ")  # local HH:MM (UTC here), then the bed
        assert len(e.clock) == 5 and e.clock[2] == ":"
        assert pager.endswith("Decision support: verify per local protocol.")


def test_alarm_ids_name_bed_rule_and_onset() -> None:
    bed = diuresis_bed()
    ev = bed.ward.first("pod-hourly")
    assert ev is not None
    bed_id, rule_id, stamp = ev.alarm_id.split("/")
    assert (bed_id, rule_id) == ("b01", "pod-hourly")
    assert stamp.startswith("20260314T")
    assert ev.time < T0 + 3 * HOUR
