"""`hourwatch simulate`: the log path, its one-line errors, and live publishing to a
REAL Mosquitto broker (tests/broker.py: testcontainers or the local binary on a
free loopback port; never a public broker, never a mocked client). All data is invented.
"""

from __future__ import annotations

import json
import socket
import threading
import time
from pathlib import Path
from typing import Any

import pytest
from paho.mqtt import client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from daemon.cli import main
from daemon.engine.decode import Decoder, Reading
from daemon.engine.timefmt import parse_iso
from daemon.logfile import LogRecord, read_log
from daemon.profile_files import load_profiles
from simulator import runner
from simulator.scenario import BUNDLED, load_scenario
from tests.broker import Broker, running_broker

PROFILES = {p.name: p for p in load_profiles()}
NORMAL = BUNDLED / "normal.toml"


def test_to_log_writes_a_replayable_log(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "ward.jsonl"
    start = "2026-05-01T22:00:00Z"
    code = main(["simulate", "--scenario", str(BUNDLED / "ward-demo.toml"), "--to-log", str(out),
                 "--beds", "3", "--hours", "2", "--seed", "5", "--start", start])  # fmt: skip
    assert code == 0
    said = capsys.readouterr().out
    assert str(out) in said and "3 beds" in said and "invented" in said
    lines = [x for x in read_log(out)]
    records = [x[1] for x in lines if isinstance(x, tuple)]
    assert len(records) == len(lines) > 100
    assert said.split(":")[1].strip().startswith(f"{len(records)} messages")
    beds = {r.topic.split("/")[2] for r in records if r.topic.startswith("hourwatch/beds/")}
    assert beds == {"bed-01", "bed-02", "bed-03"}
    t0 = parse_iso(start)
    meters = [r for r in records if not r.topic.startswith("hourwatch/")]
    assert t0 <= meters[0].time.timestamp() and meters[-1].time.timestamp() <= t0 + 2 * 3600
    # the replay command takes it as it is
    assert main(["replay", str(out)]) == 0


def test_same_command_same_bytes(tmp_path: Path) -> None:
    a, b = tmp_path / "a.jsonl", tmp_path / "b.jsonl"
    for path in (a, b):
        assert main(["simulate", "--scenario", str(NORMAL), "--to-log", str(path),
                     "--hours", "3", "--seed", "11"]) == 0  # fmt: skip
    assert a.read_bytes() == b.read_bytes()


def _error(capsys: pytest.CaptureFixture[str], argv: list[str]) -> str:
    assert main(argv) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "Traceback" not in err
    return err


def test_a_bad_scenario_file_is_one_line_with_file_and_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    bad = tmp_path / "bad.toml"
    bad.write_text(NORMAL.read_text().replace("weight_kg = 74", "weight_kg = -74"))
    err = _error(capsys, ["simulate", "--scenario", str(bad), "--to-log", str(tmp_path / "o")])
    assert err.startswith(f"hourwatch: {bad}: beds.0.weight_kg:")
    assert not (tmp_path / "o").exists()
    typo = tmp_path / "typo.toml"
    typo.write_text(NORMAL.read_text().replace('profile = "gravimetric-text"', 'profile = "x"'))
    err = _error(capsys, ["simulate", "--scenario", str(typo), "--to-log", str(tmp_path / "o")])
    assert err.startswith(f"hourwatch: {typo}: beds.1.meters.0.profile: unknown device profile")


@pytest.mark.parametrize(
    ("extra", "needle"),
    [
        (["--start", "yesterday"], "--start"),
        (["--speed", "0"], "--speed"),
        (["--beds", "0"], "--beds"),
        (["--hours", "-2"], "--hours"),
    ],
)
def test_bad_options_are_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], extra: list[str], needle: str
) -> None:
    argv = ["simulate", "--scenario", str(NORMAL), "--to-log", str(tmp_path / "o.jsonl")]
    assert needle in _error(capsys, argv + extra)


