"""HTML routes: overview, sessions, session page (and its refreshable panels), animal page,
and the viewer login."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response

from server.store import queries
from server.web import animal_page, cohort_page, session_page
from server.web.auth import TOKEN_FIELD, VIEW_COOKIE, form_fields
from server.web.layout import page
from server.web.markup import el
from server.web.overview import overview_body

NOTICES = {
    "paused": "Session paused.",
    "resumed": "Session resumed.",
    "stopped": "Stop requested: the session ends with outputs in their safe state.",
    "noted": "Note stored.",
}


def login_body(message: str | None = None) -> Any:
    return el(
        "form",
        el("h1", "Viewer login"),
        el("p", message, class_="notice", role="alert") if message else None,
        el(
            "label",
            "Token ",
            el("input", type="password", name=TOKEN_FIELD, autocomplete="current-password", required=True),
        ),
        el("button", "open the status page", type="submit"),
        method="post",
        action="/login",
        class_="login",
    )


def pages_router(state: Any) -> APIRouter:
    router = APIRouter(include_in_schema=False)
    read_only = not state.controls_on

    def html(title: str, body: Any, cls: str, status: int = 200) -> HTMLResponse:
        return HTMLResponse(
            page(title, body, lab_name=state.lab_name, body_class=cls, read_only=read_only), status_code=status
        )

    @router.get("/")
    async def overview() -> Response:
        snap = await state.snapshot()
        text = snap.cache.get("overview")
        if text is None:  # rendered once per snapshot, shared by every client
            body = overview_body(snap, with_controls=state.controls_on)
            text = snap.cache["overview"] = page(
                "Boxes", body, lab_name=state.lab_name, body_class="pg-overview", read_only=read_only
            ).encode()
        return Response(text, media_type="text/html; charset=utf-8")

    @router.get("/sessions")
    def sessions() -> HTMLResponse:
        rows = queries.list_sessions(state.store.conn(), limit=200)
        return html("Sessions", session_page.sessions_body(rows), "pg-sessions")

    def _session(session_id: int) -> dict[str, Any]:
        found = queries.get_session(state.store.conn(), session_id)
        if found is None:
            raise HTTPException(404, f"no session {session_id}")
        return found

    @router.get("/sessions/{session_id}")
    def session(session_id: int, done: str | None = None) -> HTMLResponse:
        found = _session(session_id)
        controllable = (
            state.controls_on
            and found["end_reason"] is None
            and (state.live is None or session_id in state.live.latest.running_sessions())
        )
        paused = controllable and session_id in state.live.latest.paused_sessions()
        body = session_page.session_body(
            state.store.conn(), found, controllable=controllable, notice=NOTICES.get(done or ""), paused=paused
        )
        return html(f"Session {session_id}", body, "pg-session")

    @router.get("/sessions/{session_id}/panels")
    def panels(session_id: int) -> HTMLResponse:
        found = _session(session_id)
        return HTMLResponse(str(session_page.panels(state.store.conn(), found)))

    @router.get("/animals")
    def animals() -> HTMLResponse:
        return html("Animals", cohort_page.animals_body(queries.list_animals(state.store.conn())), "pg-animals")

    @router.get("/animals/{animal:path}")
    def animal(animal: str) -> HTMLResponse:
        conn = state.store.conn()
        history = animal_page.animal_rows(conn, animal)
        if not history:
            raise HTTPException(404, f"no sessions of animal '{animal}'")
        body = animal_page.animal_body(animal, history, animal_page.stage_rows(conn, animal))
        return html(f"Animal {animal}", body, "pg-animal")

    @router.get("/cohorts/{protocol:path}")
    def cohort(protocol: str) -> HTMLResponse:
        by_animal = cohort_page.cohort_rows(state.store.conn(), protocol)
        if not by_animal:
            raise HTTPException(404, f"no sessions of protocol '{protocol}'")
        return html(f"Cohort {protocol}", cohort_page.cohort_body(protocol, by_animal), "pg-cohort")

    @router.get("/login")
    def login_form() -> Response:
        if state.guard.read_is_open:
            return RedirectResponse("/", status_code=303)
        return html("Login", login_body(), "pg-login")

    @router.post("/login")
    async def login(request: Request) -> Response:
        if state.guard.read_is_open:
            return RedirectResponse("/", status_code=303)
        token = (await form_fields(request)).get(TOKEN_FIELD)
        if not isinstance(token, str) or not state.guard.is_reader_token(token):
            return html("Login", login_body("wrong token"), "pg-login", status=403)
        response = RedirectResponse("/", status_code=303)
        response.set_cookie(VIEW_COOKIE, state.guard.cookie_value, httponly=True, samesite="strict", path="/")
        return response

    @router.post("/logout")
    def logout() -> Response:
        response = RedirectResponse("/login", status_code=303)
        response.delete_cookie(VIEW_COOKIE, path="/")
        return response

    return router
