"""Service configuration: one TOML file, validated by pydantic, with command-line and
environment overrides. A bad value is one line naming the key (exit status 2).

Secrets come from the environment or a password file rather than the config file where
possible: HOURWATCH_MQTT_USERNAME, HOURWATCH_MQTT_PASSWORD, HOURWATCH_MQTT_PASSWORD_FILE.
"""

from __future__ import annotations

import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    SecretStr,
    ValidationError,
    field_validator,
    model_validator,
)

from .engine.engine import (
    CLINICAL_AHEAD_S,
    ID_PATTERN,
    MAX_UNBOUND_DEVICES,
    UNBOUND_EXPIRY_S,
)
from .errors import UserError, describe_validation, read_toml
from .journal_api import JournalTarget, is_url, pg_url
from .notify.settings import NotifyConfig

ENV_USERNAME = "HOURWATCH_MQTT_USERNAME"
ENV_PASSWORD = "HOURWATCH_MQTT_PASSWORD"
ENV_PASSWORD_FILE = "HOURWATCH_MQTT_PASSWORD_FILE"

Port = Annotated[int, Field(ge=1, le=65535)]
TOPIC_PREFIX = r"^[A-Za-z0-9_\-]+(/[A-Za-z0-9_\-]+)*$"  # no wildcards, no empty level


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class TlsConfig(_Strict):
    ca_file: Path  # the CA that signed the broker's certificate
    cert_file: Path | None = None  # client certificate, when the broker asks for one
    key_file: Path | None = None

    @model_validator(mode="after")
    def _pair(self) -> TlsConfig:
        if (self.cert_file is None) != (self.key_file is None):
            raise ValueError("cert_file and key_file go together")
        for p in (self.ca_file, self.cert_file, self.key_file):
            if p is not None and not p.is_file():
                raise ValueError(f"no such file: {p}")
        return self


class BrokerConfig(_Strict):
    host: Annotated[str, Field(min_length=1, max_length=253)] = "127.0.0.1"
    port: Port = 1883
    protocol: Literal["3.1.1", "5"] = "5"
    # Fixed, so the broker keeps our session (and queues readings) across restarts.
    client_id: Annotated[str, Field(min_length=1, max_length=128)] = "hourwatch"
    keepalive_s: Annotated[int, Field(ge=5, le=3600)] = 30
    # MQTT 5 only: how long the broker keeps the session while we are away.
    session_expiry_s: Annotated[int, Field(ge=60, le=0xFFFFFFFE)] = 7 * 86400
    # MQTT 5 only: how many unacknowledged readings the broker may send us at once. We
    # acknowledge after the journal's fsync, so this bounds the batch (3.1.1: the
    # broker's own max_inflight_messages, 20 by default, bounds it).
    receive_maximum: Annotated[int, Field(ge=20, le=65535)] = 256
    reconnect_min_s: Annotated[int, Field(ge=1, le=60)] = 1
    reconnect_max_s: Annotated[int, Field(ge=1, le=600)] = 30
    username: Annotated[str, Field(min_length=1, max_length=256)] | None = None
    password: SecretStr | None = None
    password_file: Path | None = None
    tls: TlsConfig | None = None

    @field_validator("protocol", mode="before")
    @classmethod
    def _protocol_text(cls, v: object) -> object:
        return str(v) if isinstance(v, int | float) and not isinstance(v, bool) else v

    @model_validator(mode="after")
    def _consistent(self) -> BrokerConfig:
        if self.password is not None and self.password_file is not None:
            raise ValueError("give password or password_file, not both")
        if self.reconnect_max_s < self.reconnect_min_s:
            raise ValueError("reconnect_max_s must be at least reconnect_min_s")
        return self

    def secret(self) -> str | None:
        """The password, read from its file when one is named."""
        if self.password is not None:
            return self.password.get_secret_value()
        if self.password_file is not None:
            try:
                text = self.password_file.read_text(encoding="utf-8")
            except OSError as exc:
                raise UserError(
                    f"broker.password_file: cannot read {self.password_file}: {exc.strerror}"
                ) from None
            return text.rstrip("\r\n")
        return None


