"""The docker-compose deployment, checked without a Docker engine: the compose file
parses, everything it mounts and the Dockerfile copies exists in the repository,
the commands are ones `hourwatch` accepts, and the broker's ACL lets each meter
publish only on its own topic (this part against a REAL mosquitto binary).
"""

from __future__ import annotations

import contextlib
import shlex
import shutil
import subprocess
import threading
import time
import tomllib
from pathlib import Path
from typing import Any

import pytest
import yaml
from paho.mqtt import client as mqtt
from paho.mqtt.enums import CallbackAPIVersion

from daemon.cli import _parser
from daemon.profile_files import load_profiles
from simulator.scenario import load_scenario
from tests.broker import running_broker
from tests.test_simulate_cli import Collector

ROOT = Path(__file__).resolve().parent.parent
COMPOSE: dict[str, Any] = yaml.safe_load((ROOT / "docker-compose.yml").read_text())
SERVICES: dict[str, Any] = COMPOSE["services"]
PROFILES = load_profiles()
APP = "/app/"  # where the Dockerfile puts the repository


def _mounts(service: dict[str, Any]) -> list[tuple[str, str]]:
    out = []
    for v in service.get("volumes", []):
        source, target = v.split(":")[:2]
        out.append((source, target))
    return out


def _bind_mounts() -> list[tuple[str, str, str]]:
    return [
        (name, src, dst)
        for name, svc in SERVICES.items()
        for src, dst in _mounts(svc)
        if src.startswith((".", "/"))
    ]


def _host_path(service: dict[str, Any], container_path: str) -> Path | None:
    """The repository file behind a path inside a container (a mount or the image)."""
    for src, dst in _mounts(service):
        if src.startswith(".") and container_path == dst:
            return ROOT / src
    if container_path.startswith(APP) and service.get("image", "").startswith("hourwatch"):
        return ROOT / container_path[len(APP) :]
    return None


def test_the_compose_file_has_the_broker_the_service_and_the_simulator() -> None:
    assert SERVICES["broker"]["image"].startswith("eclipse-mosquitto:")
    assert SERVICES["hourwatch"]["build"] == "."
    assert "simulator" in SERVICES
    named = set(COMPOSE["volumes"])
    journal = [src for src, dst in _mounts(SERVICES["hourwatch"]) if dst == "/var/lib/hourwatch"]
    assert journal and journal[0] in named  # the journal lives in a named volume
    for _, src, _ in _bind_mounts():
        assert not src.startswith("/"), f"{src}: mount repository files by relative path"
    for svc in SERVICES.values():
        for src, _ in _mounts(svc):
            assert src.startswith(".") or src in named, f"volume {src} is not declared"


@pytest.mark.parametrize(("service", "source", "target"), _bind_mounts())
def test_every_mounted_file_exists_in_the_repository(
    service: str, source: str, target: str
) -> None:
    assert (ROOT / source).exists(), f"{service}: {source} -> {target}"


def test_no_secret_is_committed_in_compose() -> None:
    text = (ROOT / "docker-compose.yml").read_text()
    for svc in SERVICES.values():
        for key, value in (svc.get("environment") or {}).items():
            if "PASSWORD" in key:
                assert str(value).startswith("${"), f"{key} must come from the environment"
    broker = tomllib.loads((ROOT / "deploy/hourwatch.toml").read_text())["broker"]
    assert "password" not in broker
    assert ".env" in text  # tells the operator where the passwords go


def _dockerfile_copies() -> list[str]:
    sources = []
    for line in (ROOT / "Dockerfile").read_text().splitlines():
        if line.strip().upper().startswith("COPY "):
            words = shlex.split(line.split("#")[0])
            args = [w for w in words[1:] if not w.startswith("--")]
            sources += args[:-1]
    return sources


def test_the_dockerfile_copies_only_what_exists() -> None:
    sources = _dockerfile_copies()
    assert {"pyproject.toml", "daemon", "simulator", "device_profiles", "alert_rules"} <= set(
        sources
    )
    for src in sources:
        assert (ROOT / src).exists(), src
    ignored = (ROOT / ".dockerignore").read_text().split()
    assert ".venv" in ignored and ".git" in ignored


