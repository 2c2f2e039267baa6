"""A minimal driver for headless Chromium over its DevTools pipe (no extra dependency).

Chromium started with `--remote-debugging-pipe` reads DevTools commands from fd 3 and
writes replies and events to fd 4, one JSON message per NUL-terminated chunk (the
"pipe" transport of the Chrome DevTools Protocol). Enough here to open a page, run a
line of script in it and take a screenshot.
"""

from __future__ import annotations

import base64
import fcntl
import json
import os
import queue
import shutil
import subprocess
import threading
import time
from pathlib import Path

CHROMIUM_FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--remote-debugging-pipe",
)


def chromium_path() -> str | None:
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    return None


class BrowserError(Exception):
    pass


def _high(*fds: int) -> tuple[int, ...]:
    """The descriptors moved to numbers above 9, so the child's dup2 onto 3 and 4 never
    meets one of them (dup2 onto itself would keep close-on-exec)."""
    moved = tuple(fcntl.fcntl(fd, fcntl.F_DUPFD_CLOEXEC, 10) for fd in fds)
    for fd in fds:
        os.close(fd)
    return moved


class Chromium:
    def __init__(self, profile: Path, *, width: int = 1400, height: int = 1000):
        exe = chromium_path()
        if exe is None:
            raise BrowserError("chromium is not installed")
        to_child_r, self._to_child = _high(*os.pipe())
        self._from_child, from_child_w = _high(*os.pipe())

        def fds() -> None:  # runs in the child before exec: put the pipe ends on 3 and 4
            os.dup2(to_child_r, 3)
            os.dup2(from_child_w, 4)

        self.proc = subprocess.Popen(
            [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--window-size={width},{height}", "about:blank"],
            stdin=subprocess.DEVNULL,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
            # Python's own descriptors are not inheritable (PEP 446), so with close_fds off
            # the child keeps only 0-2 and the two duplicated above.
            preexec_fn=fds,
            close_fds=False,
        )
        os.close(to_child_r)
        os.close(from_child_w)
        self._replies: dict[int, queue.Queue] = {}
        self._lock = threading.Lock()
        self._next = 0
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()
        target = self.call("Target.createTarget", url="about:blank")["targetId"]
        self.session = self.call("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        self.call(
            "Emulation.setDeviceMetricsOverride",
            session=True,
            width=width,
            height=height,
            deviceScaleFactor=1,
            mobile=False,
        )

    def _read(self) -> None:
        buffer = b""
        while True:
            try:
                chunk = os.read(self._from_child, 65536)
            except OSError:
                chunk = b""
            if not chunk:
                for waiting in list(self._replies.values()):
                    waiting.put({"error": {"message": "browser closed the pipe"}})
                return
            buffer += chunk
            while b"\0" in buffer:
                raw, buffer = buffer.split(b"\0", 1)
                message = json.loads(raw)
                waiting = self._replies.get(message.get("id"))
                if waiting is not None:
                    waiting.put(message)

    def call(self, method: str, *, session: bool = False, timeout: float = 30.0, **params):
        with self._lock:
            self._next += 1
            ident = self._next
            box: queue.Queue = queue.Queue()
            self._replies[ident] = box
        message = {"id": ident, "method": method, "params": params}
        if session:
            message["sessionId"] = self.session
        os.write(self._to_child, json.dumps(message).encode() + b"\0")
        try:
            reply = box.get(timeout=timeout)
        except queue.Empty:
            raise BrowserError(f"{method}: no reply within {timeout:g} s") from None
        finally:
            self._replies.pop(ident, None)
        if "error" in reply:
            raise BrowserError(f"{method}: {reply['error'].get('message')}")
        return reply.get("result", {})

    def navigate(self, url: str, *, timeout: float = 30.0) -> None:
        self.call("Page.navigate", session=True, url=url)
        self.wait_for("document.readyState === 'complete' && location.href !== 'about:blank'", timeout=timeout)

    def evaluate(self, expression: str):
        result = self.call(
            "Runtime.evaluate", session=True, expression=expression, returnByValue=True, awaitPromise=True
        )
        if "exceptionDetails" in result:
            details = result["exceptionDetails"]
            why = (details.get("exception") or {}).get("description") or details.get("text")
            raise BrowserError(f"script failed: {why}")
        return result["result"].get("value")

    def wait_for(self, expression: str, *, timeout: float = 30.0, every: float = 0.25):
        """Evaluate until the value is truthy; returns it."""
        deadline = time.monotonic() + timeout
        while True:
            value = self.evaluate(expression)
            if value:
                return value
            if time.monotonic() > deadline:
                raise BrowserError(f"timed out waiting for: {expression}")
            time.sleep(every)

    def screenshot(self, path: Path, *, full_page: bool = True) -> Path:
        data = self.call("Page.captureScreenshot", session=True, format="png", captureBeyondViewport=full_page)["data"]
        path.write_bytes(base64.b64decode(data))
        return path

    def close(self) -> None:
        try:
            self.call("Browser.close", timeout=5.0)
        except BrowserError:
            pass
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        for fd in (self._to_child, self._from_child):
            try:
                os.close(fd)
            except OSError:
                pass
