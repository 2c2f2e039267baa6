"""Where `vigil fit` gets its trials: a trials CSV or the session database (read-only).

Rows are checked and encoded here, before the models see them, so every problem in a file
is reported as `file:line: message` and the numerics never see a bad row.
"""

from __future__ import annotations

import csv
import math
import sqlite3
from collections.abc import Sequence
from pathlib import Path

from server.models.trials import AnimalTrials, encode_animal
from server.store.dialect import database_errors, is_server_url, reason
from server.store.errors import StoreError
from server.store.history import PastTrial, trial_history
from server.store.postgres import redact
from server.store.queries import open_readonly

HEADER = ["animal", "session", "trial", "choice", "reward"]


class FitInputError(Exception):
    """A trials source that cannot be read; the message is ready for the user."""


def read_trials_csv(path: str) -> list[AnimalTrials]:
    """Animals in order of first appearance, each with its rows in file order."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            return _parse_csv(path, fh)
    except OSError as exc:
        raise FitInputError(f"{path}: cannot read: {exc.strerror or exc}") from None
    except UnicodeDecodeError:
        raise FitInputError(f"{path}: not a UTF-8 text file") from None
    except csv.Error as exc:
        raise FitInputError(f"{path}: malformed CSV: {exc}") from None


def _parse_csv(path: str, fh) -> list[AnimalTrials]:
    reader = csv.reader(fh)
    header = next(reader, None)
    if header is None:
        raise FitInputError(f"{path}:1: empty file; expected header {','.join(HEADER)}")
    if [h.strip() for h in header] != HEADER:
        raise FitInputError(f"{path}:1: header must be {','.join(HEADER)}")
    rows: dict[str, list[tuple[str, int, str | None, float]]] = {}
    last: dict[str, tuple[str, int]] = {}  # animal -> (session, trial) of its last row
    done: dict[str, set[str]] = {}  # animal -> sessions already closed
    for fields in reader:
        line = reader.line_num
        if not fields or all(not f.strip() for f in fields):
            continue
        if len(fields) != len(HEADER):
            raise FitInputError(f"{path}:{line}: expected {len(HEADER)} fields ({','.join(HEADER)}), got {len(fields)}")
        animal, session, trial_s, choice, reward_s = (f.strip() for f in fields)
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
        rows.setdefault(animal, []).append((session, trial, choice or None, reward))
    if not rows:
        raise FitInputError(f"{path}:2: no trials after the header")
    return [encode_animal(a, r) for a, r in rows.items()]


def _file_history(path: str, animals: Sequence[str] | None) -> list[PastTrial]:
    if not Path(path).is_file():
        raise FitInputError(f"{path}: no such database file")
    uri = Path(path).resolve().as_uri() + "?mode=ro"
    try:
        con = sqlite3.connect(uri, uri=True)
    except sqlite3.Error as exc:
        raise FitInputError(f"{path}: cannot open database: {exc}") from None
    try:
        return trial_history(con, animals=animals)
    except sqlite3.Error as exc:
        raise FitInputError(f"{path}: cannot read trials: {exc}") from None
    finally:
        con.close()


def _server_history(url: str, animals: Sequence[str] | None) -> list[PastTrial]:
    try:
        con = open_readonly(url)
    except StoreError as exc:
        raise FitInputError(str(exc)) from None
    try:
        return trial_history(con, animals=animals)
    except database_errors(con) as exc:
        raise FitInputError(f"{redact(url)}: cannot read trials: {reason(exc)}") from None
    finally:
        con.close()


def read_trials_db(path: str, animals: Sequence[str] | None) -> list[AnimalTrials]:
    """Trials of the given animals (all when None), sessions in the order they started;
    `path` a SQLite file or a lab-wide store's PostgreSQL URL."""
    if is_server_url(path):
        found = _server_history(path, animals)
    else:
        found = _file_history(path, animals)
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
