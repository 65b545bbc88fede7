"""Operations: `hourwatch check`, `hourwatch probe`, the service's logs on stdout and its
/metrics, against a REAL Mosquitto where a broker is involved (tests/broker.py).

All meters, beds, volumes and clock offsets are invented; no patient data.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
import urllib.request
from datetime import UTC, datetime
from pathlib import Path

import pytest

from daemon.cli import main
from daemon.probe import ProbeTally
from daemon.profile_files import load_profiles
from simulator.encode import encode
from simulator.meterlog import constant, iso_z, simulate
from tests.broker import (
    Watcher,
    broker,  # noqa: F401  (the fixture)
    probe_on_broker,
    publish_all,
    publisher,
)

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "hourwatch.toml"
PROFILES = {p.name: p for p in load_profiles()}
REF = PROFILES["reference-cumulative"]
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


def hourwatch(*args: str) -> list[str]:
    return [sys.executable, "-m", "daemon.cli", *args]


def one_error_line(capsys: pytest.CaptureFixture[str], argv: list[str]) -> str:
    assert main(argv) == 2
    err = capsys.readouterr().err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    return lines[0]


# --- check --------------------------------------------------------------------------------
def test_check_shows_subscriptions_journal_broker_and_health(tmp_path, capsys):
    journal = tmp_path / "j.db"
    assert main(["check", "--config", str(EXAMPLE), "--journal", str(journal)]) == 0
    out = capsys.readouterr().out
    for p in PROFILES.values():  # every filter, beside the profile it serves
        assert re.search(rf"^\s+{re.escape(p.subscription)}\s+profile {p.name}:", out, re.M), out
    assert re.search(
        r"^\s+hourwatch/ack/\+\s+alarm acknowledgements, one topic per user", out, re.M
    )
    assert re.search(r"^\s+hourwatch/beds/\+/\+\s+bed context", out, re.M)
    # the example file's values
    assert "127.0.0.1:1883  MQTT 5" in out and "'hourwatch-icu-east'" in out
    assert f"journal    {journal} (created at the first start)" in out
    assert "http://127.0.0.1:9108/health" in out
    assert not journal.exists()  # check creates nothing


def copy_folder(src: Path, dst: Path) -> Path:
    shutil.copytree(src, dst)
    return dst


def config_with(tmp_path: Path, **tables: str) -> Path:
    lines = [f'{k} = "{v}"' for k, v in tables.items()]
    lines += ["[journal]", f'path = "{tmp_path / "j.db"}"']
    conf = tmp_path / "hw.toml"
    conf.write_text("\n".join(lines) + "\n")
    return conf


def test_check_names_the_file_and_key_of_a_bad_profile(tmp_path, capsys):
    folder = copy_folder(ROOT / "device_profiles", tmp_path / "profiles")
    f = folder / "reference-cumulative.toml"
    f.write_text(f.read_text().replace("period_s = 60", "period_s = 0"))
    line = one_error_line(
        capsys, ["check", "--config", str(config_with(tmp_path, profiles=folder))]
    )
    assert "reference-cumulative.toml" in line and "timing.period_s" in line, line


def test_check_names_the_file_and_key_of_a_bad_rule(tmp_path, capsys):
    folder = copy_folder(ROOT / "alert_rules", tmp_path / "rules")
    f = folder / "pod-hourly.toml"
    text = f.read_text()
    assert re.search(r'^priority = "\w+"', text, re.M)
    f.write_text(re.sub(r'^priority = "\w+"', 'priority = "loudest"', text, flags=re.M))
    line = one_error_line(capsys, ["check", "--config", str(config_with(tmp_path, rules=folder))])
    assert "pod-hourly.toml" in line and "priority" in line, line


def test_check_names_a_bad_escalation_policy(tmp_path, capsys):
    folder = copy_folder(ROOT / "alert_rules", tmp_path / "rules")
    (folder / "escalation.toml").write_text("schema = 1\nnot_a_key = 3\n")
    line = one_error_line(capsys, ["check", "--config", str(config_with(tmp_path, rules=folder))])
    assert "escalation.toml" in line, line


def test_check_names_a_bad_config_key_and_a_journal_that_is_not_one(tmp_path, capsys):
    conf = tmp_path / "hw.toml"
    conf.write_text("[broker]\nport = 70000\n")
    line = one_error_line(capsys, ["check", "--config", str(conf)])
    assert str(conf) in line and "broker.port" in line, line
    stranger = tmp_path / "notes.db"
    stranger.write_text("not a database\n")
    conf.write_text(f'[journal]\npath = "{stranger}"\n')
    line = one_error_line(capsys, ["check", "--config", str(conf)])
    assert "journal.path" in line and "not a Hourwatch journal" in line, line


# --- probe ----------------------------------------------------------------------------------
def test_probe_unknown_profile_lists_the_known_ones(capsys):
    line = one_error_line(capsys, ["probe", "--broker", "127.0.0.1:9", "--profile", "nope"])
    assert "nope" in line
    for name in PROFILES:
        assert name in line, line


def test_probe_tally_period_offset_and_rejections_without_a_broker():
    tally = ProbeTally(REF)
    t0 = 1_800_000_000.0  # invented device times, 60 s apart (the profile's period)
    skew = 30.0  # invented: the meter's clock runs 30 s behind ours
    for i in range(6):
        topic, payload = encode(REF, "rc-0301", t0 + 60 * i, 10.0 * i, seq=i + 1)
        tally.observe(topic, json.dumps(payload).encode(), t0 + 60 * i + skew)
    tally.observe("meters/rc-0301/volume", b"{broken", t0 + 400)
    topic, payload = encode(REF, "rc-0301", t0 + 420, 99_999.0, seq=8)  # beyond max_ml
    tally.observe(topic, json.dumps(payload).encode(), t0 + 420 + skew)
    d = tally.devices["rc-0301"]
    assert (d.messages, d.accepted) == (8, 6)
    assert d.rejected == {"bad_payload": 1, "out_of_range": 1}
    assert d.period_s() == 60.0 and d.offset_s() == skew
    assert {reason for reason, _ in d.examples} == {"bad_payload", "out_of_range"}
    text = "\n".join(tally.report())
    assert "rc-0301: 8 messages, 6 decoded, 2 rejected (bad_payload 1, out_of_range 1)" in text
    assert "reporting period: 60 s" in text and "clock offset: +30.0 s" in text


def test_probe_on_a_real_broker_summarises_each_device(broker):  # noqa: F811
    def messages() -> list[tuple[str, object]]:  # made once the probe is subscribed
        now = time.time()
        # invented: five readings 60 s apart whose device clock runs 45 s ahead of ours
        t0 = now - 120 + 45
        msgs: list[tuple[str, object]] = []
        for i in range(5):
            topic, payload = encode(REF, "rc-7001", t0 + 60 * i, 100.0 + 5 * i, seq=i + 1)
            msgs.append((topic, payload))
        msgs.append(("meters/rc-7001/volume", b"\xff\xfe not text"))  # bad_encoding
        topic, payload = encode(REF, "rc-7001", now, 99_999.0, seq=6)  # out_of_range
        msgs.append((topic, payload))
        topic, payload = encode(REF, "rc-7002", now, 50.0, seq=1)
        assert isinstance(payload, dict)
        del payload["time"]  # missing_field
        msgs.append((topic, payload))
        return msgs

    out = probe_on_broker(broker, ["--profile", REF.name], messages)
    assert out.startswith("probe: subscribed to meters/+/volume"), out
    assert "rc-7001: 7 messages, 5 decoded, 2 rejected (bad_encoding 1, out_of_range 1)" in out, out
    assert "rc-7002: 1 messages, 0 decoded, 1 rejected (missing_field 1)" in out, out
    block = out.split("rc-7001:", 1)[1].split("rc-7002:", 1)[0]
    assert "reporting period: 60 s (median of 4 intervals" in block, out
    offset = float(re.search(r"clock offset: ([-+][\d.]+) s", block).group(1))  # type: ignore[union-attr]
    assert -47.0 <= offset <= -40.0, out  # 45 s ahead, plus the broker's delivery time
    assert "rejected: out_of_range: 99999.0 mL outside physical range" in block
    assert "rejected: missing_field: time field missing" in out


# --- the running service: logs on stdout, /metrics ------------------------------------------------
METRIC = re.compile(r"^(hourwatch_[a-z_]+)(\{[^}]*\})? (\S+)$")


def scrape(address: str) -> dict[str, float]:
    with urllib.request.urlopen(f"http://{address}/metrics", timeout=5) as r:
        text = r.read().decode()
    out: dict[str, float] = {}
    for line in text.splitlines():
        if line.startswith("# TYPE "):
            out.setdefault(line.split()[2], float("nan"))  # declared, maybe without samples
        m = METRIC.match(line)
        if m:
            out[m.group(1) + (m.group(2) or "")] = float(m.group(3))
    return out


def test_run_logs_json_on_stdout_and_serves_the_operations_metrics(broker, tmp_path):  # noqa: F811
    w = Watcher(broker)
    jpath = tmp_path / "j.db"
    conf = tmp_path / "hw.toml"
    conf.write_text('[health]\nlisten = "127.0.0.1:0"\n[broker]\nclient_id = "hw-ops"\n'
                    "[publish]\nstate_interval_s = 0\n")  # fmt: skip
    proc = subprocess.Popen(
        hourwatch("run", "--config", str(conf), "--broker", broker.address,
                  "--journal", str(jpath)),
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=ENV,
    )  # fmt: skip
    lines: list[str] = []
    assert proc.stdout is not None
    reader = threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True)  # type: ignore[arg-type]
    reader.start()
    try:
        w.wait_for(lambda w: any(s["status"] == "online" for s in w.json("hourwatch/status")),
                   20, "status online")  # fmt: skip
        health = next(json.loads(x)["address"] for x in list(lines) if '"health_listening"' in x)
        pub = publisher(broker, "ops-pub")
        ctx = {"ward": "icu-east", "device_ids": ["rc-0901"], "weight_kg": 80,
               "weight_basis": "actual",  # relieved 12 h ago: POD rules armed (DESIGN §4)
               "episodes": [{"kind": "obstruction_relieved",
                             "at": iso_z(time.time() - 12 * 3600)}]}  # fmt: skip
        start = datetime.fromtimestamp(time.time() - 3 * 3600, UTC)
        # invented: 3 h at 300 mL/h, uploaded at once (store-and-forward)
        sim = simulate(REF, "rc-0901", start, 3.0, constant(300.0))
        readings = [(topic, payload) for _, topic, payload in sim.records]
        msgs = [("hourwatch/beds/b09/context", ctx), *readings,
                readings[-1],  # the same reading again: a duplicate
                ("meters/rc-0901/volume", b"{not json")]  # fmt: skip
        publish_all(pub, msgs)
        w.wait_for(lambda w: [a for a in w.json("hourwatch/alarms/") if a["rule"] == "pod-hourly"],
                   10, "pod-hourly alarm")  # fmt: skip
        deadline = time.monotonic() + 10
        while True:
            m = scrape(health)
            if (m.get("hourwatch_messages_acked_total", 0) >= len(msgs)
                    and m.get("hourwatch_alarm_latency_seconds_count", 0) >= 1):  # fmt: skip
                break
            assert time.monotonic() < deadline, m
            time.sleep(0.1)
        pub.disconnect()
        proc.send_signal(signal.SIGTERM)
        proc.wait(15)
        reader.join(5)
        err = proc.stderr.read() if proc.stderr else ""
    finally:
        if proc.poll() is None:
            proc.kill()
    w.close()
    assert proc.returncode == 0, err[-2000:]
    n = len(msgs)
    assert m["hourwatch_messages_received_total"] == n
    assert m["hourwatch_messages_journaled_total"] == n
    assert m["hourwatch_messages_acked_total"] == n
    assert m['hourwatch_duplicates_total{profile="reference-cumulative"}'] == 1
    assert m['hourwatch_rejected_total{reason="bad_payload"}'] == 1
    assert m['hourwatch_alarm_events_total{rule="pod-hourly",state="active"}'] == 1
    assert m["hourwatch_publish_failures_total"] == 0
    db_and_wal = sum(p.stat().st_size for p in (jpath, jpath.with_name("j.db-wal"))
                     if p.exists())  # fmt: skip
    # scraped while running; at stop the WAL may have been folded into the database
    assert m["hourwatch_journal_bytes"] >= n * 50  # each row holds a ~80-byte JSON payload
    assert abs(m["hourwatch_journal_bytes"] - db_and_wal) < 1e6
    assert m["hourwatch_ingest_latency_seconds_count"] == n
    assert m['hourwatch_alarm_latency_seconds_bucket{le="+Inf"}'] >= 1
    # logs: JSON on stdout, one event per line; nothing but one-line errors on stderr
    events = [json.loads(x) for x in lines if x.startswith("{")]
    assert len(events) == len([x for x in lines if x.strip()])
    assert not [x for x in err.splitlines() if x.startswith("{")], err[-2000:]
    alarm_lines = [e for e in events if e["event"] == "alarm_event" and e["rule"] == "pod-hourly"]
    assert alarm_lines and alarm_lines[0]["bed"] == "b09"
    assert alarm_lines[0]["alarm_id"].startswith("b09/pod-hourly/")
    assert any(e["event"] == "service_stopped" for e in events)
    assert all("level" in e and "timestamp" in e for e in events)
