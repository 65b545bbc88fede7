"""The [notify] section: `hourwatch check --config` names the key of every problem in one
line (exit status 2): unknown role, unknown channel, missing secret, and the rest."""

from __future__ import annotations

from pathlib import Path

import pytest

from daemon.cli import main
from daemon.config import load_config
from daemon.errors import UserError

CHANNELS = """
[[notify.channels]]
name = "pager-mail"
kind = "smtp"
host = "127.0.0.1"
port = 2525
sender = "hourwatch@icu-east.example"

[[notify.channels]]
name = "unit-hook"
kind = "webhook"
url = "http://127.0.0.1:8099/pages"
secret_env = "HW_TEST_HOOK_KEY"

[[notify.channels]]
name = "alert-mgr"
kind = "hl7v2-mllp"
host = "127.0.0.1"
port = 2575
"""

ROUTES = """
[[notify.routes]]
role = "bedside-nurse"
channel = "pager-mail"
to = ["nurse-east@pager.example"]
ward = "icu-east"

[[notify.routes]]
role = "charge-nurse"
channel = "unit-hook"
to = ["charge-east"]

[[notify.routes]]
role = "icu-physician"
channel = "alert-mgr"
to = ["east-physician"]
"""

ENV = {"HW_TEST_HOOK_KEY": "invented-hook-key-0123456789"}


def write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "hw.toml"
    p.write_text(f'[journal]\npath = "{tmp_path / "j.db"}"\n' + text)
    return p


def error(path: Path, env: dict[str, str] | None = None) -> str:
    with pytest.raises(UserError) as exc:
        load_config(path, env=ENV if env is None else env)
    msg = str(exc.value)
    assert "\n" not in msg and msg.startswith(str(path)), msg
    return msg


def test_a_complete_section_loads(tmp_path):
    cfg = load_config(write(tmp_path, CHANNELS + ROUTES), env=ENV)
    assert [c.kind for c in cfg.notify.channels] == ["smtp", "webhook", "hl7v2-mllp"]
    assert cfg.notify.routes[0].ward == "icu-east"


def test_unknown_role_names_the_route(tmp_path):
    text = CHANNELS + ROUTES.replace('role = "charge-nurse"', 'role = "night-porter"')
    msg = error(write(tmp_path, text))
    assert "notify.routes.1.role: unknown role 'night-porter'" in msg
    assert "bedside-nurse" in msg  # it says which roles there are


def test_unknown_channel_names_the_route(tmp_path):
    text = CHANNELS + ROUTES.replace('channel = "alert-mgr"', 'channel = "fax"')
    msg = error(write(tmp_path, text))
    assert msg.endswith("notify.routes.2.channel: unknown channel 'fax' "
                        "(channels: pager-mail, unit-hook, alert-mgr)")  # fmt: skip


def test_missing_secret_names_the_key(tmp_path):
    msg = error(write(tmp_path, CHANNELS + ROUTES), env={})
    assert msg.endswith("notify.channels.1.secret_env: environment variable HW_TEST_HOOK_KEY "
                        "is not set")  # fmt: skip


def test_unreadable_password_file_names_the_key(tmp_path):
    text = CHANNELS.replace('sender = "hourwatch@icu-east.example"',
                            'sender = "hourwatch@icu-east.example"\nstarttls = true\n'
                            'username = "hw"\npassword_file = "no-such-file"') + ROUTES  # fmt: skip
    msg = error(write(tmp_path, text))
    assert "notify.channels.0.password_file: cannot read" in msg and "no-such-file" in msg


@pytest.mark.parametrize(("change", "expected"), [
    (('to = ["nurse-east@pager.example"]', 'to = ["not an address"]'),
     "notify.routes.0.to.0: 'not an address' is not a mail address"),
    (('name = "unit-hook"', 'name = "pager-mail"'),
     "notify.channels.1.name: channel 'pager-mail' is defined twice"),
    (('secret_env = "HW_TEST_HOOK_KEY"', ""), "give secret_env or secret_file"),
    (('kind = "hl7v2-mllp"', 'kind = "carrier-pigeon"'), "notify.channels.2"),
    (('url = "http://127.0.0.1:8099/pages"', 'url = "ftp://x/y"'), "url must be http"),
])  # fmt: skip
def test_other_mistakes_are_one_line_naming_the_key(tmp_path, change, expected):
    text = (CHANNELS + ROUTES).replace(*change)
    assert expected in error(write(tmp_path, text))


def test_auth_needs_starttls(tmp_path):
    text = CHANNELS.replace('sender = "hourwatch@icu-east.example"',
                            'sender = "hourwatch@icu-east.example"\nusername = "hw"\n'
                            'password_env = "HW_TEST_HOOK_KEY"') + ROUTES  # fmt: skip
    assert "set starttls = true" in error(write(tmp_path, text))


def test_ack_links_need_a_key_and_the_http_endpoint(tmp_path):
    base = CHANNELS + ROUTES + "\n[notify]\n"
    no_key = base.replace("[notify]\n", "") + ""
    text = '[notify]\nack_base_url = "https://hourwatch.icu-east.example"\n' + no_key
    assert "notify.ack_base_url: needs ack_secret_env or ack_secret_file" in error(
        write(tmp_path, text)
    )
    text = ('[notify]\nack_base_url = "https://hourwatch.icu-east.example"\n'
            'ack_secret_env = "HW_TEST_ACK_KEY"\n' + no_key)  # fmt: skip
    assert "notify.ack_secret_env: environment variable HW_TEST_ACK_KEY" in error(
        write(tmp_path, text)
    )
    env = ENV | {"HW_TEST_ACK_KEY": "short"}
    assert "at least 16 bytes" in error(write(tmp_path, text), env=env)
    env = ENV | {"HW_TEST_ACK_KEY": "invented-ack-key-0123456789"}
    off = '[health]\nlisten = ""\n' + text
    assert "notify.ack_base_url: the links are served on health.listen" in error(
        write(tmp_path, off), env=env
    )
    assert load_config(write(tmp_path, text), env=env).notify.ack_base_url


def test_check_command_prints_the_paging_section_or_one_line(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("HW_TEST_HOOK_KEY", ENV["HW_TEST_HOOK_KEY"])
    good = write(tmp_path, CHANNELS + ROUTES)
    assert main(["check", "--config", str(good)]) == 0
    out = capsys.readouterr().out
    assert "paging     3 channel(s)" in out
    assert "route   bedside-nurse    -> pager-mail: nurse-east@pager.example (ward icu-east only)" \
        in out  # fmt: skip
    assert "no route for" not in out  # the three roles of the shipped policy are routed
    one_role = write(tmp_path, CHANNELS + ROUTES.split('[[notify.routes]]\nrole = "charge')[0])
    assert main(["check", "--config", str(one_role)]) == 0
    assert "no route for charge-nurse, icu-physician: their pages stay on MQTT" in \
        capsys.readouterr().out  # fmt: skip
    bad = write(tmp_path, CHANNELS + ROUTES.replace('"icu-physician"', '"icu-doctor"'))
    assert main(["check", "--config", str(bad)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "notify.routes.2.role: unknown role 'icu-doctor'" in err[0]


def test_no_channels_means_pages_stay_on_mqtt(tmp_path, capsys):
    assert main(["check", "--config", str(write(tmp_path, ""))]) == 0
    assert "paging     no channels: pages stay on MQTT" in capsys.readouterr().out
