"""Batch runs: find the phantom sessions in folder trees and assess each one.

A *session* is one reconstructed volume: a multi-frame DICOM file, a NumPy ``.npz``
volume, or one series of single-frame DICOM slices (one Series Instance UID) in one
folder. Headers are read without pixel data; a series already fixes the unit and the
date, which come from its header when the volume is read. A series whose slices are
spread over several folders is not joined: it becomes one failed session naming the
folders (a session is read from one place, which its checksum and source name).

Sessions are assessed in worker processes (or on a Dask cluster), and each failure is
kept with its one-line reason while the others go on, including a worker process that
dies (killed for memory, a crash in native code): the sessions it may have held are run
again, each in a process of its own, and the one whose process dies again is reported
with how it died. Every worker writes its own log and records its session in the shared
history (SQLite in WAL mode serialises the writers).
"""

from __future__ import annotations

import csv
import functools
import io
import traceback
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

from .errors import InputError, LacunaError
from .fileio import write_text_atomic


@dataclass(frozen=True)
class BatchTask:
    """One session to assess: a file or a folder (series), with the shared options."""

    source: str
    series: str | None
    unit: str | None
    phantom: str
    limits: str
    out_dir: str
    history: str | None
    kind: str = "routine"
    problem: str = ""   # known before any work: the session fails with this reason

    @property
    def label(self) -> str:
        return self.source + (f" (series {self.series})" if self.series else "")


@dataclass(frozen=True)
class BatchOutcome:
    task: BatchTask
    ok: bool
    unit: str = ""
    date: str = ""
    overall: str = ""
    report: str = ""
    metrics: dict = field(default_factory=dict)
    uncertainties: dict = field(default_factory=dict)
    verdicts: dict = field(default_factory=dict)
    error: str = ""


def _header(path: Path):
    import pydicom
    from pydicom.errors import InvalidDicomError

    try:
        with open(path, "rb") as fh:
            if fh.read(132)[128:] != b"DICM":
                return None
        return pydicom.dcmread(path, stop_before_pixels=True)
    except (OSError, InvalidDicomError):
        return None


def find_sessions(folders, *, phantom: str, limits: str, out_dir: str,
                  history: str | None, unit: str | None = None,
                  kind: str = "routine") -> list[BatchTask]:
    """Every session under ``folders`` (recursively), in a stable order.

    Parameters
    ----------
    folders : iterable of str or Path
        Folders to search.
    phantom, limits, out_dir, history, unit, kind
        Passed on to every :class:`BatchTask`.

    Returns
    -------
    list of BatchTask
        One per multi-frame DICOM file, ``.npz`` file and series of slices; a series
        found in several folders gives one task whose ``problem`` names them.

    Raises
    ------
    InputError
        When a folder does not exist.
    """
    common = dict(phantom=str(phantom), limits=str(limits), out_dir=str(out_dir),
                  history=None if history is None else str(history), unit=unit, kind=kind)
    found = []                      # (path, series uid or None, series in the folder)
    folders_of = defaultdict(list)  # series uid -> folders holding its slices
    for folder in folders:
        root = Path(folder)
        if not root.is_dir():
            raise InputError("expected a folder of sessions", source=str(root))
        for d in sorted([root] + [p for p in root.rglob("*") if p.is_dir()]):
            singles = set()
            for f in sorted(p for p in d.iterdir() if p.is_file()):
                if f.suffix.lower() == ".npz":
                    found.append((f, None, 0))
                    continue
                ds = _header(f)
                if ds is None:
                    continue
                if int(ds.get("NumberOfFrames", 1) or 1) > 1:
                    found.append((f, None, 0))
                elif "PixelData" in ds or "Rows" in ds:
                    singles.add(str(ds.get("SeriesInstanceUID", "")))
            for uid in sorted(singles):
                found.append((d, uid, len(singles)))
                if uid and d not in folders_of[uid]:
                    folders_of[uid].append(d)
    tasks = []
    for path, uid, n_series in found:
        places = folders_of.get(uid, []) if uid else []
        if len(places) > 1 and path != places[0]:
            continue  # reported once, at its first folder
        problem = "" if len(places) <= 1 else (
            f"series {uid} is split over {len(places)} folders ("
            + ", ".join(str(p) for p in places) + "); put its slices in one folder")
        tasks.append(BatchTask(str(path), uid if n_series > 1 or problem else None,
                               problem=problem, **common))
    return tasks


