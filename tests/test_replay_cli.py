"""`hourwatch replay LOG --hourly [--json]` through `daemon.cli.main`.

Logs are simulated (invented meters and beds) and written to tmp_path.
"""

from __future__ import annotations

import json
import re
import subprocess
import sys
from datetime import UTC, datetime
from pathlib import Path

import pytest

from daemon.cli import main
from simulator.meterlog import MeterFaults, constant, context_record, simulate, write_log
from tests.conftest import PROFILES, T0

START = datetime.fromtimestamp(T0, UTC)
HOURLY_KEYS = {"bed", "hour_start", "volume_ml", "measured_fraction"}


def make_log(path: Path, hours: float = 3.5, flow_ml_h: float = 60.0) -> int:
    """A reference meter on bed b12 at a constant flow, with some redeliveries."""
    faults = MeterFaults(duplicate_p=0.1)
    sim = simulate(
        PROFILES["reference-cumulative"], "rc-0101", START, hours, constant(flow_ml_h), faults
    )
    recs = [context_record(T0 - 60, "b12", "icu-east", ["rc-0101"]), *sim.records]
    write_log(path, recs)
    return sum(1 for _ in recs)


def run(capsys: pytest.CaptureFixture[str], *argv: str) -> tuple[int, str, str]:
    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


def run_process(*argv: str) -> tuple[int, str, str]:
    """The same command line in a fresh interpreter, as a user runs it."""
    root = Path(__file__).resolve().parent.parent
    done = subprocess.run(
        [sys.executable, "-m", "daemon.cli", *argv],
        cwd=root,
        capture_output=True,
        text=True,
        timeout=60,
    )
    return done.returncode, done.stdout, done.stderr


def _with_malformed_lines(log: Path) -> None:
    lines = log.read_text(encoding="utf-8").splitlines()
    lines.insert(2, "this is not JSON {")  # becomes line 3
    lines.insert(4, json.dumps({"time": "2026-03-14T00:03:00Z", "payload": {}}))  # line 5
    lines.insert(6, json.dumps({"time": "03:00", "topic": "t", "payload": {}}))  # line 7
    log.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_hourly_table_and_quality_summary(tmp_path: Path, capsys) -> None:
    log = tmp_path / "night.jsonl"
    n = make_log(log)
    rc, out, err = run(capsys, "replay", str(log), "--hourly")
    assert rc == 0 and err == ""
    assert "Bed b12" in out and "icu-east" in out
    assert "clock hour (UTC)" in out
    rows = re.findall(r"^\s+(2026-03-14 \d\d:00)\s+([\d.]+)\s", out, flags=re.M)
    assert [r[0] for r in rows] == ["2026-03-14 00:00", "2026-03-14 01:00", "2026-03-14 02:00"]
    # 60 mL/h (invented); the first hour counts from the first reading at 00:01
    assert [float(r[1]) for r in rows] == pytest.approx([59.0, 60.0, 60.0], abs=0.15)
    assert "Data quality per meter" in out
    (qline,) = [line for line in out.splitlines() if line.strip().startswith("rc-0101")]
    assert "reference-cumulative" in qline and "b12" in qline
    assert f"{n} messages replayed, 0 malformed" in out
    assert "Decision support only" in out and "local protocols" in out


def test_hourly_json_rows_then_device_quality(tmp_path: Path, capsys) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log)
    rc, out, err = run(capsys, "replay", str(log), "--hourly", "--json")
    assert rc == 0 and err == ""
    objs = [json.loads(line) for line in out.splitlines()]  # every line is JSON
    hourly = [o for o in objs if "hour_start" in o]
    devices = [o for o in objs if "device" in o]
    assert len(hourly) + len(devices) == len(objs)
    assert objs[: len(hourly)] == hourly, "hourly rows come first, then device quality"
    assert len(hourly) == 3
    for row in hourly:
        assert set(row) == HOURLY_KEYS
        assert row["bed"] == "b12"
        assert datetime.fromisoformat(row["hour_start"]).tzinfo is not None
        assert row["hour_start"].endswith("Z")
        assert 0.0 <= row["measured_fraction"] <= 1.0
    assert [r["hour_start"] for r in hourly] == [
        "2026-03-14T00:00:00Z",
        "2026-03-14T01:00:00Z",
        "2026-03-14T02:00:00Z",
    ]
    assert [r["volume_ml"] for r in hourly] == pytest.approx([59.0, 60.0, 60.0], abs=0.15)
    (dev,) = devices
    assert dev["device"] == "rc-0101"
    q = dev["quality"]
    assert q["profile"] == "reference-cumulative" and q["bed"] == "b12"
    assert q["outcomes"].get("duplicate", 0) > 0
    assert q["received"] == sum(q["outcomes"].values()) + q["held"]


