"""Serve the application with uvicorn on a thread of its own, on one or more addresses.

The sockets are bound in the constructor, so an address in use fails before anything
else starts (the service turns it into one line naming the key), and a client that
connects before uvicorn's loop runs waits in the listen backlog instead of being refused.
"""

from __future__ import annotations

import asyncio
import contextlib
import socket
import threading
import time

import uvicorn
from starlette.applications import Starlette

STOP_S = 3.0  # open event streams are ended; requests in flight get this long


def bind(host: str, port: int) -> socket.socket:
    """A listening TCP socket (OSError when the address is taken or not ours)."""
    family = socket.AF_INET6 if ":" in host else socket.AF_INET
    sock = socket.socket(family, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        sock.bind((host, port))
        sock.listen(128)
        sock.set_inheritable(True)
    except OSError:
        sock.close()
        raise
    return sock


class WebServer:
    def __init__(self, app: Starlette, addresses: dict[str, tuple[str, int]]) -> None:
        """`addresses`: name (health, board) -> (host, port); equal ones share a socket."""
        self.app = app
        self.sockets: list[socket.socket] = []
        self.addresses: dict[str, tuple[str, int]] = {}
        by_address: dict[tuple[str, int], tuple[str, int]] = {}
        try:
            for name, (host, port) in addresses.items():
                if (host, port) in by_address and port != 0:
                    self.addresses[name] = by_address[(host, port)]
                    continue
                sock = bind(host, port)
                self.sockets.append(sock)
                bound = sock.getsockname()[:2]
                by_address[(host, port)] = self.addresses[name] = (str(bound[0]), int(bound[1]))
        except OSError:
            self.close_sockets()
            raise
        config = uvicorn.Config(app, log_level="warning", access_log=False, lifespan="on",
                                timeout_graceful_shutdown=int(STOP_S),
                                timeout_keep_alive=5)  # fmt: skip
        self.server = uvicorn.Server(config)
        self.loop: asyncio.AbstractEventLoop | None = None
        self._thread = threading.Thread(target=self._serve, name="hourwatch-http", daemon=True)

    @property
    def address(self) -> tuple[str, int]:
        """The first address (the health endpoint's when it has one)."""
        return next(iter(self.addresses.values()))

    def _serve(self) -> None:
        self.loop = asyncio.new_event_loop()
        asyncio.set_event_loop(self.loop)
        try:
            self.loop.run_until_complete(self.server.serve(sockets=self.sockets))
        finally:
            self.loop.close()

    def start(self) -> None:
        self._thread.start()
        deadline = time.monotonic() + 10.0
        while not self.server.started and self._thread.is_alive():
            if time.monotonic() > deadline:
                break
            time.sleep(0.005)

    def stop(self) -> None:
        board = getattr(self.app.state, "board", None)
        loop = self.loop
        if board is not None and loop is not None and not loop.is_closed():
            # end the event streams first: uvicorn waits for open responses
            with contextlib.suppress(RuntimeError):
                done = asyncio.run_coroutine_threadsafe(board.broadcaster.stop(), loop)
                with contextlib.suppress(Exception):
                    done.result(STOP_S)
        self.server.should_exit = True
        if self._thread.is_alive():
            self._thread.join(STOP_S + 2.0)
        self.close_sockets()

    def close_sockets(self) -> None:
        for sock in self.sockets:
            with contextlib.suppress(OSError):
                sock.close()
