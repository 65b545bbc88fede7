"""What the HTTP application needs from the service, as one object.

The service builds a `Site` from what it already has (its health and metrics documents,
the acknowledgement links, the engine under its lock); the tests build one around an
engine fed from a log. The application never reaches into the service otherwise.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any
from zoneinfo import ZoneInfo

from ..config import BoardConfig
from ..engine.engine import Engine
from ..journal import StoredEvent
from ..notify.acklinks import AckLinks, AckOutcome
from .live import ChangeFeed
from .marks import ReadingMarks
from .users import UserStore

HealthFn = Callable[[], tuple[bool, dict[str, Any]]]  # (healthy, the /health document)
MetricsFn = Callable[[], str]  # the Prometheus text exposition
# (alarm_id, user, role) -> what the engine made of it; waits for the worker
AckFn = Callable[[str, str, str], AckOutcome]
# (bed, since) -> the bed's journaled events (alarm and advice) since then, oldest first
EventsFn = Callable[[str, float], list[StoredEvent]]


@dataclass
class BoardData:
    """The live engine and what the board shows beside it."""

    engine: Engine
    lock: threading.RLock  # the engine's: held only to copy numbers out
    clock: Callable[[], float]  # the service's clock (the demo's runs fast)
    timezone: ZoneInfo  # people read local clock times
    latest_advice: Callable[[str], dict[str, Any] | None]
    bed_events: EventsFn
    acknowledge: AckFn
    users: UserStore
    settings: BoardConfig
    marks: ReadingMarks = field(default_factory=ReadingMarks)
    changes: ChangeFeed = field(default_factory=ChangeFeed)
    journal: str | None = None  # for the `hourwatch explain` line of an alarm
    service_state: HealthFn | None = None  # the board says plainly when the service is not ok


@dataclass
class Site:
    health: HealthFn
    metrics: MetricsFn
    ack_links: Callable[[], AckLinks | None] = lambda: None
    board: BoardData | None = None  # None: /health, /metrics and the links only
