"""Live updates: the service says what changed, one task turns it into card updates,
and each open board gets them as server-sent events.

- `ChangeFeed.touch(bed)` is called by the service's threads (a bed's alarm or advice;
  None for "readings arrived": any bed's output may have moved). It costs a counter and,
  when the board task sleeps, one wake-up.
- `Broadcaster` (one per application, on the server's event loop) waits for a change,
  then at most every `min_gap_s` renders the cards of the wards someone watches (in a
  worker thread: the numbers are copied under the engine lock, the HTML is made
  outside it), and sends each watcher only the cards that differ from what it was sent.
  Every `heartbeat_s` it renders anyway (ages move on) and sends the service's state, so
  a board that hears nothing for 3 heartbeats knows its connection is gone.
"""

from __future__ import annotations

import asyncio
import contextlib
import json
import threading
import time
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass, field

HEARTBEAT_S = 5.0
MIN_GAP_S = 0.1  # renders at most 10 times a second, however fast readings come
QUEUE_MAX = 64  # a watcher further behind than this is dropped (its browser reconnects)


class ChangeFeed:
    """Which beds changed since the board last looked; thread-safe."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._beds: set[str] = set()
        self._all = False
        self._first: float | None = None  # perf_counter of the oldest change not yet taken
        self._wake: tuple[asyncio.AbstractEventLoop, asyncio.Event] | None = None

    def touch(self, bed: str | None = None) -> None:
        with self._lock:
            if bed is None:
                self._all = True
            else:
                self._beds.add(bed)
            if self._first is None:
                self._first = time.perf_counter()
            wake, self._wake = self._wake, None
        if wake is not None:
            loop, event = wake
            with contextlib.suppress(RuntimeError):  # the loop has closed: nobody waits
                loop.call_soon_threadsafe(event.set)

    def take(self) -> tuple[bool, set[str], float | None]:
        """(any bed, the beds named, when the oldest change came) since the last take."""
        with self._lock:
            out = (self._all, self._beds, self._first)
            self._all, self._beds, self._first = False, set(), None
            return out

    async def wait(self, timeout: float) -> bool:
        """True when something changed (at once if it already has), False on timeout."""
        event = asyncio.Event()
        with self._lock:
            if self._all or self._beds:
                return True
            self._wake = (asyncio.get_running_loop(), event)
        try:
            await asyncio.wait_for(event.wait(), timeout)
            return True
        except TimeoutError:
            return False
        finally:
            with self._lock:
                if self._wake is not None and self._wake[1] is event:
                    self._wake = None


@dataclass
class WardFrame:
    """What a ward's board shows, rendered: the cards and the parts around them."""

    ward: str
    beds: list[str]  # in the order shown
    cards: dict[str, str]  # bed -> the card's HTML
    summary: str  # HTML of the ward's alarm summary
    time: str  # service time of the snapshot, for people


@dataclass(eq=False)  # one per open board: compared (and hashed) by identity
class Watcher:
    ward: str
    queue: asyncio.Queue[str | None] = field(default_factory=lambda: asyncio.Queue(QUEUE_MAX))
    sent: dict[str, str] = field(default_factory=dict)  # bed -> HTML last sent
    order: list[str] = field(default_factory=list)
    summary: str = ""


def sse(event: str, data: object) -> str:
    """One server-sent event (data is JSON on one line)."""
    return f"event: {event}\ndata: {json.dumps(data, separators=(',', ':'))}\n\n"


Render = Callable[[set[str]], dict[str, WardFrame]]  # wards -> their frames
Status = Callable[[], dict[str, str]]  # the service's state for the banner


class Broadcaster:
    def __init__(
        self,
        changes: ChangeFeed,
        render: Render,
        status: Status,
        heartbeat_s: float = HEARTBEAT_S,
        min_gap_s: float = MIN_GAP_S,
    ) -> None:
        self.changes = changes
        self.render = render
        self.status = status
        self.heartbeat_s = heartbeat_s
        self.min_gap_s = min_gap_s
        self.watchers: set[Watcher] = set()
        self._task: asyncio.Task[None] | None = None
        self._kick = asyncio.Event()  # a new watcher: render for it now
        self.closing = False
        # perf_counter seconds from a change to its frames being queued (benchmarks)
        self.lags: list[float] = []

    def start(self) -> None:
        if self._task is None:
            self._task = asyncio.get_running_loop().create_task(self._run())

    async def stop(self) -> None:
        self.closing = True
        for w in list(self.watchers):
            with contextlib.suppress(asyncio.QueueFull):
                w.queue.put_nowait(None)
        if self._task is not None:
            self._task.cancel()
            with contextlib.suppress(asyncio.CancelledError):
                await self._task

    async def _run(self) -> None:
        last = 0.0
        while not self.closing:
            waits = [asyncio.ensure_future(self.changes.wait(self.heartbeat_s)),
                     asyncio.ensure_future(self._kick.wait())]  # fmt: skip
            try:
                await asyncio.wait(waits, return_when=asyncio.FIRST_COMPLETED)
            finally:
                for f in waits:
                    f.cancel()
            self._kick.clear()
            gap = self.min_gap_s - (time.perf_counter() - last)
            if gap > 0:
                await asyncio.sleep(gap)  # changes meanwhile go out with this frame
            last = time.perf_counter()
            _, _, first = self.changes.take()
            if not self.watchers:
                continue
            wards = {w.ward for w in self.watchers}
            try:
                frames = await asyncio.to_thread(self.render, wards)
                status = await asyncio.to_thread(self.status)
            except Exception:  # a bug here must not end live updates for everyone
                continue
            for w in list(self.watchers):
                self._send(w, frames.get(w.ward), status)
            if first is not None and len(self.lags) < 100_000:
                self.lags.append(time.perf_counter() - first)

    def _send(self, w: Watcher, frame: WardFrame | None, status: dict[str, str]) -> None:
        out: list[str] = []
        if frame is not None:
            if frame.beds != w.order or frame.summary != w.summary:
                w.order, w.summary = list(frame.beds), frame.summary
                out.append(sse("ward", {"beds": frame.beds, "summary": frame.summary}))
            for bed in frame.beds:
                html = frame.cards.get(bed, "")
                if w.sent.get(bed) != html:
                    w.sent[bed] = html
                    out.append(sse("card", {"bed": bed, "html": html}))
        out.append(sse("status", status | {"time": frame.time if frame else ""}))
        try:
            w.queue.put_nowait("".join(out))
        except asyncio.QueueFull:  # this browser does not keep up: let it reconnect
            self.watchers.discard(w)
            with contextlib.suppress(asyncio.QueueEmpty):
                w.queue.get_nowait()
            w.queue.put_nowait(None)

    async def stream(self, ward: str) -> AsyncIterator[str]:
        """The events for one open board: everything first, then what changes."""
        w = Watcher(ward)
        self.watchers.add(w)
        self._kick.set()
        try:
            yield "retry: 2000\n\n"  # the browser reconnects after 2 s
            while not self.closing:
                item = await w.queue.get()
                if item is None:
                    return
                yield item
        finally:
            self.watchers.discard(w)
