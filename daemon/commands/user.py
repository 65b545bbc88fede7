"""`hourwatch user add|remove|list`: who may log in on the ward board and acknowledge.

Users live in board.users_file (JSON, argon2id password hashes, mode 0600). Their roles
must be roles of the escalation policy. The running service re-reads the file when it
changes: a removed user is logged out at their next request.
"""

from __future__ import annotations

import argparse
import getpass
import sys
from pathlib import Path

from ..config import load_config
from ..errors import UserError
from ..notify.settings import policy_roles
from ..rule_files import load_policy


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    u = sub.add_parser("user", help="manage who may log in on the ward board",
                       description=__doc__)  # fmt: skip
    actions = u.add_subparsers(dest="action", required=True)
    for name, text in (("add", "add a user (asks for the password twice)"),
                       ("remove", "remove a user"), ("list", "list users and their roles")):
        a = actions.add_parser(name, help=text)
        if name != "list":
            a.add_argument("name", help="user name: letters, digits, '.', '_', '-'")
        if name == "add":
            a.add_argument("--role", action="append", default=[], required=True,
                           help="a role of the escalation policy (repeat for several; the "
                                "first is the one the user acts in after logging in)")
            a.add_argument("--password-stdin", action="store_true",
                           help="read the password from the first line of standard input")
            a.add_argument("--replace", action="store_true", help="replace an existing user")
        a.add_argument("--config", type=Path, default=None,
                       help="service config (TOML): its board.users_file and rules")
        a.add_argument("--users-file", type=Path, default=None,
                       help="the users file (overrides board.users_file)")
        a.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from ..web.users import add_user, read_users, remove_user

    cfg = load_config(args.config)
    path: Path = args.users_file or cfg.board.users_file
    if args.action == "list":
        users = read_users(path).users
        if not users:
            print(f"no users in {path}")
        for name, entry in sorted(users.items()):
            print(f"{name:<24} {', '.join(entry.roles):<40} added {entry.added or '-'}")
        return 0
    if args.action == "remove":
        remove_user(path, args.name)
        print(f"removed {args.name} from {path}")
        return 0
    roles = policy_roles(load_policy(cfg.rules))
    password = _password(args.password_stdin)
    add_user(path, args.name, args.role, password, roles, replace=args.replace)
    print(f"added {args.name} ({', '.join(dict.fromkeys(args.role))}) to {path}")
    staff = cfg.ack.users
    if staff and not set(args.role) <= set(staff.get(args.name, [])):
        print(f"note: [ack] users does not give {args.name} these roles: the engine will "
              "refuse their acknowledgements until it does", file=sys.stderr)
    return 0


def _password(from_stdin: bool) -> str:
    if from_stdin:
        line = sys.stdin.readline()
        if not line:
            raise UserError("--password-stdin: standard input is empty")
        return line.rstrip("\r\n")
    if not sys.stdin.isatty():
        raise UserError("no terminal to ask for the password: use --password-stdin")
    first = getpass.getpass("password: ")
    if getpass.getpass("again: ") != first:
        raise UserError("the two passwords differ")
    return first
