"""Service configuration: defaults, the example file, overrides, and one-line errors that
name the key (exit status 2 from `hourwatch run`)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from daemon.config import ServiceConfig, load_config, split_address
from daemon.errors import UserError

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "hourwatch.toml"


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "hw.toml"
    p.write_text(text)
    return p


def error(path: Path | None = None, **kw) -> str:
    with pytest.raises(UserError) as exc:
        load_config(path, env=kw.pop("env", {}), **kw)
    msg = str(exc.value)
    assert "\n" not in msg
    return msg


def test_defaults_need_no_file():
    cfg = load_config(None, env={})
    assert cfg == ServiceConfig()
    assert (cfg.broker.host, cfg.broker.port, cfg.broker.protocol) == ("127.0.0.1", 1883, "5")
    assert cfg.journal.retention_days == 30 and cfg.topic_prefix == "hourwatch"


def test_the_example_config_is_valid_and_documents_every_table():
    cfg = load_config(EXAMPLE, env={})
    assert cfg.broker.client_id == "hourwatch-icu-east"
    text = EXAMPLE.read_text()
    for table in ("[broker]", "[journal]", "[health]", "[publish]", "[recovery]", "[broker.tls]"):
        assert table in text
    for field in ServiceConfig.model_fields:
        assert field in text or field == "schema_version"


def test_command_line_overrides_the_file(tmp_path):
    p = write(tmp_path, '[broker]\nhost = "mqtt.ward.invalid"\nport = 8883\n')
    cfg = load_config(p, broker="10.0.0.5:1884", journal=tmp_path / "j.db", env={})
    assert (cfg.broker.host, cfg.broker.port) == ("10.0.0.5", 1884)
    assert cfg.journal.path == tmp_path / "j.db"


def test_relative_paths_are_relative_to_the_config_file(tmp_path):
    sub = tmp_path / "etc"
    sub.mkdir()
    (sub / "secret").write_text("s3cret\n")
    p = sub / "hw.toml"
    p.write_text('[journal]\npath = "j.db"\n[broker]\nusername = "hw"\npassword_file = "secret"\n')
    cfg = load_config(p, env={})
    assert cfg.journal.path == sub / "j.db"
    assert cfg.broker.secret() == "s3cret"  # the trailing newline is not part of it


def test_secrets_from_the_environment_win_and_never_show(tmp_path):
    p = write(tmp_path, '[broker]\nusername = "file-user"\npassword = "file-pass"\n')
    env = {"HOURWATCH_MQTT_USERNAME": "env-user", "HOURWATCH_MQTT_PASSWORD": "env-pass"}
    cfg = load_config(p, env=env)
    assert cfg.broker.username == "env-user" and cfg.broker.secret() == "env-pass"
    assert "env-pass" not in repr(cfg) and "env-pass" not in str(cfg.model_dump())
    (tmp_path / "pw").write_text("from-file")
    cfg = load_config(p, env={"HOURWATCH_MQTT_PASSWORD_FILE": str(tmp_path / "pw")})
    assert cfg.broker.secret() == "from-file" and cfg.broker.password is None


@pytest.mark.parametrize(
    ("text", "key"),
    [
        ("[broker]\nport = 70000\n", "broker.port"),
        ('[broker]\nprotocol = "4"\n', "broker.protocol"),
        ('[broker]\nhots = "x"\n', "broker.hots"),
        ('[broker]\npassword = "a"\npassword_file = "b"\n', "broker"),
        ("[journal]\nretention_days = 0\n", "journal.retention_days"),
        ('[health]\nlisten = "localhost"\n', "health.listen"),
        ('topic_prefix = "a/#"\n', "topic_prefix"),
        ('log_level = "loud"\n', "log_level"),
        ('[broker.tls]\nca_file = "/no/such/ca.crt"\n', "broker.tls"),
        ("[broker]\nreconnect_min_s = 10\nreconnect_max_s = 5\n", "broker"),
    ],
)
def test_a_bad_value_is_one_line_naming_the_key(tmp_path, text, key):
    p = write(tmp_path, text)
    msg = error(p)
    assert msg.startswith(f"{p}: {key}: "), msg


def test_protocol_may_be_written_as_a_number(tmp_path):
    assert load_config(write(tmp_path, "[broker]\nprotocol = 5\n"), env={}).broker.protocol == "5"


def test_unreadable_files_and_bad_toml(tmp_path):
    assert "cannot read" in error(tmp_path / "missing.toml")
    assert "not valid TOML" in error(write(tmp_path, "[broker\n"))
    p = write(tmp_path, '[broker]\npassword_file = "nope"\n')
    assert error(p).startswith("broker.password_file: cannot read")
    assert error(broker="no-port").startswith("--broker: expected HOST:PORT")
    assert error(broker="h:0").startswith("--broker: port out of range")


def test_split_address():
    assert split_address("127.0.0.1:1883") == ("127.0.0.1", 1883)
    assert split_address("[::1]:9108") == ("::1", 9108)
    assert split_address("127.0.0.1:0", allow_zero=True) == ("127.0.0.1", 0)
    with pytest.raises(ValueError):
        split_address(":1883")


def test_hourwatch_run_with_a_bad_config_exits_2_with_one_line(tmp_path):
    p = write(tmp_path, "[broker]\nport = -1\n")
    r = subprocess.run(
        [sys.executable, "-m", "daemon.cli", "run", "--config", str(p)],
        capture_output=True, text=True, timeout=60, cwd=ROOT,
    )  # fmt: skip
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "broker.port" in lines[0], r.stderr
    assert r.stdout == ""


def test_a_health_address_in_use_exits_2_naming_the_key(tmp_path):
    import socket

    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        p = write(tmp_path, f'[health]\nlisten = "127.0.0.1:{port}"\n')
        r = subprocess.run(
            [sys.executable, "-m", "daemon.cli", "run", "--config", str(p),
             "--journal", str(tmp_path / "j.db"), "--broker", "127.0.0.1:9"],
            capture_output=True, text=True, timeout=60, cwd=ROOT,
        )  # fmt: skip
    assert r.returncode == 2, r.stderr
    (line,) = r.stderr.strip().splitlines()
    assert line.startswith("hourwatch: health.listen: cannot listen on 127.0.0.1:"), r.stderr
    assert not (tmp_path / "j.db").exists()  # failed before touching the journal