class JournalConfig(_Strict):
    path: Path = Path("hourwatch-journal.db")
    retention_days: Annotated[float, Field(gt=0, le=3650)] = 30.0
    # Size cap of the journal file in bytes (0: none but the disk's). Full disk or cap:
    # the service acknowledges nothing more, says so, and retries every full_retry_s
    # (docs/operations.md, "When the journal's disk is full").
    max_bytes: Annotated[int, Field(ge=0)] = 0
    full_retry_s: Annotated[float, Field(gt=0, le=300)] = 5.0
    # A PostgreSQL journal instead of the file: a libpq URL without a password
    # ("postgresql://hourwatch@db.example:5432/hourwatch"). The password comes from
    # HOURWATCH_PG_PASSWORD, the file HOURWATCH_PG_PASSWORD_FILE names, PGPASSWORD or
    # ~/.pgpass. With a URL, instances of one config form an active/standby group ([ha]).
    url: Annotated[str, Field(min_length=1, max_length=2000)] | None = None
    pool_size: Annotated[int, Field(ge=2, le=64)] = 4  # connections per instance

    @field_validator("url")
    @classmethod
    def _url(cls, v: str | None) -> str | None:
        if v is not None:
            try:
                pg_url(v)
            except UserError as exc:
                raise ValueError(str(exc).removeprefix("journal.url: ")) from None
        return v

    def target(self) -> JournalTarget:
        """Where the journal is: the PostgreSQL URL when given, else the file."""
        return pg_url(self.url) if self.url is not None else self.path


class HaConfig(_Strict):
    """Active/standby (daemon/ha.py); only with a PostgreSQL journal."""

    # The group's name in the lease table; default: broker.client_id (one group per
    # client id: the active is the only one connected with it).
    group: Annotated[str, Field(min_length=1, max_length=128)] | None = None
    # This instance's name in the lease table and the logs; default: host:pid.
    instance: Annotated[str, Field(min_length=1, max_length=128)] | None = None
    # An active that has not renewed its lease for this long is replaced. A dead one
    # (its database connection gone) is replaced at the next poll.
    lease_s: Annotated[float, Field(ge=2, le=300)] = 8.0
    # A standby looks at the lease this often.
    poll_s: Annotated[float, Field(ge=0.1, le=30)] = 0.5

    @model_validator(mode="after")
    def _poll(self) -> HaConfig:
        if self.poll_s * 2 > self.lease_s:
            raise ValueError("poll_s must be at most half of lease_s")
        return self


class ShardConfig(_Strict):
    """Sharding a hospital by ward: this group watches these wards only. A bed context
    naming another ward is ignored (logged once per bed), and so are that bed's inputs
    and its meters' readings. Empty: every ward."""

    wards: list[Annotated[str, Field(min_length=1, max_length=64)]] = Field(
        default_factory=list
    )


class HealthConfig(_Strict):
    # "host:port"; port 0 picks a free one (logged); "" turns the endpoint off
    listen: str = "127.0.0.1:9108"

    @field_validator("listen")
    @classmethod
    def _address(cls, v: str) -> str:
        if v:
            split_address(v, allow_zero=True)
        return v


class BoardConfig(_Strict):
    """The ward board (daemon/web): off unless `listen` is set."""

    # "HOST:PORT" (or just "PORT": 127.0.0.1); "" = no board. The board is one HTTP
    # application with /health and /metrics, served on this address and health.listen.
    listen: str = ""
    # users who may log in and acknowledge (`hourwatch user add`); relative to the file
    users_file: Path = Path("hourwatch-users.json")
    # false: anyone on the network may look (a station screen); true: looking needs a login
    require_login: bool = False
    # a login lasts this long without use (one shift)
    session_hours: Annotated[float, Field(gt=0, le=24)] = 12.0
    # true when people reach the board over HTTPS (a reverse proxy): cookies go only there
    secure_cookies: bool = False
    # failed logins allowed per user name, and per client address, in login_window_s
    login_failures_per_user: Annotated[int, Field(ge=1, le=100)] = 5
    login_failures_per_address: Annotated[int, Field(ge=1, le=1000)] = 20
    login_window_s: Annotated[float, Field(ge=10, le=86400)] = 900.0

    @field_validator("listen")
    @classmethod
    def _address(cls, v: str) -> str:
        v = v.strip()
        if v.isdigit() or (v.startswith(":") and v[1:].isdigit()):
            v = "127.0.0.1:" + v.lstrip(":")  # loopback unless a host is named
        if v:
            split_address(v, allow_zero=True)
        return v


class PublishConfig(_Strict):
    # An alarm not confirmed (PUBACK) this long after it was raised is a technical
    # alarm of the service itself.
    confirm_timeout_s: Annotated[float, Field(gt=0, le=3600)] = 30.0
    # Retained bed state is refreshed at most this often unless an alarm changes.
    state_interval_s: Annotated[float, Field(ge=0, le=3600)] = 10.0