def assess_task(task: BatchTask) -> BatchOutcome:
    """Assess one session; never raises (a failure becomes the outcome's ``error``)."""
    from .judge import load_profile
    from .phantom import load_phantom
    from .publish import assess_file

    if task.problem:
        return BatchOutcome(task, False, error=task.problem)
    try:
        phantom = load_phantom(task.phantom)
        profile = load_profile(task.limits)
        result, published = assess_file(task.source, phantom, profile, unit=task.unit,
                                        out_dir=task.out_dir, history_path=task.history,
                                        kind=task.kind, series=task.series)
        return BatchOutcome(task, True, result.unit_id, result.date, result.overall,
                            str(published.report),
                            metrics={j.name: j.measurement.value for j in result.judged},
                            uncertainties={j.name: j.measurement.uncertainty
                                           for j in result.judged},
                            verdicts={j.name: j.verdict for j in result.judged})
    except LacunaError as exc:
        message = exc.one_line() if isinstance(exc, InputError) else str(exc)
        return BatchOutcome(task, False, error=message)
    except Exception as exc:  # a bug must not stop the other sessions; keep its trace
        return BatchOutcome(task, False, error=f"internal error: {_last_line(exc)}")


def _last_line(exc: BaseException) -> str:
    return traceback.format_exception_only(type(exc), exc)[-1].strip()


def run_local(tasks, *, processes: int = 2, progress: bool = True) -> list[BatchOutcome]:
    """Assess ``tasks`` in worker processes; outcomes come back in the tasks' order.

    Parameters
    ----------
    tasks : sequence of BatchTask
    processes : int
        Worker processes at a time (at least 1).
    progress : bool
        Show a progress bar on standard error.

    Returns
    -------
    list of BatchOutcome
        One per task. A worker process that dies fails only the session it was
        running (see the module notes); the others are still assessed.

    Raises
    ------
    InputError
        ``processes`` is less than 1.
    """
    if isinstance(processes, bool) or not isinstance(processes, int) or processes < 1:
        raise InputError(f"expected a whole number of at least 1, got {processes!r}",
                         field="--processes")
    work = assess_task           # looked up here, so that the workers run the same function
    outcomes: dict[int, BatchOutcome] = {}
    with _bar(len(tasks), progress) as bar:
        todo = list(range(len(tasks)))
        while todo:
            suspects = _pool_round(work, tasks, todo, processes, outcomes, bar)
            for i, outcome in zip(suspects, _each_alone(work, [tasks[i] for i in suspects])):
                outcomes[i] = outcome
                bar.update()
            todo = [i for i in todo if i not in outcomes]
    return [outcomes[i] for i in range(len(tasks))]


def _spawn():
    import multiprocessing as mp
    return mp.get_context("spawn")


def _pool_round(work, tasks, todo, processes, outcomes, bar) -> list[int]:
    """Run ``todo`` in one pool, ``processes`` at a time, until done or the pool breaks.

    Returns the indices that were in flight when the pool broke (empty when it did not).
    """
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
    from concurrent.futures.process import BrokenProcessPool

    queue = list(todo)
    running: dict = {}
    with ProcessPoolExecutor(max_workers=min(processes, len(queue)),
                             mp_context=_spawn()) as pool:
        while queue or running:
            try:
                while queue and len(running) < processes:
                    future = pool.submit(work, tasks[queue[0]])
                    running[future] = queue.pop(0)
            except BrokenProcessPool:
                return _in_flight(running, outcomes, bar) or [queue[0]]
            done, _ = wait(running, return_when=FIRST_COMPLETED)
            if any(isinstance(f.exception(), BrokenProcessPool) for f in done):
                return _in_flight(running, outcomes, bar)
            for fut in done:
                i = running.pop(fut)
                exc = fut.exception()
                outcomes[i] = fut.result() if exc is None else BatchOutcome(
                    tasks[i], False, error=f"internal error: {_last_line(exc)}")
                bar.update()
    return []


def _in_flight(running, outcomes, bar) -> list[int]:
    """Keep the results that did arrive; the others are the suspects of a broken pool."""
    suspects = []
    for fut, i in running.items():
        if fut.done() and fut.exception() is None:
            outcomes[i] = fut.result()
            bar.update()
        else:
            suspects.append(i)
    return sorted(suspects)


def _each_alone(work, tasks) -> list[BatchOutcome]:
    """Run each task in a fresh process of its own, at the same time; see how each ends."""
    ctx = _spawn()
    started = []
    for task in tasks:
        receive, send = ctx.Pipe(duplex=False)
        proc = ctx.Process(target=_send_outcome, args=(work, task, send), daemon=True)
        proc.start()
        send.close()
        started.append((task, proc, receive))
    outcomes = []
    for task, proc, receive in started:
        try:
            outcome = receive.recv()
        except EOFError:      # the process ended without sending its outcome
            outcome = None
        receive.close()
        proc.join()
        outcomes.append(outcome or BatchOutcome(
            task, False, error=f"worker process died: {_how_ended(proc.exitcode)}"))
    return outcomes


