"""Starting the status page for the `vigil` verbs: beside a running lab (in a process of its
own), or alone over a database (`vigil serve`, read-only, in this process)."""

from __future__ import annotations

import asyncio
import os
import secrets
import signal
from collections.abc import Callable
from pathlib import Path
from typing import Any

from server.lab_config import WebSettings, is_loopback
from server.store.errors import StoreError
from server.web.app import create_app
from server.web.page_process import PageProcess, start_page
from server.web.serving import StatusServer, WebError

VIEWER_TOKEN_ENV = "VIGIL_VIEWER_TOKEN"  # `vigil serve`: a token on the command line would show in ps


def _say(text: str) -> None:
    print(text, flush=True)


async def run_lab_with_page(
    lab: Any,
    db_path: str | Path,
    web: WebSettings,
    *,
    minutes: float | None,
    port: int | None = None,
    say: Callable[[str], None] = _say,
) -> list:
    """Run the lab with its status page in a process of its own; returns the lab's runs.

    Without an operator token in the config, one is drawn for this run and printed. A page
    that cannot start (a busy port) is reported and the sessions run without it: the
    animals are already in the boxes. The page's process ends with the lab.
    """
    token = web.operator_token or secrets.token_urlsafe(18)
    try:
        page: PageProcess | None = await start_page(
            lab,
            db_path,
            host=web.host,
            port=web.port if port is None else port,
            operator_token=token,
            viewer_token=web.viewer_token,
            lab_name=lab.config.lab,
            quiet_after_s=web.no_response_minutes * 60.0,
            say=say,
        )
    except (WebError, StoreError) as exc:
        say(f"warning: status page not started: {exc}")
        page = None
    if page is not None:
        say(f"status page: {page.url}")
        if web.operator_token is None:
            say(f"operator token for this run (pause, stop, notes): {token}")
    try:
        return await lab.run(minutes)
    finally:
        if page is not None:
            await page.close()


def serve_store(db_path: str | Path, *, host: str, port: int, say: Callable[[str], None] = _say) -> int:
    """`vigil serve`: the status page over a database alone, read-only, until SIGINT/SIGTERM.

    Returns the exit code (1 when the database or the address cannot be used).
    """
    viewer = os.environ.get(VIEWER_TOKEN_ENV) or None
    if not is_loopback(host) and viewer is None:
        say(f"vigil: listening on '{host}' reaches other computers; set {VIEWER_TOKEN_ENV} first, or use 127.0.0.1")
        return 1
    try:
        server = StatusServer(create_app(db_path, viewer_token=viewer), host, port)
    except (WebError, StoreError) as exc:
        say(f"vigil: {exc}")
        return 1

    async def main() -> None:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            try:
                loop.add_signal_handler(sig, server.stop)
            except (NotImplementedError, RuntimeError):  # not the main thread
                pass
        say(f"status page (read-only): {server.url}")
        await server.serve()

    asyncio.run(main())
    return 0
