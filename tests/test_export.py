"""`hourwatch export` and `hourwatch replay JOURNAL` through `daemon.cli.main`.

The journal is built from examples/ward-night.jsonl (an invented ward night) plus a few
invented odd messages; no patient data.
"""

from __future__ import annotations

import json
import sqlite3
from datetime import UTC, datetime
from pathlib import Path

import pytest

from daemon.engine.timefmt import iso
from daemon.journal import SqliteJournal
from daemon.logfile import read_log
from tests.test_replay_cli import run, run_process

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "ward-night.jsonl"


def example_rows() -> list[tuple[float, str, bytes, int]]:
    rows = []
    for item in read_log(EXAMPLE):
        if isinstance(item, tuple):
            rec = item[1]
            p = rec.payload
            raw = json.dumps(p).encode() if isinstance(p, dict) else p.encode()
            rows.append((rec.time.timestamp(), rec.topic, raw, 1))
    return rows


def odd_rows(t: float) -> list[tuple[float, str, bytes, int]]:
    """Messages a live service journals and the engine rejects, in every payload kind."""
    return [
        (t, "meters/rc-0101/volume", b"\xff\xfe not UTF-8", 1),
        (t + 0.000123, "meters/rc-0101/volume", b'{"volume_ml": NaN}', 1),
        (t + 1, "wardscale/gs-0201/mass", b"[1, 2, 3]", 0),
        (t + 2, "hourwatch/ack", b'{"alarm_id": "bed-02/none/x", "by": "n1", "role": "rn"}', 1),
        (t + 3, "unknown/topic", b"", 0),
    ]


