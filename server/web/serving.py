"""Serving the status page with uvicorn on the caller's asyncio loop: in the page's own
process beside a lab (`server.web.child`), or alone for `vigil serve`.

uvicorn installs its own SIGINT/SIGTERM handlers while it serves; here they are switched
off so the caller's handlers stay in charge, and the server stops when told to (DESIGN.md,
"uvicorn in our loop"). The socket is bound before anything starts (by the lab, for the
page's process), so a busy port is a one-line error rather than an exit from inside uvicorn.
"""

from __future__ import annotations

import contextlib
import socket

import uvicorn
from fastapi import FastAPI

from server.lab.page_socket import WebError, bind_socket, url_of
from server.web.app import close_app, stop_live_updates

__all__ = ["StatusServer", "WebError", "bind_socket", "serve", "url_of"]


class _KeepOurSignals(uvicorn.Server):
    @contextlib.contextmanager
    def capture_signals(self):
        yield


class StatusServer:
    """The status page on one socket; `serve()` until `stop()`."""

    def __init__(self, app: FastAPI, host: str = "127.0.0.1", port: int = 8642, *, sock: socket.socket | None = None):
        self.app = app
        self.sock = sock if sock is not None else bind_socket(host, port)
        self.host = host
        self.port = self.sock.getsockname()[1]
        config = uvicorn.Config(
            app,
            host=host,
            port=self.port,
            log_config=None,
            log_level="warning",
            access_log=False,
            lifespan="off",
            ws="none",
            http="auto",
            server_header=False,
            timeout_graceful_shutdown=3,
        )
        self._server = _KeepOurSignals(config)

    @property
    def url(self) -> str:
        return url_of(self.host, self.port)

    @property
    def started(self) -> bool:
        return self._server.started

    async def serve(self) -> None:
        try:
            await self._server.serve(sockets=[self.sock])
        finally:
            close_app(self.app)

    def stop(self) -> None:
        stop_live_updates(self.app)
        self._server.should_exit = True


async def serve(app: FastAPI, host: str = "127.0.0.1", port: int = 8642) -> None:
    """Serve `app` on the running loop until the task is cancelled or the app is stopped;
    the caller's signal handlers stay in place."""
    await StatusServer(app, host, port).serve()
