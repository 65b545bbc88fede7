"""A replay that keeps what review needs: every alarm event and advice, what became
of each reading (compactly, per bed), documented intake, and a progress bar.

The engine tells the fate of each meter message through its observer hook; the
recorder only files it. Shell side (reads the source, draws the progress bar).
"""

from __future__ import annotations

import sys
from array import array
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, TextIO, TypeVar

from pydantic import ValidationError

from ..engine.advice import DEFAULT_POLICY, AdvicePolicy
from ..engine.alarms import AlarmEvent
from ..engine.clinical import IntakeMessage
from ..engine.effects import AdviceIssued, Effect
from ..engine.engine import Engine, ReadingTrace
from ..engine.escalation import EscalationPolicy
from ..engine.evaluator import Notice
from ..engine.outcomes import Outcome
from ..engine.profiles import DeviceProfile
from ..engine.rules import RuleDef
from ..engine.strictjson import NotJson, validate
from ..journal import is_sqlite
from ..journal_api import JournalTarget
from ..logfile import BadLine, LogRecord
from ..replay import ReplayResult, clock_warnings, drive
from ..sources import open_source

if TYPE_CHECKING:
    from .acks import AckCarrier

Record = tuple[int, LogRecord] | BadLine
T = TypeVar("T")

# Outcomes as small integers, so a month of readings fits in compact arrays.
OUTCOMES: tuple[Outcome, ...] = tuple(Outcome)
CODE: dict[Outcome, int] = {o: i for i, o in enumerate(OUTCOMES)}
HELD = CODE[Outcome.SPIKE_HELD]

BAG_CHANGES = frozenset({Outcome.BAG_CHANGE, Outcome.BAG_CHANGE_INFERRED})
ARTEFACTS = frozenset({Outcome.ARTEFACT_DROPPED, Outcome.SPIKE_CONFIRMED, Outcome.IMPLAUSIBLE_FLOW})


@dataclass(slots=True)
class BedReadings:
    """Every traced message of one bed's meters: effective time and final outcome."""

    times: array[float] = field(default_factory=lambda: array("d"))
    codes: array[int] = field(default_factory=lambda: array("B"))

    def outcome_counts(self, t0: float, t1: float) -> dict[str, int]:
        """Readings with an effective time in (t0, t1], by outcome (times are near sorted,
        so a plain scan of the span is enough)."""
        out: dict[str, int] = {}
        for t, c in zip(self.times, self.codes, strict=True):
            if t0 < t <= t1:
                name = str(OUTCOMES[c])
                out[name] = out.get(name, 0) + 1
        return dict(sorted(out.items()))

    def marks(self, wanted: frozenset[Outcome]) -> list[tuple[float, Outcome]]:
        codes = {CODE[o] for o in wanted}
        return [(t, OUTCOMES[c]) for t, c in zip(self.times, self.codes, strict=True) if c in codes]


@dataclass(frozen=True, slots=True)
class Intake:
    time: float
    volume_ml: float
    fluid: str


def effective_time(tr: ReadingTrace) -> float:
    """The time the engine used for the reading (receive time if the meter clock was
    not believed, or if the message never became a reading)."""
    t = tr.device_time
    return tr.received if t is None or tr.outcomes[-1] is _SKEW else t


_SKEW = Outcome.CLOCK_SKEW  # the engine marks the reading's own (last) outcome