def _command(service: str) -> list[str]:
    cmd = SERVICES[service]["command"]
    return shlex.split(cmd) if isinstance(cmd, str) else [str(c) for c in cmd]


def test_the_simulator_command_is_one_hourwatch_accepts() -> None:
    args = _parser().parse_args(_command("simulator"))
    assert args.command == "simulate"
    assert args.broker.split(":")[0] == "broker"
    scenario = _host_path(SERVICES["simulator"], str(args.scenario))
    assert scenario is not None and scenario.is_file()
    load_scenario(scenario, {p.name: p for p in PROFILES})
    assert args.username == "simulator"


def test_the_service_command_is_one_hourwatch_accepts() -> None:
    cmd = _command("hourwatch")
    commands = _parser()._subparsers._group_actions[0].choices  # type: ignore[union-attr]
    if "run" not in commands:
        pytest.skip("`hourwatch run` is not registered in daemon/cli.py yet")
    args = _parser().parse_args(cmd)
    assert args.command == "run"
    config = _host_path(SERVICES["hourwatch"], str(args.config))
    assert config is not None and config.is_file()


def test_the_service_config_is_valid() -> None:
    config = pytest.importorskip("daemon.config")
    cfg = config.load_config(ROOT / "deploy/hourwatch.toml", env={"HOURWATCH_MQTT_PASSWORD": "x"})
    assert cfg.broker.host == "broker"
    assert cfg.broker.username == "hourwatch"
    # container paths the image provides: the repository's folders under /app
    assert cfg.profiles is not None and (ROOT / str(cfg.profiles)[len(APP) :]).is_dir()
    assert cfg.rules is not None and (ROOT / str(cfg.rules)[len(APP) :]).is_dir()
    journal_dir = str(cfg.journal.path.parent)
    assert (journal_dir, "journal") in [(d, s) for s, d in _mounts(SERVICES["hourwatch"])]


# --- the broker's own config and ACL ------------------------------------------------------


def _conf() -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for line in (ROOT / "deploy/mosquitto/mosquitto.conf").read_text().splitlines():
        if line.strip() and not line.lstrip().startswith("#"):
            key, _, value = line.strip().partition(" ")
            out.setdefault(key, []).append(value.strip())
    return out


def test_the_broker_requires_a_login_and_names_files_it_can_see() -> None:
    conf = _conf()
    assert conf["allow_anonymous"] == ["false"]
    mounted = [dst for _, dst in _mounts(SERVICES["broker"])]
    for key in ("password_file", "acl_file"):
        (path,) = conf[key]
        assert any(path == m or path.startswith(m.rstrip("/") + "/") for m in mounted), path
    assert conf["max_queued_messages"] == ["0"]  # FIELD-NOTES: the default drops silently


def _acl() -> tuple[set[str], dict[str, set[tuple[str, str]]]]:
    patterns: set[str] = set()
    users: dict[str, set[tuple[str, str]]] = {}
    user = None
    for line in (ROOT / "deploy/mosquitto/acl").read_text().splitlines():
        words = line.split()
        if not words or words[0].startswith("#"):
            continue
        if words[0] == "user":
            user = words[1]
            users[user] = set()
        elif words[0] == "pattern" and words[1] == "write":
            patterns.add(words[2])
        elif words[0] == "topic" and user is not None:
            users[user].add((words[1], words[2]))
    return patterns, users


def test_the_acl_covers_every_shipped_device_profile() -> None:
    patterns, users = _acl()
    for p in PROFILES:  # a metadata level ({ward}) may be any level: '+'
        meter = "/".join("%u" if x == "{device_id}" else "+" if x.startswith("{") else x
                         for x in p.topic.split("/"))  # fmt: skip
        assert meter in patterns, p.name
        assert ("read", p.subscription) in users["hourwatch"], p.name
        assert ("write", p.subscription) in users["simulator"], p.name
    svc = users["hourwatch"]
    assert ("read", "hourwatch/beds/#") in svc and ("read", "hourwatch/ack/+") in svc
    assert ("write", "hourwatch/alarms/#") in svc