def test_json_and_text_agree(tmp_path: Path, capsys) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log)
    _, text, _ = run(capsys, "replay", str(log), "--hourly")
    _, js, _ = run(capsys, "replay", str(log), "--hourly", "--json")
    text_rows = [float(v) for v in re.findall(r"^\s+2026-03-14 \d\d:00\s+([\d.]+)", text, re.M)]
    json_rows = [json.loads(line)["volume_ml"] for line in js.splitlines() if "hour_start" in line]
    assert text_rows == pytest.approx(json_rows, abs=0.051)


def test_malformed_lines_are_reported_with_their_line_number_and_skipped(
    tmp_path: Path,
) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log)
    _with_malformed_lines(log)
    rc, out, err = run_process("replay", str(log), "--hourly", "--json")
    assert rc == 0
    err_lines = err.strip().splitlines()
    assert [re.match(r"^(.*):(\d+): ", e).group(2) for e in err_lines] == ["3", "5", "7"]
    assert all(e.startswith(str(log)) for e in err_lines)
    assert "topic" in err_lines[1]
    assert "Traceback" not in err
    hourly = [json.loads(line) for line in out.splitlines() if "hour_start" in line]
    assert len(hourly) == 3  # the rest of the log still counts
    rc, out, _ = run_process("replay", str(log), "--hourly")
    assert "3 malformed line(s) skipped" in out


def test_malformed_line_warnings_follow_a_redirected_stderr(tmp_path: Path, capsys) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log)
    _with_malformed_lines(log)
    rc, _, err = run(capsys, "replay", str(log), "--hourly", "--json")
    assert rc == 0
    assert len(err.strip().splitlines()) == 3


def test_binary_garbage_lines_are_malformed_not_fatal(tmp_path: Path) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log, hours=1.2)
    with log.open("ab") as fh:
        fh.write(b"\xff\xfe\x00garbage\n\x80\x81\n")
    rc, _, err = run_process("replay", str(log), "--hourly", "--json")
    assert rc == 0
    assert len(err.strip().splitlines()) == 2 and "Traceback" not in err


def test_missing_log_from_the_installed_command(tmp_path: Path) -> None:
    rc, out, err = run_process("replay", str(tmp_path / "absent.jsonl"), "--hourly")
    assert (rc, out) == (2, "")
    assert len(err.strip().splitlines()) == 1 and "Traceback" not in err


def test_missing_log_is_one_line_and_exit_2(tmp_path: Path, capsys) -> None:
    rc, out, err = run(capsys, "replay", str(tmp_path / "absent.jsonl"), "--hourly")
    assert rc == 2
    assert out == ""
    assert len(err.strip().splitlines()) == 1
    assert "absent.jsonl" in err and "Traceback" not in err


def test_a_folder_given_as_the_log_is_one_line_and_exit_2(tmp_path: Path, capsys) -> None:
    rc, _, err = run(capsys, "replay", str(tmp_path), "--hourly")
    assert rc == 2 and len(err.strip().splitlines()) == 1


def test_invalid_profile_folder_is_one_line_and_exit_2(tmp_path: Path, capsys) -> None:
    log = tmp_path / "night.jsonl"
    make_log(log, hours=1.2)
    folder = tmp_path / "profiles"
    folder.mkdir()
    bad = folder / "broken-meter.toml"
    bad.write_text('schema = 1\nname = "broken-meter"\ntopic = "x/{device_id}"\n', "utf-8")
    rc, out, err = run(capsys, "replay", str(log), "--profiles", str(folder), "--hourly")
    assert rc == 2 and out == ""
    assert len(err.strip().splitlines()) == 1
    assert str(bad) in err and "Traceback" not in err
    rc, _, err = run(capsys, "replay", str(log), "--profiles", str(tmp_path / "none"), "--hourly")
    assert rc == 2 and len(err.strip().splitlines()) == 1


def test_log_without_context_says_so(tmp_path: Path, capsys) -> None:
    sim = simulate(PROFILES["reference-cumulative"], "rc-0101", START, 1.5, constant(60.0))
    log = tmp_path / "unbound.jsonl"
    write_log(log, sim.records)
    rc, out, _ = run(capsys, "replay", str(log), "--hourly")
    assert rc == 0
    assert "no meter is bound" in out
    (qline,) = [line for line in out.splitlines() if line.strip().startswith("rc-0101")]
    assert str(len(sim.records)) in qline  # every reading counted as unbound
    rc, out, _ = run(capsys, "replay", str(log), "--hourly", "--json")
    (dev,) = [json.loads(line) for line in out.splitlines()]
    assert dev["quality"]["outcomes"] == {"unbound": len(sim.records)}


def test_check_profiles_lists_the_shipped_families(capsys) -> None:
    rc, out, _ = run(capsys, "check-profiles")
    assert rc == 0
    assert sorted(re.findall(r"^ok\s+(\S+)", out, re.M)) == sorted(PROFILES)
