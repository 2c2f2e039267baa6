"""Where `vigil fit` gets its trials: a trials CSV or the session database (read-only).

Rows are checked and encoded here, before the models see them, so every problem in a file
is reported as `file:line: message` and the numerics never see a bad row.
"""

from __future__ import annotations

import csv
import math
import sqlite3
from collections.abc import Iterator, Sequence
from pathlib import Path

from server.models.trials import AnimalTrials, encode_animal
from server.store.dialect import database_errors, is_server_url, reason
from server.store.errors import StoreError
from server.store.history import PastTrial, trial_history
from server.store.postgres import redact
from server.store.queries import open_readonly

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


def read_history(path: str, animals: Sequence[str] | None, two_stage: bool = False) -> list[PastTrial]:
    """The stored trials of the given animals (all when None), read-only; with `two_stage`,
    each trial's second stage too (a database from before two-stage trials has none).
    `path` is a SQLite file or a lab-wide store's PostgreSQL URL."""
    if is_server_url(path):
        return _server_history(path, animals, two_stage)
    if not Path(path).is_file():
        raise FitInputError(f"{path}: no such database file")
    uri = Path(path).resolve().as_uri() + "?mode=ro"
    try:
        con = sqlite3.connect(uri, uri=True)
    except sqlite3.Error as exc:
        raise FitInputError(f"{path}: cannot open database: {exc}") from None
    try:
        try:
            return trial_history(con, animals=animals, two_stage=two_stage)
        except sqlite3.OperationalError as exc:
            if two_stage and "no such column" in str(exc):
                return trial_history(con, animals=animals)
            raise FitInputError(f"{path}: cannot read trials: {exc}") from None
        except sqlite3.Error as exc:
            raise FitInputError(f"{path}: cannot read trials: {exc}") from None
    finally:
        con.close()


def _server_history(url: str, animals: Sequence[str] | None, two_stage: bool) -> list[PastTrial]:
    try:
        con = open_readonly(url)
    except StoreError as exc:
        raise FitInputError(str(exc)) from None
    try:
        return trial_history(con, animals=animals, two_stage=two_stage)
    except database_errors(con) as exc:
        raise FitInputError(f"{redact(url)}: cannot read trials: {reason(exc)}") from None
    finally:
        con.close()


def check_found(path: str, animals: Sequence[str] | None, found: Sequence[str]) -> list[str]:
    """The animals to fit, in order: those asked for (each must have trials), or all found."""
    missing = [a for a in (animals or []) if a not in found]
    if missing:
        raise FitInputError(f"{path}: no trials for animal {missing[0]!r}")
    if not found:
        raise FitInputError(f"{path}: no trials in the database")
    return list(dict.fromkeys(animals)) if animals else list(found)


def read_trials_db(
    path: str, animals: Sequence[str] | None, found: list[PastTrial] | None = None
) -> list[AnimalTrials]:
    """Trials of the given animals (all when None), sessions in the order they started."""
    found = read_history(path, animals) if found is None else found
    rows: dict[str, list[tuple[str, int, str | None, float]]] = {}
    for past in found:
        label = None if (past.omission or not past.choice) else str(past.choice)
        reward = 0.0 if past.reward is None else float(past.reward)
        rows.setdefault(past.animal, []).append((str(past.session_id), past.trial, label, reward))
    return [encode_animal(a, rows[a]) for a in check_found(path, animals, list(rows))]