class LimitsConfig(_Strict):
    """Bounds on what hostile or broken input can cost (docs/operations.md)."""

    # A payload over this is never read or journaled: it becomes the outcome too_large.
    # Meter messages are ~100-300 bytes and a bed context a few kB. Keep it at or below
    # the broker's message_size_limit (deploy/mosquitto/mosquitto.conf).
    max_payload_bytes: Annotated[int, Field(ge=1024, le=16 * 1024 * 1024)] = 65536
    # Received messages waiting for the worker. When full, the service stops taking
    # from the broker (paho's thread waits), so the broker holds the rest.
    inbound_queue: Annotated[int, Field(ge=100, le=1_000_000)] = 20_000
    # /health says "degraded" past either: waiting messages, or seconds from a
    # message's arrival to its journaling.
    degraded_backlog: Annotated[int, Field(ge=1)] = 5_000
    degraded_lag_s: Annotated[float, Field(gt=0)] = 5.0
    # A clinical time (intake, vitals, labs, context episodes) further ahead of its
    # receive time than this is refused as future_time.
    clinical_ahead_s: Annotated[float, Field(ge=0, le=7 * 86400)] = CLINICAL_AHEAD_S
    # Entries of meters on no bed: forgotten after this silence, and at most this many.
    unbound_expiry_s: Annotated[float, Field(ge=60, le=30 * 86400)] = UNBOUND_EXPIRY_S
    max_unbound_devices: Annotated[int, Field(ge=10, le=1_000_000)] = MAX_UNBOUND_DEVICES

    @model_validator(mode="after")
    def _backlog(self) -> LimitsConfig:
        if self.degraded_backlog > self.inbound_queue:
            raise ValueError("degraded_backlog must not exceed inbound_queue")
        return self


class IdentifiersConfig(_Strict):
    # Bed ids, ward names and acknowledging users must match this. Never a patient's
    # name or record number (docs/operations.md).
    pattern: str = ID_PATTERN

    @field_validator("pattern")
    @classmethod
    def _safe(cls, v: str) -> str:
        try:
            rx = re.compile(v)
        except re.error as exc:
            raise ValueError(f"not a regular expression: {exc}") from None
        for bad in ("a/b", "+", "#", "", "a b"):
            if rx.match(bad):
                raise ValueError(f"must not admit {bad!r} (topic separators, wildcards, "
                                 "spaces or nothing)")  # fmt: skip
        return v


class AckConfig(_Strict):
    # true: acknowledgements only on {prefix}/ack/{user}, whose user the broker's ACL
    # vouches for (deploy/mosquitto/acl). false: also the shared {prefix}/ack with the
    # person in the payload, for a broker without authentication (the demo).
    per_user_topic: bool = True
    # Optional staff list: user -> the roles (of the escalation policy) they may
    # acknowledge in. Empty: any user, in any role the policy names.
    users: dict[Annotated[str, Field(min_length=1, max_length=64)], list[str]] = Field(
        default_factory=dict
    )


class RecoveryConfig(_Strict):
    # Re-fed on restart beyond the longest rule window, so that alarm episodes that
    # began just before the window start are rebuilt with the same ids.
    margin_s: Annotated[float, Field(ge=0, le=7 * 86400)] = 3600.0
    # An engine snapshot is journaled every this many seconds of engine time, and at a
    # clean stop; a restart loads the newest and feeds only the messages after it.
    # 0: never (every restart re-feeds the longest rule window).
    snapshot_every_s: Annotated[float, Field(ge=0, le=86400)] = 900.0


class ServiceConfig(_Strict):
    schema_version: Literal[1] = Field(1, alias="schema")
    topic_prefix: Annotated[str, Field(pattern=TOPIC_PREFIX, max_length=128)] = "hourwatch"
    profiles: Path | None = None  # folder; None = the profiles shipped with Hourwatch
    rules: Path | None = None  # folder with escalation.toml; None = the shipped rules
    # per-meter calibration (factor, offset_ml) kept apart from the bed contexts; optional
    devices: Path | None = None
    log_level: Literal["debug", "info", "warning", "error"] = "info"
    # pages and summaries show local clock time in this zone (IANA name); data stays UTC
    timezone: Annotated[str, Field(min_length=1, max_length=64)] = "UTC"
    broker: BrokerConfig = BrokerConfig()
    journal: JournalConfig = JournalConfig()
    health: HealthConfig = HealthConfig()
    board: BoardConfig = BoardConfig()  # the ward board; off unless board.listen is set
    publish: PublishConfig = PublishConfig()
    recovery: RecoveryConfig = RecoveryConfig()
    notify: NotifyConfig = NotifyConfig()  # paging channels; none = pages stay on MQTT
    limits: LimitsConfig = LimitsConfig()
    identifiers: IdentifiersConfig = IdentifiersConfig()
    ack: AckConfig = AckConfig()
    ha: HaConfig = HaConfig()
    shard: ShardConfig = ShardConfig()

    model_config = ConfigDict(extra="forbid", frozen=True, populate_by_name=True)

    @field_validator("timezone")
    @classmethod
    def _zone(cls, name: str) -> str:
        zone_info(name)
        return name


