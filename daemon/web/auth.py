"""Logins on the board: sessions in memory behind an HttpOnly, SameSite=Strict cookie, a
CSRF token per session, and a limit on failed logins per user name and per address.

Sessions live in the service's memory: a restart logs everyone out, which is the safe
direction. The cookie holds only a random token; the session holds the user, their
roles, the role they act in, and the CSRF token their forms and requests must carry.
"""

from __future__ import annotations

import hmac
import secrets
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field

COOKIE = "hourwatch_session"
SECURE_COOKIE = "__Host-hourwatch_session"  # only over HTTPS: bound to the host, path /
LOGIN_COOKIE = "hourwatch_login"  # a login form's own CSRF token (double submit)
MAX_SESSIONS = 1_000


@dataclass
class Session:
    token: str
    user: str
    roles: list[str]
    role: str  # the role this person acknowledges in
    csrf: str
    expires: float  # monotonic
    created: float = field(default_factory=time.time)


class Sessions:
    def __init__(self, lifetime_s: float, clock: Callable[[], float] = time.monotonic) -> None:
        self.lifetime_s = lifetime_s
        self.clock = clock
        self._lock = threading.Lock()
        self._by_token: dict[str, Session] = {}

    def create(self, user: str, roles: list[str]) -> Session:
        now = self.clock()
        s = Session(secrets.token_urlsafe(32), user, roles, roles[0], secrets.token_urlsafe(32),
                    now + self.lifetime_s)  # fmt: skip
        with self._lock:
            self._expire(now)
            if len(self._by_token) >= MAX_SESSIONS:  # the oldest goes first
                oldest = min(self._by_token.values(), key=lambda x: x.expires)
                del self._by_token[oldest.token]
            self._by_token[s.token] = s
        return s

    def get(self, token: str | None) -> Session | None:
        """The live session of a cookie's token; using it extends it."""
        if not token or len(token) > 100:
            return None
        now = self.clock()
        with self._lock:
            s = self._by_token.get(token)
            if s is None:
                return None
            if s.expires <= now:
                del self._by_token[token]
                return None
            s.expires = now + self.lifetime_s
            return s

    def end(self, token: str | None) -> None:
        with self._lock:
            self._by_token.pop(token or "", None)

    def end_user(self, user: str) -> None:
        """A user removed from the users file is logged out everywhere."""
        with self._lock:
            for t in [t for t, s in self._by_token.items() if s.user == user]:
                del self._by_token[t]

    def _expire(self, now: float) -> None:
        for t in [t for t, s in self._by_token.items() if s.expires <= now]:
            del self._by_token[t]


def same_token(given: str | None, expected: str) -> bool:
    return bool(given) and hmac.compare_digest(str(given).encode(), expected.encode())


class LoginLimiter:
    """Failed logins per key (a user name, an address) in a sliding window; over the
    limit, further attempts are refused without checking the password."""

    def __init__(self, per_user: int, per_address: int, window_s: float,
                 clock: Callable[[], float] = time.monotonic) -> None:  # fmt: skip
        self.per_user, self.per_address, self.window_s = per_user, per_address, window_s
        self.clock = clock
        self._lock = threading.Lock()
        self._fails: dict[str, deque[float]] = {}

    def _recent(self, key: str, now: float) -> deque[float]:
        q = self._fails.get(key)
        if q is None:
            return deque()
        while q and q[0] <= now - self.window_s:
            q.popleft()
        if not q:
            del self._fails[key]
        return q

    def blocked_for(self, user: str, address: str) -> float:
        """Seconds until another attempt is allowed (0: allowed now)."""
        now = self.clock()
        with self._lock:
            waits = []
            for key, limit in ((f"u:{user}", self.per_user), (f"a:{address}", self.per_address)):
                q = self._recent(key, now)
                if len(q) >= limit:
                    waits.append(q[0] + self.window_s - now)
            return max(waits, default=0.0)

    def failed(self, user: str, address: str) -> None:
        now = self.clock()
        with self._lock:
            if len(self._fails) > 100_000:  # bounded whatever is tried
                self._fails.clear()
            for key in (f"u:{user}", f"a:{address}"):
                self._fails.setdefault(key, deque(maxlen=1000)).append(now)

    def succeeded(self, user: str) -> None:
        with self._lock:
            self._fails.pop(f"u:{user}", None)
