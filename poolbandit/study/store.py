"""The SQLite store of a live study: schema, migrations, connections, transactions.

One study is one SQLite file (Python's :mod:`sqlite3`, no server). The file
holds the design as submitted, the roster, every decision with its exact
randomisation probabilities and seed material, and every outcome as it was
recorded. Nothing is updated in place: triggers refuse ``UPDATE`` and
``DELETE`` on every table, and a correction of an outcome is a new row that
names the row it supersedes (both stay; readers take the latest).

Every write command runs in one ``BEGIN IMMEDIATE`` transaction, so a failed
or killed command leaves the file as it was before or as it is after, never
in between, and concurrent commands are serialised by SQLite's own lock
(``busy_timeout``; no lock file). Each committed write command appends one
row to ``batches``; the batch id orders everything that happened, which is
what lets an assignment be re-derived from exactly the data that existed
when it was made.

Schema (version 2)
------------------
``design``
    ``text`` as submitted, its ``sha256``, ``source`` path, the ``policy``
    name running the adaptive condition, the study ``seed`` (decimal text,
    may exceed 64 bits when drawn at init), ``created``.
``batches``
    One row per committed write command: ``command``, ``created``,
    ``source`` file, ``source_sha256``, ``rows``.
``randomisations``
    One row per enrolment that randomised participants between the adaptive
    and the control condition: ``control_ratio``, ``method``, the seed
    material (``seed``, ``spawn_key``) and the counts per condition.
``participants``
    ``participant`` id (unique), ``batch``, ``enrol_step``, ``covariates``
    (JSON list in design order), ``condition`` (``adaptive``/``control``),
    ``randomisation`` (or NULL), ``source_row``.
``steps``
    One row per assignment round: ``step`` (0, 1, 2, ...), its ``batch``,
    the seed material of the step and the posterior ``snapshot`` if any.
``decisions``
    ``participant`` (row id), ``decision`` (1-based), ``step``, ``arm``,
    ``propensity``, ``probabilities`` (JSON list, one per arm), ``context``
    (BLOB: float64 little-endian, design feature order; read fast when a
    step rebuilds the policy from the whole history), ``policy``, ``condition``, seed
    material (``seed``, ``spawn_key``), ``snapshot``, ``created``.
    UNIQUE (participant, decision) and UNIQUE (participant, step).
``outcomes``
    ``decision`` (row id), ``reward`` (NULL: the session did not happen),
    ``batch``, ``recorded``, ``source``, ``source_row``, ``supersedes``
    (the outcome row this one corrects; UNIQUE, so a row is superseded at
    most once, and at most one first outcome per decision).
``snapshots``
    A JSON summary of the policy's posterior used at a step (pooled
    policies).
``latest_outcomes`` (view, version 2)
    The current outcome of every decision that has one.

Floats are stored as SQLite REAL (IEEE double), as float64 bytes, or as
JSON written with Python's shortest round-trip representation, so every
number reads back bit for bit.
"""

from __future__ import annotations

import os
import sqlite3
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterator

from ..errors import InputError

__all__ = [
    "SCHEMA_VERSION",
    "MIGRATIONS",
    "BUSY_TIMEOUT_MS",
    "StoreError",
    "connect",
    "create",
    "write_transaction",
    "read_transaction",
    "utc_now",
    "schema_version",
]

#: Milliseconds a command waits for another command's write lock.
BUSY_TIMEOUT_MS = 120_000


class StoreError(InputError):
    """The database file is missing, is not a study database, or is too new."""


def utc_now() -> str:
    """The current time as ISO 8601 UTC with microseconds."""
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


# --------------------------------------------------------------------------
# Schema and migrations
# --------------------------------------------------------------------------
_APPEND_ONLY = ("design", "batches", "randomisations", "participants", "steps", "decisions", "outcomes",
                "snapshots")