def test_missing_scenario_and_option_conflicts(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    missing = tmp_path / "nope.toml"
    err = _error(capsys, ["simulate", "--scenario", str(missing), "--to-log", "x"])
    assert str(missing) in err and "no such scenario file" in err
    err = _error(capsys, ["simulate", "--scenario", str(NORMAL), "--broker", "127.0.0.1:1",
                          "--start", "2026-01-01T00:00:00Z"])  # fmt: skip
    assert "--start" in err
    err = _error(capsys, ["simulate", "--scenario", str(NORMAL), "--broker", "no-port"])
    assert "HOST:PORT" in err
    with pytest.raises(SystemExit) as exc:  # neither --to-log nor --broker: argparse says so
        main(["simulate", "--scenario", str(NORMAL)])
    assert exc.value.code == 2


def test_an_unreachable_broker_is_one_line(capsys: pytest.CaptureFixture[str]) -> None:
    port = _free_port()  # nothing listens there
    err = _error(capsys, ["simulate", "--scenario", str(NORMAL), "--broker", f"127.0.0.1:{port}"])
    assert f"127.0.0.1:{port}" in err and "cannot connect" in err


# --- live, against a real broker ---------------------------------------------------------


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class Collector:
    """A subscriber that records (wall time, topic, payload, retain) of every message."""

    def __init__(self, b: Broker, topic: str = "#", **auth: str) -> None:
        self.got: list[tuple[float, str, bytes, bool]] = []
        self.ready = threading.Event()
        self.c = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv311)
        if auth:
            self.c.username_pw_set(auth["username"], auth["password"])
        self.c.on_connect = lambda c, *_: c.subscribe(topic, qos=1)
        self.c.on_subscribe = lambda *_: self.ready.set()
        self.c.on_message = lambda _c, _u, m: self.got.append(
            (time.time(), m.topic, m.payload, bool(m.retain))
        )
        self.c.connect(b.host, b.port)
        self.c.loop_start()
        assert self.ready.wait(5)

    def stop(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()


def test_live_publishing_to_a_real_broker(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    sc = load_scenario(NORMAL, PROFILES)
    expected = runner.build(sc, PROFILES, seed=4, hours=0.75)
    with running_broker() as b:
        sub = Collector(b)
        t0 = time.time()
        code = main(["simulate", "--scenario", str(NORMAL), "--broker", b.address,
                     "--hours", "0.75", "--speed", "45", "--seed", "4"])  # fmt: skip
        t1 = time.time()
        time.sleep(0.3)
        sub.stop()
        late = Collector(b, "hourwatch/beds/+/context")  # retained context for newcomers
        time.sleep(0.3)
        late.stop()
    assert code == 0
    assert "done:" in capsys.readouterr().out
    got = sub.got
    assert len(got) == len(expected.messages)
    assert [g[1] for g in got] == [m.topic for m in expected.messages]  # the same order
    # 45 simulated minutes at 45 simulated minutes per second: about one second
    assert 0.7 < t1 - t0 < 5.0
    decoders = {p.topic_regex(): Decoder(p) for p in PROFILES.values()}
    for wall, topic, payload, _ in got:
        for regex, dec in decoders.items():
            m = regex.match(topic)
            if m:
                r = dec.decode(m.group("device_id"), payload)
                assert isinstance(r, Reading)
                # payload times are the wall clock at publish, not the simulated clock
                assert abs(r.device_time - wall) < 3.0
        if topic.endswith("/context"):
            body: dict[str, Any] = json.loads(payload)
            assert body["ward"] == "sim-icu"
    assert {g[1] for g in late.got} == {"hourwatch/beds/bed-n1/context",
                                        "hourwatch/beds/bed-n2/context"}  # fmt: skip
    assert all(g[3] for g in late.got)


def test_logged_and_live_streams_carry_the_same_readings(tmp_path: Path) -> None:
    """Live and logged differ only in payload times: values and sequence agree."""
    sc = load_scenario(NORMAL, PROFILES)
    built = runner.build(sc, PROFILES, seed=9, hours=0.5)
    log = tmp_path / "n.jsonl"
    runner.write_log(built, log)
    logged = [x[1] for x in read_log(log) if isinstance(x, tuple)]
    clock = runner.live_clock(built.start, 2.0e9, speed=10.0)
    for rec, m in zip(logged, built.messages, strict=True):
        assert isinstance(rec, LogRecord) and rec.topic == m.topic
        live = m.payload(clock)
        if isinstance(live, str):  # delimited text: seq;time;weight;status
            a, b = live.split(";"), str(rec.payload).split(";")
            assert (a[0], a[2], a[3]) == (b[0], b[2], b[3]) and a[1] != b[1]