def zone_info(name: str) -> ZoneInfo:
    """The time zone `name` (IANA, e.g. "Europe/Berlin"); ValueError with a plain message."""
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(
            f"unknown time zone {name!r} (an IANA name such as Europe/Berlin)"
        ) from None


def split_address(text: str, *, allow_zero: bool = False) -> tuple[str, int]:
    """'host:port' (or '[v6]:port') to a pair; ValueError with a plain message."""
    host, sep, port_text = text.strip().rpartition(":")
    host = host.strip("[]")
    if not sep or not host or not port_text.isdigit():
        raise ValueError(f"expected HOST:PORT, got {text!r}")
    port = int(port_text)
    if not ((allow_zero and port == 0) or 1 <= port <= 65535):
        raise ValueError(f"port out of range in {text!r}")
    return host, port


def _resolve(base: Path, data: dict[str, Any]) -> None:
    """Relative paths in a config file are relative to the file, not to the cwd."""

    def fix(table: Mapping[str, Any] | None, keys: tuple[str, ...]) -> None:
        if not isinstance(table, dict):
            return
        for k in keys:
            v = table.get(k)
            if isinstance(v, str) and v and not Path(v).is_absolute():
                table[k] = str(base / v)

    fix(data, ("profiles", "rules", "devices"))
    fix(data.get("journal"), ("path",))
    fix(data.get("board"), ("users_file",))
    broker = data.get("broker")
    fix(broker, ("password_file",))
    if isinstance(broker, dict):
        fix(broker.get("tls"), ("ca_file", "cert_file", "key_file"))
    notify = data.get("notify")
    if isinstance(notify, dict):
        fix(notify, ("ack_secret_file",))
        for channel in notify.get("channels") or []:
            fix(channel, ("ca_file", "password_file", "secret_file"))


def _set(data: dict[str, Any], dotted: str, value: object) -> None:
    *parents, last = dotted.split(".")
    for key in parents:
        sub = data.get(key)
        if not isinstance(sub, dict):
            sub = data[key] = {}
        data = sub
    data[last] = value


def load_config(
    path: Path | None = None,
    *,
    broker: str | None = None,
    journal: Path | str | None = None,
    env: Mapping[str, str] | None = None,
) -> ServiceConfig:
    """The config file (or the defaults), then command-line options, then secrets from
    the environment. Raises UserError with one line naming the key."""
    env = os.environ if env is None else env
    where = str(path) if path is not None else "configuration"
    data: dict[str, Any] = {}
    if path is not None:
        data = read_toml(path)
        _resolve(path.resolve().parent, data)
    if broker is not None:
        try:
            host, port = split_address(broker)
        except ValueError as exc:
            raise UserError(f"--broker: {exc}") from None
        _set(data, "broker.host", host)
        _set(data, "broker.port", port)
    if isinstance(journal, str) and is_url(journal):
        _set(data, "journal.url", journal)
    elif journal is not None:
        _set(data, "journal.path", str(journal))
        _set(data, "journal.url", None)
    if env.get(ENV_USERNAME):
        _set(data, "broker.username", env[ENV_USERNAME])
    if env.get(ENV_PASSWORD):
        _set(data, "broker.password", env[ENV_PASSWORD])
        _set(data, "broker.password_file", None)
    elif env.get(ENV_PASSWORD_FILE):
        _set(data, "broker.password_file", env[ENV_PASSWORD_FILE])
        _set(data, "broker.password", None)
    try:
        cfg = ServiceConfig.model_validate(data)
    except ValidationError as exc:
        raise UserError(describe_validation(Path(where), exc).replace("\n", " ")) from None
    if cfg.broker.password_file is not None:
        cfg.broker.secret()  # unreadable file: say so now, not at the first connect
    if cfg.notify.channels or cfg.notify.routes:  # channels, roles, secrets
        from .notify.settings import check_notify, policy_roles
        from .rule_files import load_policy

        check_notify(cfg.notify, policy_roles(load_policy(cfg.rules)), where, env)
        if cfg.notify.ack_base_url and not (cfg.health.listen or cfg.board.listen):
            raise UserError(f"{where}: notify.ack_base_url: the links are served on "
                            "health.listen and board.listen, which are both off")  # fmt: skip
    if cfg.journal.url is not None and cfg.board.listen and cfg.board.listen == cfg.health.listen:
        # an active/standby member serves /health itself, and the board only while active
        raise UserError(f"{where}: board.listen: with a PostgreSQL journal (active/standby) the "
                        "board needs an address of its own, not health.listen's")  # fmt: skip
    return cfg
