"""Takeover time of an active/standby pair (daemon/ha.py): two `hourwatch run` processes
on one PostgreSQL journal and a freshly started local Mosquitto, default lease (8 s).

Measured, per trial: from the moment the active is stopped to the moment a subscriber
receives the alarm that fell due then (a meter's 3 h store-and-forward upload at an
invented 300 mL/h, published right after the active was stopped):
- SIGKILL: the process dies; its database session ends; the standby sees that at its
  next poll (0.5 s). Goal: under 15 s.
- SIGSTOP: the process is paused with its connections open; the standby waits for the
  lease to expire (lease_s). Goal: under 15 s with the default lease.
Baseline, in the same run: the same upload's alarm on a healthy active (no takeover).

Skipped, with the reason, without a PostgreSQL server (HOURWATCH_TEST_PG, default
postgresql://postgres@127.0.0.1:5432/postgres) or a mosquitto binary. Benchmarks are
not tests: nothing asserts a time. All meters, beds and flows are invented.
"""

from __future__ import annotations

import json
import os
import signal
import statistics
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
import uuid
from collections.abc import Sequence
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from benchmarks.table import Row, add
from daemon.local_broker import Mosquitto, free_port, mosquitto_binary
from daemon.profile_files import load_profiles
from simulator.meterlog import constant, simulate

ROOT = Path(__file__).resolve().parent.parent
PROFILE = next(p for p in load_profiles() if p.name == "reference-cumulative")
GOAL_S = 15.0
TRIALS = 3  # of each kind
FLOW_ML_H = 300.0  # invented: a clear post-obstructive diuresis


def _upload(bed: str, device: str) -> list[tuple[str, bytes, bool]]:
    start = time.time() - 3 * 3600
    relieved = datetime.fromtimestamp(start - 7200, UTC).isoformat()
    ctx = {"ward": "bench", "device_ids": [device], "weight_kg": 80, "weight_basis": "actual",
           "episodes": [{"kind": "obstruction_relieved", "at": relieved}]}  # fmt: skip
    sim = simulate(PROFILE, device, datetime.fromtimestamp(start, UTC), 3.0, constant(FLOW_ML_H))
    return [(f"hourwatch/beds/{bed}/context", json.dumps(ctx).encode(), True)] + [
        (topic, json.dumps(p).encode(), False) for _, topic, p in sim.records
    ]


class Alarms:
    """A subscriber noting when each bed's first pod-hourly activation arrives."""

    def __init__(self, host: str, port: int) -> None:
        self.first: dict[str, float] = {}
        self.cond = threading.Condition()
        c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-watch")

        def on_message(client: Any, userdata: Any, msg: Any) -> None:
            a = json.loads(msg.payload)
            if a.get("rule") == "pod-hourly" and a.get("state") == "active":
                with self.cond:
                    self.first.setdefault(a["bed"], time.monotonic())
                    self.cond.notify_all()

        c.on_message = on_message
        c.connect(host, port)
        c.subscribe("hourwatch/alarms/#", 1)
        c.loop_start()
        self.client = c

    def wait(self, bed: str, timeout: float) -> float | None:
        deadline = time.monotonic() + timeout
        with self.cond:
            while bed not in self.first:
                left = deadline - time.monotonic()
                if left <= 0:
                    return None
                self.cond.wait(left)
            return self.first[bed]


def _role(port: int) -> str | None:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=1) as r:
            body = json.loads(r.read())
    except urllib.error.HTTPError as exc:
        body = json.loads(exc.read())
    except (OSError, ValueError):
        return None
    return body.get("role") if body.get("role") == "standby" or body.get("connected") else None


class Pair:
    def __init__(self, folder: Path, broker: Mosquitto, url: str) -> None:
        self.folder, self.broker, self.url = folder, broker, url
        self.procs: dict[str, tuple[subprocess.Popen[bytes], int]] = {}
        self.n = 0

    def start(self) -> str:
        self.n += 1
        name, port = f"i{self.n}", free_port()
        conf = self.folder / f"{name}.toml"
        conf.write_text(
            f'log_level = "warning"\n[broker]\nhost = "{self.broker.host}"\n'
            f'port = {self.broker.port}\nclient_id = "bench-pair"\nreconnect_min_s = 1\n'
            f'[journal]\nurl = "{self.url}"\n[health]\nlisten = "127.0.0.1:{port}"\n'
            f'[ha]\ninstance = "{name}"\n'
        )
        with (self.folder / f"{name}.log").open("w") as log:
            proc = subprocess.Popen([sys.executable, "-m", "daemon.cli", "run", "--config",
                                     str(conf)], env=dict(os.environ, PYTHONPATH=str(ROOT)),
                                    stdout=log, stderr=log)  # fmt: skip
        self.procs[name] = (proc, port)
        return name

    def wait_role(self, name: str, role: str, timeout: float = 60.0) -> bool:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if _role(self.procs[name][1]) == role:
                return True
            time.sleep(0.05)
        return False

    def active(self) -> str | None:
        for name, (proc, port) in self.procs.items():
            if proc.poll() is None and _role(port) == "active":
                return name
        return None

    def end(self, name: str) -> None:
        proc, _ = self.procs.pop(name)
        proc.send_signal(signal.SIGCONT)
        proc.kill()
        proc.wait(10)

    def close(self) -> None:
        for name in list(self.procs):
            self.end(name)


