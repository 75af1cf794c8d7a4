"""The schema of the history database and the steps that bring a file up to it.

The schema carries its own version (table ``schema_version``, one row per applied step).
:data:`MIGRATIONS` lists the steps from an empty file to the current version; opening an
older database applies the missing steps, in order, inside one transaction, so a failed
step leaves the file at its old version. A database newer than this tool is refused.

:func:`connect` sets what every connection needs: WAL journal mode (readers do not block
the writer), a busy timeout (a writer waits for another process's transaction instead of
failing), and foreign keys enforced.
"""

from __future__ import annotations

import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from time import monotonic, sleep
from typing import Sequence

from ..errors import InputError

#: Seconds a writer waits for another process's transaction before giving up.
BUSY_TIMEOUT_S = 30.0


@dataclass(frozen=True)
class Migration:
    """One schema step: the version it brings the database to and its SQL statements."""

    version: int
    description: str
    statements: tuple[str, ...]


_VERDICT_CHECK = "IN ('pass', 'warning', 'fail', 'not measured')"

#: Schema steps, applied in order; a database at version v gets the steps after v.
MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "units, sessions, measurements and baselines", (
        """CREATE TABLE units (
            unit_id TEXT PRIMARY KEY, info TEXT NOT NULL,
            first_acquired TEXT NOT NULL, last_acquired TEXT NOT NULL)""",
        f"""CREATE TABLE sessions (
            id INTEGER PRIMARY KEY, unit_id TEXT NOT NULL REFERENCES units(unit_id),
            acquired TEXT NOT NULL, analysed TEXT NOT NULL, recorded TEXT NOT NULL,
            phantom TEXT NOT NULL, profile TEXT NOT NULL, tool_version TEXT NOT NULL,
            overall TEXT NOT NULL CHECK (overall {_VERDICT_CHECK}),
            kind TEXT NOT NULL, unit_info TEXT NOT NULL, source TEXT NOT NULL,
            checksum TEXT NOT NULL, report_path TEXT NOT NULL)""",
        "CREATE INDEX session_by_unit ON sessions(unit_id, phantom, acquired)",
        f"""CREATE TABLE measurements (
            session_id INTEGER NOT NULL REFERENCES sessions(id) ON DELETE CASCADE,
            position INTEGER NOT NULL, name TEXT NOT NULL, value REAL, unit TEXT NOT NULL,
            uncertainty REAL, verdict TEXT NOT NULL CHECK (verdict {_VERDICT_CHECK}),
            note TEXT NOT NULL, limit_text TEXT NOT NULL,
            PRIMARY KEY (session_id, name))""",
        """CREATE TABLE baselines (
            id INTEGER PRIMARY KEY, unit_id TEXT NOT NULL REFERENCES units(unit_id),
            phantom TEXT NOT NULL, set_at TEXT NOT NULL, set_by TEXT NOT NULL,
            reason TEXT NOT NULL, superseded_at TEXT,
            superseded_by INTEGER REFERENCES baselines(id))""",
        """CREATE TABLE baseline_sessions (
            baseline_id INTEGER NOT NULL REFERENCES baselines(id),
            session_id INTEGER NOT NULL REFERENCES sessions(id),
            PRIMARY KEY (baseline_id, session_id))""",
        """CREATE TABLE baseline_values (
            baseline_id INTEGER NOT NULL REFERENCES baselines(id), metric TEXT NOT NULL,
            value REAL NOT NULL, sd REAL, n INTEGER NOT NULL, unit TEXT NOT NULL,
            PRIMARY KEY (baseline_id, metric))""",
    )),
    Migration(2, "index of measurements by metric name (trends across units)", (
        "CREATE INDEX measurement_by_name ON measurements(name, session_id)",
    )),
    Migration(3, "acquisition facts of each session (geometry, views, arc, distance)", (
        "ALTER TABLE sessions ADD COLUMN acquisition TEXT NOT NULL DEFAULT '{}'",
    )),
)

#: The schema version this tool writes.
SCHEMA_VERSION = MIGRATIONS[-1].version

def utc_now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="microseconds")


def _schema_version(conn: sqlite3.Connection, source: str) -> int:
    tables = {row[0] for row in conn.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%'")}
    if "schema_version" in tables:
        return int(conn.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] or 0)
    if tables:
        raise InputError("an SQLite database but not a Lacuna history (no schema_version "
                         "table); give a new file name", source=source)
    return 0


def migrate(conn: sqlite3.Connection, *, target: int | None = None,
            steps: Sequence[Migration] = MIGRATIONS, source: str = "") -> int:
    """Bring the database of ``conn`` to schema version ``target`` (default: the latest).

    All missing steps run inside one ``BEGIN IMMEDIATE`` transaction, so a failure leaves
    the database at its old version. ``conn`` must be in autocommit mode
    (``isolation_level=None``). Returns the version reached.

    Raises
    ------
    InputError
        The database is newer than ``steps`` know, or is not a Lacuna history.
    """
    latest = steps[-1].version if steps else 0
    target = latest if target is None else target
    current = _schema_version(conn, source)
    if current > latest:
        raise InputError(f"database schema version {current} is newer than this tool's "
                         f"({latest}); use a newer Lacuna", source=source)
    if current >= target:
        return current
    conn.execute("BEGIN IMMEDIATE")
    try:
        current = _schema_version(conn, source)  # another process may have migrated it
        conn.execute("CREATE TABLE IF NOT EXISTS schema_version (version INTEGER PRIMARY KEY,"
                     " description TEXT NOT NULL, applied_at TEXT NOT NULL)")
        for step in steps:
            if current < step.version <= target:
                for statement in step.statements:
                    conn.execute(statement)
                conn.execute("INSERT INTO schema_version VALUES (?, ?, ?)",
                             (step.version, step.description, utc_now()))
                current = step.version
        conn.execute("COMMIT")
    except BaseException:
        if conn.in_transaction:
            conn.execute("ROLLBACK")
        raise
    return current


def connect(path: Path) -> sqlite3.Connection:
    """Open ``path`` in autocommit mode with WAL, the busy timeout and foreign keys on.

    ``sqlite3.DatabaseError`` (a file that is not SQLite) surfaces at the first pragma
    that reads the file.
    """
    conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
    try:
        conn.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_S * 1000)}")
        conn.execute("PRAGMA foreign_keys = ON")
        # Switching a new file to WAL needs an exclusive lock, and SQLite answers "locked"
        # at once (without its busy handler) when two processes create the file together.
        deadline, pause = monotonic() + BUSY_TIMEOUT_S, 0.005
        while True:
            try:
                conn.execute("PRAGMA journal_mode = WAL").fetchone()
                break
            except sqlite3.OperationalError as exc:
                if "locked" not in str(exc) or monotonic() > deadline:
                    raise
                sleep(pause)
                pause = min(2 * pause, 0.1)
    except BaseException:
        conn.close()
        raise
    return conn
