"""The session page (plots, rule firings, notes, event log, controls) and the list of
sessions, rendered from the read-only store."""

from __future__ import annotations

import json
import math
from datetime import datetime, timedelta
from typing import Any

from server.engine.stay import stay_counts
from server.lab.status import reverses
from server.protocol.model import Pavlovian
from server.store import queries
from server.store.dialect import Connection
from server.web import plots
from server.web.markup import Safe, el
from server.web.overview import animal_href
from server.web.pca import classify, pca_panel, pca_parts
from server.web.session_protocol import protocol_of, rules_of
from server.web.tables import percent, table, when
from server.web.tiles import clock_text, rewards_text, session_limits
from server.web.words import firing_words

EVENT_TAIL = 60


def _fmt(value: Any, digits: int = 3) -> str:
    if value is None:
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, float):
        return f"{value:.{digits}g}"
    return str(value)


def session_end_t(session: dict[str, Any], status: dict[str, Any], trials: list[dict[str, Any]]) -> float:
    candidates = [status.get("last_t") or 0.0] + [t["t_end"] + t["iti_s"] for t in trials[-1:]]
    return max(candidates)


def panels(conn: Connection, session: dict[str, Any]) -> Safe:
    """Every plot of a session (the part the page refreshes while the session runs)."""
    sid = session["id"]
    status = queries.session_status(conn, sid)
    trials = queries.session_trials(conn, sid)
    estimates = queries.session_estimates(conn, sid)
    blocks = queries.session_blocks(conn, sid)
    firings = queries.session_rule_firings(conn, sid)
    inputs = queries.session_events(conn, sid, kind="input")
    pulses = queries.session_events(conn, sid, kind="pulse")
    pause_events = queries.session_events(conn, sid, kind="pause") + queries.session_events(conn, sid, kind="resume")
    pause_events.sort(key=lambda ev: ev["id"])
    end_t = session_end_t(session, status, trials)
    pauses = plots.pause_spans(pause_events, end_t)
    pav = pavlovian_of(session)
    x_range = plots.trial_axis(trials)
    parts: list[Any] = [
        plots.cumulative_record(
            session=session,
            inputs=inputs,
            pulses=pulses,
            trials=trials,
            blocks=blocks,
            firings=firings,
            pauses=pauses,
            end_t=end_t,
            also=() if pav is None else (pav.magazine,),
        )
    ]
    two_stage = plots.two_stage_panels(trials)
    if two_stage:
        parts.extend(two_stage)
        stay = plots.stay_panel(stay_counts(queries.trial_records(conn, sid)))
        if stay is not None:
            parts.append(stay)
    elif pav is not None:
        parts.extend(pca_panel(trials, pav, x_range) or [el("p", "No CS trials yet.", class_="note")])
    else:
        choice = plots.choice_panel(trials, estimates)
        parts.append(choice if choice is not None else el("p", "No choice trials in this session.", class_="note"))
    estimated = plots.parameter_panels(estimates, x_range)
    parts.extend(estimated or [el("p", "No learning-model estimates stored for this session.", class_="note")])
    timeline = plots.iti_timeline(trials, blocks, pauses, firings, end_t)
    if timeline is not None:
        parts.append(timeline)
    itis = [t["iti_s"] for t in trials if t["iti_s"] > 0]
    if itis:
        parts.append(
            el(
                "p",
                f"ITI: {len(itis)} intervals, mean {sum(itis) / len(itis):.1f} s, "
                f"range {min(itis):.1f}–{max(itis):.1f} s",
                class_="note",
            )
        )
    return el("div", parts, class_="panels")


def pavlovian_of(session: dict[str, Any]) -> Pavlovian | None:
    """The session's Pavlovian CS (for the PCA panel), from the protocol that ran."""
    protocol = protocol_of(session)
    return None if protocol is None else protocol.pavlovian


def _firings_list(session: dict[str, Any], firings: list[dict[str, Any]]) -> Safe:
    if not firings:
        return el("p", "No rule firings recorded.", class_="note")
    rules = rules_of(protocol_of(session))
    rows = [
        [clock_text(r["t"]), r["trial"], firing_words(r["rule"], r["actions"], r.get("reads"), rules.get(r["rule"]))]
        for r in firings
    ]
    return table(["at", "after trial", "what the rule did and why"], rows, cls="tbl firings")


def _measures(
    conn: Connection, session: dict[str, Any], status: dict[str, Any], firings: list[dict[str, Any]]
) -> list[tuple[str, Any, str]]:
    """The session's main measures: accuracy and reversals, or for a Pavlovian session its
    PCA index and what it classifies the animal as."""
    pav = pavlovian_of(session)
    parts = None if pav is None else pca_parts(queries.session_trials(conn, session["id"]), pav)
    if parts is not None:
        return [("PCA index", f"{parts.index:+.2f} ({classify(parts.index)})", "")]
    return [
        ("accuracy", percent(status["accuracy"]), ""),
        ("reversals", sum(reverses(f["actions"]) for f in firings), ""),
    ]


