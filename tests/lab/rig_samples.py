"""Rigs of an invented lab that share one PostgreSQL store: configs, and how to compare what
a rig's spool holds with what the server holds of it."""

from __future__ import annotations

import socket
import sqlite3
import subprocess
import sys
from pathlib import Path

import psycopg

ROOT = Path(__file__).resolve().parents[2]
VIGIL = [sys.executable, "-m", "server.cli"]

# Columns that must arrive unchanged; server-side ids differ from the spool's for events.
EVENT_COLUMNS = "session_id, kind, name, value, t, device_t_us, device_seq, detail"
TRIAL_COLUMNS = "session_id, trial, choice, reward, t_start, t_end, iti_s, steps"


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def write_rig(folder: Path, rig: str, url: str, *, seed: int) -> Path:
    """A rig with two emulated boxes; both rigs name their boxes alike, as real rooms do."""
    config = folder / f"{rig}.yaml"
    config.write_text(
        f"lab: {rig}\n"
        f'database: "{url}"\n'
        f"spool: spool-{rig}.sqlite\n"
        f"web: {{port: {free_port()}}}\n"
        "boxes:\n"
        f"  - {{name: box-1, animal: {rig}-R1, protocol: {ROOT / 'protocols' / 'bandit.yaml'},"
        f" emulate: {{agent: q_learner, seed: {seed}}}}}\n"
        f"  - {{name: box-2, animal: {rig}-R2, protocol: {ROOT / 'protocols' / 'autoshaping.yaml'},"
        f" emulate: {{agent: pavlovian, seed: {seed + 1}}}}}\n"
    )
    return config


def start_rig(config: Path, *args: str) -> subprocess.Popen:
    return subprocess.Popen(
        VIGIL + ["run", str(config), *args],
        cwd=ROOT,
        stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT,
        text=True,
        env={**__import__("os").environ, "PYTHONUNBUFFERED": "1"},
    )


def server_rows(url: str, sql: str, params: tuple = ()) -> list[tuple]:
    with psycopg.connect(url, autocommit=True) as conn:
        return [tuple(row) for row in conn.execute(sql, params).fetchall()]


def server_count(url: str, table: str) -> int:
    """Rows in a table of the server, 0 before the first rig has made the tables."""
    try:
        return server_rows(url, f"SELECT count(*) FROM {table}")[0][0]
    except psycopg.errors.UndefinedTable:
        return 0


def spool_rows(path: Path, sql: str, params: tuple = ()) -> list[tuple]:
    conn = sqlite3.connect(path)
    try:
        return [tuple(row) for row in conn.execute(sql, params).fetchall()]
    finally:
        conn.close()


def assert_server_holds_the_spool(url: str, spool: Path) -> None:
    """Every session, trial and event of the spool is on the server once, nothing more."""
    sessions = spool_rows(spool, "SELECT id, box, animal, end_reason, trials, rewards, rig FROM sessions ORDER BY id")
    ids = tuple(s[0] for s in sessions)
    assert sessions, "the spool holds no session"
    marks = ",".join("%s" for _ in ids)
    on_server = server_rows(
        url,
        f"SELECT id, box, animal, end_reason, trials, rewards, rig FROM sessions WHERE id IN ({marks}) ORDER BY id",
        ids,
    )
    assert on_server == sessions
    for table, columns, order in (
        ("events", EVENT_COLUMNS, "session_id, id"),
        ("trials", TRIAL_COLUMNS, "session_id, trial"),
    ):
        local = spool_rows(spool, f"SELECT {columns} FROM {table} ORDER BY {order}")
        remote = server_rows(url, f"SELECT {columns} FROM {table} WHERE session_id IN ({marks}) ORDER BY {order}", ids)
        assert len(remote) == len(local), f"{table}: {len(local)} in the spool, {len(remote)} on the server"
        assert remote == local, f"{table} differ between the spool and the server"
