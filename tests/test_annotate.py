"""`hourwatch annotate`: reviewers' verdicts kept beside the source, surviving later
runs, and counted per rule set by the comparison. All data is invented."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.engine.alarms import AlarmEvent, Kind, Priority, State
from daemon.review.compare import MIN_ANNOTATED_FOR_PPV, RunSummary, annotation_stats
from daemon.review.episodes import episodes
from daemon.review.verdicts import Annotation, load, store_path
from tests.reviewtools import alarm_events, first_active, raised_pod_threshold, write_night

# 250 mL/h is an invented what-if threshold; the default 200 mL/h is the pod-hourly
# criterion (source: Halbgewachs & Domes, Can Fam Physician 2015).
RAISED_ML_H = 250


@pytest.fixture
def night(tmp_path: Path) -> Path:
    return write_night(tmp_path / "night.jsonl")


def _pod_ids(night: Path) -> tuple[str, str]:
    events = alarm_events(night)
    return (first_active(events, "bed-sev", "pod-hourly").alarm_id,
            first_active(events, "bed-bord", "pod-hourly").alarm_id)  # fmt: skip


def test_verdicts_survive_and_are_counted(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    severe, borderline = _pod_ids(night)
    assert main(["annotate", str(night), severe, "--actionable", "yes",
                 "--note", "replacement started"]) == 0  # fmt: skip
    assert main(["annotate", str(night), borderline, "--actionable", "no"]) == 0
    capsys.readouterr()
    path = store_path(night)
    assert path.name == "night.jsonl.annotations.sqlite" and path.parent == night.parent
    rows = load(path)
    assert {(a.alarm_id, a.actionable) for a in rows} == {(severe, True), (borderline, False)}
    assert next(a for a in rows if a.alarm_id == severe).note == "replacement started"

    raised = raised_pod_threshold(tmp_path, RAISED_ML_H)
    results = []
    for _ in range(2):  # a second run reads the same verdicts
        assert main(["replay", str(night), "--compare", str(raised), "--json"]) == 0
        results.append(json.loads(capsys.readouterr().out)["annotations"])
    assert results[0] == results[1]
    ann = results[0]
    assert ann["count"] == 2
    # under the shipped rules both alarms are raised: nothing avoided
    assert ann["a"]["actionable_kept"] == 1 and ann["a"]["actionable"] == 1
    assert ann["a"]["non_actionable_avoided"] == 0 and ann["a"]["non_actionable"] == 1
    # at 250 mL/h the severe alarm is kept and the borderline one avoided
    assert ann["b"]["actionable_kept"] == 1
    assert ann["b"]["non_actionable_avoided"] == 1
    # two annotated alarms are far too few for a PPV
    assert ann["a"]["ppv"] is None and ann["a"]["ppv_min_annotated"] == MIN_ANNOTATED_FOR_PPV

    assert main(["replay", str(night), "--compare", str(raised)]) == 0
    out = capsys.readouterr().out
    assert "actionable alarms kept 1 of 1, non-actionable avoided 1 of 1" in out
    assert f"fewer than {MIN_ANNOTATED_FOR_PPV} annotated" in out


def test_a_new_verdict_replaces_the_old(night: Path, capsys: pytest.CaptureFixture[str]) -> None:
    severe, _ = _pod_ids(night)
    assert main(["annotate", str(night), severe, "--actionable", "no"]) == 0
    assert main(["annotate", str(night), severe, "--actionable", "yes"]) == 0
    out = capsys.readouterr().out
    assert "replaced the earlier verdict" in out
    rows = load(store_path(night))
    assert len(rows) == 1 and rows[0].actionable is True
    con = sqlite3.connect(store_path(night))
    try:
        assert con.execute("SELECT COUNT(*) FROM annotation").fetchone()[0] == 1
    finally:
        con.close()


@pytest.mark.parametrize(
    "args",
    [
        ["bed-sev/pod-hourly/20260314T000000Z", "--actionable", "yes"],  # no such alarm
        ["garbage", "--actionable", "no"],  # not an alarm id
    ],
)
def test_unknown_alarm_is_refused(
    night: Path, args: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(["annotate", str(night), *args]) == 2
    err = capsys.readouterr().err.strip()
    assert err.startswith("hourwatch: ") and "\n" not in err
    assert not store_path(night).exists()


def _episode(i: int) -> list[AlarmEvent]:
    t = i * 7200.0
    return [
        AlarmEvent(t, f"b/r/{i}", "b", "w", "r", Priority.MEDIUM, Kind.PHYSIOLOGICAL,
                   State.ACTIVE, "x", "s", {}, 0, ()),
        AlarmEvent(t + 600.0, f"b/r/{i}", "b", "w", "r", Priority.MEDIUM, Kind.PHYSIOLOGICAL,
                   State.RESOLVED, "x", "s", {}, 0, ()),
    ]  # fmt: skip


def _ann(i: int, actionable: bool) -> Annotation:
    return Annotation(f"b/r/{i}", "b", "r", i * 7200.0, i * 7200.0 + 600.0, actionable, None, "")


def test_ppv_only_with_enough_annotations() -> None:
    # invented verdicts: 9 actionable, 3 not, all raised
    n = MIN_ANNOTATED_FOR_PPV + 2
    eps = episodes([e for i in range(n) for e in _episode(i)])
    run = RunSummary("A", eps, n * 7200.0, 1.0)
    anns = [_ann(i, i < 9) for i in range(n)]
    s = annotation_stats(anns, run)
    assert s["annotated_raised"] == n
    assert s["ppv"] == pytest.approx(9 / n, abs=1e-3)
    few = annotation_stats(anns[: MIN_ANNOTATED_FOR_PPV - 1], run)
    assert few["ppv"] is None
    # a rule set that raises only the first half keeps 6 actionable, avoids the 3 others
    half = RunSummary("B", eps[:6], n * 7200.0, 1.0)
    s = annotation_stats(anns, half)
    assert (s["actionable_kept"], s["non_actionable_avoided"], s["ppv"]) == (6, 3, None)
