"""Where `vigil fit` gets its trials: a trials CSV or the session database (read-only).

Rows are checked and encoded here, before the models see them, so every problem in a file
is reported as `file:line: message` and the numerics never see a bad row.
"""

from __future__ import annotations

import csv
import math
import sqlite3
from collections.abc import Iterator, Sequence
from dataclasses import replace
from pathlib import Path

from server.models.trials import AnimalTrials, encode_animal
from server.models.two_stage import TwoStageTask
from server.models.two_stage_trials import TwoStageRow, TwoStageTrials, encode_two_stage
from server.store.history import trial_history

HEADER = ["animal", "session", "trial", "choice", "reward"]
TWO_STAGE_HEADER = ["animal", "session", "trial", "choice", "transition", "state", "choice2", "reward"]


class FitInputError(Exception):
    """A trials source that cannot be read; the message is ready for the user."""


def read_trials_csv(path: str) -> list[AnimalTrials]:
    """Animals in order of first appearance, each with its rows in file order."""
    return _read(path, _parse_csv)


def csv_kind(path: str) -> str:
    """ "two_stage" when the file has the two-stage header, else "choice" (the header itself
    is checked when the file is read)."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            header = next(csv.reader(fh), None)
    except (OSError, UnicodeDecodeError, csv.Error):
        return "choice"  # reading it again reports the problem
    return "two_stage" if header and [h.strip() for h in header] == TWO_STAGE_HEADER else "choice"


def _read(path: str, parse):
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            return parse(path, fh)
    except OSError as exc:
        raise FitInputError(f"{path}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise FitInputError(f"{path}: not a UTF-8 text file") from None
    except csv.Error as exc:
        raise FitInputError(f"{path}: malformed CSV: {exc}") from None


def _csv_rows(path: str, fh, header: list[str]) -> Iterator[tuple[int, dict[str, str], int, float]]:
    """Rows with their line, fields by name, trial number and reward, after the checks every
    trials CSV shares: field count, animal and session given, whole trial numbers increasing
    within a session, finite rewards, each session's rows together."""
    reader = csv.reader(fh)
    first = next(reader, None)
    if first is None:
        raise FitInputError(f"{path}:1: empty file; expected header {','.join(header)}")
    if [h.strip() for h in first] != header:
        raise FitInputError(f"{path}:1: header must be {','.join(header)}")
    last: dict[str, tuple[str, int]] = {}  # animal -> (session, trial) of its last row
    done: dict[str, set[str]] = {}  # animal -> sessions already closed
    seen = False
    for fields in reader:
        line = reader.line_num
        if not fields or all(not f.strip() for f in fields):
            continue
        if len(fields) != len(header):
            raise FitInputError(f"{path}:{line}: expected {len(header)} fields ({','.join(header)}), got {len(fields)}")
        row = dict(zip(header, (f.strip() for f in fields)))
        animal, session, trial_s, reward_s = row["animal"], row["session"], row["trial"], row["reward"]
        if not animal:
            raise FitInputError(f"{path}:{line}: animal is empty")
        if not session:
            raise FitInputError(f"{path}:{line}: session is empty")
        try:
            trial = int(trial_s)
        except ValueError:
            raise FitInputError(f"{path}:{line}: trial {trial_s!r} is not a whole number") from None
        try:
            reward = float(reward_s)
        except ValueError:
            reward = math.nan
        if not math.isfinite(reward):
            raise FitInputError(f"{path}:{line}: reward {reward_s!r} is not a finite number")
        prev = last.get(animal)
        if prev is not None and prev[0] == session and trial <= prev[1]:
            raise FitInputError(
                f"{path}:{line}: trial {trial} of session {session} (animal {animal}) "
                f"comes after trial {prev[1]}; trials must increase within a session"
            )
        if prev is not None and prev[0] != session:
            closed = done.setdefault(animal, set())
            closed.add(prev[0])
            if session in closed:
                raise FitInputError(
                    f"{path}:{line}: session {session} of animal {animal} resumes after "
                    f"session {prev[0]}; keep each session's rows together"
                )
        last[animal] = (session, trial)
        seen = True
        yield line, row, trial, reward
    if not seen:
        raise FitInputError(f"{path}:2: no trials after the header")


def _parse_csv(path: str, fh) -> list[AnimalTrials]:
    rows: dict[str, list[tuple[str, int, str | None, float]]] = {}
    for _, row, trial, reward in _csv_rows(path, fh, HEADER):
        rows.setdefault(row["animal"], []).append((row["session"], trial, row["choice"] or None, reward))
    return [encode_animal(a, r) for a, r in rows.items()]


