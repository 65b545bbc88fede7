"""`hourwatch demo`: the whole chain on one machine, with invented patients.

A local broker, the live service (with a temporary journal) and a simulated
ward of eight beds run on one accelerated clock: the service and the meters
both read simulated time, so a simulated day passes in a couple of minutes
while every rate the rules see is the real one. A nurse acknowledges some
alarms; the rest climb the escalation chain. All patient data is invented.
"""

from __future__ import annotations

import json
import logging
import queue
import random
import tempfile
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TextIO

import paho.mqtt.client as mqtt
import structlog
from paho.mqtt.enums import CallbackAPIVersion
from rich.console import Console
from rich.live import Live
from rich.table import Table

from simulator.runner import Built, build, wire_bytes
from simulator.scenario import load_scenario

from .caution import CAUTION
from .config import (
    BoardConfig,
    BrokerConfig,
    HealthConfig,
    JournalConfig,
    PublishConfig,
    ServiceConfig,
)
from .engine.alarms import STATE_WORDS, State
from .engine.numbers import ml, num
from .engine.timefmt import iso
from .local_broker import EmbeddedBroker, Mosquitto, start_local_broker
from .profile_files import load_profiles
from .service import Service, configure_logging

SCENARIO = Path(__file__).resolve().parent.parent / "simulator" / "scenarios" / "ward-demo.toml"
PREFIX = "hourwatch"
BOARD = ("127.0.0.1", 8090)  # the board's address, when free (else any free port)
DEMO_CHARGE = "demo-charge"  # invented board user: may acknowledge as either nurse role


class DemoClock:
    """Simulated epoch seconds, running `rate` times faster than the wall clock."""

    def __init__(self, sim_start: float, rate: float) -> None:
        self.sim_start, self.rate = sim_start, rate
        self._wall0 = time.monotonic()
        self._frozen: float | None = None

    def now(self) -> float:
        if self._frozen is not None:
            return self._frozen
        return self.sim_start + (time.monotonic() - self._wall0) * self.rate

    def freeze(self) -> None:
        """Stop simulated time: the ward ends here, and the service must not see
        the meters fall silent while it shuts down."""
        self._frozen = self.now()

    def sleep_until(self, sim_t: float, stop: threading.Event) -> bool:
        """Wait until simulated time `sim_t`; False if stopped first."""
        while (left := (sim_t - self.now()) / self.rate) > 0:
            if stop.wait(min(left, 0.25)):
                return False
        return not stop.is_set()


@dataclass
class BedView:
    ward: str = ""
    hourly_ml: float | None = None
    day_ml: float | None = None
    alarms: list[tuple[str, str, str]] = field(default_factory=list)  # (priority, rule, state)
    advice: str = ""


@dataclass
class Tally:
    published: int = 0
    events: Counter[str] = field(default_factory=Counter)  # by state
    rules: Counter[str] = field(default_factory=Counter)  # alarms opened, by rule
    pages: int = 0
    acks: int = 0
    advice: int = 0
    first_alarm: str | None = None
    start: float = 0.0  # simulated time the ward started at
    end: float = 0.0  # simulated time the ward stopped at
    beds: int = 0
    paged: set[str] = field(default_factory=set)  # alarm ids that paged anyone


class Nurse:
    """Acknowledges about two thirds of new (or returning) alarms after 5-25
    simulated minutes; the rest climb the escalation chain."""

    def __init__(self, client: mqtt.Client, clock: DemoClock, seed: int) -> None:
        self.client, self.clock = client, clock
        self.rng = random.Random(seed)
        self.due: list[tuple[float, str]] = []
        self.seen: set[str] = set()
        self.sent = 0

    def consider(self, event: dict[str, Any]) -> None:
        alarm_id = str(event["alarm_id"])
        if event.get("reason") == "ack_expired":
            self.seen.discard(alarm_id)  # back after an hour: she looks again
        if event["state"] not in ("active", "escalated") or alarm_id in self.seen:
            return
        self.seen.add(alarm_id)
        if self.rng.random() < 2 / 3:
            self.due.append((self.clock.now() + self.rng.uniform(300, 1500), alarm_id))

    def act(self) -> None:
        now = self.clock.now()
        for item in [d for d in self.due if d[0] <= now]:
            self.due.remove(item)
            # on the per-user topic: the user (here a demo account) is the acknowledger
            ack = {"alarm_id": item[1], "role": "bedside-nurse"}
            self.client.publish(f"{PREFIX}/ack/{DEMO_NURSE}", json.dumps(ack), qos=1)
            self.sent += 1


