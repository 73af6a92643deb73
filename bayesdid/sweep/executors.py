"""Executors: map a function (by default one sweep variant) over picklable tasks in-process, on a local process pool or on Dask."""

from __future__ import annotations

import os
import uuid
from collections.abc import Callable

from ..errors import SweepError
from ..lifeline import workers_end_with_me
from ..outputs import owner_tag, process_start
from .worker import run_variant


def _bind_to_parent(parent_pid: int) -> None:
    """Pool-worker initializer: the worker ends when the sweep's main process does, however it ends
    (:func:`bayesdid.lifeline.bind_to_parent`)."""
    from ..lifeline import bind_to_parent

    bind_to_parent(parent_pid)


# ---- executors ---------------------------------------------------------------------------------
def _variant_lost(task: dict, exc: BaseException) -> dict:
    return {
        "id": task["id"],
        "label": task["label"],
        "pid": "lost",
        "status": "failed",
        "compiles": 0,
        "error": f"the worker running this variant stopped: {type(exc).__name__}: {exc}",
    }


def _result_or_failure(future, task, lost=_variant_lost) -> dict:
    """The worker's record, or a failure record when the worker itself died (killed, out of memory)."""
    try:
        return future.result()
    except Exception as exc:
        return lost(task, exc)


# Each executor maps ``fn`` (default: one sweep variant) over picklable tasks and yields the records
# as they complete; ``lost(task, exc)`` makes the record of a task whose worker died. The calibration
# study runs its reps through the same executors (``bayesdid.calibration.make_executor``).
def _serial(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    fn = fn or run_variant
    for t in tasks:
        yield fn(t)


def _pool(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    import multiprocessing as mp
    from concurrent.futures import ProcessPoolExecutor, as_completed

    fn = fn or run_variant
    # spawn: a clean interpreter per worker (no forked numba/LLVM state); each worker compiles once
    # each worker ends with this process, even when it is killed (_bind_to_parent)
    with ProcessPoolExecutor(
        max_workers=workers, mp_context=mp.get_context("spawn"), initializer=_bind_to_parent, initargs=(os.getpid(),)
    ) as ex:
        with workers_end_with_me():  # the workers start in submit; they arm the signal while importing
            futs = {ex.submit(fn, t): t for t in tasks}
        for f in as_completed(futs):
            yield _result_or_failure(f, futs[f], lost)


def _dask(tasks: list, workers: int, cluster, *, fn=None, lost=_variant_lost):
    from distributed import Client, LocalCluster, as_completed

    from ..on_dask import EndWithSweep, on_dask

    fn = fn or run_variant
    local = None
    if cluster == "local":
        with workers_end_with_me():  # the workers start here; they arm the signal while importing
            local = LocalCluster(
                n_workers=workers,
                threads_per_worker=1,
                processes=True,
                host="127.0.0.1",
                dashboard_address=None,
                silence_logs=40,
            )
        client = Client(local)
        client.register_plugin(EndWithSweep(os.getpid()))
    else:
        try:
            client = Client(cluster, timeout="20s")
        except (OSError, TimeoutError) as exc:
            raise SweepError(
                f"cannot reach the Dask scheduler at --cluster '{cluster}': {exc}. Start one "
                "(dask scheduler) or use --cluster local."
            ) from None
    try:
        token = uuid.uuid4().hex[:8]  # a fresh key per run: a scheduler never hands back an old result
        life = {"owner": owner_tag(), "start": process_start(os.getpid())}
        futs = {
            client.submit(on_dask, fn, t, life, pure=False, key=f"bayesdid-{_task_key(t, i)}-{token}"): t
            for i, t in enumerate(tasks)
        }
        for f in as_completed(list(futs)):
            yield _result_or_failure(f, futs[f], lost)
    finally:
        client.close()
        if local is not None:
            local.close()


def _task_key(task, i: int) -> str:
    return f"variant-{task['id']}" if isinstance(task, dict) and "id" in task else f"task-{i}"


EXECUTORS: dict[str, Callable] = {"serial": _serial, "pool": _pool, "dask": _dask}