def read_two_stage_csv(path: str, common_probability: float | None = None) -> list[TwoStageTrials]:
    """Two-stage animals in order of first appearance, sharing one task read from the file:
    first-stage options, states and their second-stage options in order of appearance, each
    option's common state from the `transition` column, and P(common) as given or, by
    default, the fraction of common transitions in the file."""
    return _read(path, lambda p, fh: _parse_two_stage(p, fh, common_probability))


def _parse_two_stage(path: str, fh, p_common: float | None) -> list[TwoStageTrials]:
    rows: dict[str, list[TwoStageRow]] = {}
    first: list[str] = []
    states: dict[str, list[str]] = {}
    common_of: dict[str, tuple[str, int]] = {}  # first option -> (common state, line)
    rare_of: dict[tuple[str, str], int] = {}  # (first option, state) -> first line
    n_common = n_choice = 0
    for line, row, trial, reward in _csv_rows(path, fh, TWO_STAGE_HEADER):
        choice, transition, state, choice2 = row["choice"], row["transition"], row["state"], row["choice2"]
        if not choice:
            if transition or state or choice2:
                raise FitInputError(f"{path}:{line}: an omission (empty choice) has no transition, state or choice2")
            rows.setdefault(row["animal"], []).append(TwoStageRow(row["session"], trial, None, reward=reward))
            continue
        if transition not in ("common", "rare"):
            raise FitInputError(f"{path}:{line}: transition must be common or rare, got {transition!r}")
        if not state:
            raise FitInputError(f"{path}:{line}: state is empty; a first-stage choice leads to a state")
        if choice not in first:
            first.append(choice)
        options = states.setdefault(state, [])
        if choice2 and choice2 not in options:
            options.append(choice2)
        n_choice += 1
        if transition == "common":
            n_common += 1
            known = common_of.setdefault(choice, (state, line))
            if known[0] != state:
                raise FitInputError(
                    f"{path}:{line}: choice {choice} reaches state {state} by a common transition, "
                    f"but state {known[0]} at line {known[1]}"
                )
        else:
            rare_of.setdefault((choice, state), line)
        rows.setdefault(row["animal"], []).append(
            TwoStageRow(row["session"], trial, choice, state, transition == "common", choice2 or None, False, reward)
        )
    for (choice, state), line in rare_of.items():
        if choice in common_of and common_of[choice][0] == state:
            raise FitInputError(
                f"{path}:{line}: choice {choice} reaches state {state} by a rare transition, "
                f"but that is its common state (line {common_of[choice][1]})"
            )
    for choice in first:
        if choice not in common_of:
            raise FitInputError(f"{path}: choice {choice} never has a common transition; its common state is unknown")
    if not first:
        raise FitInputError(f"{path}: no first-stage choices to fit")
    p = n_common / n_choice if p_common is None else p_common
    transitions = {}
    for choice in first:
        common = common_of[choice][0]
        rare = [s for (c, s) in rare_of if c == choice] or [s for s in states if s != common]
        row_p = {common: p if rare else 1.0}
        row_p.update({s: (1.0 - p) / len(rare) for s in rare})
        transitions[choice] = row_p
    task = TwoStageTask.build(first, states, transitions)
    animals = []
    for animal, trials in rows.items():
        # an empty choice2 in a state that offers a choice is a second-stage omission
        marked = [replace(r, omitted2=True) if r.state and r.choice2 is None and states[r.state] else r for r in trials]
        animals.append(encode_two_stage(animal, marked, task))
    return animals


def read_trials_db(path: str, animals: Sequence[str] | None) -> list[AnimalTrials]:
    """Trials of the given animals (all when None), sessions in the order they started."""
    if not Path(path).is_file():
        raise FitInputError(f"{path}: no such database file")
    uri = Path(path).resolve().as_uri() + "?mode=ro"
    try:
        con = sqlite3.connect(uri, uri=True)
    except sqlite3.Error as exc:
        raise FitInputError(f"{path}: cannot open database: {exc}") from None
    try:
        try:
            found = trial_history(con, animals=animals)
        except sqlite3.Error as exc:
            raise FitInputError(f"{path}: cannot read trials: {exc}") from None
    finally:
        con.close()
    rows: dict[str, list[tuple[str, int, str | None, float]]] = {}
    for past in found:
        label = None if (past.omission or not past.choice) else str(past.choice)
        reward = 0.0 if past.reward is None else float(past.reward)
        rows.setdefault(past.animal, []).append((str(past.session_id), past.trial, label, reward))
    missing = [a for a in (animals or []) if a not in rows]
    if missing:
        raise FitInputError(f"{path}: no trials for animal {missing[0]!r}")
    if not rows:
        raise FitInputError(f"{path}: no trials in the database")
    order = list(dict.fromkeys(animals)) if animals else list(rows)
    return [encode_animal(a, rows[a]) for a in order]
