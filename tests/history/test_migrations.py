"""The schema version table and the migration steps."""

from __future__ import annotations

import sqlite3
from dataclasses import replace

import pytest

from qa.errors import InputError
from qa.history.db import MIGRATIONS, SCHEMA_VERSION, History, Migration, migrate


def _indexes(conn) -> set[str]:
    return {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type = 'index'")}


def _version_1_database(path):
    """A database as version 1 of the schema wrote it, filled through plain SQL."""
    conn = sqlite3.connect(path, isolation_level=None)
    assert migrate(conn, target=1) == 1
    conn.executescript("""
        INSERT INTO units VALUES ('DBT-SOUTH-2', '{"model": "T-300", "serial": "S-9"}',
                                  '2023-11-02', '2023-12-01');
        INSERT INTO sessions VALUES (1, 'DBT-SOUTH-2', '2023-11-02', '2023-11-02T15:00:00',
            '2023-11-02T15:01:00+00:00', 'wedge-50', 'acceptance-v1', '0.0.9', 'pass',
            'acceptance', '{"model": "T-300", "serial": "S-9"}', 'a.dcm', 'sha256:01', '');
        INSERT INTO sessions VALUES (2, 'DBT-SOUTH-2', '2023-12-01', '2023-12-01T15:00:00',
            '2023-12-01T15:01:00+00:00', 'wedge-50', 'constancy-v1', '0.0.9', 'warning',
            'routine', '{"model": "T-300", "serial": "S-9"}', 'b.dcm', 'sha256:02', '');
        INSERT INTO measurements VALUES (1, 0, 'mtf50_x', 3.25, 'lp/mm', 0.04, 'pass', '', '');
        INSERT INTO measurements VALUES (1, 1, 'sdnr_d5', NULL, '', NULL, 'not measured',
                                         'insert not found', '');
        INSERT INTO measurements VALUES (2, 0, 'mtf50_x', 2.95, 'lp/mm', 0.05, 'warning',
                                         '', '>= 3.0 (local policy)');
        INSERT INTO baselines VALUES (1, 'DBT-SOUTH-2', 'wedge-50',
            '2023-11-03T09:00:00.000000+00:00', 'physicist', 'acceptance', NULL, NULL);
        INSERT INTO baseline_sessions VALUES (1, 1);
        INSERT INTO baseline_values VALUES (1, 'mtf50_x', 3.25, NULL, 1, 'lp/mm');
    """)
    conn.close()


def test_version_1_is_migrated_without_loss(tmp_path):
    path = tmp_path / "v1.sqlite"
    _version_1_database(path)
    conn = sqlite3.connect(path)
    assert conn.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == 1
    assert "measurement_by_name" not in _indexes(conn)
    conn.close()
    assert SCHEMA_VERSION >= 2  # otherwise this test would migrate nothing
    with History.open(path) as h:
        versions = [r[0] for r in h._conn.execute("SELECT version FROM schema_version "
                                                  "ORDER BY version")]
        assert versions == list(range(1, SCHEMA_VERSION + 1))
        assert "measurement_by_name" in _indexes(h._conn)  # the step of version 2
        first, second = h.sessions()
        assert (first.kind, first.tool_version, second.overall) == (
            "acceptance", "0.0.9", "warning")
        assert [(m.name, m.value, m.verdict) for m in h.measurements(1)] == [
            ("mtf50_x", 3.25, "pass"), ("sdnr_d5", None, "not measured")]
        assert h.measurements(2)[0].limit_text == ">= 3.0 (local policy)"
        assert [p.value for p in h.series("DBT-SOUTH-2", "mtf50_x")] == [3.25, 2.95]
        assert h.baseline("DBT-SOUTH-2", "wedge-50")["mtf50_x"].value == 3.25
        assert dict(h.units()[0].info) == {"model": "T-300", "serial": "S-9"}
        # and the migrated file takes new sessions
        assert h.record(replace(h.load_session(2), acquired="2024-01-05")) == 3
        assert h._conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_failed_step_leaves_the_old_version(tmp_path):
    path = tmp_path / "h.sqlite"
    History.open(path).close()
    broken = MIGRATIONS + (Migration(SCHEMA_VERSION + 1, "a step that fails half-way", (
        "CREATE INDEX measurement_by_unit ON measurements(unit)",
        "INSERT INTO no_such_table VALUES (1)",  # fails after a good statement
    )),)
    conn = sqlite3.connect(path, isolation_level=None)
    with pytest.raises(sqlite3.OperationalError, match="no such table: no_such_table"):
        migrate(conn, steps=broken)
    # DDL is transactional in SQLite: the good statement of the step is gone too
    assert conn.execute("SELECT MAX(version) FROM schema_version").fetchone()[0] == SCHEMA_VERSION
    assert "measurement_by_unit" not in _indexes(conn)
    conn.close()


def test_steps_apply_in_order_and_once(tmp_path):
    path = tmp_path / "h.sqlite"
    extra = MIGRATIONS + (Migration(SCHEMA_VERSION + 1, "a further column", (
        "ALTER TABLE sessions ADD COLUMN operator TEXT NOT NULL DEFAULT ''",)),)
    conn = sqlite3.connect(path, isolation_level=None)
    assert migrate(conn, target=1, steps=extra) == 1
    assert migrate(conn, steps=extra) == SCHEMA_VERSION + 1
    assert migrate(conn, steps=extra) == SCHEMA_VERSION + 1  # a no-op the second time
    columns = [r[1] for r in conn.execute("PRAGMA table_info(sessions)")]
    assert columns[-1] == "operator"
    conn.close()
    # this tool's own schema is now older than the file: refused, not downgraded
    with pytest.raises(InputError, match=f"newer than this tool's \\({SCHEMA_VERSION}\\)"):
        History.open(path)
