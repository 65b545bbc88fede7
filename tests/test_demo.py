"""`hourwatch demo` end to end: a real local broker, the live service and a simulated
ward (invented patients) on one accelerated clock; what it pages live must be what a
replay of its journal gives."""

from __future__ import annotations

import io
import json
from pathlib import Path

import pytest

from daemon.caution import CAUTION
from daemon.cli import main
from daemon.journal import SqliteJournal
from daemon.local_broker import mosquitto_binary

pytestmark = pytest.mark.skipif(mosquitto_binary() is None, reason="mosquitto not installed")


def test_demo_runs_a_ward_and_its_journal_replays_to_the_same_alarms(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    from daemon.demo import run_demo

    out = io.StringIO()
    assert run_demo(sim_hours=4, speed=20, seed=7, out=out, keep_dir=tmp_path) == 0
    text = out.getvalue()
    assert "Summary" in text and "journal:" in text
    assert "pages per alarm that paged:" in text and "pages per bed-day:" in text
    assert " ".join(CAUTION.split()) in " ".join(text.split())
    assert "pod-hourly" in text  # the ward has a post-obstructive diuresis (invented)
    flat = " ".join(text.split())
    assert "ward board: http://127.0.0.1:" in flat and "/ward/sim-4west" in flat
    assert "log in as demo-charge with password" in flat
    journal = tmp_path / "journal.db"
    assert journal.is_file()

    with SqliteJournal(journal) as j:
        live = {
            (e.body["alarm_id"], e.body["state"], e.body["reason"], e.body["time"])
            for e in j.events_between(None, None)
            if e.kind == "alarm"
        }
    assert any(state == "acknowledged" for _, state, _, _ in live)  # the demo nurse acted
    assert any(alarm.split("/")[1] == "pod-hourly" for alarm, *_ in live)

    # the service's clock ran on a little after the last message (the ward's end):
    # replay runs its virtual clock as far
    until = max(t for *_, t in live)
    capsys.readouterr()
    assert main(["replay", str(journal), "--json", "--until", until]) == 0
    replayed = {
        (e["alarm_id"], e["state"], e["reason"], e["time"])
        for e in map(json.loads, capsys.readouterr().out.splitlines())
        if e.get("type") == "alarm"
    }
    assert replayed == live


def test_demo_refuses_bad_options_in_one_line(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["demo", "--speed", "0"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--speed" in err[0]
