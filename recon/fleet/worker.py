"""Run one pass and return its archive record: the function the local pool and Dask workers call.

A worker writes the pass's report folder (``<out_root>/<pass id>/``) and returns a :class:`PassRecord`;
it never opens the archive. Any error becomes a failed record with its one-line message, so one bad
pass never stops a batch.
"""

from __future__ import annotations

import json

from ..pipeline import run_pass
from .catalogue import PassRecord
from .discover import PassTask, failed_record, one_line
from .extract import record_from_summary

__all__ = ["process_pass"]


def process_pass(task: PassTask) -> PassRecord:
    """Run every stage on ``task``'s mission file and read its archive record from the outputs."""
    try:
        result = run_pass(task.mission_file, task.out_root, progress=False, report=True)
        if result.pass_id != task.pass_id:
            raise RuntimeError(f"the mission file's pass id changed while the batch ran "
                               f"({task.pass_id!r} -> {result.pass_id!r})")
        # the figures as summary.json holds them (10 significant digits), so that the archive and the files agree
        summary = json.loads((result.out_dir / "summary.json").read_text(encoding="utf-8"))
        return record_from_summary(summary, result.out_dir, mission_file=str(task.mission_file),
                                   input_hash=task.input_hash, satellite=task.satellite, object_id=task.object_id)
    except Exception as e:  # every failure of one pass is recorded, never raised
        return failed_record(task.pass_id, task.mission_file, task.input_hash, one_line(e),
                             satellite=task.satellite, object_id=task.object_id)
