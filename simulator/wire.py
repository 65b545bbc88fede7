"""A simulated message before it goes on the wire.

Payload times are rendered late, through a clock mapping: writing a log keeps
the simulated clock, while live publishing maps simulated time onto the wall
clock (the service takes its receive time as `now`, so device times must sit
near it). Everything else in a message is fixed when the scenario is built.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

Payload = dict[str, Any] | str
Clock = Callable[[float], float]  # simulated epoch seconds -> epoch seconds in payloads
Render = Callable[[Clock], Payload]


def same_clock(t: float) -> float:
    return t


def iso_ms(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


@dataclass(frozen=True, slots=True)
class Message:
    recv: float  # simulated receive time, epoch seconds
    topic: str
    render: Render
    retain: bool = False

    def payload(self, clock: Clock = same_clock) -> Payload:
        return self.render(clock)
