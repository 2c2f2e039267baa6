"""Operator controls: pause, resume, stop and annotate a running box's session.

Only mounted when the app serves a running lab. Every route is POST, checks the operator
token, and records who acted: pause and resume land in the events table with their origin,
a stop in the session's end reason, a note in the annotations table. These routes run on
the lab's loop (the session queue and the store's writer belong to it).
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import RedirectResponse

from server.store.errors import StoreError
from server.web.auth import Refused, form_fields, supplied_token
from server.web.schemas import ActionOut, NoteIn, NoteOut

ACTIONS = ("pause", "resume", "stop")
DONE = {"pause": "paused", "resume": "resumed", "stop": "stopped", "annotate": "noted"}


def origin_of(request: Request) -> str:
    client = request.client
    return client.host if client is not None else "unknown"


def _run_of(lab: Any, session_id: int) -> Any:
    for run in lab.runs:
        if run.session_id == session_id:
            return run
    raise HTTPException(404, f"session {session_id} is not running in this lab")


def _act(lab: Any, session_id: int, action: str, origin: str) -> Any:
    run = _run_of(lab, session_id)
    try:
        lab.control(run.config.name, action, origin)
    except ValueError as exc:
        raise HTTPException(409, str(exc)) from None
    return run


def _annotate(lab: Any, session_id: int, text: str, origin: str) -> int:
    run = _run_of(lab, session_id)
    text = text.strip()
    if not text:
        raise HTTPException(422, "a note needs some text")
    if len(text) > 2000:
        raise HTTPException(422, "a note is limited to 2000 characters")
    try:
        return lab.annotate(run.config.name, text, origin)
    except StoreError as exc:
        raise HTTPException(503, f"note not stored: {exc}") from None


def controls_router(state: Any) -> APIRouter:
    router = APIRouter(tags=["controls"])
    lab = state.lab

    async def operator(request: Request) -> str:
        state.guard.check_operator(await supplied_token(request))
        return origin_of(request)

    def action_route(action: str):
        async def route(session_id: int, request: Request) -> dict[str, Any]:
            origin = await operator(request)
            run = _act(lab, session_id, action, origin)
            return {"session_id": session_id, "box": run.config.name, "action": action,
                    "origin": origin}

        route.__name__ = f"{action}_session"
        return route

    for action in ACTIONS:
        router.add_api_route(
            f"/api/sessions/{{session_id}}/{action}", action_route(action), methods=["POST"],
            response_model=ActionOut,
            summary=f"{action.capitalize()} a running session (operator token required)",
        )

    @router.post("/api/sessions/{session_id}/annotations", response_model=NoteOut,
                 status_code=201, summary="Store a note on a session (operator token required)")
    async def annotate(session_id: int, note: NoteIn, request: Request) -> dict[str, Any]:
        origin = await operator(request)
        note_id = _annotate(lab, session_id, note.text, origin)
        return {"id": note_id, "session_id": session_id, "origin": origin}

    @router.post("/sessions/{session_id}/control", include_in_schema=False)
    async def form_control(session_id: int, request: Request) -> RedirectResponse:
        """The session page's form (works without the page script)."""
        origin = await operator(request)
        form = await form_fields(request)
        action = form.get("action")
        if action in ACTIONS:
            _act(lab, session_id, str(action), origin)
        elif action == "annotate":
            _annotate(lab, session_id, str(form.get("text") or ""), origin)
        else:
            raise Refused(400, "unknown action")
        return RedirectResponse(f"/sessions/{session_id}?done={DONE[str(action)]}",
                                status_code=303)

    return router
