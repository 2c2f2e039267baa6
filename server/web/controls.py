"""Operator controls: pause, resume, stop and annotate a running box's session.

Only mounted when the app serves a running lab. Every route is POST and checks the operator
token here, in the page's process; then the lab is asked over the channel and applies the
action in its own loop (`server.lab.page_feed.answer`), recording who acted: pause and resume land in the
events table with their origin, a stop in the session's end reason, a note in the
annotations table. The lab's answer becomes the HTTP status: 404 not running, 409 refused,
422 a bad note, 503 the store failed or the lab did not answer.
"""

from __future__ import annotations

from typing import Any, Protocol

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import RedirectResponse
from pydantic import ValidationError

from server.engine.records import ControlAction
from server.web.auth import Refused, form_fields, supplied_token
from server.web.page_end import LabGone
from server.web.schemas import ActionOut, NoteIn, NoteOut

DONE = {
    ControlAction.PAUSE: "paused",
    ControlAction.RESUME: "resumed",
    ControlAction.STOP: "stopped",
    "annotate": "noted",
}
ACTIONS = tuple(action.value for action in ControlAction)


class LabControls(Protocol):
    """The running lab as the page's controls see it: something to ask, over the channel
    (`server.web.page_end.LabView`); it raises `LabGone` when the lab does not answer."""

    async def ask(self, op: str, session_id: int, origin: str, text: str | None = None) -> dict[str, Any]: ...


def origin_of(request: Request) -> str:
    client = request.client
    return client.host if client is not None else "unknown"


async def _ask(live: LabControls, op: str, session_id: int, origin: str, text: str | None = None) -> dict[str, Any]:
    """The lab's answer to one control; an HTTP error unless it was done."""
    try:
        reply = await live.ask(op, session_id, origin, text)
    except LabGone as exc:
        raise HTTPException(503, str(exc)) from None
    if reply["status"] >= 300:
        raise HTTPException(reply["status"], reply.get("detail") or "refused by the lab")
    return reply


async def _note(request: Request) -> NoteIn:
    """The JSON body of a note, validated once the operator is known (422 when invalid)."""
    try:
        return NoteIn.model_validate_json(await request.body())
    except ValidationError as exc:
        problems = [
            f"{'.'.join(str(p) for p in e.get('loc', ())) or 'body'}: {e.get('msg', 'invalid').lower()}"
            for e in exc.errors()
        ]
        raise HTTPException(422, "; ".join(problems) or "invalid note") from None


def controls_router(state: Any) -> APIRouter:
    router = APIRouter(tags=["controls"])
    live: LabControls = state.controls

    async def operator(request: Request) -> str:
        state.guard.check_operator(await supplied_token(request))
        return origin_of(request)

    def action_route(action: str):
        async def route(session_id: int, request: Request) -> dict[str, Any]:
            origin = await operator(request)
            reply = await _ask(live, action, session_id, origin)
            return {"session_id": session_id, "box": reply["box"], "action": action, "origin": origin}

        route.__name__ = f"{action}_session"
        return route

    for action in ACTIONS:
        router.add_api_route(
            f"/api/sessions/{{session_id}}/{action}",
            action_route(action),
            methods=["POST"],
            response_model=ActionOut,
            summary=f"{action.capitalize()} a running session (operator token required)",
        )

    @router.post(
        "/api/sessions/{session_id}/annotations",
        response_model=NoteOut,
        status_code=201,
        summary="Store a note on a session (operator token required)",
        openapi_extra={
            "requestBody": {
                "required": True,
                "content": {"application/json": {"schema": NoteIn.model_json_schema()}},
            }
        },
    )
    async def annotate(session_id: int, request: Request) -> dict[str, Any]:
        # The token first, the body after: a request without the right token learns
        # nothing, not even what a valid note looks like (FastAPI would validate a body
        # parameter before any check in the route).
        origin = await operator(request)
        note = await _note(request)
        reply = await _ask(live, "annotate", session_id, origin, note.text)
        return {"id": reply["note_id"], "session_id": session_id, "origin": origin}

    @router.post("/sessions/{session_id}/control", include_in_schema=False)
    async def form_control(session_id: int, request: Request) -> RedirectResponse:
        """The session page's form (works without the page script)."""
        origin = await operator(request)
        form = await form_fields(request)
        action = form.get("action")
        if action in ACTIONS:
            await _ask(live, str(action), session_id, origin)
        elif action == "annotate":
            await _ask(live, "annotate", session_id, origin, str(form.get("text") or ""))
        else:
            raise Refused(400, "unknown action")
        return RedirectResponse(f"/sessions/{session_id}?done={DONE[str(action)]}", status_code=303)

    return router