@pytest.fixture(scope="module")
def night_journal(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("journal") / "night.db"
    rows = example_rows()
    mid = rows[len(rows) // 2][0]
    with SqliteJournal(path) as j:
        for k in range(0, len(rows), 16):  # batches of 16, as the service flushes
            j.append_messages(rows[k : k + 16])
        j.append_messages(odd_rows(mid))  # received out of time order: replay copes
    return path


def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat()


def test_export_writes_the_log_format(night_journal: Path, capsys, tmp_path: Path) -> None:
    rows = example_rows()
    t0, t1 = rows[100][0], rows[200][0]
    rc, out, err = run(capsys, "export", str(night_journal), "--from", _iso(t0), "--to", _iso(t1))
    assert rc == 0
    lines = out.splitlines()
    assert len(lines) == 100  # [from, to): row 100 kept, row 200 not
    assert json.loads(lines[0])["time"] == iso(t0)
    # line for line the example's records: same time, topic and payload (object or text)
    example = [item[1] for item in read_log(EXAMPLE) if isinstance(item, tuple)][100:200]
    for line, rec in zip(lines, example, strict=True):
        got = json.loads(line)
        assert set(got) == {"time", "topic", "payload"}
        assert (got["topic"], got["payload"]) == (rec.topic, rec.payload)
        assert datetime.fromisoformat(got["time"]) == rec.time
    assert "100 message(s) exported" in err
    # --out writes the same bytes, and the file reads back as a valid log
    out_file = tmp_path / "part.jsonl"
    rc, out2, _ = run(capsys, "export", str(night_journal), "--from", _iso(t0), "--to",
                      _iso(t1), "--out", str(out_file))  # fmt: skip
    assert rc == 0 and out2 == ""
    assert out_file.read_text(encoding="utf-8") == out
    assert all(isinstance(item, tuple) for item in read_log(out_file))


def test_export_of_one_bed(night_journal: Path, capsys) -> None:
    rc, out, _ = run(capsys, "export", str(night_journal), "--from", "2026-03-14T00:00:00Z",
                     "--to", "2026-03-16T00:00:00Z", "--bed", "bed-02")  # fmt: skip
    assert rc == 0
    topics = {json.loads(line)["topic"] for line in out.splitlines()}
    # bed-02's context binds gs-0201 (examples/ward-night.jsonl); its ack is kept
    assert topics == {
        "hourwatch/beds/bed-02/context",
        "hourwatch/beds/bed-02/intake",
        "hourwatch/beds/bed-02/labs",
        "wardscale/gs-0201/mass",
        "hourwatch/ack",
    }


def test_replay_of_journal_equals_replay_of_its_export(
    night_journal: Path, capsys, tmp_path: Path
) -> None:
    exported = tmp_path / "all.jsonl"
    rc, _, _ = run(capsys, "export", str(night_journal), "--from", "2026-03-14T00:00:00Z",
                   "--to", "2026-03-16T00:00:00Z", "--out", str(exported))  # fmt: skip
    assert rc == 0
    outputs = {}
    for name, src in (("journal", night_journal), ("export", exported), ("example", EXAMPLE)):
        rc, out, _ = run(capsys, "replay", str(src), "--json")
        assert rc == 0
        outputs[name] = out
        rc, out, _ = run(capsys, "replay", str(src), "--json", "--hourly")
        assert rc == 0
        outputs[name + " hourly"] = out
    assert outputs["journal"].count("\n") > 50  # the night raises many alarms
    assert outputs["journal"] == outputs["export"]
    assert outputs["journal hourly"] == outputs["export hourly"]
    # the odd messages are all rejected, so the alarms are the example log's; the
    # per-meter quality counts in the hourly output do see them (so it differs there)
    assert outputs["journal"] == outputs["example"]
    assert outputs["journal hourly"] != outputs["example hourly"]


def test_replay_of_one_bed_export_matches_that_bed_in_the_full_replay(
    night_journal: Path, capsys, tmp_path: Path
) -> None:
    exported = tmp_path / "bed-02.jsonl"
    night = ["--from", "2026-03-14T00:00:00Z", "--to", "2026-03-16T00:00:00Z"]
    rc, _, _ = run(capsys, "export", str(night_journal), *night, "--bed", "bed-02", "--out",
                   str(exported))  # fmt: skip
    assert rc == 0
    _, full, _ = run(capsys, "replay", str(night_journal), "--json")
    _, bed, _ = run(capsys, "replay", str(exported), "--json")
    wanted = [line for line in full.splitlines() if json.loads(line)["bed"] == "bed-02"]
    assert wanted and bed.splitlines() == wanted


@pytest.mark.parametrize(
    ("extra", "message"),
    [
        (["--from", "yesterday", "--to", "2026-03-15T00:00:00Z"], "--from: not an ISO-8601"),
        (["--from", "2026-03-14T00:00:00", "--to", "2026-03-15T00:00:00Z"], "without UTC offset"),
        (["--from", "2026-03-15T00:00:00Z", "--to", "2026-03-14T00:00:00Z"], "must be later"),
    ],
)
def test_export_bad_times(night_journal: Path, capsys, extra: list[str], message: str) -> None:
    rc, out, err = run(capsys, "export", str(night_journal), *extra)
    assert rc == 2 and out == ""
    assert err.count("\n") == 1 and err.startswith("hourwatch: ") and message in err


def test_export_bad_files(tmp_path: Path, capsys, night_journal: Path) -> None:
    span = ["--from", "2026-03-14T00:00:00Z", "--to", "2026-03-15T00:00:00Z"]
    other = tmp_path / "other.db"
    db = sqlite3.connect(other)
    db.execute("CREATE TABLE t (x)")
    db.commit()
    db.close()
    text = tmp_path / "night.jsonl"
    text.write_text("{}\n")
    for path, message in (
        (tmp_path / "missing.db", "no such journal file"),
        (other, "not a Hourwatch journal"),
        (text, "not a Hourwatch journal"),
    ):
        rc, out, err = run(capsys, "export", str(path), *span)
        assert rc == 2 and out == ""
        assert err.count("\n") == 1 and message in err, err
    # an --out that cannot be written: one line, and no partial file left behind
    target = tmp_path / "no-such-folder" / "x.jsonl"
    rc, _, err = run(capsys, "export", str(night_journal), *span, "--out", str(target))
    assert rc == 2 and err.count("\n") == 1 and "cannot write" in err
    assert not target.parent.exists()


def test_export_needs_the_range(night_journal: Path) -> None:
    from daemon.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["export", str(night_journal), "--from", "2026-03-14T00:00:00Z"])
    assert exc.value.code == 2


def test_replay_refuses_a_foreign_sqlite_file(tmp_path: Path, capsys) -> None:
    other = tmp_path / "other.db"
    db = sqlite3.connect(other)
    db.execute("CREATE TABLE t (x)")
    db.commit()
    db.close()
    rc, _, err = run(capsys, "replay", str(other))
    assert rc == 2 and err.count("\n") == 1 and "not a Hourwatch journal" in err


def test_export_as_a_user_runs_it(night_journal: Path) -> None:
    rc, out, err = run_process("export", str(night_journal), "--from", "2026-03-14T18:00:00Z",
                               "--to", "2026-03-14T18:10:00Z")  # fmt: skip
    assert rc == 0, err
    times = [json.loads(line)["time"] for line in out.splitlines()]
    assert times and times == sorted(times)
    assert all("2026-03-14T18:00:00" <= t < "2026-03-14T18:10:00" for t in times)


# --- refused content is redacted (issue 14) ------------------------------------------
SENSITIVE = "sensitive-marker-7f3a"  # stands for what a site must never send


def refused_rows(t: float) -> list[tuple[float, str, bytes, int]]:
    """Messages refused for their content, each carrying the marker somewhere."""
    ctx = {"ward": "4-East", "device_ids": ["gs-0201"], SENSITIVE: SENSITIVE}
    return [
        (t, "hourwatch/beds/bed-02/context", json.dumps(ctx).encode(), 1),
        (t + 1, f"hourwatch/beds/{SENSITIVE} 1/context", b'{"ward": "w", "device_ids": []}', 1),
        (t + 2, "hourwatch/beds/bed-02/labs",
         json.dumps({"time": "2026-03-14T20:00:00Z", "note": SENSITIVE}).encode(), 1),
        (t + 3, "meters/rc-0101/volume", json.dumps({"volume_ml": SENSITIVE}).encode(), 1),
        (t + 4, "hourwatch/ack/nurse-1", json.dumps({"alarm_id": 1, "why": SENSITIVE}).encode(),
         1),
    ]  # fmt: skip


def test_refused_content_is_redacted_and_replays_the_same(capsys, tmp_path: Path) -> None:
    path = tmp_path / "refused.db"
    rows = example_rows()
    mid = rows[len(rows) // 2][0]
    with SqliteJournal(path) as j:
        for k in range(0, len(rows), 16):
            j.append_messages(rows[k : k + 16])
        j.append_messages(refused_rows(mid))
        j.append_messages(odd_rows(mid + 10))
    # the journal keeps what was received, as received
    with SqliteJournal(path) as j:
        assert sum(SENSITIVE.encode() in m.payload or SENSITIVE in m.topic
                   for m in j.messages_between(None, None)) == 5  # fmt: skip
    exported = tmp_path / "all.jsonl"
    night = ["--from", "2026-03-14T00:00:00Z", "--to", "2026-03-16T00:00:00Z"]
    rc, _, err = run(capsys, "export", str(path), *night, "--out", str(exported))
    assert rc == 0 and "refused one(s) redacted" in err
    text = exported.read_text(encoding="utf-8")
    assert SENSITIVE not in text
    withheld = [json.loads(line) for line in text.splitlines() if "withheld:" in line]
    reasons = {rec["payload"].split(":", 1)[1] for rec in withheld}
    assert {"bad_ack", "bad_context", "bad_clinical_input", "bad_identifier",
            "missing_field"} <= reasons  # fmt: skip
    assert "hourwatch/beds/{refused}/context" in {rec["topic"] for rec in withheld}
    # a replay of the export refuses them for the same reasons: same output as the journal
    for flags in (["--json"], ["--json", "--hourly"]):
        _, from_journal, _ = run(capsys, "replay", str(path), *flags)
        _, from_export, _ = run(capsys, "replay", str(exported), *flags)
        assert from_journal == from_export