_V1 = """
CREATE TABLE design (
    id        INTEGER PRIMARY KEY CHECK (id = 1),
    text      TEXT NOT NULL,
    sha256    TEXT NOT NULL,
    source    TEXT,
    policy    TEXT NOT NULL,
    seed      TEXT NOT NULL,
    created   TEXT NOT NULL
);
CREATE TABLE batches (
    id            INTEGER PRIMARY KEY AUTOINCREMENT,
    command       TEXT NOT NULL,
    created       TEXT NOT NULL,
    source        TEXT,
    source_sha256 TEXT,
    rows          INTEGER NOT NULL
);
CREATE TABLE randomisations (
    id            INTEGER PRIMARY KEY,
    batch         INTEGER NOT NULL REFERENCES batches(id),
    control_ratio REAL NOT NULL CHECK (control_ratio >= 0 AND control_ratio <= 1),
    method        TEXT NOT NULL,
    seed          TEXT NOT NULL,
    spawn_key     TEXT NOT NULL,
    n_control     INTEGER NOT NULL,
    n_adaptive    INTEGER NOT NULL
);
CREATE TABLE participants (
    id            INTEGER PRIMARY KEY,
    participant   TEXT NOT NULL UNIQUE,
    batch         INTEGER NOT NULL REFERENCES batches(id),
    enrol_step    INTEGER NOT NULL CHECK (enrol_step >= 0),
    covariates    TEXT NOT NULL,
    condition     TEXT NOT NULL CHECK (condition IN ('adaptive', 'control')),
    randomisation INTEGER REFERENCES randomisations(id),
    source_row    INTEGER
);
CREATE TABLE snapshots (
    id       INTEGER PRIMARY KEY,
    step     INTEGER NOT NULL,
    policy   TEXT NOT NULL,
    summary  TEXT NOT NULL
);
CREATE TABLE steps (
    step       INTEGER PRIMARY KEY CHECK (step >= 0),
    batch      INTEGER NOT NULL UNIQUE REFERENCES batches(id),
    seed       TEXT NOT NULL,
    spawn_key  TEXT NOT NULL,
    snapshot   INTEGER REFERENCES snapshots(id),
    n          INTEGER NOT NULL,
    created    TEXT NOT NULL
);
CREATE TABLE decisions (
    id            INTEGER PRIMARY KEY,
    participant   INTEGER NOT NULL REFERENCES participants(id),
    decision      INTEGER NOT NULL CHECK (decision >= 1),
    step          INTEGER NOT NULL REFERENCES steps(step),
    arm           TEXT NOT NULL,
    propensity    REAL NOT NULL CHECK (propensity > 0 AND propensity <= 1),
    probabilities TEXT NOT NULL,
    context       BLOB NOT NULL CHECK (length(context) % 8 = 0),
    policy        TEXT NOT NULL,
    condition     TEXT NOT NULL CHECK (condition IN ('adaptive', 'control')),
    seed          TEXT NOT NULL,
    spawn_key     TEXT NOT NULL,
    snapshot      INTEGER REFERENCES snapshots(id),
    created       TEXT NOT NULL,
    UNIQUE (participant, decision),
    UNIQUE (participant, step)
);
CREATE INDEX decisions_step ON decisions(step, participant);
CREATE TABLE outcomes (
    id          INTEGER PRIMARY KEY,
    decision    INTEGER NOT NULL REFERENCES decisions(id),
    reward      REAL,
    batch       INTEGER NOT NULL REFERENCES batches(id),
    recorded    TEXT NOT NULL,
    source      TEXT,
    source_row  INTEGER,
    supersedes  INTEGER UNIQUE REFERENCES outcomes(id)
);
CREATE UNIQUE INDEX outcomes_first ON outcomes(decision) WHERE supersedes IS NULL;
CREATE INDEX outcomes_decision ON outcomes(decision, id);
""" + "\n".join(
    f"""CREATE TRIGGER {t}_no_update BEFORE UPDATE ON {t}
BEGIN SELECT RAISE(ABORT, '{t} is append-only: add a new row instead'); END;
CREATE TRIGGER {t}_no_delete BEFORE DELETE ON {t}
BEGIN SELECT RAISE(ABORT, '{t} is append-only: rows are never deleted'); END;"""
    for t in _APPEND_ONLY
)

_V2 = """
CREATE VIEW latest_outcomes AS
    SELECT o.* FROM outcomes AS o
    WHERE NOT EXISTS (SELECT 1 FROM outcomes AS n WHERE n.supersedes = o.id);
"""


def _script(sql: str) -> Callable[[sqlite3.Connection], None]:
    def apply(conn: sqlite3.Connection) -> None:
        # executescript would COMMIT first; run statement by statement inside our transaction
        for statement in _split_sql(sql):
            conn.execute(statement)
    return apply


def _split_sql(sql: str) -> list[str]:
    out, buf = [], ""
    for line in sql.splitlines(keepends=True):
        buf += line
        if sqlite3.complete_statement(buf):
            if buf.strip():
                out.append(buf.strip())
            buf = ""
    if buf.strip():
        out.append(buf.strip())
    return out


#: MIGRATIONS[v] takes a database from schema version v to v + 1.
MIGRATIONS: list[Callable[[sqlite3.Connection], None]] = [_script(_V1), _script(_V2)]
SCHEMA_VERSION = len(MIGRATIONS)


def schema_version(conn: sqlite3.Connection) -> int:
    """``PRAGMA user_version`` of an open database."""
    return int(conn.execute("PRAGMA user_version").fetchone()[0])


def _migrate(conn: sqlite3.Connection, path: str, *, target: int = SCHEMA_VERSION) -> None:
    version = schema_version(conn)
    if version == target:
        return
    if version > SCHEMA_VERSION:
        raise StoreError(f"{path}: the study database has schema version {version}, newer than this "
                         f"poolbandit understands ({SCHEMA_VERSION}); upgrade poolbandit")
    with write_transaction(conn):
        version = schema_version(conn)  # another process may have migrated meanwhile
        if version == 0 and conn.execute("SELECT count(*) FROM sqlite_master").fetchone()[0]:
            raise StoreError(f"{path}: not a poolbandit study database (it has tables but no schema version)")
        for v in range(version, target):
            MIGRATIONS[v](conn)
        conn.execute(f"PRAGMA user_version = {int(target)}")


