"""`vigil serve`: the status page alone over a database, read-only, in this process.

(Beside a running lab the page has a process of its own: server/lab/page_process.py.)"""

from __future__ import annotations

import asyncio
import os
from collections.abc import Callable
from pathlib import Path

from server.lab.config_web import is_loopback
from server.lab.signals import on_stop_signals
from server.store.dialect import is_server_url
from server.store.errors import StoreError
from server.web.app import create_app
from server.web.serving import StatusServer, WebError

VIEWER_TOKEN_ENV = "VIGIL_VIEWER_TOKEN"  # `vigil serve`: a token on the command line would show in ps
OPERATOR_TOKEN_ENV = "VIGIL_OPERATOR_TOKEN"  # with a lab-wide store: controls reach the rigs


def _say(text: str) -> None:
    print(text, flush=True)


def serve_store(db_path: str | Path, *, host: str, port: int, say: Callable[[str], None] = _say) -> int:
    """`vigil serve`: the status page over a database alone, read-only, until SIGINT/SIGTERM.
    Over a lab-wide store (a PostgreSQL URL) with `VIGIL_OPERATOR_TOKEN` set, the page's
    controls reach the rig that runs each box, through the store (web/table_controls.py).

    Returns the exit code (1 when the database or the address cannot be used).
    """
    viewer = os.environ.get(VIEWER_TOKEN_ENV) or None
    operator = os.environ.get(OPERATOR_TOKEN_ENV) or None
    if not is_loopback(host) and viewer is None:
        say(f"vigil: listening on '{host}' reaches other computers; set {VIEWER_TOKEN_ENV} first, or use 127.0.0.1")
        return 1
    controls = None
    try:
        if is_server_url(db_path) and operator is not None:
            from server.web.table_controls import TableControls

            controls = TableControls(str(db_path))
        app = create_app(db_path, viewer_token=viewer, operator_token=operator, controls=controls)
        server = StatusServer(app, host, port)
    except (WebError, StoreError) as exc:
        if controls is not None:
            controls.close()
        say(f"vigil: {exc}")
        return 1

    async def main() -> None:
        with on_stop_signals(asyncio.get_running_loop(), lambda sig: server.stop()):
            mode = "controls through the lab-wide store" if controls is not None else "read-only"
            say(f"status page ({mode}): {server.url}")
            await server.serve()

    try:
        asyncio.run(main())
    finally:
        if controls is not None:
            controls.close()
    return 0
