"""`hourwatch explain`: the windows behind an alarm, recomputed, equal the alarm's own
evidence; the readings behind them carry their cleaning outcome; unknown ids are one
line and exit 2. All data is invented (tests/reviewtools.py)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.profile_files import load_profiles
from daemon.review.explain import explain
from daemon.rule_files import load_policy, load_rules
from tests.reviewtools import (
    ACK_BY,
    BORDERLINE_ML_H,
    SEVERE_ML_H,
    T0,
    alarm_events,
    edited_rules,
    first_active,
    write_night,
)


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_night(tmp_path_factory.mktemp("explain") / "night.jsonl")


def _explain(path: Path, alarm_id: str) -> dict:
    return explain(path, alarm_id, load_profiles(), load_rules(), load_policy())


@pytest.mark.parametrize(
    ("bed", "rule"),
    [
        ("bed-sev", "pod-hourly"),
        ("bed-bord", "pod-hourly"),
        ("bed-sev", "replacement-behind"),
    ],
)
def test_windows_equal_the_alarm_event_evidence(night: Path, bed: str, rule: str) -> None:
    event = first_active(alarm_events(night), bed, rule)
    d = _explain(night, event.alarm_id)
    assert d["evidence_check"]["all_equal"], d["evidence_check"]
    # and number by number, against the event of a plain replay (no review code)
    ev = event.evidence
    theirs = ev["windows"] if "windows" in ev else [ev["window"]]
    assert len(d["windows"]) == len(theirs) > 0
    for ours, w in zip(d["windows"], theirs, strict=True):
        for key in ("from", "to", "length_min", "volume_ml", "coverage", "estimated_fraction"):
            assert ours[key] == w[key], key


def test_pod_hourly_windows_hold_the_invented_flows(night: Path) -> None:
    event = first_active(alarm_events(night), "bed-sev", "pod-hourly")
    d = _explain(night, event.alarm_id)
    older, newer = d["windows"]
    # the newer hour is fully measured at the invented 600 mL/h
    assert newer["measured_min"] == 60 and newer["unknown_min"] == 0
    assert newer["volume_ml"] == pytest.approx(SEVERE_ML_H, abs=1.0)
    # the alarm fires in the first minute the older hour passes 200 mL (source: pod-hourly
    # threshold, Halbgewachs & Domes, Can Fam Physician 2015); with 10 mL a minute that
    # is at most 210 mL
    assert 200.0 < older["volume_ml"] <= 210.0 + 0.5
    assert older["threshold"] == {"volume_ml": 200.0, "comparator": ">"}
    assert older["meets_condition"] and newer["meets_condition"]
    # the older hour begins before the meter's first reading: those minutes are unknown
    assert older["unknown_min"] > 0
    assert older["unmeasured_runs"][0]["state"] == "unknown"
    assert d["rule"]["source"].startswith("Halbgewachs")
    assert d["rule"]["check"]["threshold_ml_h"] == 200.0


def test_borderline_hour_is_just_above_the_threshold(night: Path) -> None:
    event = first_active(alarm_events(night), "bed-bord", "pod-hourly")
    d = _explain(night, event.alarm_id)
    newer = d["windows"][-1]
    assert newer["volume_ml"] == pytest.approx(BORDERLINE_ML_H, abs=1.0)


def test_readings_carry_their_cleaning_outcome(night: Path) -> None:
    event = first_active(alarm_events(night), "bed-sev", "pod-hourly")
    d = _explain(night, event.alarm_id)
    readings = d["readings"]
    outcomes = [r["outcome"] for r in readings]
    # every minute of the two hours since the first reading, plus the spike and the
    # redelivered message
    assert outcomes.count("duplicate") == 1
    # the spike was held, then dropped when the next reading did not confirm it: by the
    # time the alarm fired it was known as an artefact
    spike = [r for r in readings if r["outcome"] == "artefact_dropped"]
    assert len(spike) == 1 and not spike[0]["counted"]
    assert spike[0]["volume_ml"] > SEVERE_ML_H * 50 / 60 + 250  # the +300 mL jump
    # the reading after the spike settles it
    assert any(r.get("also_settled_previous_as") == "artefact_dropped" for r in readings)
    counted = [r for r in readings if r["counted"]]
    assert len(counted) >= 75
    for r in readings:
        assert r["windows"], r  # each listed reading lies in an evaluated window
    counts = d["windows"][-1]["readings_by_outcome"]
    assert counts.get("duplicate") == 1


def test_lifecycle_and_suppression_are_reported(night: Path) -> None:
    event = first_active(alarm_events(night), "bed-sev", "pod-hourly")
    d = _explain(night, event.alarm_id)
    states = [e["state"] for e in d["lifecycle"]]
    assert states[0] == "active"
    assert "escalated" in states  # nobody acknowledged in the invented night
    assert d["suppression"]["low_output_rule"] is False
    assert d["suppression"]["technical_alarms_open"] == []
    assert d["activated"].startswith(T0.strftime("%Y-%m-%d"))
    assert "clinician" in d["caution"]


def test_gated_rule_names_the_alarm_that_gates_it(night: Path) -> None:
    events = alarm_events(night)
    event = first_active(events, "bed-sev", "replacement-behind")
    d = _explain(night, event.alarm_id)
    gates = [g["rule"] for g in d["suppression"]["gated_by"]]
    assert gates == ["pod-hourly"]


def test_cli_text_and_json(night: Path, capsys: pytest.CaptureFixture[str]) -> None:
    event = first_active(alarm_events(night), "bed-bord", "pod-hourly")
    assert main(["explain", str(night), event.alarm_id]) == 0
    out = capsys.readouterr().out
    assert "Rule pod-hourly" in out
    assert "equal the alarm event's evidence" in out
    assert "Lifecycle" in out and "Decision support only" in out
    assert main(["explain", str(night), event.alarm_id, "--json"]) == 0
    d = json.loads(capsys.readouterr().out)
    assert d["alarm_id"] == event.alarm_id
    assert d["evidence_check"]["all_equal"]


@pytest.mark.parametrize(
    "alarm_id",
    ["bed-sev/pod-hourly/20260314T000000Z", "bed-zzz/pod-24h/20260314T012201Z", "not-an-id"],
)
def test_unknown_alarm_is_one_line_exit_2(
    night: Path, alarm_id: str, capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["explain", str(night), alarm_id]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("hourwatch: ") and "\n" not in err


def test_acknowledgement_is_in_the_lifecycle(night: Path) -> None:
    event = first_active(alarm_events(night), "bed-sev", "pod-hourly")
    d = _explain(night, event.alarm_id)
    acks = [e for e in d["lifecycle"] if e["reason"] == "acknowledged"]
    assert len(acks) == 1 and acks[0]["by"] == ACK_BY and acks[0]["role"] == "bedside-nurse"
    assert acks[0]["state"] == "acknowledged"


def test_with_a_condition_delay_the_evidence_is_the_last_evaluation(
    night: Path, tmp_path: Path
) -> None:
    # invented what-if: pod-hourly waits 10 minutes before it annunciates. The clock,
    # not a reading, then activates it, with the evidence of the last evaluation
    # before: explain must show the windows of that evaluation.
    rules_dir = edited_rules(tmp_path, "delayed", "pod-hourly",
                             "condition_delay_s = 0 ", "condition_delay_s = 600 ")  # fmt: skip
    event = first_active(alarm_events(night, rules_dir), "bed-sev", "pod-hourly")
    assert event.reason == "delay_elapsed"
    d = explain(night, event.alarm_id, load_profiles(), load_rules(rules_dir),
                load_policy(rules_dir))  # fmt: skip
    assert d["evidence_check"]["all_equal"], d["evidence_check"]
    assert d["moment"] <= d["activated"]
    ev = event.evidence["windows"]
    assert [w["volume_ml"] for w in d["windows"]] == [w["volume_ml"] for w in ev]


def test_the_residual_drain_is_shown_and_left_out(tmp_path: Path, capsys) -> None:
    """An obstruction relieved at the start: 1200 mL of retained urine drains in 40 min
    (1800 mL/h), then a diuresis of 300 mL/h (invented). The first hour after relief is
    the residual (its span, alert context default 60 min): explain and the report show it,
    and the criteria leave it out."""
    from simulator.meterlog import MeterFaults, context_record, simulate, write_log

    prof = next(p for p in load_profiles() if p.name == "reference-cumulative")
    t0 = T0.timestamp()
    ctx = context_record(t0 - 60.0, "bed-res", "review-test", ["rc-9101"], relieved_at=t0)
    sim = simulate(prof, "rc-9101", T0, 4.0, lambda m: 1800.0 if m < 40 else 300.0,
                   MeterFaults(), seed=5)  # fmt: skip
    log = tmp_path / "residual.jsonl"
    write_log(log, [ctx, *sim.records])
    pod = first_active(alarm_events(log), "bed-res", "pod-hourly")
    # > 200 mL/h in each of 2 hours (Halbgewachs & Domes 2015), the residual hour left
    # out: the older hour holds > 200 mL of 300 mL/h only with > 40 min after minute 60,
    # so not before 2:41 (with the residual counted, the first hour alone had 1300 mL)
    assert pod.time >= t0 + 2 * 3600 + 40 * 60
    d = _explain(log, pod.alarm_id)
    (res,) = d["context"]["residual_drained"]
    # 1200 mL in 40 min plus 20 min at 300 mL/h (invented flows), less minute 0 (30 mL),
    # which is in the bag when the baseline reading is taken
    assert res["volume_ml"] == pytest.approx(1270.0, abs=3.0)
    capsys.readouterr()
    assert main(["explain", str(log), pod.alarm_id]) == 0
    out = capsys.readouterr().out
    assert "residual drained: 1270 mL" in out and "not counted as output" in out
    assert "replacement order: none on file" in out
    report = tmp_path / "residual.html"
    assert main(["replay", str(log), "--report", str(report)]) == 0
    assert "residual drained: 1270 mL" in report.read_text(encoding="utf-8")
