"""Findings of a review of the replay tools on realistic nights: each test pins one
defect that was found (bad input that escaped as a traceback, evidence shown in a form
a reader cannot use, readings left out of an explanation). All data is invented
(tests/reviewtools.py)."""

from __future__ import annotations

import json
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.engine.timefmt import iso
from daemon.profile_files import load_profiles
from daemon.review.acks import AckCarrier
from daemon.review.episodes import episodes
from daemon.review.explain import explain
from daemon.review.recorder import replay_alarms
from daemon.rule_files import BUNDLED as BUNDLED_RULES
from daemon.rule_files import load_policy, load_rules
from tests.reviewtools import (
    ACK_BY,
    alarm_events,
    first_active,
    raised_pod_threshold,
    write_night,
)


@pytest.fixture(scope="module")
def night(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return write_night(tmp_path_factory.mktemp("findings") / "night.jsonl")


def test_a_plots_folder_that_cannot_be_made_is_one_line_and_exit_2(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    out = tmp_path / "night.html"
    rc = main(["replay", str(night), "--report", str(out), "--plots", str(blocker / "plots")])
    err = capsys.readouterr().err
    assert rc == 2
    assert len(err.strip().splitlines()) == 1 and "plots" in err, err


def _faulty_meter_night(path: Path) -> Path:
    """INVENTED: one bed on a nested-telemetry meter (120-s period) that reports normally
    for 30 min, then sends only fault status messages for 16 min, then recovers."""
    t0 = datetime(2026, 3, 14, 6, 0, tzinfo=UTC)  # invented
    lines = [
        {
            "time": _iso(t0 - timedelta(minutes=1)),
            "topic": "hourwatch/beds/bed-f1/context",
            "payload": {
                "schema": 1,
                "ward": "review-test",
                "device_ids": ["nt-f101"],
                "weight_kg": 80.0,
                "weight_basis": "actual",
            },
        }
    ]
    for n in range(0, 31):
        t = t0 + timedelta(minutes=2 * n)
        fault = 15 <= n < 23
        lines.append(
            {
                "time": _iso(t),
                "topic": "bedside/nt-f101/telemetry",
                "payload": {
                    "hdr": {"ts_ms": int(t.timestamp() * 1000), "dev": "nt-f101", "n": n + 1},
                    "uo": {"cum": round(0.002 * n, 4), "unit": "L"},  # 60 mL/h, invented
                    "status": {"state": "fault" if fault else "run", "bag_swap": False},
                },
            }
        )
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return path


def _iso(t: datetime) -> str:
    return t.strftime("%Y-%m-%dT%H:%M:%S.000Z")


def _alarm_ids(log: Path, capsys: pytest.CaptureFixture[str], rule: str) -> list[str]:
    assert main(["replay", str(log), "--json"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    return sorted({r["alarm_id"] for r in rows if r.get("type") == "alarm" and r["rule"] == rule})


def test_evidence_without_a_window_reads_as_plain_words_not_python_reprs(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    log = _faulty_meter_night(tmp_path / "faulty.jsonl")
    ids = _alarm_ids(log, capsys, "meter-offline")
    assert len(ids) == 1
    assert main(["explain", str(log), ids[0]]) == 0
    text = capsys.readouterr().out
    assert "device_fault" in text
    assert "<Outcome." not in text, text
    out = tmp_path / "faulty.html"
    assert main(["replay", str(log), "--report", str(out)]) == 0
    capsys.readouterr()
    page = out.read_text(encoding="utf-8")
    assert "device_fault" in page
    assert "&lt;Outcome." not in page and "<Outcome." not in page


def _half_minute_night(path: Path) -> Path:
    """INVENTED: one bed after a relieved obstruction, a reference-cumulative meter whose
    clock reads half a minute past each minute, a steady 600 mL/h (10 mL a reading)."""
    t0 = datetime(2026, 3, 14, 6, 0, 30, tzinfo=UTC)  # invented
    relieved = _iso(t0 - timedelta(hours=2))
    ctx = {
        "ward": "review-test",
        "device_ids": ["rc-h101"],
        "weight_kg": 80.0,
        "weight_basis": "actual",
        "episodes": [{"kind": "obstruction_relieved", "at": relieved}],
    }
    lines = [
        {
            "time": _iso(t0 - timedelta(minutes=2)),
            "topic": "hourwatch/beds/bed-h1/context",
            "payload": ctx,
        }
    ]
    for n in range(150):
        t = t0 + timedelta(minutes=n)
        reading = {"time": _iso(t), "volume_ml": 10.0 * n, "device_id": "rc-h101", "seq": n + 1}
        lines.append({"time": _iso(t), "topic": "meters/rc-h101/volume", "payload": reading})
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return path


def test_the_reading_that_completed_the_window_is_listed_among_those_that_fed_it(
    tmp_path: Path,
) -> None:
    # A window (from, to] ends at the minute before the newest reading, and the volume
    # between the reading before `to` and the newest one is spread over the minutes up
    # to it: the newest reading (the one that made the alarm fire) fed the window's last
    # half minute, and a reader of "the readings that fed these windows" needs it. So
    # did the reading just after the older window's end.
    log = _half_minute_night(tmp_path / "half.jsonl")
    event = first_active(alarm_events(log), "bed-h1", "pod-hourly")
    d = explain(log, event.alarm_id, load_profiles(), load_rules(), load_policy())
    older, newest = d["windows"]
    by_time = {r["time_used"]: r for r in d["readings"]}
    trigger = by_time.get(iso(event.time))
    assert trigger is not None, sorted(by_time)[-3:]
    assert trigger["counted"] and trigger["time_used"] > newest["to"]
    assert newest["label"] in trigger["windows"]
    after_older = min(t for t in by_time if t > older["to"])
    assert older["label"] in by_time[after_older]["windows"]


@pytest.mark.parametrize(
    "argv",
    [
        ["replay", "postgresql://"],
        ["replay", "postgresql://x@[::1"],
        ["explain", "postgresql://hourwatch@db:5432", "bed-1/pod-hourly/20260314T083825Z"],
        ["export", "postgresql://", "--from", "2026-03-14T00:00Z", "--to", "2026-03-15T00:00Z"],
    ],
)
def test_a_malformed_postgresql_url_is_one_line_and_exit_2(
    argv: list[str], capsys: pytest.CaptureFixture[str]
) -> None:
    assert main(argv) == 2
    err = capsys.readouterr().err
    # (the URL is not echoed: it might carry a password)
    assert len(err.strip().splitlines()) == 1 and "journal" in err, err


def test_a_binary_file_given_as_the_log_is_one_line_and_exit_2(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # a program or an image, not a log: thousands of "line N: skipped: not JSON" would
    # bury the one thing to say
    blob = tmp_path / "night.jsonl"
    blob.write_bytes(b"\x7fELF\x02\x01\x01\x00" + bytes(range(256)) * 400)
    for argv in (["replay", str(blob)], ["replay", str(blob), "--hourly", "--json"]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert len(err.strip().splitlines()) == 1 and "binary" in err, err


def test_a_what_if_applies_the_recorded_acknowledgement_to_its_own_alarm(
    night: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The invented night's nurse acknowledges bed-sev's pod-hourly alarm 20 min after it
    # fires (tests/reviewtools.py). With the threshold raised to 250 mL/h (an invented
    # what-if; the default 200 is Halbgewachs & Domes, Can Fam Physician 2015) the same
    # alarm starts 5 min later under another id; the acknowledgement must still stop it,
    # or B counts escalations the nurse had stopped and a higher threshold looks like
    # more pages.
    raised = raised_pod_threshold(tmp_path, 250)
    assert main(["replay", str(night), "--compare", str(raised), "--json"]) == 0
    c = json.loads(capsys.readouterr().out)
    assert c["recorded_acks"]["a"] == {"carried": 0, "unmatched": 0}
    assert c["recorded_acks"]["b"] == {"carried": 1, "unmatched": 0}
    rec, _ = replay_alarms(
        night, load_profiles(), load_rules(raised), load_policy(raised), acks=AckCarrier()
    )
    sev = [e for e in episodes(rec.events) if e.bed == "bed-sev" and e.rule == "pod-hourly"]
    assert len(sev) == 1 and [a.by for a in sev[0].acks] == [ACK_BY]
    # the rule set against itself: nothing is carried, the night replays as recorded
    assert main(["replay", str(night), "--compare", str(BUNDLED_RULES), "--json"]) == 0
    same = json.loads(capsys.readouterr().out)
    assert same["recorded_acks"]["b"] == {"carried": 0, "unmatched": 0}
    assert same["differences"] == 0


def _balance_night(path: Path) -> Path:
    """INVENTED: one 70 kg bed with no episode marker, a steady 400 mL/h on a
    reference-cumulative meter, and one documented 100 mL intake: the 6-h fluid balance
    falls below -15 mL/kg while the hour stays above 200 mL."""
    t0 = datetime(2026, 3, 14, 6, 0, 30, tzinfo=UTC)  # invented
    ctx = {
        "ward": "review-test",
        "device_ids": ["rc-v101"],
        "weight_kg": 70.0,
        "weight_basis": "actual",
    }
    lines = [
        {
            "time": _iso(t0 - timedelta(minutes=2)),
            "topic": "hourwatch/beds/bed-v1/context",
            "payload": ctx,
        }
    ]
    for n in range(4 * 60):
        t = t0 + timedelta(minutes=n)
        reading = {
            "time": _iso(t),
            "volume_ml": round(400 / 60 * n, 1),
            "device_id": "rc-v101",
            "seq": n + 1,
        }
        lines.append({"time": _iso(t), "topic": "meters/rc-v101/volume", "payload": reading})
    intake = {"time": _iso(t0 + timedelta(minutes=30)), "volume_ml": 100, "fluid": "0.9% NaCl"}
    lines.append(
        {
            "time": _iso(t0 + timedelta(minutes=31)),
            "topic": "hourwatch/beds/bed-v1/intake",
            "payload": intake,
        }
    )
    lines.sort(key=lambda x: str(x["time"]))
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return path


def test_explain_text_shows_the_evidence_beside_the_windows(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # hypovolaemia-risk fired on the fluid balance (alarm below -15 mL/kg over 6 h:
    # Hourwatch's own threshold, alert_rules/hypovolaemia-risk.toml): the balance that
    # decided it is in the event's evidence, and a reviewer reading the text must see it
    log = _balance_night(tmp_path / "balance.jsonl")
    ids = _alarm_ids(log, capsys, "hypovolaemia-risk")
    assert len(ids) == 1
    assert main(["explain", str(log), ids[0], "--json"]) == 0
    ev = json.loads(capsys.readouterr().out)["event_evidence"]
    assert ev["balance_low"] and ev["balance_ml_kg"] < -15.0
    assert main(["explain", str(log), ids[0]]) == 0
    text = capsys.readouterr().out
    assert f"net_balance_ml: {ev['net_balance_ml']}" in text, text
    assert f"balance_ml_kg: {ev['balance_ml_kg']}" in text


def test_an_until_before_the_last_message_is_said_not_silently_ignored(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # --until runs the clock on past the last line; given a time inside the log it did
    # nothing, silently, and a reviewer asking for the night "until 07:00" got all of it
    log = _half_minute_night(tmp_path / "half.jsonl")  # 06:00:30 .. 08:29:30, invented
    for extra in ([], ["--hourly"], ["--compare", str(BUNDLED_RULES)]):
        assert main(["replay", str(log), "--until", "2026-03-14T07:00:00Z", *extra]) == 0
        err = capsys.readouterr().err
        assert "--until" in err and "before the last message" in err, (extra, err)
    assert main(["replay", str(log), "--until", "2026-03-14T09:00:00Z"]) == 0
    assert "--until" not in capsys.readouterr().err


def _silent_meter_night(path: Path) -> Path:
    """INVENTED: one bed on a reference-cumulative meter (60-s period) that reports for
    an hour at 60 mL/h and then falls silent: the log ends with the last reading."""
    t0 = datetime(2026, 3, 14, 6, 0, 30, tzinfo=UTC)  # invented
    ctx = {
        "ward": "review-test",
        "device_ids": ["rc-s101"],
        "weight_kg": 80.0,
        "weight_basis": "actual",
    }
    lines = [
        {
            "time": _iso(t0 - timedelta(minutes=2)),
            "topic": "hourwatch/beds/bed-s1/context",
            "payload": ctx,
        }
    ]
    for n in range(61):
        t = t0 + timedelta(minutes=n)
        reading = {"time": _iso(t), "volume_ml": float(n), "device_id": "rc-s101", "seq": n + 1}
        lines.append({"time": _iso(t), "topic": "meters/rc-s101/volume", "payload": reading})
    path.write_text("".join(json.dumps(x) + "\n" for x in lines))
    return path


def test_an_alarm_raised_after_the_last_message_can_be_explained_and_annotated(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # `replay --until` lists the meter-offline alarm that falls due after the log's last
    # line (a silent meter: the very alarm a reviewer of a night is asked about), so
    # explain and annotate must be able to reach it too
    log = _silent_meter_night(tmp_path / "silent.jsonl")
    until = "2026-03-14T08:00:00Z"
    assert main(["replay", str(log), "--until", until, "--json"]) == 0
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    ids = sorted({r["alarm_id"] for r in rows if r.get("rule") == "meter-offline"})
    assert len(ids) == 1
    # without --until it is not there: the refusal says what to add
    assert main(["explain", str(log), ids[0]]) == 2
    assert "--until" in capsys.readouterr().err
    assert main(["explain", str(log), ids[0], "--until", until]) == 0
    assert "Rule meter-offline" in capsys.readouterr().out
    assert main(["annotate", str(log), ids[0], "--actionable", "no", "--until", until]) == 0
    assert "not actionable" in capsys.readouterr().out


def test_a_utf16_log_is_named_as_such(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # a log saved through a Windows shell's redirection is UTF-16 text: every byte pair
    # holds a NUL, and "binary content" would send the reader looking for the wrong thing
    src = _half_minute_night(tmp_path / "half.jsonl")
    log = tmp_path / "utf16.jsonl"
    log.write_bytes(src.read_text(encoding="utf-8").encode("utf-16"))
    assert main(["replay", str(log)]) == 2
    err = capsys.readouterr().err
    assert len(err.strip().splitlines()) == 1 and "UTF-16" in err, err


def test_a_timeline_with_a_local_zone_says_which_clock_is_which(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the timeline's own times are UTC while the clock times inside its messages (a lab
    # sample's time, the pager line) follow --timezone: "12:45 ... sodium at 17:30
    # (0.8 h ago)" read as a contradiction until the reader is told
    log = _half_minute_night(tmp_path / "half.jsonl")
    assert main(["replay", str(log), "--timezone", "Asia/Kolkata"]) == 0
    first = capsys.readouterr().out.splitlines()[0]
    assert "UTC" in first and "Asia/Kolkata" in first, first
    assert main(["replay", str(log)]) == 0  # UTC throughout: nothing to say
    assert "Asia" not in capsys.readouterr().out.splitlines()[0]
