"""Batch runs: find the phantom sessions in folder trees and assess each one.

A *session* is one reconstructed volume: a multi-frame DICOM file, one series of
single-frame DICOM slices in a folder, or a NumPy ``.npz`` volume. Sessions are grouped
per file or per series (headers read without pixel data; unit and date come from each
header), assessed one by
one in worker processes (or on a Dask cluster), and each failure is kept with its
one-line reason while the others go on. Every worker writes its own log and records its
session in the shared history (SQLite in WAL mode serialises the writers).
"""

from __future__ import annotations

import csv
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

    Raises
    ------
    InputError
        When a folder does not exist.
    """
    tasks = []
    common = dict(phantom=str(phantom), limits=str(limits), out_dir=str(out_dir),
                  history=None if history is None else str(history), unit=unit, kind=kind)
    for folder in folders:
        root = Path(folder)
        if not root.is_dir():
            raise InputError("expected a folder of sessions", source=str(root))
        for d in sorted([root] + [p for p in root.rglob("*") if p.is_dir()]):
            singles = defaultdict(list)
            for f in sorted(p for p in d.iterdir() if p.is_file()):
                if f.suffix.lower() == ".npz":
                    tasks.append(BatchTask(str(f), None, **common))
                    continue
                ds = _header(f)
                if ds is None:
                    continue
                if int(ds.get("NumberOfFrames", 1) or 1) > 1:
                    tasks.append(BatchTask(str(f), None, **common))
                elif "PixelData" in ds or "Rows" in ds:
                    singles[str(ds.get("SeriesInstanceUID", ""))].append(f)
            for uid in sorted(singles):
                tasks.append(BatchTask(str(d), uid if len(singles) > 1 else None, **common))
    return tasks


def assess_task(task: BatchTask) -> BatchOutcome:
    """Assess one session; never raises (a failure becomes the outcome's ``error``)."""
    from .judge import load_profile
    from .phantom import load_phantom
    from .publish import assess_file

    try:
        phantom = load_phantom(task.phantom)
        profile = load_profile(task.limits)
        result, published = assess_file(task.source, phantom, profile, unit=task.unit,
                                        out_dir=task.out_dir, history_path=task.history,
                                        kind=task.kind, series=task.series)
        metrics = {j.name: j.measurement.value for j in result.judged}
        return BatchOutcome(task, True, result.unit_id, result.date, result.overall,
                            str(published.report), metrics)
    except LacunaError as exc:
        message = exc.one_line() if isinstance(exc, InputError) else str(exc)
        return BatchOutcome(task, False, error=message)
    except Exception as exc:  # a bug must not stop the other sessions; keep its trace
        last = traceback.format_exception_only(type(exc), exc)[-1].strip()
        return BatchOutcome(task, False, error=f"internal error: {last}")


def run_local(tasks, *, processes: int = 2, progress: bool = True) -> list[BatchOutcome]:
    """Assess ``tasks`` in a process pool; outcomes come back in the tasks' order."""
    from concurrent.futures import ProcessPoolExecutor
    import multiprocessing as mp

    if processes <= 1 or len(tasks) <= 1:
        iterator = map(assess_task, tasks)
        return list(_progress(iterator, len(tasks), progress))
    with ProcessPoolExecutor(max_workers=processes, mp_context=mp.get_context("spawn")) as pool:
        return list(_progress(pool.map(assess_task, tasks), len(tasks), progress))


def run_dask(tasks, *, scheduler: str, progress: bool = True) -> list[BatchOutcome]:
    """Assess ``tasks`` on a Dask cluster (``dask.distributed``; an optional extra)."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise InputError("--scheduler needs dask.distributed: pip install -e '.[dask]'",
                         field="--scheduler") from None
    try:
        client = Client(scheduler, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise InputError(f"cannot reach the Dask scheduler: {exc}", source=scheduler) from None
    try:
        futures = client.map(assess_task, tasks, pure=False)
        done = {}
        for fut in _progress(as_completed(futures), len(futures), progress):
            done[fut.key] = fut.result()
        return [done[f.key] for f in futures]
    finally:
        client.close()


def _progress(iterator, total: int, show: bool):
    if not show:
        return iterator
    from tqdm import tqdm
    return tqdm(iterator, total=total, desc="sessions", unit="session", leave=False)


SUMMARY_FIELDS = ("source", "series", "status", "unit", "date", "overall", "report", "reason")


def summary_csv(outcomes, path) -> Path:
    """One row per session (and one column per metric value), written atomically."""
    names = sorted({k for o in outcomes for k in o.metrics})
    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(list(SUMMARY_FIELDS) + names)
    for o in outcomes:
        w.writerow([o.task.source, o.task.series or "", "assessed" if o.ok else "failed",
                    o.unit, o.date, o.overall, o.report, o.error]
                   + ["" if o.metrics.get(n) is None else repr(o.metrics[n]) for n in names])
    return write_text_atomic(path, buf.getvalue())