# --------------------------------------------------------------------------
# Connections
# --------------------------------------------------------------------------
def _configure(conn: sqlite3.Connection) -> None:
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    conn.execute("PRAGMA foreign_keys = ON")
    conn.execute("PRAGMA synchronous = FULL")


def connect(path: str | os.PathLike, *, migrate: bool = True) -> sqlite3.Connection:
    """Open an existing study database.

    The connection is in autocommit mode (``isolation_level=None``): writes
    happen only inside :func:`write_transaction`. Foreign keys are on,
    ``busy_timeout`` is :data:`BUSY_TIMEOUT_MS`, and an older schema is
    migrated to :data:`SCHEMA_VERSION` in one transaction.

    Raises
    ------
    StoreError
        If the file does not exist, is not SQLite, is not a study database or
        was written by a newer poolbandit.
    """
    path = str(path)
    if not os.path.isfile(path):
        raise StoreError(f"{path}: no study database here (create one with `poolbandit study init`)")
    try:
        conn = sqlite3.connect(Path(path).resolve().as_uri() + "?mode=rw", uri=True, isolation_level=None,
                               timeout=BUSY_TIMEOUT_MS / 1000)
        _configure(conn)
        version = schema_version(conn)
    except sqlite3.DatabaseError as err:
        raise StoreError(f"{path}: not a study database ({err})") from None
    try:
        if version == 0:
            raise StoreError(f"{path}: not a poolbandit study database (schema version 0)")
        if migrate:
            _migrate(conn, path)
        elif version != SCHEMA_VERSION:
            raise StoreError(f"{path}: schema version {version}, expected {SCHEMA_VERSION}")
    except BaseException:
        conn.close()
        raise
    return conn


def create(path: str | os.PathLike, fill: Callable[[sqlite3.Connection], None], *,
           version: int = SCHEMA_VERSION) -> None:
    """Create a new study database at ``path`` atomically, refusing to overwrite.

    The database is built in a temporary file beside ``path`` (schema, then
    ``fill(conn)`` in the same transaction), closed, and hard-linked into
    place, which fails if ``path`` exists; so a crash leaves no half-made
    study and two concurrent ``init`` commands cannot both win.

    ``version`` is for tests of the migrations: build an older schema.
    """
    target = Path(path)
    if target.exists():
        raise StoreError(f"{target}: a file already exists here; refusing to overwrite it")
    if not target.parent.is_dir():
        raise StoreError(f"{target}: the folder {target.parent} does not exist")
    tmp = target.parent / f".{target.name}.{os.getpid()}.init.tmp"
    for leftover in (tmp, Path(f"{tmp}-wal"), Path(f"{tmp}-shm")):
        if leftover.exists():
            leftover.unlink()
    try:
        conn = sqlite3.connect(str(tmp), isolation_level=None)
        try:
            conn.execute("PRAGMA journal_mode = WAL")
            _configure(conn)
            with write_transaction(conn):
                for v in range(version):
                    MIGRATIONS[v](conn)
                conn.execute(f"PRAGMA user_version = {int(version)}")
                fill(conn)
        finally:
            conn.close()
        try:
            os.link(tmp, target)  # atomic, and fails if target exists
        except FileExistsError:
            raise StoreError(f"{target}: a file already exists here; refusing to overwrite it") from None
        except OSError:  # a file system without hard links: check, then rename (a small race remains)
            if target.exists():
                raise StoreError(f"{target}: a file already exists here; refusing to overwrite it") from None
            os.replace(tmp, target)
    finally:
        for leftover in (tmp, Path(f"{tmp}-wal"), Path(f"{tmp}-shm")):
            if leftover.exists():
                leftover.unlink()


# --------------------------------------------------------------------------
# Transactions
# --------------------------------------------------------------------------
@contextmanager
def write_transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """``BEGIN IMMEDIATE`` ... ``COMMIT``; any exception rolls everything back.

    IMMEDIATE takes the write lock at the start, so what the command reads
    inside the block is what it writes against (no lost updates), and a
    concurrent writer waits up to :data:`BUSY_TIMEOUT_MS`.
    """
    conn.execute("BEGIN IMMEDIATE")
    try:
        yield conn
    except BaseException:
        conn.execute("ROLLBACK")
        raise
    conn.execute("COMMIT")


@contextmanager
def read_transaction(conn: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    """A consistent snapshot for reads (``BEGIN DEFERRED`` ... ``ROLLBACK``)."""
    conn.execute("BEGIN")
    try:
        yield conn
    finally:
        conn.execute("ROLLBACK")