DEMO_NURSE = "demo-nurse"  # invented user name of the simulated nurse


def _ward_table(beds: dict[str, BedView], sim_now: float, start: float) -> Table:
    hours = (sim_now - start) / 3600
    table = Table(title=f"Ward view, simulated hour {num(hours, 1)} (invented patients)")
    table.add_column("bed", no_wrap=True)
    table.add_column("60 min", justify="right", no_wrap=True)
    table.add_column("24 h", justify="right", no_wrap=True)
    table.add_column("alarms (priority rule state)")
    table.add_column("latest advice")
    for bed in sorted(beds):
        b = beds[bed]
        alarms = "\n".join(f"{p} {r} {STATE_WORDS[State(s)]}" for p, r, s in b.alarms) or "-"
        table.add_row(
            bed,
            "-" if b.hourly_ml is None else ml(b.hourly_ml),
            "-" if b.day_ml is None else ml(b.day_ml),
            alarms,
            b.advice or "-",
        )
    return table


def _publish_ward(built: Built, client: mqtt.Client, clock: DemoClock, stop: threading.Event,
                  tally: Tally) -> None:  # fmt: skip
    for m in built.messages:
        if not clock.sleep_until(m.recv, stop):
            return
        # payload times on the simulated clock: the service reads the same clock
        client.publish(m.topic, wire_bytes(m.payload()), qos=1, retain=m.retain)
        tally.published += 1


def _on_message(msg: mqtt.MQTTMessage, beds: dict[str, BedView], tally: Tally, nurse: Nurse,
                lines: queue.Queue[str]) -> None:  # fmt: skip
    parts = msg.topic.split("/")
    try:
        body = json.loads(msg.payload)
    except ValueError:
        return
    if len(parts) != 4 or not isinstance(body, dict):
        return
    kind, ward, bed = parts[1], parts[2], parts[3]
    view = beds.setdefault(bed, BedView(ward))
    if kind == "alarms":
        tally.events[body["state"]] += 1
        if body.get("notify"):
            tally.pages += 1
            tally.paged.add(body["alarm_id"])
        if body["state"] == "active" and body.get("reason") in ("condition_met", "delay_elapsed"):
            tally.rules[body["rule"]] += 1
            tally.first_alarm = tally.first_alarm or body["alarm_id"]
        nurse.consider(body)
        who = f" -> page {', '.join(body['notify'])}" if body.get("notify") else ""
        lines.put(f"{body['pager']}{who}")  # the pager line starts with its clock time
    elif kind == "advice":
        tally.advice += 1
        view.advice = _rate(body)
    elif kind == "state":
        h, d = body.get("output_60min"), body.get("output_24h")
        view.hourly_ml = h["volume_ml"] if h else None
        view.day_ml = d["volume_ml"] if d else None
        view.alarms = [
            (a["priority"], a["rule"], a["state"]) for a in body.get("active_alarms", [])
        ]
        adv = body.get("latest_advice")
        if adv:
            view.advice = _rate(adv)


def _rate(advice: dict[str, Any]) -> str:
    """The advice's few words (a rate under an order, or why there is none) and its time."""
    words = advice.get("pager") or str(advice.get("summary", ""))[:60]
    return f"{words} ({advice.get('time', '')[11:16]})"


def _board_address() -> str:
    """127.0.0.1:8090 when free, else a free port (the URL is printed either way)."""
    from .web.server import bind

    try:
        bind(*BOARD).close()
    except OSError:
        return f"{BOARD[0]}:0"
    return f"{BOARD[0]}:{BOARD[1]}"


