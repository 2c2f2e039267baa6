"""Shapes of the JSON API, for the OpenAPI schema served at /api/openapi.json.

Rows of the store (trials, events, estimates) keep the store's own column names; their
schema is given loosely as objects so a later column does not break a client.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, Field


class AlarmOut(BaseModel):
    kind: str = Field(description="link_lost, no_response, cap_reached or ended_early")
    text: str


class RuleOut(BaseModel):
    t: float | None = Field(description="session seconds")
    text: str


class BoxTile(BaseModel):
    box: str
    animal: str
    protocol: str
    session_id: int
    live: bool = Field(description="true when read from the running lab, false from the store")
    state: str = Field(description="running, paused or ended")
    block: str | None
    step: str | None
    trial: int = Field(description="trial in progress (or the last one done)")
    trials_done: int
    rewards: int
    max_rewards: int | None = Field(None, description="the session's reward cap (None when not known)")
    reversals: int | None = Field(None, description="rule firings so far that reversed the options")
    accuracy: float | None = Field(description="fraction correct over scored trials")
    elapsed_s: float
    remaining_s: float | None = Field(description="until the session time limit or the run's --minutes")
    since_input_s: float | None = Field(description="seconds since the last input onset")
    link: str = Field(description="up, lost, or unknown (read from the store)")
    last_rule: RuleOut | None
    end_reason: str | None
    alarms: list[AlarmOut]


class SessionOut(BaseModel):
    session: dict[str, Any]
    status: dict[str, Any]
    blocks: list[dict[str, Any]]
    annotations: list[dict[str, Any]]
    rule_firings: list[dict[str, Any]]


class AnimalOut(BaseModel):
    animal: str
    sessions: list[dict[str, Any]]


class ActionOut(BaseModel):
    session_id: int
    box: str
    action: str
    origin: str


class NoteIn(BaseModel):
    text: str = Field(min_length=1, max_length=2000)


class NoteOut(BaseModel):
    id: int
    session_id: int
    origin: str
