"""`hourwatch user add|remove|list`: argon2id hashes in a 0600 file, roles from the
escalation policy, one clear line for bad input."""

from __future__ import annotations

import io
import json
import stat

import pytest

from daemon.cli import main
from daemon.web.users import UserStore, read_users

PASSWORD = "invented-password-2"  # test account only


def run(args, stdin="", monkeypatch=None, capsys=None):
    if monkeypatch is not None:
        monkeypatch.setattr("sys.stdin", io.StringIO(stdin))
    return main(["user", *args])


def test_add_list_remove(tmp_path, monkeypatch, capsys):
    f = tmp_path / "users.json"
    code = run(["add", "nurse-a", "--role", "bedside-nurse", "--users-file", str(f),
                "--password-stdin"], PASSWORD + "\n", monkeypatch)  # fmt: skip
    assert code == 0
    text = f.read_text()
    assert PASSWORD not in text
    entry = json.loads(text)["users"]["nurse-a"]
    assert entry["roles"] == ["bedside-nurse"]
    assert entry["password_hash"].startswith("$argon2id$")
    assert stat.S_IMODE(f.stat().st_mode) == 0o600
    assert UserStore(f).verify("nurse-a", PASSWORD) == ["bedside-nurse"]
    assert UserStore(f).verify("nurse-a", PASSWORD + "x") is None
    assert UserStore(f).verify("nobody", PASSWORD) is None
    capsys.readouterr()
    assert run(["list", "--users-file", str(f)]) == 0
    out = capsys.readouterr().out
    assert "nurse-a" in out and "bedside-nurse" in out and "argon2" not in out
    assert run(["remove", "nurse-a", "--users-file", str(f)]) == 0
    assert read_users(f).users == {}


@pytest.mark.parametrize(("args", "stdin", "says"), [
    (["nurse-a", "--role", "night-owl"], PASSWORD, "not a role of the escalation policy"),
    (["nurse a", "--role", "bedside-nurse"], PASSWORD, "letters, digits"),
    (["nurse-a", "--role", "bedside-nurse"], "short", "10 to 256 characters"),
    (["nurse-a", "--role", "bedside-nurse"], "", "standard input is empty"),
])  # fmt: skip
def test_bad_input_is_one_line_and_exit_2(tmp_path, monkeypatch, capsys, args, stdin, says):
    f = tmp_path / "users.json"
    code = run(["add", *args, "--users-file", str(f), "--password-stdin"],
               stdin + ("\n" if stdin else ""), monkeypatch)  # fmt: skip
    err = capsys.readouterr().err
    assert code == 2 and says in err and len(err.strip().splitlines()) == 1
    assert not f.exists()


def test_a_user_is_added_once_unless_replaced(tmp_path, monkeypatch, capsys):
    f = tmp_path / "users.json"
    base = ["add", "nurse-a", "--users-file", str(f), "--password-stdin"]
    assert run([*base, "--role", "bedside-nurse"], PASSWORD, monkeypatch) == 0
    assert run([*base, "--role", "charge-nurse"], PASSWORD, monkeypatch) == 2
    assert "exists already" in capsys.readouterr().err
    assert run([*base, "--role", "charge-nurse", "--replace"], PASSWORD, monkeypatch) == 0
    assert read_users(f).users["nurse-a"].roles == ["charge-nurse"]
    assert run(["remove", "nobody", "--users-file", str(f)]) == 2


def test_the_service_store_follows_the_file(tmp_path, monkeypatch):
    f = tmp_path / "users.json"
    store = UserStore(f)
    assert store.roles("nurse-a") is None and store.count() == 0
    run(["add", "nurse-a", "--role", "bedside-nurse", "--users-file", str(f),
         "--password-stdin"], PASSWORD, monkeypatch)  # fmt: skip
    assert store.roles("nurse-a") == ["bedside-nurse"]
    f.write_text("{not json")
    assert store.roles("nurse-a") is None  # a broken file lets nobody in


def test_the_users_file_comes_from_the_config(tmp_path, monkeypatch, capsys):
    cfg = tmp_path / "hourwatch.toml"
    cfg.write_text('[board]\nlisten = "8099"\nusers_file = "staff.json"\n')
    assert run(["add", "nurse-a", "--role", "bedside-nurse", "--config", str(cfg),
                "--password-stdin"], PASSWORD, monkeypatch) == 0  # fmt: skip
    assert (tmp_path / "staff.json").is_file()
    capsys.readouterr()
    assert main(["check", "--config", str(cfg)]) == 0
    out = capsys.readouterr().out
    assert "board      http://127.0.0.1:8099/" in out and "1 user(s)" in out