class Recorder:
    """Collects a replay's alarm events, advice, notices, readings and intake."""

    def __init__(self, prefix: str = "hourwatch", keep_traces_for: str | None = None) -> None:
        self.events: list[AlarmEvent] = []
        self.advice: list[AdviceIssued] = []
        self.notices: list[Notice] = []
        self.readings: dict[str, BedReadings] = {}
        self.intake: dict[str, list[Intake]] = {}
        self.first_time: float | None = None
        self._last: LogRecord | None = None  # the latest record passed on
        # full traces of one bed (for explain), each with its final outcome
        self.trace_bed = keep_traces_for
        self.traces: list[tuple[ReadingTrace, Outcome]] = []
        self._held: dict[str, tuple[BedReadings, int, int | None]] = {}
        self._intake_tail = "/intake"
        self._bed_prefix = prefix.rstrip("/") + "/beds/"

    # --- the engine's observer -------------------------------------------------
    def observe(self, tr: ReadingTrace) -> None:
        """Called once per meter message (a month is ~900,000 calls): kept lean."""
        bed = tr.bed
        if bed is None:
            return
        log = self.readings.get(bed)
        if log is None:
            log = self.readings[bed] = BedReadings()
        outs = tr.outcomes
        last = outs[-1]
        if len(outs) == 2:  # the first settles the reading this device held before
            held = self._held.pop(tr.device_id, None)
            if held is not None:
                hlog, i, j = held
                hlog.codes[i] = CODE[outs[0]]
                if j is not None:
                    self.traces[j] = (self.traces[j][0], outs[0])
        t = tr.device_time
        log.times.append(tr.received if t is None or last is _SKEW else t)
        log.codes.append(CODE[last])
        j = None
        if bed == self.trace_bed:
            j = len(self.traces)
            self.traces.append((tr, last))
        if last is Outcome.SPIKE_HELD:
            self._held[tr.device_id] = (log, len(log.codes) - 1, j)
        if tr.revised:
            self._revise(log, bed, tr)

    def _revise(self, log: BedReadings, bed: str, tr: ReadingTrace) -> None:
        """Readings counted earlier, found to be artefacts now (rare): found by their
        effective time among this bed's latest readings."""
        artefact = CODE[Outcome.ARTEFACT_DROPPED]
        for t, was in tr.revised:
            code = CODE[was]
            for i in range(len(log.times) - 1, max(-1, len(log.times) - 4096), -1):
                if log.times[i] == t and log.codes[i] == code:
                    log.codes[i] = artefact
                    break
            if bed != self.trace_bed:
                continue
            for j in range(len(self.traces) - 1, -1, -1):
                old, outcome = self.traces[j]
                if old.device_id == tr.device_id and effective_time(old) == t and outcome is was:
                    self.traces[j] = (old, Outcome.ARTEFACT_DROPPED)
                    break

    # --- the replay's effects ------------------------------------------------
    def on_effects(self, effects: list[Effect]) -> None:
        for e in effects:
            if isinstance(e, AlarmEvent):
                self.events.append(e)
            elif isinstance(e, AdviceIssued):
                self.advice.append(e)
            elif isinstance(e, Notice):
                self.notices.append(e)

    # --- the records on their way in -------------------------------------------
    def watch(
        self, records: Iterable[Record], between: Callable[[], None] | None = None
    ) -> Iterator[Record]:
        """Pass records through, noting times and documented intake; `between` runs
        before each record, when the one before has been fully processed."""
        prefix, tail = self._bed_prefix, self._intake_tail
        for item in records:
            if between is not None:
                between()
            if not isinstance(item, BadLine):
                rec = self._last = item[1]
                if self.first_time is None:
                    self.first_time = rec.time.timestamp()
                topic = rec.topic
                if topic.endswith(tail) and topic.startswith(prefix):
                    self._note_intake(topic[len(prefix) : -len(tail)], rec)
            yield item
        if between is not None:
            between()

    @property
    def last_time(self) -> float | None:
        """Receive time of the latest record passed on."""
        return None if self._last is None else self._last.time.timestamp()

    def _note_intake(self, bed: str, rec: LogRecord) -> None:
        try:
            msg = validate(IntakeMessage, rec.payload)  # as strictly as the engine reads it
        except (ValidationError, NotJson):
            return  # the engine rejects and counts it
        self.intake.setdefault(bed, []).append(
            Intake(msg.time.timestamp(), msg.volume_ml, msg.fluid)
        )

    @property
    def end_time(self) -> float:
        """The replay's last moment: the last record or the last event, whichever is later."""
        ends = [t for t in (self.last_time, self.events[-1].time if self.events else None) if t]
        return max(ends) if ends else 0.0


