"""Replay: a log through the same engine, on a virtual clock.

now = min(next logged message, next engine wake-up), so time-driven changes
happen at the times they would have happened live.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from typing import Literal, TextIO

from .engine.effects import Effect
from .engine.engine import Engine
from .engine.profiles import DeviceProfile
from .journal_api import JournalTarget
from .logfile import BadLine, LogRecord
from .sources import open_source


@dataclass
class ReplayResult:
    engine: Engine
    messages: int = 0
    bad_lines: list[BadLine] = field(default_factory=list)
    clock_went_back: int = 0
    effects: list[Effect] = field(default_factory=list)


def drive(
    engine: Engine,
    records: Iterable[tuple[int, LogRecord] | BadLine],
    on_effects: Callable[[list[Effect]], None] | None = None,
    until: float | None = None,
) -> ReplayResult:
    """Feed records in file order; fire wake-ups due before each one."""
    result = ReplayResult(engine)
    now = float("-inf")

    def emit(effects: list[Effect]) -> None:
        if effects:
            result.effects.extend(effects)
            if on_effects:
                on_effects(effects)

    next_wakeup, advance, step = engine.next_wakeup, engine.advance, engine.step
    for item in records:
        if isinstance(item, BadLine):
            result.bad_lines.append(item)
            continue
        _, rec = item
        t = rec.time.timestamp()
        if t < now:  # receive times must not go backwards; keep the clock monotone
            result.clock_went_back += 1
            t = now
        wake = next_wakeup()
        if wake is not None and wake <= t:  # most messages come before any wake-up
            emit(advance(t))
        now = t
        effects = step(rec.topic, rec.payload, t)
        if effects:
            emit(effects)
        result.messages += 1
    if until is not None:
        emit(engine.advance(until))
    return result


def replay_file(
    path: JournalTarget,
    engine: Engine | list[DeviceProfile],
    warn: TextIO | Literal["stderr"] | None = "stderr",
    on_effects: Callable[[list[Effect]], None] | None = None,
    until: float | None = None,
) -> ReplayResult:
    if not isinstance(engine, Engine):
        engine = Engine(engine)
    result = drive(engine, open_source(path), on_effects, until)
    if warn == "stderr":  # looked up now, so a redirected stderr is honoured
        warn = sys.stderr
    if warn is not None:
        for bad in result.bad_lines:
            print(f"{path}:{bad.line_no}: skipped: {bad.reason}", file=warn)
        if result.clock_went_back:
            print(
                f"{path}: {result.clock_went_back} line(s) had a receive time earlier than the "
                "line before; replayed at the earlier line's time",
                file=warn,
            )
    return result
