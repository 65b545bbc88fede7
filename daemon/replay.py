"""Replay: a log through the same engine, on a virtual clock.

now = min(next logged message, next engine wake-up), so time-driven changes
happen at the times they would have happened live.
"""

from __future__ import annotations

import json
import sys
from collections import deque
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, TextIO

from .engine.effects import Effect, RejectedInput
from .engine.engine import Engine, ReadingTrace
from .engine.outcomes import Outcome
from .engine.profiles import DeviceProfile
from .engine.timefmt import iso
from .journal_api import JournalTarget
from .logfile import BadLine, LogRecord, Message, as_messages
from .sources import open_messages, open_source

Records = Iterator[tuple[int, LogRecord] | BadLine]
BENCH_WARD = "bench"  # the ward of the temporary beds of --bind


@dataclass
class ReplayResult:
    engine: Engine
    messages: int = 0
    bad_lines: list[BadLine] = field(default_factory=list)
    clock_went_back: int = 0
    effects: list[Effect] = field(default_factory=list)
    # --until fell before the last message: the clock had already passed it
    until_before_end: tuple[float, float] | None = None  # (until, last message time)


def drive(
    engine: Engine,
    records: Iterable[tuple[int, LogRecord] | BadLine],
    on_effects: Callable[[list[Effect]], None] | None = None,
    until: float | None = None,
) -> ReplayResult:
    """Feed records in file order; fire wake-ups due before each one."""
    return drive_messages(engine, as_messages(records), on_effects, until)


def drive_messages(
    engine: Engine,
    messages: Iterable[Message | BadLine],
    on_effects: Callable[[list[Effect]], None] | None = None,
    until: float | None = None,
) -> ReplayResult:
    """`drive` for messages (line, receive time, topic, payload)."""
    result = ReplayResult(engine)
    now = float("-inf")

    def emit(effects: list[Effect]) -> None:
        if effects:
            result.effects.extend(effects)
            if on_effects:
                on_effects(effects)

    next_wakeup, advance, step = engine.next_wakeup, engine.advance, engine.step_at
    count = 0  # messages stepped, put in the result at the end
    for item in messages:
        if isinstance(item, BadLine):
            result.bad_lines.append(item)
            continue
        _, t, topic, payload = item
        if t < now:  # receive times must not go backwards; keep the clock monotone
            result.clock_went_back += 1
            t = now
        wake = next_wakeup()
        if wake is not None and wake <= t:  # most messages come before any wake-up
            emit(advance(t))
        now = t
        effects = step(topic, payload, t)
        if effects:
            emit(effects)
        count += 1
    result.messages = count
    if until is not None:
        if until < now:
            result.until_before_end = (until, now)
        emit(engine.advance(until))
    return result


def replay_file(
    path: JournalTarget,
    engine: Engine | list[DeviceProfile],
    warn: TextIO | Literal["stderr"] | None = "stderr",
    on_effects: Callable[[list[Effect]], None] | None = None,
    until: float | None = None,
    wrap: Callable[[Records], Records] | None = None,
) -> ReplayResult:
    """`wrap` sees the records on their way in (adds bench beds, follows lines)."""
    if not isinstance(engine, Engine):
        engine = Engine(engine)
    if wrap is None:  # nothing needs the records themselves
        result = drive_messages(engine, open_messages(path), on_effects, until)
    else:
        result = drive(engine, wrap(open_source(path)), on_effects, until)
    if warn == "stderr":  # looked up now, so a redirected stderr is honoured
        warn = sys.stderr
    if warn is not None:
        for bad in result.bad_lines:
            print(f"{path}:{bad.line_no}: skipped: {bad.reason}", file=warn)
        for line in clock_warnings(result, path):
            print(line, file=warn)
    return result


def clock_warnings(result: ReplayResult, path: JournalTarget) -> list[str]:
    """What a replay says about its clock: lines that went back, an --until too early."""
    out = []
    if result.clock_went_back:
        out.append(f"{path}: {result.clock_went_back} line(s) had a receive time earlier than "
                   "the line before; replayed at the earlier line's time")  # fmt: skip
    if result.until_before_end:
        until, last = result.until_before_end
        out.append(f"{path}: --until {iso(until)} is before the last message ({iso(last)}): "
                   "the whole log was replayed; --until only runs the clock on past its "
                   "end")  # fmt: skip
    return out


