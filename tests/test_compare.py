"""What-if comparison: the same data under two rule sets. All data is invented
(tests/reviewtools.py)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.engine.alarms import AlarmEvent, Kind, Priority, State
from daemon.review.compare import RunSummary, compare, match
from daemon.review.episodes import episodes
from daemon.rule_files import BUNDLED as BUNDLED_RULES
from tests.reviewtools import raised_pod_threshold, write_night

# source: pod-hourly default, > 200 mL/h in 2 consecutive hours (Halbgewachs & Domes,
# Can Fam Physician 2015). 250 is an invented what-if threshold for the test.
DEFAULT_ML_H = 200
RAISED_ML_H = 250


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_night(tmp_path_factory.mktemp("compare") / "night.jsonl")


def _compare(capsys: pytest.CaptureFixture[str], *args: str) -> dict:
    assert main(["replay", *args, "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_a_rule_set_against_itself_differs_nowhere(
    night: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    c = _compare(capsys, str(night), "--rules", str(BUNDLED_RULES), "--compare", str(BUNDLED_RULES))
    total = c["total"]
    assert total["a"] == total["b"] == total["both"] > 0
    assert total["only_a"] == total["only_b"] == 0
    assert c["differences"] == 0
    assert c["only_a"] == c["only_b"] == []
    assert total["time_to_alarm_b_minus_a"]["changed"] == 0
    assert total["burden_a"] == total["burden_b"]
    for row in c["rules"]:
        assert row["a"] == row["b"] == row["both"]


def test_profiles_against_themselves_differ_nowhere(
    night: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from daemon.profile_files import BUNDLED as BUNDLED_PROFILES

    c = _compare(capsys, str(night), "--compare-profiles", str(BUNDLED_PROFILES))
    assert c["differences"] == 0 and c["total"]["a"] > 0


def test_raising_pod_hourly_to_250_drops_the_borderline_alarm_only(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    raised = raised_pod_threshold(tmp_path, RAISED_ML_H)
    c = _compare(capsys, str(night), "--compare", str(raised))
    pod = next(r for r in c["rules"] if r["rule"] == "pod-hourly")
    assert (pod["a"], pod["b"], pod["only_a"], pod["only_b"], pod["both"]) == (2, 1, 1, 0, 1)
    only_a = [e for e in c["only_a"] if e["rule"] == "pod-hourly"]
    assert [e["bed"] for e in only_a] == ["bed-bord"]  # the invented ~220 mL/h bed
    # the severe bed (600 mL/h) keeps its alarm, later by the time 50 more mL take:
    # (250 - 200) mL / 600 mL/h = 5 min (derived arithmetic)
    delay = pod["time_to_alarm_b_minus_a"]
    assert delay["n"] == 1 and 4.0 <= delay["median_min"] <= 6.0
    assert pod["burden_b"]["alarms_per_bed_day"] < pod["burden_a"]["alarms_per_bed_day"]
    assert pod["burden_b"]["minutes_in_alarm"] < pod["burden_a"]["minutes_in_alarm"]
    # pages per bed-day per rule: the alarm that went took its pages with it
    assert 0 < pod["burden_b"]["pages"] < pod["burden_a"]["pages"]
    assert pod["burden_a"]["pages_per_bed_day"] == pytest.approx(
        pod["burden_a"]["pages"] / c["bed_days_a"],
        rel=0.01,  # bed-days shown to 3 decimals
    )
    # the replacement rule only runs while pod-* is open, so it follows
    rep = next(r for r in c["rules"] if r["rule"] == "replacement-behind")
    assert (rep["only_a"], rep["only_b"]) == (1, 0)
    # and the text says so
    assert main(["replay", str(night), "--compare", str(raised)]) == 0
    out = capsys.readouterr().out
    assert "only under A: bed-bord/pod-hourly/" in out
    assert "pages/bed-day A" in out
    assert "only under B" not in out
    assert "Decision support only" in out


def _ev(alarm_id: str, t: float, state: State, bed: str = "b1", rule: str = "r1") -> AlarmEvent:
    return AlarmEvent(t, alarm_id, bed, "w", rule, Priority.MEDIUM, Kind.PHYSIOLOGICAL, state,
                      "x", "s", {}, 0, ())  # fmt: skip


def test_matching_needs_the_same_bed_and_rule_and_overlapping_spans() -> None:
    a = episodes([
        _ev("b1/r1/1", 0.0, State.ACTIVE), _ev("b1/r1/1", 600.0, State.RESOLVED),
        _ev("b1/r1/2", 3600.0, State.ACTIVE), _ev("b1/r1/2", 4000.0, State.RESOLVED),
        _ev("b2/r1/1", 0.0, State.ACTIVE, bed="b2"),
    ])  # fmt: skip
    b = episodes([
        _ev("b1/r1/9", 300.0, State.ACTIVE), _ev("b1/r1/9", 900.0, State.RESOLVED),
        _ev("b1/r1/8", 5000.0, State.ACTIVE), _ev("b1/r1/8", 5100.0, State.RESOLVED),
        _ev("b2/r2/1", 0.0, State.ACTIVE, bed="b2", rule="r2"),
    ])  # fmt: skip
    m = match(RunSummary("A", a, 9000.0, 1.0), RunSummary("B", b, 9000.0, 1.0))
    assert [(x.alarm_id, y.alarm_id) for x, y in m.both] == [("b1/r1/1", "b1/r1/9")]
    assert sorted(e.alarm_id for e in m.only_a) == ["b1/r1/2", "b2/r1/1"]
    assert sorted(e.alarm_id for e in m.only_b) == ["b1/r1/8", "b2/r2/1"]
    c = compare(RunSummary("A", a, 9000.0, 1.0), RunSummary("B", b, 9000.0, 1.0))
    assert c["total"]["time_to_alarm_b_minus_a"]["median_min"] == 5.0  # 300 s later
    # open episodes count up to the end of the data: 600 + 400 + 9000 s
    minutes = c["total"]["burden_a"]["minutes_in_alarm"]
    assert minutes == pytest.approx((600 + 400 + 9000) / 60, abs=0.05)
