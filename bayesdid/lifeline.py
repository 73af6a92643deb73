"""Worker processes that end with the process that started them, however it ends.

A sweep's (or a calibration's) worker processes are started by its main process: a local process
pool, or a local Dask cluster. If the main process is killed, nobody is left to stop them, so each
worker binds itself to its parent:

* on Linux, ``prctl(PR_SET_PDEATHSIG, SIGKILL)``: the kernel kills the worker when its parent dies;
* everywhere, a watchdog thread that ends the worker once it has been handed to another parent.

The signal is armed as early as possible: the parent puts its pid in :data:`ENV` while it starts
workers, and a new process that imports bayesdid and finds its parent's pid there arms it during
that import (:func:`arm_from_env`), long before the worker's heavy imports and its initializer.
Only importable standard-library modules are used here.

Linux sends the parent-death signal when the *thread* that started the worker ends, not only the
process. The pool's workers are started by the thread that submits (the sweep's main thread); a local
Dask cluster's by a thread of each worker's ``AsyncProcess`` in distributed, which lives as long as
that worker. Start workers from a thread that outlives them.
"""

from __future__ import annotations

import contextlib
import os
import sys
import threading
import time

__all__ = ["ENV", "parent_death_signal", "bind_to_parent", "arm_from_env", "workers_end_with_me"]

#: environment variable naming the pid whose direct children bind themselves to it
ENV = "BAYESDID_END_WITH_PID"


def parent_death_signal() -> bool:
    """Ask the kernel to SIGKILL this process when its parent dies (Linux); True if armed."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes
        import signal

        libc = ctypes.CDLL(None, use_errno=True)
        return libc.prctl(1, int(signal.SIGKILL), 0, 0, 0) == 0  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        return False


def bind_to_parent(parent_pid: int) -> None:
    """End this process when ``parent_pid``, its parent, ends: the parent-death signal and a watchdog.

    Exits at once when the parent is already gone (this process was handed to another parent).
    """
    parent_death_signal()
    if os.getppid() != parent_pid:
        os._exit(1)

    def watch():
        while True:
            time.sleep(1.0)
            if os.getppid() != parent_pid:
                os._exit(1)

    threading.Thread(target=watch, name="bayesdid-parent-watch", daemon=True).start()


def arm_from_env() -> None:
    """At import: arm the parent-death signal when this process is a direct child of the pid in
    :data:`ENV` (a worker being started). Other processes that inherit the variable are left alone."""
    pid = os.environ.get(ENV, "")
    if pid.isdigit() and os.getppid() == int(pid):
        parent_death_signal()


@contextlib.contextmanager
def workers_end_with_me():
    """While processes are started in this block, their import of bayesdid binds them to this process."""
    old = os.environ.get(ENV)
    os.environ[ENV] = str(os.getpid())
    try:
        yield
    finally:
        if old is None:
            os.environ.pop(ENV, None)
        else:
            os.environ[ENV] = old