def count_records(path: JournalTarget) -> int | None:
    """Lines in a JSON Lines file, for the progress bar; None for anything else.

    A journal is never opened as a plain file here: closing such a handle would drop
    the SQLite locks of a writer in this same process."""
    if not isinstance(path, Path) or is_sqlite(path):
        return None
    try:
        with path.open("rb") as fh:
            n = 0
            while chunk := fh.read(1 << 20):
                n += chunk.count(b"\n")
            return n
    except OSError:
        return None


def with_progress(
    items: Iterable[T], total: int | None, label: str, stream: TextIO, every: int = 5000
) -> Iterator[T]:
    """A rich progress bar on `stream` while items pass; nothing when not a terminal."""
    if not stream.isatty():
        yield from items
        return
    from rich.console import Console
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TimeElapsedColumn

    columns = (
        "[progress.description]{task.description}",
        BarColumn(),
        MofNCompleteColumn(),
        TimeElapsedColumn(),
    )
    with Progress(*columns, console=Console(file=stream), transient=True) as bar:
        task = bar.add_task(label, total=total)
        n = 0
        for item in items:
            yield item
            n += 1
            if n % every == 0:
                bar.update(task, completed=n)
        bar.update(task, completed=n)


def run(
    path: JournalTarget,
    make_engine: Callable[[Callable[[ReadingTrace], None]], Engine],
    recorder: Recorder,
    *,
    until: float | None = None,
    progress: TextIO | None = None,
    label: str = "replay",
    before_each: Callable[[], None] | None = None,
    also: Callable[[list[Effect]], None] | None = None,
    wrap: Callable[[Iterable[Record]], Iterable[Record]] | None = None,
) -> ReplayResult:
    """Replay `path` through a fresh engine that reports to `recorder`.

    `before_each` runs between records, when the previous record has been fully
    processed (explain uses it to follow one alarm's evidence); `also` sees every
    batch of effects after the recorder; `wrap` sees the records on their way in."""
    engine = make_engine(recorder.observe)
    records: Iterable[Record] = recorder.watch(open_source(path), before_each)
    if wrap is not None:
        records = wrap(records)
    if progress is not None and progress.isatty():
        records = with_progress(records, count_records(path), label, progress)
    if also is None:
        return drive(engine, records, recorder.on_effects, until)
    extra = also

    def both(effects: list[Effect]) -> None:
        recorder.on_effects(effects)
        extra(effects)

    return drive(engine, records, both, until)


def warn_about(
    result: ReplayResult, path: JournalTarget, stream: TextIO | None = sys.stderr
) -> None:
    if stream is None:
        return
    bad = len(result.bad_lines)
    if bad:
        print(f"{path}: {bad} malformed line(s) skipped", file=stream)
    for line in clock_warnings(result, path):
        print(line, file=stream)


def replay_alarms(
    path: JournalTarget,
    profiles: list[DeviceProfile],
    rules: list[RuleDef],
    policy: EscalationPolicy,
    progress: TextIO | None = None,
    label: str = "replay",
    until: float | None = None,
    advice: AdvicePolicy = DEFAULT_POLICY,
    acks: AckCarrier | None = None,
) -> tuple[Recorder, ReplayResult]:
    """A replay that keeps alarm events, advice and intake, without reading traces;
    `acks` carries recorded acknowledgements over to this replay's alarms (a what-if)."""
    recorder = Recorder()

    def make(_: Callable[[ReadingTrace], None]) -> Engine:
        # no observer: nothing per reading
        engine = Engine(profiles, rules, policy, advice_policy=advice)
        return engine if acks is None else acks.attach(engine)

    also, wrap = (None, None) if acks is None else (acks.on_effects, acks.records)
    result = run(path, make, recorder, until=until, progress=progress, label=label,
                 also=also, wrap=wrap)  # fmt: skip
    return recorder, result
