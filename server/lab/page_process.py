"""Starting and watching the status page's process, from the lab's side (see `child.py` for
why the page has a process of its own).

The lab binds the listening socket and opens the channel before the child exists, so the
URL can be printed at once (connections wait in the socket's backlog until the child
serves). The lab never depends on the page: if the child dies, one warning is printed and
the sessions go on; when the lab closes its end, the child exits.
"""

from __future__ import annotations

import asyncio
import contextlib
import os
import secrets
import signal
import socket
import subprocess
import sys
import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from server.lab.config_web import WebSettings
from server.lab.page_feed import FedLab, LabEnd, open_lab_end
from server.lab.page_socket import WebError, bind_socket, url_of
from server.store import queries
from server.store.errors import StoreError

if TYPE_CHECKING:  # the supervisor is what runs the page, not what the page needs
    from server.lab.supervisor import BoxRun, Lab

PACKAGE_ROOT = Path(__file__).resolve().parents[2]  # the folder holding `server`
CLOSE_WAIT_S = 8.0  # uvicorn's graceful shutdown takes up to 3 s


@contextlib.contextmanager
def _sigint_ignored():
    """Ignore SIGINT while the child is spawned, so it starts ignoring it (an ignored signal
    stays ignored across exec, and Python then installs no KeyboardInterrupt handler): a
    Ctrl-C while the child is still importing cannot kill it with a traceback."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)


def _child_env() -> dict[str, str]:
    """The lab's environment, with this copy of `server` first on the child's path, so
    the page runs the same code as the lab whatever the working directory."""
    paths = [str(PACKAGE_ROOT)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]
    return {**os.environ, "PYTHONPATH": os.pathsep.join(paths)}


class PageProcess:
    """The status page's process as the lab sees it."""

    def __init__(self, proc: asyncio.subprocess.Process, end: LabEnd, url: str, say: Callable[[str], None]):
        self.proc = proc
        self.end = end
        self.url = url
        self.say = say
        self._closing = False
        self._watch = asyncio.create_task(self._watch_page())

    @property
    def pid(self) -> int:
        return self.proc.pid

    async def _watch_page(self) -> None:
        await self.end.run()  # until the page's end closes: it exited, or we closed ours
        if self._closing:
            return
        self.end.close()
        code = await self.proc.wait()
        self.say(f"warning: status page stopped (its process exited with code {code}); the sessions go on")

    async def close(self, timeout: float = CLOSE_WAIT_S) -> int:
        """Close the channel (the child reads EOF and exits) and wait for it; returns its
        exit code (killed after `timeout`)."""
        self._closing = True
        self.end.close()
        try:
            code = await asyncio.wait_for(self.proc.wait(), timeout)
        except TimeoutError:
            self.proc.kill()
            code = await self.proc.wait()
        await asyncio.gather(self._watch, return_exceptions=True)
        return code


async def start_page(
    lab: FedLab,
    db_path: str | Path,
    *,
    host: str,
    port: int,
    operator_token: str | None,
    viewer_token: str | None,
    lab_name: str,
    quiet_after_s: float,
    say: Callable[[str], None] = print,
) -> PageProcess:
    """Bind host:port, start the page's process and open the lab's end of its channel.

    Raises `WebError` (busy port, no process) or `StoreError` (database unreadable) before
    anything is started.
    """
    listening = bind_socket(host, port)
    try:
        queries.open_readonly(db_path).close()  # the child would fail the same way, later
        lab_sock, page_sock = socket.socketpair()
        try:
            with _sigint_ignored():
                proc = await asyncio.create_subprocess_exec(
                    sys.executable,
                    "-m",
                    "server.web.child",
                    "--listen-fd",
                    str(listening.fileno()),
                    "--channel-fd",
                    str(page_sock.fileno()),
                    pass_fds=(listening.fileno(), page_sock.fileno()),
                    stdin=subprocess.DEVNULL,
                    env=_child_env(),
                )
        except OSError as exc:
            lab_sock.close()
            raise WebError(f"cannot start the status page's process: {exc}") from None
        finally:
            page_sock.close()  # the child's copy is the only one: its exit reads as EOF here
        url = url_of(host, listening.getsockname()[1])
    finally:
        listening.close()  # the child listens now; its exit frees the port
    end = await open_lab_end(lab, lab_sock, say=say)
    end.send(
        {
            "setup": {
                "db": str(Path(db_path).resolve()),
                "host": host,
                "lab_name": lab_name,
                "operator_token": operator_token,
                "viewer_token": viewer_token,
                "quiet_after_s": quiet_after_s,
            }
        }
    )
    return PageProcess(proc, end, url, say)


def _say(text: str) -> None:
    print(text, flush=True)


async def run_lab_with_page(
    lab: Lab,
    db_path: str | Path,
    web: WebSettings,
    *,
    minutes: float | None,
    port: int | None = None,
    say: Callable[[str], None] = _say,
) -> list[BoxRun]:
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
