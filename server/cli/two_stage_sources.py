"""Where `vigil fit` gets two-stage trials: a two-stage trials CSV or the session database.

Both give `TwoStageRow`s (server/models/two_stage_trials.py), each with where it came from,
and one function reads the task from them: the first-stage options, the states and their
second-stage options in order of appearance, each option's common state, and P(common) as
given or, by default, the share of common transitions in the data.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

from server.cli.fit_sources import TWO_STAGE_HEADER, FitInputError, _csv_rows, _read, check_found, read_history
from server.models.two_stage import TwoStageTask
from server.models.two_stage_trials import TwoStageRow, TwoStageTrials, encode_two_stage
from server.store.history import PastTrial


@dataclass(frozen=True, slots=True)
class Placed:
    """A row and where it came from: `at` prefixes an error ("file:line"), `ref` names it
    inside one ("line 7")."""

    row: TwoStageRow
    at: str
    ref: str


def read_two_stage_csv(path: str, common_probability: float | None = None) -> list[TwoStageTrials]:
    """Two-stage animals in order of first appearance, sharing one task read from the file.
    An empty choice2 in a state that offers a choice is a second-stage omission."""
    return _read(path, lambda p, fh: _parse(p, fh, common_probability))


def _parse(path: str, fh, p_common: float | None) -> list[TwoStageTrials]:
    rows: dict[str, list[Placed]] = {}
    for line, row, trial, reward in _csv_rows(path, fh, TWO_STAGE_HEADER):
        choice, transition, state, choice2 = row["choice"], row["transition"], row["state"], row["choice2"]
        at, ref = f"{path}:{line}", f"line {line}"
        if not choice:
            if transition or state or choice2:
                raise FitInputError(f"{at}: an omission (empty choice) has no transition, state or choice2")
            rows.setdefault(row["animal"], []).append(
                Placed(TwoStageRow(row["session"], trial, None, reward=reward), at, ref)
            )
            continue
        if transition not in ("common", "rare"):
            raise FitInputError(f"{at}: transition must be common or rare, got {transition!r}")
        if not state:
            raise FitInputError(f"{at}: state is empty; a first-stage choice leads to a state")
        r = TwoStageRow(row["session"], trial, choice, state, transition == "common", choice2 or None, False, reward)
        rows.setdefault(row["animal"], []).append(Placed(r, at, ref))
    return two_stage_animals(path, rows, p_common, mark_omitted=True)


def read_two_stage_db(
    path: str, animals: Sequence[str] | None, common_probability: float | None, found: list[PastTrial]
) -> list[TwoStageTrials]:
    """Two-stage animals from stored trials (`read_history(..., two_stage=True)`)."""
    rows: dict[str, list[Placed]] = {}
    for past in found:
        session = str(past.session_id)
        second = past.second
        reward = 0.0 if past.reward is None else float(past.reward)
        if past.omission or not past.choice or second is None:
            row = TwoStageRow(session, past.trial, None, reward=reward)
        else:
            row = TwoStageRow(
                session, past.trial, str(past.choice), second.state, second.common,
                None if second.omitted else second.choice, second.omitted, reward,
            )  # fmt: skip
        ref = f"session {session} trial {past.trial}"
        rows.setdefault(past.animal, []).append(Placed(row, f"{path}: {ref}", ref))
    order = check_found(path, animals, list(rows))
    return two_stage_animals(path, {a: rows[a] for a in order}, common_probability, mark_omitted=False)


def two_stage_animals(
    source: str, rows: dict[str, list[Placed]], p_common: float | None, *, mark_omitted: bool
) -> list[TwoStageTrials]:
    """Read the task from the rows, check them against it, and encode each animal."""
    first: list[str] = []
    states: dict[str, list[str]] = {}
    common_of: dict[str, tuple[str, str]] = {}  # first option -> (common state, ref)
    rare_of: dict[tuple[str, str], str] = {}  # (first option, state) -> at
    n_common = n_choice = 0
    for placed in (p for animal_rows in rows.values() for p in animal_rows):
        r = placed.row
        if r.choice is None or r.state is None:
            continue
        if r.choice not in first:
            first.append(r.choice)
        options = states.setdefault(r.state, [])
        if r.choice2 and r.choice2 not in options:
            options.append(r.choice2)
        n_choice += 1
        if r.common:
            n_common += 1
            known = common_of.setdefault(r.choice, (r.state, placed.ref))
            if known[0] != r.state:
                raise FitInputError(
                    f"{placed.at}: choice {r.choice} reaches state {r.state} by a common transition, "
                    f"but state {known[0]} at {known[1]}"
                )
        else:
            rare_of.setdefault((r.choice, r.state), placed.at)
    for (choice, state), at in rare_of.items():
        if choice in common_of and common_of[choice][0] == state:
            raise FitInputError(
                f"{at}: choice {choice} reaches state {state} by a rare transition, "
                f"but that is its common state ({common_of[choice][1]})"
            )
    for choice in first:
        if choice not in common_of:
            raise FitInputError(f"{source}: choice {choice} never has a common transition; its common state is unknown")
    if not first:
        raise FitInputError(f"{source}: no first-stage choices to fit")
    p = n_common / n_choice if p_common is None else p_common
    transitions = {}
    for choice in first:
        common = common_of[choice][0]
        rare = [s for (c, s) in rare_of if c == choice] or [s for s in states if s != common]
        row_p = {common: p if rare else 1.0}
        row_p.update({s: (1.0 - p) / len(rare) for s in rare})
        transitions[choice] = row_p
    task = TwoStageTask.build(first, states, transitions)
    out = []
    for animal, placed_rows in rows.items():
        trials = [p.row for p in placed_rows]
        if mark_omitted:
            trials = [
                replace(r, omitted2=True) if r.state and r.choice2 is None and states[r.state] else r for r in trials
            ]
        try:
            out.append(encode_two_stage(animal, trials, task))
        except ValueError as exc:
            raise FitInputError(f"{source}: {exc}") from None
    return out


__all__ = ["read_history", "read_two_stage_csv", "read_two_stage_db", "two_stage_animals"]
