"""The history database: QA sessions, their measurements, units and baselines (SQLite).

One file (by default ``output/history.sqlite``) holds every session a site has analysed.
Each session is written in a single transaction, so a run killed half-way leaves either
the whole session or nothing. The database is opened in WAL journal mode with a busy
timeout, so several processes can record at once, and with foreign keys enforced.

The schema and its migrations are in :mod:`qa.history.schema` (re-exported here).

Times written by the tool itself (``recorded``, baseline ``set_at``) are UTC ISO 8601
text with microseconds; acquisition dates are kept as given (the scanner's local time)
and sessions are ordered by their text, so one unit should not mix time-zone offsets.
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
import statistics
import tempfile
from contextlib import contextmanager
from datetime import date, datetime, time, timedelta, timezone
from pathlib import Path
from types import MappingProxyType
from typing import Iterator, Sequence

from ..errors import InputError
from .records import (ACQUISITION_KEYS, UNIT_INFO_KEYS, BaselineValue, MeasurementRecord, SeriesPoint,
                      SessionRecord, StoredBaseline, StoredSession, UnitRecord, _iso)
from .schema import BUSY_TIMEOUT_S, MIGRATIONS, SCHEMA_VERSION, Migration, connect, migrate
from .schema import utc_now as _utc_now

__all__ = ["History", "BUSY_TIMEOUT_S", "MIGRATIONS", "SCHEMA_VERSION", "Migration",
           "migrate"]

_SESSION_COLUMNS = ("id, unit_id, acquired, analysed, phantom, profile, tool_version, "
                    "overall, kind, unit_info, source, checksum, report_path, recorded, "
                    "acquisition")


def _instant(value, *, field_name: str) -> str:
    """A moment as UTC text comparable with ``set_at``; a bare date means its end."""
    if isinstance(value, str):
        text = _iso(value, field_name, date_allowed=True)
        value = date.fromisoformat(text) if len(text) == 10 else datetime.fromisoformat(text)
    if isinstance(value, date) and not isinstance(value, datetime):
        value = datetime.combine(value, time.max)
    if not isinstance(value, datetime):
        raise InputError(f"expected a date or date-time, got {value!r}", field=field_name)
    return value.astimezone(timezone.utc).isoformat(timespec="microseconds")


class History:
    """The QA history database of a site.

    Parameters
    ----------
    path : str or Path
        The database file; it and its folder are created when missing.

    Raises
    ------
    InputError
        The file is not an SQLite database, is another program's database, has a schema
        newer than this tool's, or cannot be opened.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> with History.open(pathlib.Path(tempfile.mkdtemp()) / "h.sqlite") as h:
    ...     h.sessions()
    []
    """

    def __init__(self, path):
        self.path = Path(path)
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise InputError(f"cannot create the folder: {exc}", source=str(self.path)) from None
        if self.path.is_dir():
            raise InputError("expected a database file, found a folder", source=str(self.path))
        self._conn = None
        try:
            conn = connect(self.path)
        except sqlite3.Error as exc:
            raise InputError(f"not a usable SQLite database ({exc})",
                             source=str(self.path)) from None
        try:
            migrate(conn, source=str(self.path))
        except sqlite3.DatabaseError as exc:
            conn.close()
            raise InputError(f"not a usable SQLite database ({exc})",
                             source=str(self.path)) from None
        except BaseException:
            conn.close()
            raise
        self._conn = conn

    @classmethod
    def open(cls, path) -> "History":
        """Open (creating when missing) the history database at ``path``."""
        return cls(path)

    def close(self) -> None:
        if self._conn is not None:
            self._conn.close()
            self._conn = None

    def __enter__(self) -> "History":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _error(self, message: str) -> InputError:
        return InputError(message, source=str(self.path))

    def _db(self) -> sqlite3.Connection:
        if self._conn is None:
            raise self._error("the history database is closed")
        return self._conn

    @contextmanager
    def _write(self) -> Iterator[sqlite3.Connection]:
        """One write transaction, taken at once (``BEGIN IMMEDIATE``) so it never deadlocks."""
        conn = self._db()
        try:
            conn.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as exc:
            raise self._error(f"cannot start writing: {exc}") from None
        try:
            yield conn
            conn.execute("COMMIT")
        except BaseException as exc:
            if conn.in_transaction:
                conn.execute("ROLLBACK")
            if isinstance(exc, sqlite3.Error):
                raise self._error(f"nothing written: {exc}") from None
            raise

    # --- sessions ---------------------------------------------------------------------
    def record(self, session: SessionRecord) -> int:
        """Store a session, its unit and all its measurements in one transaction.

        Returns the new session id. The unit's facts are merged into the unit row (the
        facts of the latest acquisition win).

        Raises
        ------
        InputError
            ``unit_info`` holds a key outside :data:`~qa.history.records.UNIT_INFO_KEYS`
            (patient and study identifiers never enter the history), or the write fails.
        """
        if not isinstance(session, SessionRecord):
            raise self._error(f"expected a SessionRecord, got {type(session).__name__}")
        for what, facts, allowed, picker in (
                ("unit facts", session.unit_info, UNIT_INFO_KEYS, "unit_info_from"),
                ("acquisition facts", session.acquisition, ACQUISITION_KEYS, "acquisition_from")):
            refused = sorted(set(facts) - allowed)
            if refused:
                raise self._error(
                    f"{what} {', '.join(refused)} are not accepted (allowed: "
                    f"{', '.join(sorted(allowed))}); patient or study identifiers never "
                    f"enter the history; pass the metadata through {picker}()")
        info = dict(session.unit_info)
        with self._write() as conn:
            row = conn.execute("SELECT info, first_acquired, last_acquired FROM units "
                               "WHERE unit_id = ?", (session.unit_id,)).fetchone()
            if row is None:
                conn.execute("INSERT INTO units VALUES (?, ?, ?, ?)",
                             (session.unit_id, json.dumps(info, sort_keys=True),
                              session.acquired, session.acquired))
            else:
                old = json.loads(row[0])
                newest = session.acquired >= row[2]
                merged = {**old, **info} if newest else {**info, **old}
                conn.execute("UPDATE units SET info = ?, first_acquired = ?, last_acquired = ?"
                             " WHERE unit_id = ?",
                             (json.dumps(merged, sort_keys=True), min(row[1], session.acquired),
                              max(row[2], session.acquired), session.unit_id))
            cur = conn.execute(
                f"INSERT INTO sessions ({_SESSION_COLUMNS}) "
                "VALUES (NULL, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (session.unit_id, session.acquired, session.analysed, session.phantom,
                 session.profile, session.tool_version, session.overall, session.kind,
                 json.dumps(info, sort_keys=True), session.source, session.checksum,
                 session.report_path, _utc_now(),
                 json.dumps(dict(session.acquisition), sort_keys=True)))
            session_id = int(cur.lastrowid)
            conn.executemany(
                "INSERT INTO measurements VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                [(session_id, i, m.name, m.value, m.unit, m.uncertainty, m.verdict, m.note,
                  m.limit_text) for i, m in enumerate(session.measurements)])
        return session_id

    def sessions(self, *, unit_id: str | None = None, phantom: str | None = None,
                 since=None, until=None) -> list[StoredSession]:
        """Stored sessions ordered by acquisition date (then id).

        ``since`` and ``until`` (ISO text, date or datetime) bound the acquisition date,
        both inclusive; a bare date for ``until`` includes that whole day.
        """
        where, args = [], []
        for column, value in (("unit_id", unit_id), ("phantom", phantom)):
            if value is not None:
                where.append(f"{column} = ?")
                args.append(value)
        if since is not None:
            where.append("acquired >= ?")
            args.append(_iso(since, "since", date_allowed=True))
        if until is not None:
            text = _iso(until, "until", date_allowed=True)
            if len(text) == 10:
                where.append("acquired < ?")
                args.append((date.fromisoformat(text) + timedelta(days=1)).isoformat())
            else:
                where.append("acquired <= ?")
                args.append(text)
        clause = f"WHERE {' AND '.join(where)}" if where else ""
        rows = self._db().execute(
            f"SELECT {_SESSION_COLUMNS}, (SELECT COUNT(*) FROM measurements m "
            f"WHERE m.session_id = s.id) FROM sessions s {clause} ORDER BY acquired, id",
            args).fetchall()
        return [StoredSession(r[0], r[1], r[2], r[3], r[4], r[5], r[6], r[7], r[8],
                              MappingProxyType(json.loads(r[9])), r[10], r[11], r[12], r[13],
                              r[15], MappingProxyType(json.loads(r[14]))) for r in rows]

    def _session_row(self, session_id: int):
        row = self._db().execute(f"SELECT {_SESSION_COLUMNS} FROM sessions WHERE id = ?",
                                 (int(session_id),)).fetchone()
        if row is None:
            raise self._error(f"no session with id {session_id}")
        return row

    def measurements(self, session_id: int) -> tuple[MeasurementRecord, ...]:
        """The measurements of a session, in the order they were recorded."""
        self._session_row(session_id)
        rows = self._db().execute(
            "SELECT name, value, unit, uncertainty, verdict, note, limit_text "
            "FROM measurements WHERE session_id = ? ORDER BY position", (int(session_id),))
        return tuple(MeasurementRecord(*r) for r in rows)

    def load_session(self, session_id: int) -> SessionRecord:
        """The session as it was recorded (the inverse of :meth:`record`)."""
        r = self._session_row(session_id)
        return SessionRecord(r[1], r[2], r[3], r[4], r[5], r[6], r[7],
                             self.measurements(session_id), json.loads(r[9]), r[10], r[11],
                             r[12], r[8], json.loads(r[14]))

    def series(self, unit_id: str, metric: str, *,
               phantom: str | None = None) -> list[SeriesPoint]:
        """``(acquired, value, uncertainty, session_id)`` of one metric in date order.

        Sessions where the metric was not measured are left out.
        """
        sql = ("SELECT s.acquired, m.value, m.uncertainty, s.id FROM measurements m "
               "JOIN sessions s ON s.id = m.session_id WHERE s.unit_id = ? AND m.name = ? "
               "AND m.value IS NOT NULL")
        args = [unit_id, metric]
        if phantom is not None:
            sql += " AND s.phantom = ?"
            args.append(phantom)
        rows = self._db().execute(sql + " ORDER BY s.acquired, s.id", args)
        return [SeriesPoint(*r) for r in rows]

    def units(self) -> list[UnitRecord]:
        """Every unit with its latest facts and the span and number of its sessions."""
        rows = self._db().execute(
            "SELECT u.unit_id, u.info, u.first_acquired, u.last_acquired, COUNT(s.id) "
            "FROM units u LEFT JOIN sessions s ON s.unit_id = u.unit_id "
            "GROUP BY u.unit_id ORDER BY u.unit_id")
        return [UnitRecord(r[0], MappingProxyType(json.loads(r[1])), r[2], r[3], r[4])
                for r in rows]

    # --- baselines --------------------------------------------------------------------
    def set_baseline(self, unit_id: str, phantom: str, *, session_ids: Sequence[int],
                     reason: str, set_by: str = "", at=None) -> int:
        """Set a new baseline from one or more sessions; returns its id.

        Each metric's baseline is the mean of its measured values over the sessions,
        with the sample SD (``None`` for one value) and the count. The baseline in force
        is superseded (kept, with the time and the id of its successor). ``at`` is the
        time of the change (default now); it cannot precede the latest change.

        Raises
        ------
        InputError
            No sessions or no reason given, a session that does not exist or belongs to
            another unit or phantom, a metric recorded in two units, nothing measured.
        """
        try:
            ids = sorted({int(i) for i in session_ids})
        except (TypeError, ValueError):
            raise self._error(f"session_ids must be integers, got {session_ids!r}") from None
        if not ids:
            raise self._error("a baseline needs at least one session")
        if not isinstance(reason, str) or not reason.strip():
            raise self._error("a baseline change needs a reason")
        when = _utc_now() if at is None else _instant(at, field_name="at")
        marks = ", ".join("?" * len(ids))
        with self._write() as conn:
            found = {r[0]: (r[1], r[2]) for r in conn.execute(
                f"SELECT id, unit_id, phantom FROM sessions WHERE id IN ({marks})", ids)}
            for sid in ids:
                if sid not in found:
                    raise self._error(f"no session with id {sid}")
                if found[sid] != (unit_id, phantom):
                    raise self._error(f"session {sid} is of unit '{found[sid][0]}', phantom "
                                      f"'{found[sid][1]}', not '{unit_id}', '{phantom}'")
            per_metric: dict[str, list] = {}
            for name, value, unit in conn.execute(
                    f"SELECT name, value, unit FROM measurements WHERE session_id IN ({marks})"
                    " AND value IS NOT NULL ORDER BY session_id", ids):
                per_metric.setdefault(name, []).append((value, unit))
            if not per_metric:
                raise self._error(f"sessions {ids} have no measured values")
            last = conn.execute("SELECT MAX(set_at) FROM baselines WHERE unit_id = ? AND "
                                "phantom = ?", (unit_id, phantom)).fetchone()[0]
            if last is not None and when < last:
                raise self._error(f"a baseline change at {when} cannot precede the latest "
                                  f"one ({last})")
            values = {}
            for name, pairs in per_metric.items():
                units = {u for _, u in pairs}
                if len(units) > 1:
                    raise self._error(f"metric '{name}' is recorded in different units "
                                      f"{sorted(units)} in sessions {ids}")
                xs = [v for v, _ in pairs]
                sd = statistics.stdev(xs) if len(xs) > 1 else None
                values[name] = (math.fsum(xs) / len(xs), sd, len(xs), units.pop())
            cur = conn.execute("INSERT INTO baselines VALUES (NULL, ?, ?, ?, ?, ?, NULL, NULL)",
                               (unit_id, phantom, when, set_by, reason.strip()))
            new_id = int(cur.lastrowid)
            conn.execute("UPDATE baselines SET superseded_at = ?, superseded_by = ? WHERE "
                         "unit_id = ? AND phantom = ? AND superseded_at IS NULL AND id != ?",
                         (when, new_id, unit_id, phantom, new_id))
            conn.executemany("INSERT INTO baseline_sessions VALUES (?, ?)",
                             [(new_id, sid) for sid in ids])
            conn.executemany("INSERT INTO baseline_values VALUES (?, ?, ?, ?, ?, ?)",
                             [(new_id, name, *v) for name, v in sorted(values.items())])
        return new_id

    def _baseline_values(self, baseline_id: int):
        rows = self._db().execute("SELECT metric, value, sd, n, unit FROM baseline_values "
                                  "WHERE baseline_id = ? ORDER BY metric", (baseline_id,))
        return MappingProxyType({r[0]: BaselineValue(*r[1:]) for r in rows})

    def baseline(self, unit_id: str, phantom: str, *, at=None):
        """``{metric: BaselineValue}`` of the baseline in force at ``at`` (default now).

        ``at`` is ISO text, a date (meaning the end of that day, local time) or a
        datetime (naive: local time). Empty when no baseline was in force.
        """
        when = _utc_now() if at is None else _instant(at, field_name="at")
        row = self._db().execute(
            "SELECT id FROM baselines WHERE unit_id = ? AND phantom = ? AND set_at <= ? "
            "AND (superseded_at IS NULL OR superseded_at > ?) ORDER BY set_at DESC, id DESC "
            "LIMIT 1", (unit_id, phantom, when, when)).fetchone()
        return self._baseline_values(row[0]) if row else MappingProxyType({})

    def baseline_history(self, unit_id: str, phantom: str) -> list[StoredBaseline]:
        """Every baseline set for a unit and phantom, oldest first, superseded ones too."""
        rows = self._db().execute(
            "SELECT id, unit_id, phantom, set_at, set_by, reason, superseded_at, "
            "superseded_by FROM baselines WHERE unit_id = ? AND phantom = ? "
            "ORDER BY set_at, id", (unit_id, phantom)).fetchall()
        out = []
        for r in rows:
            ids = tuple(s for (s,) in self._db().execute(
                "SELECT session_id FROM baseline_sessions WHERE baseline_id = ? "
                "ORDER BY session_id", (r[0],)))
            out.append(StoredBaseline(r[0], r[1], r[2], r[3], r[4], r[5], ids,
                                      self._baseline_values(r[0]), r[6], r[7]))
        return out

    # --- export -----------------------------------------------------------------------
    def export_csv(self, path, *, unit_id: str | None = None) -> Path:
        """Write one CSV row per measurement, with its session's facts; returns the path.

        Columns: session facts (``session_id``, ``unit_id``, ``acquired``, ...), the
        measurement (``metric``, ``value``, ``unit``, ``uncertainty``, ``verdict``,
        ``limit_text``, ``note``), one ``acquisition_<fact>`` column per acquisition
        fact and one ``unit_<fact>`` column per unit fact present.
        Not-measured values are empty cells. The file is written to a temporary name in
        the same folder and then renamed, so a reader never sees half a file.
        """
        import pandas as pd

        sql = ("SELECT s.id, s.unit_id, s.acquired, s.analysed, s.phantom, s.profile, s.kind,"
               " s.tool_version, s.overall, m.name, m.value, m.unit, m.uncertainty, "
               "m.verdict, m.limit_text, m.note, s.source, s.checksum, s.report_path, "
               "s.acquisition, s.unit_info FROM measurements m "
               "JOIN sessions s ON s.id = m.session_id")
        args = []
        if unit_id is not None:
            sql += " WHERE s.unit_id = ?"
            args.append(unit_id)
        rows = self._db().execute(sql + " ORDER BY s.acquired, s.id, m.position", args)
        columns = ["session_id", "unit_id", "acquired", "analysed", "phantom", "profile",
                   "kind", "tool_version", "overall", "metric", "value", "unit",
                   "uncertainty", "verdict", "limit_text", "note", "source", "checksum",
                   "report_path"]
        records = [dict(zip(columns, r[:-2]),
                        **{f"acquisition_{k}": v for k, v in json.loads(r[-2]).items()},
                        **{f"unit_{k}": v for k, v in json.loads(r[-1]).items()})
                   for r in rows]
        facts = sorted({k for rec in records for k in rec} - set(columns))
        frame = pd.DataFrame.from_records(records, columns=columns + facts)
        target = Path(path)
        try:
            target.parent.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp",
                                       dir=target.parent)
        except OSError as exc:
            raise InputError(f"cannot write the CSV file: {exc}", source=str(target)) from None
        try:
            with os.fdopen(fd, "w", encoding="utf-8", newline="") as handle:
                frame.to_csv(handle, index=False)
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(tmp, target)
        except BaseException as exc:
            Path(tmp).unlink(missing_ok=True)
            if isinstance(exc, OSError):
                raise InputError(f"cannot write the CSV file: {exc}",
                                 source=str(target)) from None
            raise
        return target
