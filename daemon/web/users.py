"""The board's users: a local JSON file of names, roles and argon2id password hashes,
managed by `hourwatch user add|remove|list`.

Each user's roles must be roles of the escalation policy (the engine refuses any other
on an acknowledgement). The file is written whole, atomically, readable by its owner
only; the service re-reads it when it changes, so a user added or removed counts at
the next login. Passwords are never stored or logged, only their hashes.
"""

from __future__ import annotations

import contextlib
import os
import re
import tempfile
import threading
from datetime import UTC, datetime
from pathlib import Path
from typing import Annotated, Literal

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from ..engine.engine import ID_PATTERN
from ..errors import UserError

MIN_PASSWORD = 10  # characters; a station screen's users type it often, so no rules beyond
MAX_PASSWORD = 256
NAME = re.compile(ID_PATTERN)  # the engine's pattern for acknowledging users
_HASHER = PasswordHasher()  # argon2id with the library's current defaults


class UserEntry(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)

    roles: Annotated[list[Annotated[str, Field(min_length=1, max_length=64)]],
                     Field(min_length=1, max_length=16)]  # fmt: skip
    password_hash: Annotated[str, Field(min_length=20, max_length=512)]
    added: str = ""


class UserFile(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    schema_version: Literal[1] = Field(1, alias="schema")
    users: dict[Annotated[str, Field(pattern=ID_PATTERN)], UserEntry] = Field(
        default_factory=dict
    )


def read_users(path: Path) -> UserFile:
    """The file's users; none when the file does not exist. UserError when unreadable."""
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return UserFile()
    except OSError as exc:
        raise UserError(f"{path}: cannot read the users file: {exc.strerror}") from None
    try:
        return UserFile.model_validate_json(text)
    except ValidationError as exc:
        first = exc.errors()[0]
        where = ".".join(str(x) for x in first["loc"]) or "file"
        raise UserError(f"{path}: not a users file ({where}: {first['msg']})") from None


def write_users(path: Path, users: UserFile) -> None:
    """Atomically, mode 0600 (the hashes are not for other accounts on the machine)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=".users-", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as f:
            f.write(users.model_dump_json(by_alias=True, indent=2) + "\n")
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, 0o600)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


def check_name(name: str) -> None:
    if not NAME.match(name):
        raise UserError(f"user name {name!r}: letters, digits, '.', '_' and '-' only (up to 64); "
                        "never a patient's name or record number")  # fmt: skip


def check_roles(roles: list[str], policy_roles: set[str]) -> None:
    if not roles:
        raise UserError("give at least one --role")
    unknown = [r for r in roles if r not in policy_roles]
    if unknown:
        raise UserError(f"role {unknown[0]!r} is not a role of the escalation policy "
                        f"(roles: {', '.join(sorted(policy_roles))})")  # fmt: skip


def check_password(password: str) -> None:
    if not MIN_PASSWORD <= len(password) <= MAX_PASSWORD:
        raise UserError(f"the password must have {MIN_PASSWORD} to {MAX_PASSWORD} characters")


def add_user(path: Path, name: str, roles: list[str], password: str,
             policy_roles: set[str], replace: bool = False) -> None:  # fmt: skip
    check_name(name)
    check_roles(roles, policy_roles)
    check_password(password)
    users = read_users(path)
    if name in users.users and not replace:
        raise UserError(f"user {name!r} exists already (remove it first, or --replace)")
    entry = UserEntry(roles=list(dict.fromkeys(roles)), password_hash=_HASHER.hash(password),
                      added=datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ"))  # fmt: skip
    write_users(path, users.model_copy(update={"users": users.users | {name: entry}}))


def remove_user(path: Path, name: str) -> None:
    users = read_users(path)
    if name not in users.users:
        raise UserError(f"no user {name!r} in {path}")
    rest = {k: v for k, v in users.users.items() if k != name}
    write_users(path, users.model_copy(update={"users": rest}))


class UserStore:
    """The users file as the running service sees it: re-read when it changes."""

    def __init__(self, path: Path | None) -> None:
        self.path = path
        self._lock = threading.Lock()
        self._stamp: tuple[int, int] | None = None
        self._users = UserFile()
        self._dummy = _HASHER.hash("not a password of anyone")  # equal time for unknown names

    def _current(self) -> UserFile:
        if self.path is None:
            return UserFile()
        try:
            st = self.path.stat()
            stamp = (st.st_mtime_ns, st.st_size)
        except OSError:
            stamp = None
        with self._lock:
            if stamp != self._stamp:
                try:
                    self._users = read_users(self.path) if stamp is not None else UserFile()
                except UserError:
                    self._users = UserFile()  # a broken file lets nobody in
                self._stamp = stamp
            return self._users

    def roles(self, name: str) -> list[str] | None:
        entry = self._current().users.get(name)
        return None if entry is None else list(entry.roles)

    def count(self) -> int:
        return len(self._current().users)

    def verify(self, name: str, password: str) -> list[str] | None:
        """The user's roles when the password is theirs, else None (slow on purpose:
        run it off the event loop)."""
        entry = self._current().users.get(name) if len(password) <= MAX_PASSWORD else None
        try:
            if entry is None:
                _HASHER.verify(self._dummy, password[:MAX_PASSWORD] + "x")
                return None
            _HASHER.verify(entry.password_hash, password)
        except (VerifyMismatchError, VerificationError, InvalidHashError):
            return None
        return list(entry.roles)
