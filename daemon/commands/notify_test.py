"""`hourwatch notify-test --config FILE --role ROLE`: the commissioning step. Sends one
clearly marked test page to every address of every route of the role, over the real
channels, and prints what each channel answered (SMTP reply, HTTP status, HL7 ACK).
Nothing is journaled and no alarm is involved. Exit status 1 if any page failed."""

from __future__ import annotations

import argparse
import hashlib
import time
from pathlib import Path

from ..config import load_config
from ..errors import UserError
from ..notify.channels import sender_for
from ..notify.pages import Page
from ..notify.settings import Route, check_notify, policy_roles
from ..rule_files import load_policy


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    c = sub.add_parser("notify-test",
                       help="send a test page through every route of a role and show what "
                       "each channel answered")  # fmt: skip
    c.add_argument("--config", type=Path, required=True, help="service config (TOML)")
    c.add_argument("--role", required=True, help="a role from the escalation policy")
    c.add_argument("--ward", default=None, help="only the routes that serve this ward")
    c.set_defaults(run=run)


def test_page(route: Route, to: str, now: float) -> Page:
    stamp = time.strftime("%H:%M UTC", time.gmtime(now))
    text = (f"TEST PAGE, not an alarm: Hourwatch check of role {route.role} via "
            f"{route.channel} at {stamp}. Nothing to do.")  # fmt: skip
    key = hashlib.sha256(f"test\x1f{now!r}\x1f{route.channel}\x1f{to}".encode()).hexdigest()
    return Page(
        key=key[:32], type="test", text=text, alarm=None,
        alarm_id=f"test/{route.role}/{time.strftime('%Y%m%dT%H%M%SZ', time.gmtime(now))}",
        ward=route.ward, bed=None, priority="info", alarm_kind="advisory", state="test",
        rule="test-page", title="Test page", event_time=now, channel=route.channel,
        recipient=to, role=route.role,
    )  # fmt: skip


def run(args: argparse.Namespace) -> int:
    where = str(args.config)
    cfg = load_config(args.config)  # validates the notify section: roles, channels, secrets
    n = cfg.notify
    if not n.enabled:
        raise UserError(f"{where}: notify: no channels configured, nothing to test")
    ward = args.ward
    role = args.role
    routes = [r for r in n.routes if r.role == role and (ward is None or r.ward in (None, ward))]
    if not routes:
        routed = ", ".join(sorted({r.role for r in n.routes})) or "none"
        raise UserError(f"--role: no route for role {args.role!r}"
                        + (f" and ward {args.ward!r}" if args.ward else "")
                        + f" (routed roles: {routed})")  # fmt: skip
    secrets = check_notify(n, policy_roles(load_policy(cfg.rules)), where)
    channels = {c.name: c for c in n.channels}
    now = time.time()
    failed = sent = 0
    for r in routes:
        sender = sender_for(channels[r.channel], secrets.channel.get(r.channel))
        for to in r.to:
            answer = sender.send([test_page(r, to, now)])[0]
            sent += 1
            failed += not answer.ok
            print(f"{'ok' if answer.ok else 'FAIL':<5} {r.channel} ({sender.kind})  {to}  "
                  f"{answer.text}", flush=True)  # fmt: skip
    print(f"{sent - failed} of {sent} test pages confirmed for role {args.role}")
    return 1 if failed else 0
