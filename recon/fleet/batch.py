"""``recon batch``: every pass under a folder, run where asked, each archived as soon as it completes.

The process that calls :func:`run_batch` owns the batch: it finds the mission files, plans each pass
(id and input hash), skips those archived with the same inputs, hands the rest to a runner (this
process, a local process pool, or a Dask cluster), and writes each record to the archive in its own
transaction as it arrives. Workers only return records. A pass that fails is archived as failed with
its one-line error and the batch goes on.
"""

from __future__ import annotations

import itertools
import os
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from ..core import InputError
from .archive import Archive
from .catalogue import PassRecord
from .discover import PassTask, failed_record, find_missions, plan_pass
from .pools import run_dask, run_local
from .worker import process_pass

__all__ = ["BatchResult", "run_batch", "record_line", "DEFAULT_ARCHIVE"]

DEFAULT_ARCHIVE = Path("reports") / "archive.sqlite"


@dataclass(frozen=True)
class BatchResult:
    """What a batch did: the mission files found, the passes skipped (archived with the same inputs)
    and the record of every pass it ran or found unreadable, in the order they were archived."""

    found: int
    skipped: tuple[str, ...]
    records: tuple[PassRecord, ...]
    archive: Path

    @property
    def failed(self) -> tuple[PassRecord, ...]:
        return tuple(r for r in self.records if r.status == "failed")

    @property
    def critical(self) -> tuple[PassRecord, ...]:
        return tuple(r for r in self.records if r.count("critical"))

    def describe(self) -> str:
        ok = len(self.records) - len(self.failed)
        return (f"batch: {self.found} mission file(s): {len(self.records)} archived ({ok} ok, {len(self.failed)} "
                f"failed, {len(self.critical)} with a critical anomaly), {len(self.skipped)} skipped "
                f"(inputs unchanged); archive {self.archive}")


def record_line(record: PassRecord, done: int, total: int) -> str:
    """One line on one archived pass, for a log or a terminal without a progress bar."""
    head = f"[{done}/{total}] {record.pass_id}"
    if record.status != "ok":
        return f"{head}: FAILED: {record.error}"
    counts = ", ".join(f"{record.count(s)} {s}" for s in ("critical", "warning", "info"))
    return f"{head}: ok, verdict {record.verdict or 'undetermined'}; anomalies {counts}"


def _plan(missions: list[Path], root: Path, out_root: Path) -> tuple[list[PassTask], list[PassRecord]]:
    """Tasks for the readable mission files; failed records for the others and for repeated pass ids."""
    tasks, failed, seen = [], [], {}
    for path in missions:
        plan = plan_pass(path, root, out_root)
        if isinstance(plan, PassRecord):
            failed.append(plan)
        elif plan.pass_id in seen:
            failed.append(failed_record(
                f"file:{path.resolve().relative_to(root.resolve()).as_posix()}", plan.mission_file, plan.input_hash,
                f"{plan.mission_file}: key 'pass.id': expected an id used once in the batch, got {plan.pass_id!r}, "
                f"also the id of {seen[plan.pass_id]}", satellite=plan.satellite, object_id=plan.object_id))
        else:
            seen[plan.pass_id] = plan.mission_file
            tasks.append(plan)
    return tasks, failed


def run_batch(root: str | Path, archive: str | Path = DEFAULT_ARCHIVE, *, out_root: str | Path = "reports",
              workers: int | None = None, scheduler: str | None = None, rerun: bool = False,
              run_one: Callable[[PassTask], PassRecord] = process_pass,
              on_record: Callable[[PassRecord, int, int], None] | None = None) -> BatchResult:
    """Run every pass under ``root`` and archive each as it completes.

    Parameters
    ----------
    root : folder searched (recursively) for mission files
    archive : the SQLite archive (created if absent)
    out_root : folder under which each pass's report folder ``<pass id>/`` is written
    workers : local worker processes (default: one per CPU; 1 runs the passes in this process)
    scheduler : address of a Dask distributed scheduler; the passes then run on its cluster
    rerun : run every pass, even those archived with the same input hash
    run_one : the function that runs one pass in a worker (default :func:`process_pass`)
    on_record : called as ``on_record(record, done, total)`` after each pass is archived

    Returns
    -------
    BatchResult
    """
    root = Path(root)
    if workers is not None and workers < 1:
        raise InputError(f"expected at least 1 worker, got {workers}", key="--workers")
    missions = find_missions(root)
    if not missions:
        raise InputError("expected mission files (*.toml with a [pass] table) under this folder, found none", root)
    out_root = Path(out_root)
    done: list[PassRecord] = []
    with Archive(archive) as db:
        tasks, unreadable = _plan(missions, root, out_root)
        known = db.archived()
        skipped = tuple(t.pass_id for t in tasks if not rerun and known.get(t.pass_id) == (t.input_hash, "ok"))
        tasks = [t for t in tasks if t.pass_id not in skipped]
        total = len(tasks) + len(unreadable)
        runner = (run_dask(tasks, run_one, scheduler) if scheduler
                  else run_local(tasks, run_one, workers or os.cpu_count() or 1))
        for record in itertools.chain(unreadable, runner):  # archived one by one, as they complete
            db.write(record)
            done.append(record)
            if on_record is not None:
                on_record(record, len(done), total)
    return BatchResult(len(missions), skipped, tuple(done), Path(archive))