# --- a capture without a bed context: temporary beds ------------------------------------
def bench_beds(
    binds: Sequence[tuple[str, str]], weight_kg: float | None, prefix: str = "hourwatch"
) -> Callable[[Records], Records]:
    """Bind meters to temporary beds at the first record's receive time, so a capture
    (`hourwatch probe --save`) replays without a bed context. `binds` are (device, bed);
    a context for the same bed later in the log replaces this one."""
    beds: dict[str, list[str]] = {}
    for device, bed in binds:
        beds.setdefault(bed, []).append(device)

    def wrap(records: Records) -> Records:
        first = True
        for item in records:
            if first and not isinstance(item, BadLine):
                first = False
                for bed, devices in beds.items():
                    ctx: dict[str, Any] = {"ward": BENCH_WARD, "device_ids": devices}
                    if weight_kg is not None:
                        ctx |= {"weight_kg": weight_kg, "weight_basis": "actual"}
                    topic = f"{prefix}/beds/{bed}/context"
                    yield 0, LogRecord.model_construct(time=item[1].time, topic=topic,
                                                       payload=ctx)  # fmt: skip
            yield item

    return wrap


# --- every rejected line ------------------------------------------------------------------
# Rejections of meter readings, whose line the engine's trace tells (a held reading is
# settled by the next one; a jump taken back recounts readings from earlier lines).
_TRACED = frozenset(
    {Outcome.LATE, Outcome.TOO_OLD, Outcome.ARTEFACT_DROPPED, Outcome.IMPLAUSIBLE_FLOW,
     Outcome.CONFLICTING_DUPLICATE, Outcome.UNBOUND}
)  # fmt: skip
RECENT_LINES = 256  # per meter: lines of its recent readings, for a later take-back


@dataclass(frozen=True, slots=True)
class RejectedLine:
    line: int  # 0 for a record --bind added
    time: float
    topic: str
    reason: str
    detail: str
    payload: dict[str, Any] | str

    def to_json(self) -> dict[str, object]:
        return {"type": "rejected", "line": self.line, "time": iso(self.time),
                "topic": self.topic, "reason": self.reason, "detail": self.detail,
                "payload": self.payload}  # fmt: skip

    def text(self, source: Path, width: int = 1000) -> list[str]:
        shown = json.dumps(self.payload)  # escapes control characters: safe on a terminal
        if len(shown) > width:
            shown = shown[:width] + f"... ({len(shown) - width} more characters)"
        return [f"  {source}:{self.line}  {iso(self.time)}  {self.topic}",
                f"      {self.reason}: {self.detail}",
                f"      payload: {shown}"]  # fmt: skip


class RejectLog:
    """Follows a replay and keeps every rejected line with its reason, detail and payload.
    Plug `records` in as replay_file's `wrap`, `observe` as the engine's observer and
    `on_effects` into the effects callback."""

    def __init__(self) -> None:
        self.rows: list[RejectedLine] = []
        self._current: tuple[int, LogRecord] | None = None
        self._pending: list[tuple[Outcome, tuple[int, LogRecord]]] = []  # this step's traced
        self._held: dict[str, tuple[int, LogRecord]] = {}
        self._recent: dict[str, deque[tuple[float, tuple[int, LogRecord]]]] = {}

    def records(self, records: Records) -> Records:
        for item in records:
            if not isinstance(item, BadLine):
                self._current = item
                self._pending.clear()
            yield item

    def observe(self, tr: ReadingTrace) -> None:
        here = self._current
        if here is None:
            return
        dev = tr.device_id
        recent = self._recent.get(dev)
        if recent is None:
            recent = self._recent[dev] = deque(maxlen=RECENT_LINES)
        for t, _ in tr.revised:  # readings counted before, artefacts after all
            where = next((w for tt, w in reversed(recent) if tt == t), here)
            self._pending.append((Outcome.ARTEFACT_DROPPED, where))
        outs = tr.outcomes
        if len(outs) == 2:  # the first settles the reading this meter held before
            self._pending.append((outs[0], self._held.pop(dev, here)))
        last = outs[-1]
        if last is Outcome.SPIKE_HELD:
            self._held[dev] = here
        else:
            self._pending.append((last, here))
        if tr.device_time is not None:
            t = tr.received if last is Outcome.CLOCK_SKEW else tr.device_time
            recent.append((t, here))

    def on_effects(self, effects: list[Effect]) -> None:
        for e in effects:
            if not isinstance(e, RejectedInput) or self._current is None:
                continue
            where = self._current
            if e.reason in _TRACED:
                k = next((i for i, (o, _) in enumerate(self._pending) if o == e.reason), None)
                if k is not None:
                    where = self._pending.pop(k)[1]
            line, rec = where
            self.rows.append(RejectedLine(line, rec.time.timestamp(), rec.topic,
                                          str(e.reason), e.detail, rec.payload))  # fmt: skip
