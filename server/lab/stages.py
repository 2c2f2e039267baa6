"""Training stages across days: which protocol each animal runs next, and when it moves on.

The store is the memory (server/store/stage_log.py): the stage log says where each animal
is, sessions carry the stage they ran at, and advancement is decided from the stored trials
of the last sessions, with the figures kept as evidence.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, replace
from typing import Any

from server.lab.config import Advance, BoxConfig
from server.store.background import BackgroundWriter
from server.store.stage_log import current_stage, session_figures, sessions_at_stage, stage_entered
from server.store.wall_clock import wall_now
from server.store.writer import Store


def meets(figures: dict[str, Any], advance: Advance) -> bool:
    if advance.min_accuracy is not None and (figures["accuracy"] is None or figures["accuracy"] < advance.min_accuracy):
        return False
    if advance.min_trials is not None and figures["trials"] < advance.min_trials:
        return False
    if advance.min_rewards is not None and figures["rewards"] < advance.min_rewards:
        return False
    if advance.max_omission_rate is not None and (
        figures["omission_rate"] is None or figures["omission_rate"] > advance.max_omission_rate
    ):
        return False
    return True


def advancement(store: Store, animal: str, stage: int, advance: Advance) -> dict[str, Any] | None:
    """Evidence for moving on from `stage`, or None when the criterion is not met yet."""
    conn = store.conn
    sessions = sessions_at_stage(conn, animal, stage, stage_entered(conn, animal, stage))[: advance.sessions]
    if len(sessions) < advance.sessions:
        return None
    figures = [session_figures(conn, sid) for sid in sessions]
    if not all(meets(f, advance) for f in figures):
        return None
    criterion = {k: v for k, v in asdict(advance).items() if v is not None}
    return {"criterion": criterion, "sessions": figures}


def stage_for_box(store: Store, box: BoxConfig) -> int:
    """The 1-based stage the box's animal should run now (1 before its first session)."""
    stage = current_stage(store.conn, box.animal) or 1
    return min(stage, len(box.stages))


class StageKeeper:
    """The lab's stage bookkeeping for one run: today's protocol per box, and after each
    session whether its animal moves on."""

    def __init__(self, store: Store, say: Callable[[str], None]):
        self.store = store
        self.say = say
        self.running: dict[str, int] = {}  # box name -> 1-based stage running today

    def today(self, box: BoxConfig) -> BoxConfig:
        """The box with the protocol its animal runs today: its current training stage, with
        the animal's own settings applied."""
        protocol = box.protocol
        if box.stages:
            stage = stage_for_box(self.store, box)
            protocol = box.stages[stage - 1].protocol
            if current_stage(self.store.conn, box.animal) is None:
                self.store.write_stage(box.animal, stage, protocol.name, wall_now(), "start")
            self.running[box.name] = stage
            self.say(f"{box.name}: animal {box.animal} at stage {stage} of {len(box.stages)}")
        if box.settings:
            mine = {k: v for k, v in box.settings.items() if k in protocol.settings}
            protocol = replace(protocol, settings={**protocol.settings, **mine})
        return replace(box, protocol=protocol)

    def after_session(self, box: BoxConfig, session_id: int, writer: BackgroundWriter) -> None:
        stage = self.running.get(box.name)
        if stage is None or stage >= len(box.stages):
            return
        advance = box.stages[stage - 1].advance
        if advance is None:
            return
        writer.drain()  # the session's last trials are with the store before judging
        with writer.direct() as store:
            store.flush()
            evidence = advancement(store, box.animal, stage, advance)
            if evidence is None:
                return
            nxt = box.stages[stage].protocol
            store.write_stage(box.animal, stage + 1, nxt.name, wall_now(), "advanced", session_id, evidence)
        self.say(f"{box.name}: animal {box.animal} advances to stage {stage + 1} ('{nxt.name}') next session")
