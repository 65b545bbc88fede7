"""The active/standby deployment files, checked without a Docker engine or systemd:
deploy/ha/docker-compose.yml parses, mounts only files that exist, runs two instances of
one image with one config on PostgreSQL, takes every password from the environment; the
config is valid; the systemd template runs commands `hourwatch` accepts."""

from __future__ import annotations

import configparser
import shlex
from pathlib import Path
from typing import Any

import yaml

from daemon.cli import _parser
from daemon.config import load_config
from daemon.journal_api import pg_url

ROOT = Path(__file__).resolve().parent.parent
HA = ROOT / "deploy" / "ha"
COMPOSE: dict[str, Any] = yaml.safe_load((HA / "docker-compose.yml").read_text())
SERVICES: dict[str, Any] = COMPOSE["services"]
PAIR = ("hourwatch-a", "hourwatch-b")


def _mounts(svc: dict[str, Any]) -> list[tuple[str, str]]:
    return [tuple(v.split(":")[:2]) for v in svc.get("volumes", [])]  # type: ignore[misc]


def test_two_instances_of_one_image_and_one_config_beside_postgresql_and_the_broker():
    assert SERVICES["db"]["image"].startswith("postgres:")
    assert SERVICES["broker"]["image"].startswith("eclipse-mosquitto:")
    a, b = (SERVICES[n] for n in PAIR)
    assert a["build"] == "../.." and a["image"] == b["image"] == "hourwatch:latest"
    assert a["command"] == b["command"] and _mounts(a) == _mounts(b)
    for svc in (a, b):
        assert svc["depends_on"]["db"]["condition"] == "service_healthy"
    assert {a["ports"][0].split(":")[1], b["ports"][0].split(":")[1]} == {"9108", "9109"}
    assert "pgdata" in COMPOSE["volumes"]
    assert ("pgdata", "/var/lib/postgresql/data") in _mounts(SERVICES["db"])


def test_every_mounted_file_exists_and_every_volume_is_declared():
    named = set(COMPOSE["volumes"])
    for name, svc in SERVICES.items():
        for src, dst in _mounts(svc):
            if src.startswith("."):
                assert (HA / src).resolve().exists(), f"{name}: {src} -> {dst}"
            else:
                assert src in named, f"{name}: volume {src} is not declared"


def test_passwords_come_from_the_environment_only():
    for svc in SERVICES.values():
        for key, value in (svc.get("environment") or {}).items():
            if "PASSWORD" in key:
                assert str(value).startswith("${"), f"{key} must come from the environment"
    keys = [line.split("=")[0].strip() for line in (HA / "hourwatch-ha.toml").read_text()
            .splitlines() if "=" in line and not line.lstrip().startswith("#")]  # fmt: skip
    assert not [k for k in keys if "password" in k]
    cfg = load_config(HA / "hourwatch-ha.toml", env={"HOURWATCH_MQTT_PASSWORD": "x"})
    assert cfg.journal.url is not None
    pg_url(cfg.journal.url)  # refuses a URL with a password in it
    assert ".env" in (HA / "docker-compose.yml").read_text()


def test_the_config_points_at_the_compose_services_and_forms_one_group():
    cfg = load_config(HA / "hourwatch-ha.toml", env={"HOURWATCH_MQTT_PASSWORD": "x"})
    assert cfg.broker.host == "broker"
    assert cfg.journal.url is not None and "@db:5432/" in cfg.journal.url
    assert cfg.ha.group is None and cfg.broker.client_id  # the group is the client id
    assert cfg.ha.lease_s == 8  # the documented default
    args = _parser().parse_args(SERVICES["hourwatch-a"]["command"])
    assert args.command == "run" and args.config == Path("/etc/hourwatch/hourwatch.toml")
    assert ("./hourwatch-ha.toml", "/etc/hourwatch/hourwatch.toml") in _mounts(
        SERVICES["hourwatch-a"]
    )


def test_the_image_installs_the_postgresql_driver():
    assert "pip install -e '.[postgresql]'" in (ROOT / "Dockerfile").read_text()


def test_the_systemd_template_runs_commands_hourwatch_accepts():
    unit = configparser.ConfigParser(strict=False, interpolation=None)
    unit.optionxform = str  # type: ignore[assignment,method-assign]
    unit.read_string((HA / "hourwatch-ha@.service").read_text())
    svc = unit["Service"]
    for key in ("ExecStartPre", "ExecStart"):
        argv = shlex.split(svc[key])
        assert argv[0].endswith("/hourwatch")
        args = _parser().parse_args([a.replace("%i", "a") for a in argv[1:]])
        assert args.command in ("run", "check")
        assert str(args.config) == "/etc/hourwatch/hourwatch-a.toml"
    assert svc["KillSignal"] == "SIGTERM" and svc["RestartPreventExitStatus"] == "2"
    assert "HOURWATCH_PG_PASSWORD" in (HA / "hourwatch-ha@.service").read_text()