def _demo_user(work: Path) -> tuple[Path, str]:
    """A users file with one invented user and a fresh random password."""
    import secrets

    from .web.users import add_user

    path, password = work / "board-users.json", secrets.token_urlsafe(9)
    add_user(path, DEMO_CHARGE, ["charge-nurse", "bedside-nurse"], password,
             {"charge-nurse", "bedside-nurse"}, replace=True)  # fmt: skip
    return path, password


def run_demo(
    sim_hours: float, speed: float, seed: int = 7, scenario: Path | None = None,
    out: TextIO | None = None, keep_dir: Path | None = None, board: bool = True,
) -> int:  # fmt: skip
    console = Console(file=out, highlight=False)
    work = keep_dir or Path(tempfile.mkdtemp(prefix="hourwatch-demo-"))
    work.mkdir(parents=True, exist_ok=True)
    (work / "broker").mkdir(exist_ok=True)
    console.print(f"[bold]Hourwatch demo[/bold]: a simulated ward, {sim_hours:g} h at "
                  f"{speed:g} simulated minutes per second. {CAUTION}")  # fmt: skip
    profiles = {p.name: p for p in load_profiles()}
    ward = load_scenario(scenario or SCENARIO, profiles)
    broker: Mosquitto | EmbeddedBroker = start_local_broker(work / "broker")
    console.print(f"broker: {broker.kind} on {broker.address} (MQTT {broker.protocol})")
    sim_start = float(int(time.time() // 60) * 60)
    clock = DemoClock(sim_start, rate=speed * 60.0)
    built = build(ward, profiles, seed=seed, hours=sim_hours, start=sim_start, prefix=PREFIX)
    journal = work / "journal.db"
    users, password = _demo_user(work) if board else (work / "board-users.json", "")
    cfg = ServiceConfig(
        broker=BrokerConfig(host=broker.host, port=broker.port, protocol=broker.protocol,
                            client_id="hourwatch-demo"),
        journal=JournalConfig(path=journal),
        health=HealthConfig(listen=""),
        # the ward board, with its one application (/health and /metrics too)
        board=BoardConfig(listen=_board_address() if board else "", users_file=users),
        # simulated seconds: a minute of waiting for PUBACK is a blink of wall time here
        publish=PublishConfig(confirm_timeout_s=3600.0, state_interval_s=120.0),
        log_level="warning",
    )  # fmt: skip
    log_file = (work / "service.log").open("w", encoding="utf-8")
    saved_log = structlog.get_config(), logging.getLogger().handlers[:], logging.getLogger().level
    configure_logging("info", stream=log_file)
    # with a fast clock, a coalesced wake-up job often finds one still running
    logging.getLogger("apscheduler").setLevel(logging.ERROR)
    service = Service(cfg, clock=clock.now, clock_rate=clock.rate)
    stop = threading.Event()
    tally = Tally()
    beds: dict[str, BedView] = {}
    lines: queue.Queue[str] = queue.Queue()
    feed = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="hourwatch-demo-ward",
                       protocol=mqtt.MQTTv311)  # fmt: skip
    watch = mqtt.Client(CallbackAPIVersion.VERSION2, client_id="hourwatch-demo-view",
                        protocol=mqtt.MQTTv311)  # fmt: skip
    nurse = Nurse(feed, clock, seed)
    watch.on_message = lambda _c, _u, msg: _on_message(msg, beds, tally, nurse, lines)
    try:
        service.start()
        if service.health is not None and "board" in service.health.addresses:
            host, port = service.health.addresses["board"]
            console.print(f"[bold]ward board[/bold]: http://{host}:{port}/ward/{ward.ward}",
                          soft_wrap=True)  # one line: a URL to copy
            console.print(f"  live while the demo runs; to acknowledge, log in as {DEMO_CHARGE} "
                          f"with password {password}", soft_wrap=True)  # fmt: skip
        for c in (feed, watch):
            c.connect(broker.host, broker.port, keepalive=30)
            c.loop_start()
        watch.subscribe([(f"{PREFIX}/{k}/#", 1) for k in ("alarms", "advice", "state")])
        sender = threading.Thread(target=_publish_ward, args=(built, feed, clock, stop, tally),
                                  name="demo-ward", daemon=True)  # fmt: skip
        sender.start()
        end = built.end
        live_ok = console.is_terminal
        table = _ward_table(beds, clock.now(), sim_start)
        view = Live(table, console=console, refresh_per_second=4) if live_ok else _Null()
        with view as live:
            next_print = sim_start + 4 * 3600
            while clock.now() < end or sender.is_alive():
                time.sleep(0.1)
                nurse.act()
                while not lines.empty():
                    console.print(lines.get())
                if live_ok:
                    live.update(_ward_table(beds, clock.now(), sim_start))
                elif clock.now() >= next_print:
                    console.print(_ward_table(beds, clock.now(), sim_start))
                    next_print += 4 * 3600
            clock.freeze()
            _drain(service)
            while not lines.empty():
                console.print(lines.get())
            if not live_ok:
                console.print(_ward_table(beds, clock.now(), sim_start))
    finally:
        stop.set()
        for c in (feed, watch):
            c.loop_stop()
            c.disconnect()
        service.stop("demo finished")
        broker.stop()
        # the service's logging went to the demo's file; hand it back before closing it
        structlog.configure(**saved_log[0])
        logging.getLogger().handlers = saved_log[1]
        logging.getLogger().setLevel(saved_log[2])
        log_file.close()
    tally.acks = nurse.sent
    tally.start, tally.end, tally.beds = sim_start, clock.now(), len(built.beds)
    _summary(console, tally, journal, work)
    return 0


def _drain(service: Service, wall_s: float = 2.0) -> None:
    """Let the service take in the last messages (the clock is frozen by now)."""
    deadline = time.monotonic() + wall_s
    time.sleep(0.05)
    while time.monotonic() < deadline and not service.queue.empty():
        time.sleep(0.01)


class _Null:
    def __enter__(self) -> _Null:
        return self

    def __exit__(self, *exc: object) -> None:
        return None

    def update(self, *_: object) -> None:
        return None


def _summary(console: Console, tally: Tally, journal: Path, work: Path) -> None:
    console.print("\n[bold]Summary[/bold] (simulated, invented patients)")
    console.print(f"  meter and clinical messages published: {tally.published:,}")
    opened = ", ".join(f"{r} x{n}" for r, n in sorted(tally.rules.items())) or "none"
    console.print(f"  alarms raised: {sum(tally.rules.values())} ({opened})")
    states = ", ".join(f"{s} {n}" for s, n in sorted(tally.events.items()))
    console.print(f"  lifecycle events: {states or 'none'}; pages sent: {tally.pages}")
    bed_days = tally.beds * max(tally.end - tally.start, 1.0) / 86400
    per_alarm = tally.pages / len(tally.paged) if tally.paged else 0.0
    console.print(
        f"  pages per alarm that paged: {num(per_alarm, 1)} ({len(tally.paged)} alarms); "
        f"pages per bed-day: {num(tally.pages / bed_days, 1)} ({tally.beds} beds, "
        f"{num(bed_days / max(tally.beds, 1) * 24, 1)} h)"
    )
    console.print(
        f"  acknowledgements sent by the demo nurse: {tally.acks} (the engine took "
        f"{tally.events.get('acknowledged', 0)}); advice messages: {tally.advice}"
    )
    console.print(f"  journal: {journal}   (service log: {work / 'service.log'})")
    console.print("  review it:")
    until = f"--until {iso(tally.end)}"  # the service's clock ran on to the ward's end
    console.print(f"    hourwatch replay {journal} {until}")
    console.print(f"    hourwatch replay {journal} {until} --report {work / 'report.html'}")
    if tally.first_alarm:
        console.print(f"    hourwatch explain {journal} {tally.first_alarm}")
    console.print(CAUTION)
