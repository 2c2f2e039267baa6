"""The database layout, versioned and grown by ordered migrations, the same for both backends.

The version is `PRAGMA user_version` on SQLite and the one row of `vigil_schema` on
PostgreSQL; migrations are written once, in SQLite's words, and `dialect.pg_ddl` gives
PostgreSQL its column types (server/store/dialect.py).

Migration N takes a database at version N-1 to N inside one transaction, so a crash or a
failure mid-way leaves the previous version intact. Later issues append migrations; never
edit one that has shipped.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

from server.store import dialect
from server.store.dialect import Connection
from server.store.errors import StoreError


@dataclass(frozen=True, slots=True)
class Migration:
    version: int
    summary: str
    apply: Callable[[Connection], None]


def statements(*sql: str) -> Callable[[Connection], None]:
    """A migration body from SQL statements run one by one (executescript would commit)."""

    def apply(conn: Connection) -> None:
        for statement in sql:
            conn.execute(dialect.ddl(conn, statement))

    return apply


_V1 = statements(
    """CREATE TABLE sessions (
        id INTEGER PRIMARY KEY,
        box TEXT NOT NULL,
        animal TEXT NOT NULL,
        protocol TEXT NOT NULL,
        protocol_path TEXT,
        protocol_sha256 TEXT,
        started_at TEXT NOT NULL,      -- ISO 8601 wall clock with UTC offset, stored once
        ended_at TEXT,
        end_reason TEXT,               -- NULL while running (or until closed as interrupted)
        seed INTEGER NOT NULL,
        trials INTEGER NOT NULL DEFAULT 0,
        rewards INTEGER NOT NULL DEFAULT 0,
        settings TEXT NOT NULL DEFAULT '{}'  -- JSON: caps, agent, options
    )""",
    "CREATE INDEX sessions_animal ON sessions(animal, started_at)",
    "CREATE INDEX sessions_box ON sessions(box, started_at)",
    "CREATE INDEX sessions_running ON sessions(id) WHERE end_reason IS NULL",
    """CREATE TABLE trials (
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        trial INTEGER NOT NULL,
        block TEXT NOT NULL,
        block_index INTEGER NOT NULL,
        trial_type TEXT NOT NULL,
        t_start REAL NOT NULL,
        t_end REAL NOT NULL,
        choice TEXT,
        response TEXT,
        latency_s REAL,
        rewarded INTEGER NOT NULL,
        reward REAL NOT NULL,
        correct INTEGER,
        omission INTEGER NOT NULL,
        interrupted INTEGER NOT NULL,
        iti_s REAL NOT NULL,
        steps TEXT NOT NULL,
        counts TEXT NOT NULL,
        first_s TEXT NOT NULL,
        extra TEXT NOT NULL,
        PRIMARY KEY (session_id, trial)
    )""",
    """CREATE TABLE events (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        kind TEXT NOT NULL,
        name TEXT NOT NULL,
        value REAL,
        t REAL NOT NULL,               -- seconds from session start
        device_t_us INTEGER,           -- raw device clock, untouched
        device_seq INTEGER,            -- device sequence number for device-originated events
        detail TEXT
    )""",
    # A device event replayed after a reconnect must never be stored twice.
    """CREATE UNIQUE INDEX events_device_seq ON events(session_id, device_seq)
        WHERE device_seq IS NOT NULL""",
    "CREATE INDEX events_session ON events(session_id, id)",
    "CREATE INDEX events_kind ON events(session_id, kind, t)",
    """CREATE TABLE blocks (
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        block_index INTEGER NOT NULL,
        block TEXT NOT NULL,
        t_start REAL NOT NULL,
        contingencies TEXT NOT NULL,
        outcomes_withheld INTEGER NOT NULL,
        PRIMARY KEY (session_id, block_index)
    )""",
    """CREATE TABLE estimates (
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        trial INTEGER NOT NULL,
        model TEXT NOT NULL,
        data TEXT NOT NULL,
        PRIMARY KEY (session_id, trial)
    )""",
    """CREATE TABLE annotations (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        t REAL,                        -- seconds from session start, when known
        wall_time TEXT NOT NULL,
        origin TEXT NOT NULL,
        text TEXT NOT NULL
    )""",
    "CREATE INDEX annotations_session ON annotations(session_id, t)",
)

_V2 = statements(
    """CREATE TABLE rule_firings (
        id INTEGER PRIMARY KEY,
        session_id INTEGER NOT NULL REFERENCES sessions(id),
        trial INTEGER NOT NULL,         -- the trial after which the rule fired
        t REAL NOT NULL,                -- seconds from session start
        rule TEXT NOT NULL,
        actions TEXT NOT NULL,          -- JSON list: what the rule did
        reads TEXT NOT NULL             -- JSON: every quantity its condition read, and its value
    )""",
    "CREATE INDEX rule_firings_session ON rule_firings(session_id, trial)",
)

_V3 = statements(
    """CREATE TABLE stage_log (
        id INTEGER PRIMARY KEY,
        animal TEXT NOT NULL,
        stage INTEGER NOT NULL,         -- 1-based position in the animal's list of stages
        protocol TEXT NOT NULL,
        at TEXT NOT NULL,               -- ISO 8601 wall clock with UTC offset
        session_id INTEGER REFERENCES sessions(id),  -- the session whose end decided it
        reason TEXT NOT NULL,           -- 'start' or 'advanced'
        evidence TEXT NOT NULL DEFAULT '{}'  -- JSON: the criterion and each session's figures
    )""",
    "CREATE INDEX stage_log_animal ON stage_log(animal, id)",
)

_V4 = statements(
    "ALTER TABLE trials ADD COLUMN state TEXT",  # the second-stage state reached
    "ALTER TABLE trials ADD COLUMN transition TEXT",  # 'common' or 'rare'
    "ALTER TABLE trials ADD COLUMN choice2 TEXT",  # second-stage option, where the state offers a choice
    "ALTER TABLE trials ADD COLUMN response2 TEXT",  # the input that answered in the second stage
    "ALTER TABLE trials ADD COLUMN latency2_s REAL",
    "ALTER TABLE trials ADD COLUMN omitted2 INTEGER",  # 1: the second-stage window ran out
)

_V5 = statements(
    # A lab-wide store: the rig (lab config `lab:` name) that ran each session.
    "ALTER TABLE sessions ADD COLUMN rig TEXT",
    "CREATE INDEX sessions_rig ON sessions(rig, id)",
    # Every rig that writes to the store, and the number its session ids start from.
    """CREATE TABLE rigs (
        id INTEGER PRIMARY KEY,
        name TEXT NOT NULL UNIQUE,
        registered_at TEXT NOT NULL,
        seen_at TEXT,                   -- last time the rig forwarded or polled (ISO 8601)
        store_state TEXT                -- what the rig last said of its link to the store
    )""",
    # A rig's spool: every write committed locally, in order, until the server has it.
    """CREATE TABLE outbox (
        seq INTEGER PRIMARY KEY,
        statement TEXT NOT NULL,
        params TEXT NOT NULL            -- JSON list
    )""",
    # The last outbox entry of each rig that the lab-wide store holds: written in the same
    # transaction as the entries themselves, so each is applied exactly once.
    """CREATE TABLE forwarded (
        rig TEXT PRIMARY KEY,
        seq INTEGER NOT NULL
    )""",
    # Operator controls for a rig, asked by the page of `vigil serve`, polled by the rig.
    """CREATE TABLE controls (
        id INTEGER PRIMARY KEY,
        rig TEXT NOT NULL,
        session_id INTEGER NOT NULL,
        op TEXT NOT NULL,               -- pause, resume, stop, annotate
        text TEXT,
        origin TEXT NOT NULL,
        asked_at TEXT NOT NULL,
        status INTEGER,                 -- the HTTP status the rig answered; NULL until then
        detail TEXT,
        answered_at TEXT
    )""",
    "CREATE INDEX controls_waiting ON controls(rig, id) WHERE status IS NULL",
)

MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "sessions, trials, events, blocks, estimates, annotations", _V1),
    Migration(2, "rule firings", _V2),
    Migration(3, "training stages per animal", _V3),
    Migration(4, "two-stage trials: state, transition and the second stage", _V4),
    Migration(5, "lab-wide store: rigs, spool outbox, forwarding marks, controls", _V5),
)


def schema_version(conn: Connection) -> int:
    return dialect.schema_version(conn)


def latest_version(migrations: Sequence[Migration] = MIGRATIONS) -> int:
    return migrations[-1].version if migrations else 0


def migrate(conn: Connection, migrations: Sequence[Migration] = MIGRATIONS) -> int:
    """Bring the database up to the newest version; return it.

    `conn` must be in autocommit mode (isolation_level=None). Each step reads the version
    under a write lock, so two processes opening a new database at once do not both apply it.
    """
    latest = latest_version(migrations)
    for expected, migration in enumerate(migrations, start=1):
        if migration.version != expected:
            raise ValueError(f"migration {migration.version} is out of order (expected {expected})")
    # Checked under the write lock only: read before it, the version and the tables could come
    # from either side of another process's first migration (tables there, version not yet).
    for migration in migrations:
        dialect.begin_write(conn, migrating=True)
        try:
            current = schema_version(conn)
            _refuse_unknown(conn, current, latest)
            if current < migration.version:
                migration.apply(conn)
                dialect.set_schema_version(conn, migration.version)
            conn.execute("COMMIT")
        except BaseException:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            raise
    return schema_version(conn)


def _refuse_unknown(conn: Connection, version: int, latest: int) -> None:
    if version > latest:
        raise StoreError(f"database schema version {version} is newer than this vigil knows ({latest}); upgrade vigil")
    if version == 0:
        if dialect.other_tables(conn):
            raise StoreError("not a vigil database: it already holds tables of another program")
