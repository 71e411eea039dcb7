"""Where the passes run: in this process, on a local process pool, or on a Dask distributed cluster.

Each runner takes the tasks and the function that runs one (``process_pass``) and yields a record per
task as it completes, in completion order. None of them touches the archive. A worker process that
dies (killed, out of memory, crashed) loses the passes it held; the local pool runs each of those again
alone, so that only a pass that kills its own process is recorded as failed. Dask reschedules the
tasks of a lost worker itself and gives up on a task after its ``allowed-failures``; that task is then
recorded as failed.
"""

from __future__ import annotations

import multiprocessing
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from concurrent.futures.process import BrokenProcessPool

from ..core import InputError
from .catalogue import PassRecord
from .discover import PassTask, failed_record, one_line

__all__ = ["run_here", "run_local", "run_dask"]

RunOne = Callable[[PassTask], PassRecord]


def _failed(task: PassTask, error: str) -> PassRecord:
    return failed_record(task.pass_id, task.mission_file, task.input_hash, error,
                         satellite=task.satellite, object_id=task.object_id)


def run_here(tasks: Sequence[PassTask], run_one: RunOne) -> Iterator[PassRecord]:
    """One pass after the other in this process."""
    for task in tasks:
        yield run_one(task)


def _pool(workers: int) -> ProcessPoolExecutor:
    # "spawn": a fresh interpreter per worker; forking a process that may hold threads (numba, BLAS)
    # risks deadlocks
    return ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"))


def _outcome(future: Future, task: PassTask) -> PassRecord | None:
    """The record of a finished future; None when its worker process died."""
    try:
        return future.result()
    except BrokenProcessPool:
        return None
    except Exception as e:  # the task could not be sent or its result returned: record it, go on
        return _failed(task, one_line(e))


def run_local(tasks: Sequence[PassTask], run_one: RunOne, workers: int) -> Iterator[PassRecord]:
    """On a pool of ``workers`` local processes (in this process when ``workers`` is 1)."""
    if workers <= 1 or len(tasks) <= 1:
        yield from run_here(tasks, run_one)
        return
    lost = []
    pool = _pool(min(workers, len(tasks)))
    try:
        futures = {pool.submit(run_one, t): t for t in tasks}
        for future in as_completed(futures):
            record = _outcome(future, futures[future])
            if record is None:
                lost.append(futures[future])
            else:
                yield record
    finally:
        pool.shutdown(wait=True, cancel_futures=True)
    for task in sorted(lost, key=lambda t: str(t.mission_file)):
        alone = _pool(1)
        try:
            record = _outcome(alone.submit(run_one, task), task)
        finally:
            alone.shutdown(wait=True, cancel_futures=True)
        yield record if record is not None else _failed(
            task, "the worker process running this pass died (killed, out of memory or crashed)")


def _client(address: str):
    """A client of the scheduler at ``address`` and dask.distributed's ``as_completed``."""
    try:
        import distributed  # optional dependency (recon[fleet]), imported only when a batch asks for it
    except ImportError:
        raise InputError("expected dask.distributed to be installed for --scheduler "
                         "(pip install 'recon[fleet]')", key="--scheduler") from None
    try:
        return distributed.Client(address, timeout=30), distributed.as_completed
    except (OSError, TimeoutError, ValueError) as e:
        raise InputError(f"expected a reachable Dask scheduler, got {address!r} ({one_line(e)})",
                         key="--scheduler") from None


def run_dask(tasks: Sequence[PassTask], run_one: RunOne, address: str) -> Iterator[PassRecord]:
    """On an existing Dask distributed cluster, through its scheduler at ``address``.

    The workers must see the mission files and the output folder at the same paths as this process
    (a shared file system); they return records and never open the archive.
    """
    client, dask_completed = _client(address)
    with client:
        futures = {client.submit(run_one, t, pure=False): t for t in tasks}
        for future in dask_completed(list(futures)):
            task = futures[future]
            try:
                record = future.result()
            except Exception as e:  # a lost task (KilledWorker) or a transport error: this pass failed
                record = _failed(task, one_line(e))
            future.release()
            yield record
