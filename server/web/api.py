"""The read side of the JSON API under /api/, live updates and CSV downloads.

Database routes are plain functions, which FastAPI runs on its thread pool, so a long
query never holds up the page's loop (and its live streams); the box tiles come from the
board's shared snapshot.
"""

from __future__ import annotations

import asyncio
import io
import re
from collections.abc import AsyncIterable
from typing import Any

from fastapi import APIRouter, HTTPException, Query, Response
from fastapi.sse import EventSourceResponse, ServerSentEvent

from server.store import csv_exports, queries
from server.web.schemas import AnimalOut, BoxTile, SessionOut
from server.web.session_page import animal_rows

LIVE_EVERY_S = 1.0


def _session_or_404(conn, session_id: int) -> dict[str, Any]:
    session = queries.get_session(conn, session_id)
    if session is None:
        raise HTTPException(404, f"no session {session_id}")
    return session


def _known(state: Any, session_id: int):
    """The reading connection, once the session is known to exist (404 otherwise)."""
    conn = state.store.conn()
    _session_or_404(conn, session_id)
    return conn


def _file_safe(name: str) -> str:
    """A name as it may appear in a download's file name (letters, digits, - _ . only)."""
    return re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._") or "animal"


def _attachment(text: str, filename: str) -> Response:
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={"Content-Disposition": f'attachment; filename="{filename}"'},
    )


def api_router(state: Any) -> APIRouter:
    router = APIRouter(prefix="/api", tags=["read"])

    @router.get(
        "/boxes",
        response_model=list[BoxTile],
        summary="One status tile per box (latest session per box when read-only)",
    )
    async def boxes() -> Response:
        snap = await state.snapshot()
        return Response(snap.boxes_json, media_type="application/json")

    @router.get("/board", summary="The overview's texts and alarm strip (live-update payload)")
    async def board() -> Response:
        snap = await state.snapshot()
        return Response(snap.board_json, media_type="application/json")

    @router.get(
        "/live", response_class=EventSourceResponse, summary="Server-sent events: the board payload about once a second"
    )
    async def live() -> AsyncIterable[ServerSentEvent]:
        last = None
        while not state.stopping.is_set():
            snap = await state.snapshot()
            if snap.version != last:
                last = snap.version
                yield ServerSentEvent(raw_data=snap.board_json, event="board", id=str(snap.version), retry=3000)
            await asyncio.sleep(LIVE_EVERY_S)

    @router.get("/sessions", summary="Sessions, newest first")
    def sessions(
        animal: str | None = None,
        box: str | None = None,
        running: bool = False,
        limit: int = Query(100, ge=1, le=10_000),
    ) -> list[dict[str, Any]]:
        return queries.list_sessions(state.store.conn(), animal=animal, box=box, running=running, limit=limit)

    @router.get("/sessions/{session_id}", response_model=SessionOut)
    def session(session_id: int) -> dict[str, Any]:
        conn = state.store.conn()
        return {
            "session": _session_or_404(conn, session_id),
            "status": queries.session_status(conn, session_id),
            "blocks": queries.session_blocks(conn, session_id),
            "annotations": queries.session_annotations(conn, session_id),
            "rule_firings": queries.session_rule_firings(conn, session_id),
        }

    @router.get("/sessions/{session_id}/trials", summary="Trials in order; `after` for polling")
    def trials(session_id: int, after: int = 0) -> list[dict[str, Any]]:
        conn = _known(state, session_id)
        return queries.session_trials(conn, session_id, after_trial=after)

    @router.get(
        "/sessions/{session_id}/estimates", summary="Learning-model estimates after each trial (empty when none stored)"
    )
    def estimates(session_id: int, after: int = 0) -> list[dict[str, Any]]:
        conn = _known(state, session_id)
        return queries.session_estimates(conn, session_id, after_trial=after)

    @router.get(
        "/sessions/{session_id}/events",
        summary="Events in stored order; `since` (event id) for polling, `tail` for the last N",
    )
    def events(
        session_id: int, since: int = 0, tail: int | None = Query(None, ge=1), kind: str | None = None
    ) -> list[dict[str, Any]]:
        conn = _known(state, session_id)
        return queries.session_events(conn, session_id, since_id=since, tail=tail, kind=kind)

    def _csv(session_id: int, what: str, export) -> Response:
        conn = _known(state, session_id)
        out = io.StringIO()
        export(conn, session_id, out)
        return _attachment(out.getvalue(), f"session-{session_id}-{what}.csv")

    @router.get("/sessions/{session_id}/trials.csv", response_class=Response, summary="The session's trials as CSV")
    def trials_csv(session_id: int) -> Response:
        return _csv(session_id, "trials", csv_exports.export_trials_csv)

    @router.get("/sessions/{session_id}/events.csv", response_class=Response, summary="The session's events as CSV")
    def events_csv(session_id: int) -> Response:
        return _csv(session_id, "events", csv_exports.export_events_csv)

    @router.get(
        "/sessions/{session_id}/choices.csv",
        response_class=Response,
        summary="The session's choices in the format `vigil fit` reads (animal,session,trial,choice,reward)",
    )
    def session_choices_csv(session_id: int) -> Response:
        return _csv(
            session_id, "choices", lambda conn, sid, out: csv_exports.export_choices_csv(conn, out, session_id=sid)
        )

    # Before /animals/{animal:path}, which would take "RN-1/choices.csv" for an animal's name.
    @router.get(
        "/animals/{animal:path}/choices.csv",
        response_class=Response,
        summary="Every choice of an animal, sessions in order, in the format `vigil fit` reads",
    )
    def animal_choices_csv(animal: str) -> Response:
        out = io.StringIO()
        if not csv_exports.export_choices_csv(state.store.conn(), out, animal=animal):
            raise HTTPException(404, f"no trials of animal '{animal}'")
        return _attachment(out.getvalue(), f"animal-{_file_safe(animal)}-choices.csv")

    @router.get(
        "/animals/{animal:path}",
        response_model=AnimalOut,
        summary="An animal's sessions, oldest first, with stage, accuracy and parameters",
    )
    def animal(animal: str) -> dict[str, Any]:
        history = animal_rows(state.store.conn(), animal)
        if not history:
            raise HTTPException(404, f"no sessions of animal '{animal}'")
        for row in history:
            row.pop("fitted_text", None)
        return {"animal": animal, "sessions": history}

    return router