@pytest.mark.skipif(shutil.which("mosquitto_passwd") is None, reason="no mosquitto_passwd")
def test_the_acl_on_a_real_broker(tmp_path: Path) -> None:
    """A meter publishes on its own topic only; the service hears it; anonymous is refused."""
    passwd = tmp_path / "passwd"
    for i, (user, pw) in enumerate(
        [("hourwatch", "svc-pw"), ("rc-0101", "meter-pw"), ("simulator", "sim-pw")]
    ):
        flags = ["-c"] if i == 0 else []
        subprocess.run(["mosquitto_passwd", *flags, "-b", str(passwd), user, pw], check=True)
    passwd.chmod(0o600)
    acl = ROOT / "deploy/mosquitto/acl"
    extra = f"allow_anonymous false\npassword_file {passwd}\nacl_file {acl}\n"
    with running_broker(extra) as b:  # the local binary: it needs our files
        service = Collector(b, "#", username="hourwatch", password="svc-pw")

        def publish(user: str | None, pw: str | None, topic: str) -> mqtt.ReasonCode | None:
            c = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
            codes: list[Any] = []
            c.on_connect = lambda *a: codes.append(a[3])
            if user:
                c.username_pw_set(user, pw)
            c.connect(b.host, b.port)
            c.loop_start()
            deadline = time.monotonic() + 5
            while not codes and time.monotonic() < deadline:
                time.sleep(0.01)
            if codes and not codes[0].is_failure:
                c.publish(topic, b"{}", qos=1).wait_for_publish(5)
            c.disconnect()
            c.loop_stop()
            return codes[0] if codes else None

        assert not publish("rc-0101", "meter-pw", "meters/rc-0101/volume").is_failure
        publish("rc-0101", "meter-pw", "meters/rc-0202/volume")  # someone else's topic
        publish("rc-0101", "meter-pw", "hourwatch/beds/bed-01/context")
        publish("simulator", "sim-pw", "hourwatch/beds/bed-01/context")
        refused = publish(None, None, "meters/x/volume")
        wrong = publish("rc-0101", "nope", "meters/rc-0101/volume")
        time.sleep(0.3)
        service.stop()
    heard = [g[1] for g in service.got]
    assert heard == ["meters/rc-0101/volume", "hourwatch/beds/bed-01/context"]
    assert refused is not None and refused.is_failure
    assert wrong is not None and wrong.is_failure


# --- durability and size limits of the shipped broker settings (issue 14) --------------


