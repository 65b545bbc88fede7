"""`hourwatch check --config FILE`: validate what `hourwatch run` would load, and say what
it would do (subscriptions, journal, broker, health address), without connecting to the
broker or opening the journal for writing. A problem is one line naming the file and
key, exit status 2, as for `hourwatch run`."""

from __future__ import annotations

import argparse
import os
from pathlib import Path

from ..config import ServiceConfig, load_config
from ..errors import UserError
from ..journal import is_journal
from ..notify.settings import policy_roles
from ..profile_files import BUNDLED as BUNDLED_PROFILES
from ..profile_files import load_profiles
from ..rule_files import BUNDLED as BUNDLED_RULES
from ..rule_files import POLICY_FILE
from ..service import Service


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser(
        "check", help="validate a service config, its profiles and rules; show what run would do"
    )
    c.add_argument("--config", type=Path, default=None, help="service config (TOML)")
    c.add_argument("--broker", default=None, metavar="HOST:PORT", help="as for run")
    c.add_argument("--journal", default=None, metavar="FILE|URL", help="as for run")
    c.set_defaults(run=run)


def check_journal(cfg: ServiceConfig, where: str) -> str:
    """What run would do with the journal path; UserError naming journal.path if it could
    not use it. Reads nothing but the file's header: a running service may hold it.
    A PostgreSQL journal is not contacted (check connects to nothing): its URL is shown
    with the active/standby group it forms."""
    if cfg.journal.url is not None:
        group = cfg.ha.group or cfg.broker.client_id
        wards = ", ".join(cfg.shard.wards) if cfg.shard.wards else "every ward"
        return (f"{cfg.journal.url} (PostgreSQL; active/standby group {group!r}, lease "
                f"{cfg.ha.lease_s:g} s; wards: {wards})")  # fmt: skip
    path = cfg.journal.path
    folder = path.resolve().parent
    if path.exists():
        if path.is_dir():
            raise UserError(f"{where}: journal.path: {path} is a folder, not a file")
        if not is_journal(path):
            raise UserError(f"{where}: journal.path: {path} exists but is not a Hourwatch journal")
        if not os.access(path, os.R_OK | os.W_OK):
            raise UserError(f"{where}: journal.path: {path} is not readable and writable by us")
        return f"{path} (existing journal, {path.stat().st_size} bytes)"
    if not folder.is_dir():
        raise UserError(f"{where}: journal.path: folder {folder} does not exist")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise UserError(f"{where}: journal.path: cannot create files in {folder}")
    return f"{path} (created at the first start)"


def run(args: argparse.Namespace) -> int:
    where = str(args.config) if args.config is not None else "configuration"
    cfg = load_config(args.config, broker=args.broker, journal=args.journal)
    # The service's own loading: profiles, rules, the escalation policy and the engine
    # built from them, so that check and run can never disagree about a file.
    svc = Service(cfg)
    profiles = {p.subscription: p for p in load_profiles(cfg.profiles)}
    journal = check_journal(cfg, where)
    b = cfg.broker
    if b.password is not None:
        auth = f"username {b.username or '(none)'}, password given"
    elif b.password_file is not None:
        auth = f"username {b.username or '(none)'}, password from {b.password_file}"
    else:
        auth = f"username {b.username}, no password" if b.username else "anonymous"
    rules_dir = cfg.rules or BUNDLED_RULES
    policy = rules_dir / POLICY_FILE
    if not policy.is_file():
        policy = BUNDLED_RULES / POLICY_FILE
    enabled = [r.id for r in svc.rules if r.enabled]
    disabled = [r.id for r in svc.rules if not r.enabled]

    print(f"ok  {where}")
    print(f"broker     {b.host}:{b.port}  MQTT {b.protocol}  client id {b.client_id!r}  "
          f"{'TLS (CA ' + str(b.tls.ca_file) + ')' if b.tls else 'no TLS'}  {auth}")  # fmt: skip
    print(f"journal    {journal}, kept {cfg.journal.retention_days:g} days")
    listen = cfg.health.listen
    print(f"health     {f'http://{listen}/health and /metrics' if listen else 'off'}")
    print_board(cfg)
    print(f"profiles   {cfg.profiles or BUNDLED_PROFILES} ({len(profiles)})")
    print(f"rules      {rules_dir} ({len(enabled)} enabled"
          + (f", disabled: {', '.join(disabled)}" if disabled else "") + ")")  # fmt: skip
    print(f"escalation {policy}")
    print(f"recovery   re-feeds {(svc.window_s) / 3600:g} h of journal at start")
    print("subscribes (QoS 1):")
    prefix = cfg.topic_prefix
    for topic in svc.subscriptions:
        p = profiles.get(topic)
        if p is not None:
            what = f"profile {p.name}: {p.volume.semantics}, every {p.timing.period_s} s"
        elif topic == f"{prefix}/ack/+":
            what = "alarm acknowledgements, one topic per user (broker ACL)"
        elif topic == f"{prefix}/ack":
            what = "alarm acknowledgements naming the person (no broker logins)"
        elif topic == f"{prefix}/beds/+/+":
            what = "bed context and clinical inputs"
        else:
            what = ""
        print(f"  {topic:<36} {what}")
    print(f"publishes  {prefix}/alarms/WARD/BED, {prefix}/advice/WARD/BED, "
          f"{prefix}/state/WARD/BED (retained), {prefix}/status (retained, last will), "
          f"{prefix}/rejected")  # fmt: skip
    print_notify(cfg, svc)
    return 0


def print_board(cfg: ServiceConfig) -> None:
    """The ward board: where, who may log in, whether looking needs a login."""
    b = cfg.board
    if not b.listen:
        print("board      off (board.listen)")
        return
    from ..web.users import read_users

    users = read_users(b.users_file).users  # an unreadable file: one line, exit 2
    looking = "looking needs a login" if b.require_login else "looking needs no login"
    print(f"board      http://{b.listen}/  {looking}; {len(users)} user(s) in {b.users_file} "
          f"may log in to acknowledge")  # fmt: skip
    if not users:
        print("  no users yet: `hourwatch user add NAME --role ROLE --config FILE`")


def print_notify(cfg: ServiceConfig, svc: Service) -> None:
    """The paging section (validated by load_config: roles, channels, secrets)."""
    n = cfg.notify
    if not n.enabled:
        print("paging     no channels: pages stay on MQTT")
        return
    print(f"paging     {len(n.channels)} channel(s); failing after {n.fail_after_attempts} "
          f"attempts or {n.fail_after_s:g} s; given up after {n.give_up_after_s:g} s")  # fmt: skip
    for c in n.channels:
        where = getattr(c, "url", None) or f"{getattr(c, 'host', '')}:{getattr(c, 'port', '')}"
        print(f"  channel {c.name:<16} {c.kind:<11} {where}")
    for r in n.routes:
        ward = f" (ward {r.ward} only)" if r.ward else ""
        print(f"  route   {r.role:<16} -> {r.channel}: {', '.join(r.to)}{ward}")
    links = f"{n.ack_base_url}/ack/..., valid {n.ack_link_valid_s} s" if n.ack_base_url \
        else "off (no ack_base_url)"  # fmt: skip
    print(f"  acknowledgement links {links}")
    unrouted = sorted(policy_roles(svc.policy) - {r.role for r in n.routes})
    if unrouted:
        print(f"  no route for {', '.join(unrouted)}: their pages stay on MQTT")
