"""One transaction per session, a writer killed inside it, and two writers at once."""

from __future__ import annotations

import multiprocessing
import os
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import qa
from qa.history.db import History

# A writer that records one large session and stops for good in the middle of it: the
# trace callback of its connection runs before each statement, and after half of the
# measurement rows it reports "inside" and sleeps until it is killed. A page cache of a
# few pages makes SQLite spill the uncommitted rows into the WAL file first, so the kill
# really leaves half a transaction on disk.
_WRITER = r"""
import sys, time
from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
path, n = sys.argv[1], int(sys.argv[2])
h = History.open(path)
h._conn.execute("PRAGMA cache_size = 4")
count = 0
def pause(statement):
    global count
    if statement.startswith("INSERT INTO measurements"):
        count += 1
        if count == n // 2:
            print("inside", flush=True)
            time.sleep(300)
h._conn.set_trace_callback(pause)
rows = tuple(MeasurementRecord(f"metric_{i:05d}", float(i), "mm", 0.1, "pass",
                               note="n" * 200) for i in range(n))
h.record(SessionRecord("DBT-KILLED", "2024-02-01", "2024-02-01T10:00", "wedge-50", "p",
                       "0.1.0", "pass", rows, {"serial": "K-1"}))
print("committed", flush=True)
"""


def test_killed_writer_leaves_no_half_session(tmp_path):
    path = tmp_path / "history.sqlite"
    env = {**os.environ, "PYTHONPATH": str(Path(qa.__file__).resolve().parent.parent)}
    n = 3000
    proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(path), str(n)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    try:
        line = proc.stdout.readline().strip()
        assert line == "inside", proc.stderr.read()
        wal = Path(f"{path}-wal")
        # half the rows (about 1500 x 250 bytes) went to the WAL uncommitted
        assert wal.stat().st_size > 100_000
        with sqlite3.connect(path) as reader:  # a reader sees only committed data
            assert reader.execute("SELECT COUNT(*) FROM sessions").fetchone()[0] == 0
        reader.close()
        os.kill(proc.pid, signal.SIGKILL)
        assert proc.wait(timeout=30) == -signal.SIGKILL
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    with History.open(path) as h:
        assert h.sessions() == [] and h.units() == []  # the unit's upsert is undone too
        assert h._conn.execute("SELECT COUNT(*) FROM measurements").fetchone()[0] == 0
        assert h._conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


# Each of the two writers runs this code in its own process (``exec`` as the process
# target: with the "spawn" start method a function of this module could not be imported
# by name, test modules being imported by path).
_MANY = r"""
from qa.history.db import History
from qa.history.records import MeasurementRecord, SessionRecord
start.wait(timeout=60)
with History.open(path) as h:  # both open the new file at the same moment
    for k in range(count):
        rows = tuple(MeasurementRecord(f"metric_{j:02d}", float(k + j), "mm", None, "pass")
                     for j in range(20))
        h.record(SessionRecord(f"UNIT-{tag}", f"2024-01-01T00:{k:02d}", "2024-01-02T10:00",
                               "wedge-50", "p", "0.1.0", "pass", rows, {"serial": tag}))
"""


def test_two_writers_lose_nothing(tmp_path):
    path = tmp_path / "shared" / "history.sqlite"
    ctx = multiprocessing.get_context("spawn")
    start = ctx.Barrier(2)
    workers = [ctx.Process(target=exec, args=(_MANY, {"path": path, "tag": tag, "count": 50,
                                                      "start": start}))
               for tag in ("A", "B")]
    for w in workers:
        w.start()
    for w in workers:
        w.join(timeout=120)
    assert [w.exitcode for w in workers] == [0, 0]
    with History.open(path) as h:
        for tag in ("A", "B"):
            sessions = h.sessions(unit_id=f"UNIT-{tag}")
            assert [s.acquired for s in sessions] == [f"2024-01-01T00:{k:02d}:00"
                                                      for k in range(50)]
            assert all(s.n_measurements == 20 for s in sessions)
            assert [p.value for p in h.series(f"UNIT-{tag}", "metric_07")] == [
                float(k + 7) for k in range(50)]
        assert h._conn.execute("SELECT COUNT(*) FROM measurements").fetchone()[0] == 2000
        assert h._conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
