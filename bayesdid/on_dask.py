"""What runs on Dask workers for a sweep or a calibration: the work ends with the process that sent it.

* A local cluster's worker processes are the sweep's own: :class:`EndWithSweep` binds each to the
  sweep's main process (a parent-death signal and a parent watchdog, as for the process pool), so a
  killed sweep takes them along at once.
* An external cluster's workers belong to the cluster and keep running; what stops is the sweep's work
  on them: :func:`on_dask` runs each task inside :func:`bayesdid.sample.stop_when`, which cancels
  sampling (and starts no compile) once :func:`sender_gone` says the sweep is gone.
"""

from __future__ import annotations

import os
import time

from distributed.diagnostics.plugin import WorkerPlugin

from .outputs import owner_alive

__all__ = ["EndWithSweep", "on_dask", "sender_gone"]

#: seconds between two real looks of :func:`sender_gone`
LOOK_EVERY = 0.5


class EndWithSweep(WorkerPlugin):
    """Worker plugin of a local cluster: its worker processes end with the sweep's main process."""

    idempotent = True
    name = "bayesdid-end-with-sweep"

    def __init__(self, parent_pid: int):
        self.parent_pid = parent_pid

    def setup(self, worker):
        from .lifeline import bind_to_parent

        if os.getppid() == self.parent_pid:  # a worker this process started, never one of another cluster
            bind_to_parent(self.parent_pid)


def sender_gone(life: dict):
    """A check, for a task running on a Dask worker, that the process which sent it is gone.

    Gone: that process is dead (known when it ran on this machine: host, pid and start time), or the
    scheduler dropped the task (its client disconnected, which a killed process does at once; the
    worker then marks the running task cancelled). Looked at no more often than every
    :data:`LOOK_EVERY` seconds; once gone, always gone.
    """
    worker = key = None
    try:
        from distributed import get_worker
        from distributed.worker import thread_state

        worker, key = get_worker(), thread_state.key
    except (ValueError, AttributeError, ImportError):  # not inside a Dask task: the process check alone
        pass
    last = {"t": float("-inf"), "gone": False}

    def gone() -> bool:
        now = time.monotonic()
        if last["gone"] or now - last["t"] < LOOK_EVERY:
            return last["gone"]
        last["t"] = now
        if not owner_alive(life["owner"], life.get("start")):
            last["gone"] = True
        elif worker is not None and key is not None:
            ts = worker.state.tasks.get(key)
            last["gone"] = ts is None or ts.state in ("cancelled", "released", "forgotten")
        return last["gone"]

    return gone


def on_dask(fn, task, life: dict):
    """``fn(task)`` on a Dask worker, stopped once the process that sent it is gone."""
    from .sample import stop_when

    with stop_when(sender_gone(life)):
        return fn(task)
