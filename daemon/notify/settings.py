"""The `[notify]` section of the service config: channels, routes, acknowledgement links
and the failure bound (docs/operations.md, "Paging"). pydantic is the single source of
truth for the format; `check_notify` adds what needs more than the file itself (the
escalation policy's roles, secrets from the environment or a file).
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Annotated, Literal
from urllib.parse import urlsplit

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from ..errors import UserError

Port = Annotated[int, Field(ge=1, le=65535)]
Name = Annotated[str, Field(pattern=r"^[a-z0-9][a-z0-9_-]{0,62}$")]
Role = Annotated[str, Field(pattern=r"^[a-z][a-z0-9-]{0,62}$")]
EnvName = Annotated[str, Field(pattern=r"^[A-Za-z_][A-Za-z0-9_]{0,127}$")]
Host = Annotated[str, Field(min_length=1, max_length=253)]
HL7Name = Annotated[str, Field(pattern=r"^[^|^~\\&\r\n]{0,180}$")]  # no HL7 delimiter
Timeout = Annotated[float, Field(gt=0, le=120)]
Listen = Annotated[str, Field(pattern=r"^\[?[A-Za-z0-9.:_-]+\]?:[0-9]{1,5}$")]
MAIL_ADDRESS = re.compile(r"^[^@\s<>,;\"]+@[^@\s<>,;\"]+\.[^@\s<>,;\"]+$")
RECIPIENT = re.compile(r"^[^\x00-\x1f\x7f]{1,128}$")  # an id in the receiving system


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class SmtpChannel(_Strict):
    """E-mail, e.g. to a pager or SMS gateway: one mail per recipient."""

    name: Name
    kind: Literal["smtp"]
    host: Host
    port: Port = 25
    sender: Annotated[str, Field(pattern=MAIL_ADDRESS.pattern)]
    starttls: bool = False  # upgrade the connection before anything else is said
    ca_file: Path | None = None  # CA for the server's certificate; default: the system's
    username: Annotated[str, Field(min_length=1, max_length=256)] | None = None
    password_env: EnvName | None = None
    password_file: Path | None = None
    timeout_s: Timeout = 10.0

    @model_validator(mode="after")
    def _auth(self) -> SmtpChannel:
        if self.password_env is not None and self.password_file is not None:
            raise ValueError("give password_env or password_file, not both")
        if (self.password_env or self.password_file) and not self.username:
            raise ValueError("a password needs a username")
        if self.username and not (self.password_env or self.password_file):
            raise ValueError("username needs password_env or password_file")
        if self.username and not self.starttls:
            raise ValueError("auth sends a password: set starttls = true")
        return self


class WebhookChannel(_Strict):
    """An HTTP POST of the page (with the alarm JSON), signed with HMAC-SHA256."""

    name: Name
    kind: Literal["webhook"]
    url: Annotated[str, Field(min_length=8, max_length=2000)]
    secret_env: EnvName | None = None  # the HMAC key
    secret_file: Path | None = None
    ca_file: Path | None = None  # for https: CA of the server's certificate
    timeout_s: Timeout = 10.0

    @field_validator("url")
    @classmethod
    def _url(cls, v: str) -> str:
        u = urlsplit(v)
        if u.scheme not in ("http", "https") or not u.hostname:
            raise ValueError("url must be http:// or https:// with a host")
        return v

    @model_validator(mode="after")
    def _secret(self) -> WebhookChannel:
        if (self.secret_env is None) == (self.secret_file is None):
            raise ValueError("give secret_env or secret_file (the HMAC key), one of them")
        return self


class Hl7Channel(_Strict):
    """HL7 v2.6 ORU^R40 (Report Alert) over MLLP to an alert manager."""

    name: Name
    kind: Literal["hl7v2-mllp"]
    host: Host
    port: Port
    sending_application: HL7Name = "HOURWATCH"
    sending_facility: HL7Name = ""
    receiving_application: HL7Name = ""
    receiving_facility: HL7Name = ""
    timeout_s: Timeout = 10.0
    # Optional: where the alert manager sends status reports (ORU^R41) back; a status in
    # `ack_statuses` acknowledges the alarm as the role its page went to (docs/operations.md)
    status_listen: Listen | None = None  # "host:port"
    ack_statuses: list[Annotated[str, Field(min_length=1, max_length=40)]] = Field(
        default_factory=lambda: ["accepted"]
    )


Channel = Annotated[SmtpChannel | WebhookChannel | Hl7Channel, Field(discriminator="kind")]


class Route(_Strict):
    """Who of a role is paged over which channel (one page per address)."""

    role: Role
    channel: Name
    to: Annotated[list[Annotated[str, Field(min_length=1, max_length=254)]],
                  Field(min_length=1, max_length=64)]  # fmt: skip
    ward: Annotated[str, Field(min_length=1, max_length=64)] | None = None  # only this ward


class NotifyConfig(_Strict):
    channels: list[Channel] = Field(default_factory=list)
    routes: list[Route] = Field(default_factory=list)
    # Acknowledgement links in mail and webhook pages: the address people open (the
    # service's HTTP endpoint, usually behind a TLS reverse proxy), and the token key.
    ack_base_url: Annotated[str, Field(max_length=500)] | None = None
    ack_secret_env: EnvName | None = None
    ack_secret_file: Path | None = None
    ack_link_valid_s: Annotated[int, Field(ge=60, le=7 * 86400)] = 3600
    # A channel is failing (a technical alarm) after this many failed attempts in a row,
    # or this long after its first failure since it last delivered, whichever is first.
    fail_after_attempts: Annotated[int, Field(ge=1, le=100)] = 3
    fail_after_s: Annotated[float, Field(gt=0, le=3600)] = 60.0
    retry_min_s: Annotated[float, Field(gt=0, le=600)] = 2.0
    retry_max_s: Annotated[float, Field(gt=0, le=3600)] = 60.0
    # A page not confirmed this long after its alarm event is given up (journaled).
    give_up_after_s: Annotated[float, Field(ge=60, le=7 * 86400)] = 7200.0
    # The failing-channel alarm: its priority, and roles told besides those routed on
    # the failing channel (each over its routes on the other channels).
    technical_priority: Literal["high", "medium", "low"] = "medium"
    technical_roles: list[Role] = Field(default_factory=list)

    @field_validator("ack_base_url")
    @classmethod
    def _base(cls, v: str | None) -> str | None:
        if v is None:
            return v
        u = urlsplit(v)
        if u.scheme not in ("http", "https") or not u.hostname or u.query or u.fragment:
            raise ValueError("ack_base_url must be an http(s) URL without query or fragment")
        return v.rstrip("/")

    @property
    def enabled(self) -> bool:
        return bool(self.channels)


def policy_roles(policy: object) -> set[str]:
    """Every role an escalation policy names (any priority, any tier)."""
    roles: set[str] = set()
    for prio in ("high", "medium", "low", "info"):
        for tier in getattr(policy, prio).tiers:
            roles.update(tier.roles)
    return roles


@dataclass(frozen=True)
class Secrets:
    """Secrets read at start: by channel name, and the acknowledgement-link key."""

    channel: Mapping[str, str] = field(default_factory=dict)
    ack_key: bytes | None = None


def _read_secret(key: str, env_name: str | None, path: Path | None,
                 env: Mapping[str, str]) -> str:  # fmt: skip
    if env_name is not None:
        value = env.get(env_name, "")
        if not value:
            raise UserError(f"{key}_env: environment variable {env_name} is not set")
        return value
    assert path is not None
    try:
        value = path.read_text(encoding="utf-8").rstrip("\r\n")
    except OSError as exc:
        raise UserError(f"{key}_file: cannot read {path}: {exc.strerror}") from None
    if not value:
        raise UserError(f"{key}_file: {path} is empty")
    return value


def _structure(cfg: NotifyConfig) -> None:
    """Checks across keys; ValueError("KEY: message") with KEY under notify."""
    names = [c.name for c in cfg.channels]
    for i, n in enumerate(names):
        if n in names[:i]:
            raise ValueError(f"channels.{i}.name: channel {n!r} is defined twice")
    kinds = {c.name: c.kind for c in cfg.channels}
    for i, r in enumerate(cfg.routes):
        if r.channel not in kinds:
            known = ", ".join(names) or "none defined"
            raise ValueError(f"routes.{i}.channel: unknown channel {r.channel!r} "
                             f"(channels: {known})")  # fmt: skip
        pattern = MAIL_ADDRESS if kinds[r.channel] == "smtp" else RECIPIENT
        for j, to in enumerate(r.to):
            if not pattern.match(to):
                what = "a mail address" if kinds[r.channel] == "smtp" else "a recipient id"
                raise ValueError(f"routes.{i}.to.{j}: {to!r} is not {what}")
    if cfg.retry_max_s < cfg.retry_min_s:
        raise ValueError("retry_max_s: must be at least retry_min_s")
    if cfg.ack_base_url is not None and (
        (cfg.ack_secret_env is None) == (cfg.ack_secret_file is None)
    ):
        raise ValueError("ack_base_url: needs ack_secret_env or ack_secret_file, one of them")


def check_notify(cfg: NotifyConfig, roles: set[str], where: str,
                 env: Mapping[str, str] | None = None) -> Secrets:  # fmt: skip
    """What one key alone cannot say: channels named by routes exist, addresses suit their
    channel, every route and technical role is a role of the escalation policy, and every
    secret can be read. UserError: one line naming the key."""
    env = os.environ if env is None else env
    try:
        _structure(cfg)
    except ValueError as exc:
        raise UserError(f"{where}: notify.{exc}") from None
    known = ", ".join(sorted(roles))
    for i, r in enumerate(cfg.routes):
        if r.role not in roles:
            raise UserError(f"{where}: notify.routes.{i}.role: unknown role {r.role!r} "
                            f"(escalation policy roles: {known})")  # fmt: skip
    for i, role in enumerate(cfg.technical_roles):
        if role not in roles:
            raise UserError(f"{where}: notify.technical_roles.{i}: unknown role {role!r} "
                            f"(escalation policy roles: {known})")  # fmt: skip
    secrets: dict[str, str] = {}
    try:
        for i, c in enumerate(cfg.channels):
            key = f"notify.channels.{i}."
            if isinstance(c, SmtpChannel) and c.username:
                secrets[c.name] = _read_secret(key + "password", c.password_env,
                                               c.password_file, env)  # fmt: skip
            elif isinstance(c, WebhookChannel):
                secrets[c.name] = _read_secret(key + "secret", c.secret_env, c.secret_file, env)
        ack_key = None
        if cfg.ack_base_url is not None:
            ack_key = _read_secret("notify.ack_secret", cfg.ack_secret_env,
                                   cfg.ack_secret_file, env).encode()  # fmt: skip
            if len(ack_key) < 16:
                raise UserError("notify.ack_secret: the key must be at least 16 bytes")
    except UserError as exc:
        raise UserError(f"{where}: {exc}") from None
    for i, c in enumerate(cfg.channels):
        ca = getattr(c, "ca_file", None)
        if ca is not None and not Path(ca).is_file():
            raise UserError(f"{where}: notify.channels.{i}.ca_file: no such file: {ca}")
    return Secrets(secrets, ack_key)