def _client(b: Any, user: str | None = None, pw: str | None = None) -> mqtt.Client:
    """A connected MQTT 5 client (or one the broker refused: not connected)."""
    c = mqtt.Client(CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
    if user:
        c.username_pw_set(user, pw)
    done = threading.Event()
    c.on_connect = lambda *a: done.set()
    c.connect(b.host, b.port)
    c.loop_start()
    done.wait(5)
    return c


def _shipped(*keys: str) -> str:
    """The shipped mosquitto.conf lines for these keys, for a local test broker."""
    conf = _conf()
    return "".join(f"{k} {v}\n" for k in keys for v in conf.get(k, []))


def test_the_broker_saves_its_queue_often_and_limits_payload_size() -> None:
    conf = _conf()
    assert conf["persistence"] == ["true"]
    assert conf["autosave_on_changes"] == ["false"]  # a time, not a count of changes
    (interval,) = conf["autosave_interval"]
    assert 0 < int(interval) <= 60  # Mosquitto's default, 1800 s, lost a crash's queue
    (limit,) = conf["message_size_limit"]
    from daemon.config import LimitsConfig

    assert 1024 <= int(limit) == LimitsConfig().max_payload_bytes


def test_a_broker_crash_keeps_what_it_queued_for_a_stopped_service(tmp_path: Path) -> None:
    """600 readings are queued for the service while it is stopped; the broker is killed
    with SIGKILL after its autosave interval and started again: the service gets all."""
    import json as _json
    import signal as _signal

    from daemon.journal import SqliteJournal
    from tests.broker import publish_all, publisher, running_service
    from tests.test_service import context, readings

    interval = int(_conf()["autosave_interval"][0])
    jpath = tmp_path / "j.db"
    extra = "allow_anonymous true\n" + _shipped("autosave_interval", "autosave_on_changes")
    with running_broker(extra) as b:
        with running_service(b, jpath):
            pass  # its persistent session and subscriptions now exist at the broker
        pub = publisher(b)
        feed = readings("rc-1", time.time() - 10 * 3600, 10.0)
        assert len(feed) == 600
        publish_all(pub, [("hourwatch/beds/b01/context", context(["rc-1"])), *feed])
        pub.disconnect()
        pub.loop_stop()
        time.sleep(interval + 2)  # one autosave has happened since
        assert b.proc is not None
        b.proc.send_signal(_signal.SIGKILL)  # a crash: no save at shutdown
        b.proc.wait(5)
        b.proc = None
        b.start()
        with running_service(b, jpath) as svc:
            deadline = time.monotonic() + 20
            while svc.metrics.journaled < 601 and time.monotonic() < deadline:
                time.sleep(0.05)
    with SqliteJournal(jpath) as j:
        seqs = {_json.loads(m.payload)["seq"] for m in j.messages_between(None, None)
                if m.topic.startswith("meters/")}  # fmt: skip
    assert seqs == {p["seq"] for _, p in feed}


def test_the_broker_refuses_payloads_over_its_limit() -> None:
    limit = int(_conf()["message_size_limit"][0])
    extra = "allow_anonymous true\n" + _shipped("message_size_limit")
    with running_broker(extra) as b:
        got = Collector(b, "meters/#")
        for size in (limit + 1, 200, limit):
            c = _client(b)
            info = c.publish("meters/rc-1/volume", b"x" * size, qos=1)
            # an oversized one is refused (mosquitto 2.0 may also drop the connection)
            with contextlib.suppress(RuntimeError):
                info.wait_for_publish(5)
            c.disconnect()
            c.loop_stop()
        time.sleep(0.3)
        got.stop()
        log = b.log()
    assert [len(g[2]) for g in got.got] == [200, limit], log[-500:]


@pytest.mark.skipif(shutil.which("mosquitto_passwd") is None, reason="no mosquitto_passwd")
def test_only_a_person_acknowledges_and_only_under_their_own_name(tmp_path: Path) -> None:
    """The shipped ACL plus one person's block, as deploy/mosquitto/README.md says to add
    it: the person may write only their own ack topic; meters, the ward gateway and the
    simulator cannot acknowledge; the service hears the person's acknowledgement."""
    users = [("hourwatch", "svc-pw"), ("rc-0101", "meter-pw"), ("ward-gateway", "gw-pw"),
             ("nurse-ana", "ana-pw"), ("simulator", "sim-pw")]  # fmt: skip
    passwd = tmp_path / "passwd"
    for i, (user, pw) in enumerate(users):
        flags = ["-c"] if i == 0 else []
        subprocess.run(["mosquitto_passwd", *flags, "-b", str(passwd), user, pw], check=True)
    passwd.chmod(0o600)
    acl = tmp_path / "acl"
    person = (
        "\nuser nurse-ana\ntopic write hourwatch/ack/nurse-ana\ntopic read hourwatch/alarms/#\n"
    )
    acl.write_text((ROOT / "deploy/mosquitto/acl").read_text() + person)
    extra = f"allow_anonymous false\npassword_file {passwd}\nacl_file {acl}\n"
    with running_broker(extra) as b:
        service = Collector(b, "hourwatch/ack/+", username="hourwatch", password="svc-pw")
        for user, pw in users:
            for topic in ("hourwatch/ack/nurse-ana", f"hourwatch/ack/{user}", "hourwatch/ack"):
                c = _client(b, user, pw)
                c.publish(topic, user.encode(), qos=1).wait_for_publish(5)
                c.disconnect()
                c.loop_stop()
        time.sleep(0.3)
        service.stop()
    heard = {(g[1], bytes(g[2]).decode()) for g in service.got}
    assert heard == {("hourwatch/ack/nurse-ana", "nurse-ana")}
