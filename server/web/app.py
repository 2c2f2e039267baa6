"""The status page's FastAPI app: pages, JSON API, live updates and (with a lab) controls.

The app never talks to a box: it reads the lab's tile feed and the store through a
read-only connection, and its controls only ask the lab, which applies them in its own loop
(both over the channel of `page_end.LabView`; the app runs in its own process, see
`server.web.child`). `create_app(db)` without `live` is the read-only app of `vigil serve`.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, JSONResponse, Response
from fastapi.staticfiles import StaticFiles
from starlette.concurrency import run_in_threadpool
from starlette.exceptions import HTTPException as StarletteHTTPException

from server.store.dialect import is_server_url
from server.web.api import api_router
from server.web.auth import Guard, Refused, refuse_token_in_url
from server.web.board import Board, ReadOnlyStore, Snapshot
from server.web.controls import LabControls, controls_router
from server.web.layout import page
from server.web.markup import el
from server.web.pages import login_body, pages_router

ASSETS = Path(__file__).parent / "assets"
OPEN_PATHS = ("/assets/", "/login", "/logout", "/api/openapi.json")
# No script, style or frame from anywhere but this server; nothing inline.
SECURITY_HEADERS = [
    (
        b"content-security-policy",
        b"default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
        b"object-src 'none'; base-uri 'none'; frame-ancestors 'none'; form-action 'self'",
    ),
    (b"x-content-type-options", b"nosniff"),
    (b"referrer-policy", b"no-referrer"),
    (b"x-frame-options", b"DENY"),
]


@dataclass
class WebState:
    store: ReadOnlyStore
    board: Board
    guard: Guard
    live: Any  # a page_end.LabView, or None when read-only
    lab_name: str
    stopping: asyncio.Event = field(default_factory=asyncio.Event)
    controls: LabControls | None = None  # the live lab, or the lab-wide store's control table

    @property
    def controls_on(self) -> bool:
        return self.controls is not None

    async def snapshot(self) -> Snapshot:
        if self.live is not None:  # tiles from the feed in memory: cheap, read here
            return self.board.snapshot()
        return await run_in_threadpool(self.board.snapshot)


def _wants_json(path: str) -> bool:
    return path.startswith("/api/")


def _refusal(path: str, status: int, message: str, lab_name: str, read_only: bool) -> Response:
    if _wants_json(path):
        return JSONResponse({"detail": message}, status_code=status)
    body = (
        login_body(message)
        if status in (401, 403) and path != "/login"
        else el("p", message, class_="notice", role="alert")
    )
    return HTMLResponse(
        page("Refused", body, lab_name=lab_name, body_class="pg-login", read_only=read_only), status_code=status
    )


class Gate:
    """ASGI middleware: refuses tokens in URLs, checks read access, adds security headers.

    Done here rather than per route so a route added later cannot forget it.
    """

    def __init__(self, app, state: WebState):
        self.app = app
        self.state = state

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message):
            if message["type"] == "http.response.start":
                message.setdefault("headers", [])
                message["headers"] = list(message["headers"]) + SECURITY_HEADERS
            await send(message)

        request = Request(scope)
        path = scope["path"]
        try:
            if scope.get("query_string"):
                refuse_token_in_url(request)
            if not path.startswith(OPEN_PATHS):
                self.state.guard.check_read(request)
        except Refused as refused:
            response = _refusal(path, refused.status, refused.message, self.state.lab_name, not self.state.controls_on)
            await response(scope, receive, send_with_headers)
            return
        await self.app(scope, receive, send_with_headers)


def _store_name(db_path: str | Path) -> str:
    if is_server_url(db_path):
        name = urlsplit(str(db_path)).path.strip("/")
        return f"lab-wide store {name}".strip()
    return Path(db_path).name


def create_app(
    db_path: str | Path,
    *,
    live: Any = None,
    controls: LabControls | None = None,
    operator_token: str | None = None,
    viewer_token: str | None = None,
    lab_name: str | None = None,
    quiet_after_s: float = 300.0,
) -> FastAPI:
    """The status page over a database; with `live` (a `page_end.LabView`), live tiles and
    operator controls.

    Raises `StoreError` when the database cannot be read.
    """
    store = ReadOnlyStore(db_path)
    board = Board(
        live=None if live is None else live.latest,
        store=None if live is not None else store,
        quiet_after_s=quiet_after_s,
    )
    if lab_name is None:
        lab_name = _store_name(db_path)
    if controls is None and live is not None:
        controls = live
    guard = Guard(operator_token=operator_token, viewer_token=viewer_token)
    state = WebState(store, board, guard, live, lab_name, controls=controls)
    app = FastAPI(
        title="Vigil status page",
        version="1",
        description="Live status of a Vigil lab: boxes, sessions, animals.",
        docs_url=None,
        redoc_url=None,
        openapi_url="/api/openapi.json",
    )
    app.state.vigil = state
    app.include_router(api_router(state))
    if controls is not None:
        app.include_router(controls_router(state))
    app.include_router(pages_router(state))
    app.mount("/assets", StaticFiles(directory=ASSETS), name="assets")
    read_only = controls is None

    @app.exception_handler(Refused)
    async def refused(request: Request, exc: Refused) -> Response:
        return _refusal(request.url.path, exc.status, exc.message, lab_name, read_only)

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> Response:
        message = exc.detail if isinstance(exc.detail, str) else "request refused"
        message = {"Not Found": "no such page", "Method Not Allowed": "method not allowed"}.get(message, message)
        if _wants_json(request.url.path):
            return JSONResponse({"detail": message}, status_code=exc.status_code, headers=getattr(exc, "headers", None))
        return HTMLResponse(
            page(
                "Not here",
                el("p", message, class_="notice", role="alert"),
                lab_name=lab_name,
                body_class="pg-error",
                read_only=read_only,
            ),
            status_code=exc.status_code,
        )

    @app.exception_handler(RequestValidationError)
    async def invalid(request: Request, exc: RequestValidationError) -> Response:
        problems = [
            f"{'.'.join(str(p) for p in e.get('loc', ())[1:]) or 'body'}: {e.get('msg', 'invalid').lower()}"
            for e in exc.errors()
        ]
        return JSONResponse({"detail": "; ".join(problems) or "invalid request"}, status_code=422)

    app.add_middleware(Gate, state=state)
    return app


def stop_live_updates(app: FastAPI) -> None:
    """End every open live-update stream (before the server shuts down)."""
    app.state.vigil.stopping.set()


def close_app(app: FastAPI) -> None:
    """Close the app's read-only database connections."""
    app.state.vigil.store.close()
