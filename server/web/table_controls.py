"""`vigil serve` over a lab-wide store: controls reach the rig that runs the box through the
store's `controls` table (server/store/controls.py), which every rig polls with the
connection it forwards on. The page never talks to a rig: it writes a request, and reads the
rig's answer. No answer within `WAIT_S` and the request is withdrawn, so a rig that comes
back later does not carry out a stale stop; a request the rig had already taken is waited
for a little longer, then reported as possibly still happening.
"""

from __future__ import annotations

import threading
import time
from typing import Any

from starlette.concurrency import run_in_threadpool

from server.store import controls
from server.store.postgres import connect
from server.store.wall_clock import wall_now
from server.web.page_end import LabGone

WAIT_S = 5.0
CLAIMED_WAIT_S = 3.0
POLL_S = 0.05


class TableControls:
    """`LabControls` (server/web/controls.py) through the lab-wide store."""

    def __init__(self, url: str):
        self.url = url
        self._conn = connect(url, application="vigil-serve controls")
        self._lock = threading.Lock()

    async def ask(self, op: str, session_id: int, origin: str, text: str | None = None) -> dict[str, Any]:
        return await run_in_threadpool(self._ask, op, session_id, origin, text)

    def close(self) -> None:
        self._conn.close()

    def _ask(self, op: str, session_id: int, origin: str, text: str | None) -> dict[str, Any]:
        with self._lock:
            if self._conn.broken:
                self._conn = connect(self.url, application="vigil-serve controls")
            rig = controls.session_rig(self._conn, session_id)
            if rig is None:
                return {"status": 404, "detail": f"session {session_id} is not in this store or names no rig"}
            control_id = controls.ask(self._conn, rig, session_id, op, origin, text, wall_now())
        deadline = time.monotonic() + WAIT_S
        claimed_deadline: float | None = None
        while True:
            with self._lock:
                status, reply = controls.reply(self._conn, control_id)
            if status is not None and status != controls.CLAIMED:
                return {"status": status, **reply}
            now = time.monotonic()
            if status == controls.CLAIMED and claimed_deadline is None:
                claimed_deadline = max(deadline, now) + CLAIMED_WAIT_S
            if status is None and now >= deadline:
                with self._lock:
                    withdrawn = controls.expire(self._conn, control_id, wall_now())
                if withdrawn:
                    raise LabGone(
                        f"rig '{rig}' did not answer in {WAIT_S:g} s (not running, or not reaching the store)"
                    )
                continue
            if claimed_deadline is not None and now >= claimed_deadline:
                raise LabGone(f"rig '{rig}' took the request but did not answer; it may still happen")
            time.sleep(POLL_S)