def control_form(session: dict[str, Any], *, paused: bool) -> Safe:
    """The session page's controls: pause while running, resume while paused (never both)."""
    sid = session["id"]
    buttons = [
        el("button", label, type="submit", name="action", value=action, class_="danger" if action == "stop" else None)
        for action, label in (
            ("resume", "resume") if paused else ("pause", "pause"),
            ("stop", "stop session"),
            ("annotate", "add note"),
        )
    ]
    return el(
        "form",
        el("h2", "Controls"),
        el("label", "Operator token ", el("input", type="password", name="token", autocomplete="off", required=True)),
        el("label", "Note ", el("textarea", name="text", rows="2", maxlength="2000")),
        el("div", buttons, class_="acts"),
        method="post",
        action=f"/sessions/{sid}/control",
        class_="controls",
        id="controls",
        data_session=str(sid),
    )


def session_body(
    conn: Connection,
    session: dict[str, Any],
    *,
    controllable: bool,
    notice: str | None,
    paused: bool | None = None,
) -> Safe:
    """The session page; `paused` is the running lab's word on it (else the store's)."""
    sid = session["id"]
    status = queries.session_status(conn, sid)
    running = session["end_reason"] is None
    paused = running and (bool(status["paused"]) if paused is None else paused)
    firings = queries.session_rule_firings(conn, sid)
    limits = session_limits(session.get("settings"))
    state = ("paused" if paused else "running") if running else f"ended – {session['end_reason']}"
    facts = [
        ("box", session["box"], ""),
        ("animal", el("a", session["animal"], href=animal_href(session["animal"])), ""),
        ("protocol", session["protocol"], ""),
        ("started", when(session["started_at"]), ""),
        ("state", state, ""),
        ("trials", session["trials"], ""),
        ("rewards", rewards_text(session["rewards"], limits.get("max_rewards")), ""),
        *_measures(conn, session, status, firings),
        ("block", status["block"] or "–", ""),
        ("seed", session["seed"], "seed"),
    ]
    events = queries.session_events(conn, sid, tail=EVENT_TAIL)
    event_rows = [
        [
            clock_text(ev["t"]),
            f"{ev['t']:.3f}",
            ev["kind"],
            ev["name"],
            _fmt(ev["value"]),
            "" if ev["detail"] is None else json.dumps(ev["detail"], sort_keys=True),
        ]
        for ev in reversed(events)
    ]
    note_rows = [row for _, row in sorted(_notes(conn, session), key=lambda item: item[0])]
    return el(
        "div",
        el("h1", f"Session {sid}: ", el("span", session["box"]), " · ", el("span", session["animal"])),
        el("p", notice, class_="notice", role="status") if notice else None,
        el(
            "dl", [el("div", el("dt", k), el("dd", v), class_=f"fact {c}".strip()) for k, v, c in facts], class_="facts"
        ),  # fmt: skip
        el(
            "p",
            el("a", "trials (CSV)", href=f"/api/sessions/{sid}/trials.csv"),
            " · ",
            el("a", "choices for vigil fit (CSV)", href=f"/api/sessions/{sid}/choices.csv"),
            " · ",
            el("a", "events (CSV)", href=f"/api/sessions/{sid}/events.csv"),
            " · ",
            el("a", "JSON", href=f"/api/sessions/{sid}"),
            class_="downloads",
        ),
        control_form(session, paused=paused) if controllable else None,
        el("section", panels(conn, session), id="panels", data_refresh=f"/sessions/{sid}/panels" if running else None),
        el("section", el("h2", "Rule firings"), _firings_list(session, firings)),
        el(
            "section",
            el("h2", "Notes"),
            table(["written", "session time", "by", "note"], note_rows)
            if note_rows
            else el("p", "No notes.", class_="note"),
        ),
        el(
            "section",
            el("h2", f"Event log (last {EVENT_TAIL}, newest first)"),
            table(["time", "t (s)", "kind", "name", "value", "detail"], event_rows, cls="tbl log"),
        ),
        class_="session",
    )


def _notes(conn: Connection, session: dict[str, Any]) -> list[tuple[float, list[Any]]]:
    """Every note on the session in session-time order: operators' notes, and the notes its
    rules wrote (a rule's `note` action), which carry their session time only."""
    sid = session["id"]
    out: list[tuple[float, list[Any]]] = []
    for n in queries.session_annotations(conn, sid):
        t = n["t"] if n["t"] is not None else math.inf
        out.append((t, [when(n["wall_time"]), clock_text(n["t"]), n["origin"], n["text"]]))
    try:
        started = datetime.fromisoformat(session["started_at"])
    except (TypeError, ValueError):
        started = None
    for ev in queries.session_events(conn, sid, kind="note"):
        text = (ev["detail"] or {}).get("text") if isinstance(ev["detail"], dict) else None
        if text is None:  # the link's and the session's own notes go in the event log only
            continue
        written = when((started + timedelta(seconds=ev["t"])).isoformat()) if started else "–"
        out.append((ev["t"], [written, clock_text(ev["t"]), f"rule {ev['name']}", text]))
    return out


def sessions_body(sessions: list[dict[str, Any]]) -> Safe:
    rows = [
        [
            el("a", str(s["id"]), href=f"/sessions/{s['id']}"),
            when(s["started_at"]),
            s["box"],
            el("a", s["animal"], href=animal_href(s["animal"])),
            s["protocol"],
            s["trials"],
            s["rewards"],
            s["end_reason"] or "running",
        ]
        for s in sessions
    ]
    return el(
        "div",
        el("h1", "Sessions"),
        table(["session", "started", "box", "animal", "protocol", "trials", "rewards", "end"], rows)
        if rows
        else el("p", "No sessions yet.", class_="note"),
        class_="sessions",
    )
