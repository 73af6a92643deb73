"""Progress of long work: a bar with counts and time left on a terminal, one line per step otherwise.

``Progress("placebo in space", 38, log=say)`` then ``.step("Aldmoor")`` after each item. On a terminal
(stderr is a TTY) it redraws one line, ``bayesdid: placebo in space [#####.....] 19/38 Aldmoor, about
1m05s left``; elsewhere (a log file, a notebook, a CI job) it passes one line per step to ``log``.
Without ``log`` it is silent. The time left is the mean time per finished step times the steps left.
"""

from __future__ import annotations

import sys
import time

__all__ = ["Progress", "duration"]


def duration(seconds: float) -> str:
    """'45s', '3m05s', '1h02m'."""
    s = int(round(max(seconds, 0.0)))
    if s < 60:
        return f"{s}s"
    if s < 3600:
        return f"{s // 60}m{s % 60:02d}s"
    return f"{s // 3600}h{(s % 3600) // 60:02d}m"


class Progress:
    """Counts steps of one piece of work and shows them (see the module docstring)."""

    def __init__(self, label: str, total: int, *, log=None, stream=None, tty: bool | None = None, width: int = 24):
        self.label, self.total, self.done = label, int(total), 0
        self.log = log
        self.stream = stream or sys.stderr
        self.tty = (self.stream.isatty() if hasattr(self.stream, "isatty") else False) if tty is None else tty
        self.width = width
        self.t0 = time.perf_counter()

    def left(self) -> float | None:
        if self.done == 0:
            return None
        return (time.perf_counter() - self.t0) / self.done * (self.total - self.done)

    def line(self, note: str = "") -> str:
        left = self.left()
        tail = (
            f", about {duration(left)} left"
            if left is not None and self.done < self.total
            else (f", {duration(time.perf_counter() - self.t0)} in all" if self.done >= self.total else "")
        )
        return f"{self.label} {self.done}/{self.total}" + (f" {note}" if note else "") + tail

    def step(self, note: str = "") -> None:
        self.done += 1
        if self.log is None:
            return
        if self.tty:
            k = self.width * min(self.done, self.total) // max(self.total, 1)
            bar = "#" * k + "." * (self.width - k)
            left = self.left()
            eta = f", about {duration(left)} left" if left is not None and self.done < self.total else ""
            self.stream.write(f"\rbayesdid: {self.label} [{bar}] {self.done}/{self.total} {note}{eta}\033[K")
            if self.done >= self.total:
                self.stream.write("\n")
            self.stream.flush()
        else:
            self.log(self.line(note))