def _send_outcome(work, task, connection) -> None:
    connection.send(work(task))
    connection.close()


def _how_ended(exitcode) -> str:
    import signal

    if exitcode is None or exitcode >= 0:
        return f"it exited with code {exitcode} while assessing this session"
    try:
        name = signal.Signals(-exitcode).name
    except ValueError:
        name = f"signal {-exitcode}"
    hint = " (often the system running out of memory)" if name == "SIGKILL" else ""
    return f"it was killed by {name}{hint} while assessing this session"


def run_dask(tasks, *, scheduler: str, progress: bool = True) -> list[BatchOutcome]:
    """Assess ``tasks`` on a Dask cluster (``dask.distributed``; an optional extra).

    Parameters
    ----------
    tasks : sequence of BatchTask
    scheduler : str
        Address of the scheduler (``tcp://host:port``).
    progress : bool
        Show a progress bar on standard error.

    Returns
    -------
    list of BatchOutcome
        One per task, in the tasks' order. A session whose workers died (Dask retries
        it on other workers a few times) fails with that reason; the others go on.

    Raises
    ------
    InputError
        ``dask.distributed`` is not installed, or the scheduler cannot be reached.
    """
    try:
        from dask.distributed import Client, as_completed
        from distributed import KilledWorker
    except ImportError:
        raise InputError("--scheduler needs dask.distributed: pip install -e '.[dask]'",
                         field="--scheduler") from None
    try:
        client = Client(scheduler, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise InputError(f"cannot reach the Dask scheduler: {exc}", source=scheduler) from None
    try:
        futures = client.map(assess_task, tasks, pure=False)
        index = {f.key: i for i, f in enumerate(futures)}
        outcomes = {}
        with _bar(len(tasks), progress) as bar:
            for fut in as_completed(futures):
                i = index[fut.key]
                try:
                    outcomes[i] = fut.result()
                except KilledWorker:
                    outcomes[i] = BatchOutcome(tasks[i], False, error=(
                        "worker process died: every Dask worker that ran this session died"))
                except Exception as exc:  # noqa: BLE001 - one session's loss, not the batch's
                    outcomes[i] = BatchOutcome(tasks[i], False,
                                               error=f"internal error: {_last_line(exc)}")
                bar.update()
        return [outcomes[i] for i in range(len(tasks))]
    finally:
        client.close()


def _bar(total: int, show: bool):
    from tqdm import tqdm
    return tqdm(total=total, desc="sessions", unit="session", leave=False, disable=not show)


SUMMARY_FIELDS = ("source", "series", "status", "unit", "date", "overall", "report", "reason")


@functools.lru_cache(maxsize=256)
def _source_header(source: str):
    """The DICOM header of a file, or of the first DICOM file of a folder, or ``None``
    (read once per source: the summary and the failure lines ask for it again)."""
    path = Path(source)
    if path.is_file():
        files = [path]
    elif path.is_dir():
        files = sorted(p for p in path.iterdir() if p.is_file())[:50]
    else:
        files = []
    return next((ds for ds in map(_header, files) if ds is not None), None)


def public_text(task: BatchTask, text: str) -> str:
    """``text`` with the patient identifiers of the task's DICOM header cut out.

    Folders and files are often named after the patient; the reader scrubs the source
    path it puts in a session's metadata (:func:`qa.io.deidentify.scrub_path`), and the
    summary and the failure lines get the same treatment, from the header of the file or
    of the first DICOM file of the folder (left as it is when there is none to read).
    """
    from .io.deidentify import scrub_path

    ds = _source_header(str(task.source))
    return text if ds is None else scrub_path(text, ds)


def summary_csv(outcomes, path) -> Path:
    """One row per session (and one column per metric value), written atomically."""
    names = sorted({k for o in outcomes for k in o.metrics})
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(list(SUMMARY_FIELDS) + names)
    for o in outcomes:
        w.writerow([public_text(o.task, str(o.task.source)), o.task.series or "",
                    "assessed" if o.ok else "failed", o.unit, o.date, o.overall, o.report,
                    public_text(o.task, o.error)]
                   + ["" if o.metrics.get(n) is None else repr(o.metrics[n]) for n in names])
    return write_text_atomic(path, buf.getvalue())
