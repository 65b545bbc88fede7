"""`hourwatch probe --broker HOST:PORT --profile NAME [--seconds N] [--save CAPTURE.jsonl]`:
listen to one device profile's topics and print, per device, how its messages decode and
what the service's cleaning would make of them; with --save, write what it hears as a JSON
Lines log (replay it with `hourwatch replay CAPTURE --bind DEVICE`). Never touches a
journal; safe beside a running service (its own clean session)."""

from __future__ import annotations

import argparse
import os
import threading
from pathlib import Path

from ..config import ENV_PASSWORD, split_address
from ..errors import UserError
from ..probe import ProbeTally, capture_writer, find_profile, listen
from ..profile_files import load_devices, load_profiles


def add(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "probe", help="listen to one device profile's topics and show how they decode"
    )
    p.add_argument("--broker", required=True, metavar="HOST:PORT")
    p.add_argument("--profile", required=True, metavar="NAME", help="device profile name")
    p.add_argument("--profiles", type=Path, default=None, metavar="FOLDER",
                   help="device profile folder (default: the shipped profiles)")  # fmt: skip
    p.add_argument("--seconds", type=float, default=60.0, help="listen this long (default 60)")
    p.add_argument("--save", type=Path, default=None, metavar="CAPTURE.jsonl",
                   help="write every message heard as a JSON Lines log (a new file)")  # fmt: skip
    p.add_argument("--devices", type=Path, default=None, metavar="FILE",
                   help="per-meter calibration file (as the service's devices key)")  # fmt: skip
    p.add_argument("--username", default=None)
    p.add_argument("--password-file", type=Path, default=None,
                   help=f"file holding the password (or set {ENV_PASSWORD})")  # fmt: skip
    p.add_argument("--tls-ca", type=Path, default=None, metavar="FILE",
                   help="CA file: connect with TLS")  # fmt: skip
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    try:
        host, port = split_address(args.broker)
    except ValueError as exc:
        raise UserError(f"--broker: {exc}") from None
    if not args.seconds > 0:
        raise UserError("--seconds: must be more than 0")
    profile = find_profile(load_profiles(args.profiles), args.profile)
    password: str | None = os.environ.get(ENV_PASSWORD) or None
    if args.password_file is not None:
        try:
            password = args.password_file.read_text(encoding="utf-8").rstrip("\r\n")
        except OSError as exc:
            raise UserError(f"--password-file: cannot read {args.password_file}: "
                            f"{exc.strerror}") from None  # fmt: skip
    calibration = load_devices(args.devices)
    capture = None
    if args.save is not None:
        try:
            capture = args.save.open("x", encoding="utf-8")  # never over an earlier capture
        except FileExistsError:
            raise UserError(f"--save: {args.save} exists already; name a new file") from None
        except OSError as exc:
            raise UserError(f"--save: cannot write {args.save}: {exc.strerror}") from None
    tally = ProbeTally(profile, capture_writer(capture) if capture else None, calibration)
    stop = threading.Event()
    timer = threading.Timer(args.seconds, stop.set)
    timer.daemon = True

    def ready() -> None:
        timer.start()  # the N seconds count from the subscription, not from the connect
        print(f"probe: subscribed to {profile.subscription} on {host}:{port} for "
              f"{args.seconds:g} s (profile {profile.name}; Ctrl-C prints the summary now)",
              flush=True)  # fmt: skip

    try:
        listen(host, port, profile, tally, stop, username=args.username, password=password,
               ca_file=str(args.tls_ca) if args.tls_ca else None, on_ready=ready)  # fmt: skip
    except KeyboardInterrupt:
        pass
    finally:
        timer.cancel()
        if capture is not None:
            capture.close()
    for line in tally.report():
        print(line)
    if capture is not None:
        print(f"capture: {args.save} (replay it: hourwatch replay {args.save} --profiles "
              f"FOLDER --bind DEVICE[=BED] [--rejects])")  # fmt: skip
    return 0