def _publish(pub: Any, msgs: list[tuple[str, bytes, bool]]) -> None:
    for topic, payload, retain in msgs:
        pub.publish(topic, payload, qos=1, retain=retain)


def _database() -> tuple[str, str] | str:
    """(server URL, new database URL), or why there is none."""
    try:
        import psycopg
    except ImportError:
        return "psycopg is not installed"
    server = os.environ.get("HOURWATCH_TEST_PG") or "postgresql://postgres@127.0.0.1:5432/postgres"
    name = f"hw_bench_{uuid.uuid4().hex[:10]}"
    try:
        with psycopg.connect(server, autocommit=True, connect_timeout=3) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
    except psycopg.Error as exc:
        return f"no PostgreSQL server at {server}: {str(exc).strip().splitlines()[0]}"
    return server, urlunsplit(urlsplit(server)._replace(path="/" + name))


def _drop(server: str, url: str) -> None:
    import psycopg

    name = urlsplit(url).path.strip("/")
    with psycopg.connect(server, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def main(argv: Sequence[str] = ()) -> int:
    print("Takeover of an active/standby pair (PostgreSQL journal, default lease 8 s)")
    binary = mosquitto_binary()
    db = _database()
    if binary is None or isinstance(db, str):
        print(f"  skipped: {db if isinstance(db, str) else 'no mosquitto binary'}")
        return 0
    server, url = db
    with tempfile.TemporaryDirectory(prefix="hw-bench-ha-") as tmp:
        folder = Path(tmp)
        (folder / "broker").mkdir()
        broker = Mosquitto(binary, folder / "broker")
        broker.start()
        pair = Pair(folder, broker, url)
        watch = Alarms(broker.host, broker.port)
        pub = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="bench-pub")
        pub.connect(broker.host, broker.port)
        pub.loop_start()
        results: dict[str, list[float | None]] = {"baseline": [], "SIGKILL": [], "SIGSTOP": []}
        try:
            first = pair.start()
            pair.wait_role(first, "active")
            pair.start()
            bed = 0
            for kind in ["baseline", "SIGKILL", "SIGSTOP"] * TRIALS:
                active = pair.active()
                standby = next(n for n in pair.procs if n != active)
                if active is None or not pair.wait_role(standby, "standby"):
                    print(f"  {kind}: the pair is not ready; trial skipped")
                    continue
                bed += 1
                msgs = _upload(f"b{bed:02d}", f"rc-{bed:02d}")
                t0 = time.monotonic()
                if kind != "baseline":
                    proc = pair.procs[active][0]
                    proc.send_signal(signal.SIGKILL if kind == "SIGKILL" else signal.SIGSTOP)
                    t0 = time.monotonic()
                _publish(pub, msgs)
                got = watch.wait(f"b{bed:02d}", 60.0)
                results[kind].append(None if got is None else got - t0)
                if kind != "baseline":
                    pair.end(active)  # the stopped one too: it would step down anyway
                    pair.wait_role(standby, "active")
                    pair.start()
        finally:
            pub.disconnect()
            watch.client.disconnect()
            pair.close()
            broker.stop()
            _drop(server, url)
    base = [x for x in results["baseline"] if x is not None]
    base_med = statistics.median(base) if base else None
    for kind in ("baseline", "SIGKILL", "SIGSTOP"):
        xs = results[kind]
        ok = [x for x in xs if x is not None]
        shown = ", ".join("lost" if x is None else f"{x:.2f}" for x in xs)
        if not ok:
            print(f"  {kind:<8} no alarm arrived ({shown})")
            continue
        worst = max(ok)
        ratio = f", {worst / base_med:.1f}x the baseline" if base_med and kind != "baseline" else ""
        met = worst < GOAL_S and len(ok) == len(xs)
        if kind != "baseline":
            add(Row(f"takeover after {kind}: stop -> alarm, worst", f"{worst:.2f} s",
                    f"{base_med:.2f} s no stop" if base_med else "-",
                    f"{worst / base_med:.1f} x" if base_med else "-", f"< {GOAL_S:g} s",
                    met))  # fmt: skip
        goal = "" if kind == "baseline" else f"  goal < {GOAL_S:g} s: {'met' if met else 'NOT met'}"
        print(f"  {kind:<8} stop -> alarm received: {shown} s (worst {worst:.2f} s{ratio}){goal}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
