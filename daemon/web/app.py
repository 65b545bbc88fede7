"""The HTTP application: Starlette, one app for everything the service serves.

- GET /health, GET /metrics: the service's own documents (`Site.health`, `Site.metrics`).
- /ack/{token}: acknowledgement links of paged alarms (`AckLinks.handle`).
- With a board (`Site.board`): / (wards), /ward/{ward} (every bed, live), /bed/{bed},
  /events/ward/{ward} (server-sent events), /login, /logout, /role, and
  POST /alarms/{alarm_id}/ack (the alarm id URL-encoded), which needs a logged-in user
  and the session's CSRF token, and goes through the engine like an MQTT acknowledgement.

Nothing on a page comes from outside the machine: the Content-Security-Policy allows
this origin only, and the pages use the system's fonts.
"""

from __future__ import annotations

import contextlib
from collections.abc import AsyncIterator, Awaitable, Callable, MutableMapping
from pathlib import Path
from typing import Any

import structlog
from jinja2 import Environment, FileSystemLoader, select_autoescape
from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import JSONResponse, PlainTextResponse, Response
from starlette.routing import Route

from ..health import CONTENT_TYPE
from ..notify.acklinks import MAX_FORM
from .board import Board
from .forms import read_body
from .site import Site

HERE = Path(__file__).resolve().parent
MAX_POST_BYTES = 16 * 1024  # the acknowledgement links' forms
CSP = (
    "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "connect-src 'self'; form-action 'self'; frame-ancestors 'none'; base-uri 'none'"
)
HEADERS = (
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"same-origin"),
    (b"x-frame-options", b"DENY"),
)

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
Receive = Callable[[], Awaitable[Message]]
Send = Callable[[Message], Awaitable[None]]
ASGIApp = Callable[[Scope, Receive, Send], Awaitable[None]]


class SecurityHeaders:
    """Adds the headers every response carries, unless the response set its own (the
    acknowledgement links' pages have their own policy)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def wrapped(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                names = {k.lower() for k, _ in headers}
                extra = [*HEADERS, (b"content-security-policy", CSP.encode())]
                headers += [(k, v) for k, v in extra if k not in names]
                message["headers"] = headers
            await send(message)

        await self.app(scope, receive, wrapped)


def environment() -> Environment:
    return Environment(
        loader=FileSystemLoader(HERE / "templates"),
        autoescape=select_autoescape(default=True, default_for_string=True),
    )


def build_app(site: Site) -> Starlette:
    log = structlog.get_logger("hourwatch")
    board = Board(site.board, environment(), log) if site.board is not None else None

    async def health(request: Request) -> Response:
        ok, body = await run_in_threadpool(site.health)
        return JSONResponse(body, status_code=200 if ok else 503,
                            headers={"Cache-Control": "no-store"})  # fmt: skip

    async def metrics(request: Request) -> Response:
        text = await run_in_threadpool(site.metrics)
        return Response(text, media_type=CONTENT_TYPE, headers={"Cache-Control": "no-store"})

    async def ack_link(request: Request) -> Response:
        links = site.ack_links()
        if links is None:
            return PlainTextResponse("not found\n", status_code=404)
        body = await read_body(request, MAX_POST_BYTES)
        if body is None:
            return PlainTextResponse("request body too large\n", status_code=413)
        raw = request.scope.get("raw_path") or request.url.path.encode()
        path = bytes(raw).decode("latin-1").split("?", 1)[0]
        reply = await run_in_threadpool(links.handle, request.method, path, body[: MAX_FORM * 4])
        if reply is None:
            return PlainTextResponse("not found\n", status_code=404)
        return Response(reply.body.encode(), status_code=reply.status,
                        headers=dict(reply.headers))  # fmt: skip

    routes = [
        Route("/health", health, methods=["GET"]),
        Route("/metrics", metrics, methods=["GET"]),
        # every method: the links' handler answers the ones it does not take
        Route("/ack/{token:path}", ack_link, methods=["GET", "HEAD", "POST", "PUT", "DELETE"]),
    ]
    if board is not None:
        routes += board.routes()

    async def not_found(request: Request, exc: Exception) -> Response:
        if board is not None and "text/html" in request.headers.get("accept", ""):
            return board.message(request, 404, "Not found",
                                 ["There is no such page on this board."])  # fmt: skip
        return PlainTextResponse("not found: try /health or /metrics\n", status_code=404)

    @contextlib.asynccontextmanager
    async def lifespan(app: Starlette) -> AsyncIterator[None]:
        if board is not None:
            board.broadcaster.start()
        try:
            yield
        finally:
            if board is not None:
                await board.broadcaster.stop()

    app = Starlette(routes=routes, exception_handlers={404: not_found}, lifespan=lifespan)
    app.add_middleware(SecurityHeaders)
    app.state.board = board
    return app
