"""Progress of long work: one line per step off a terminal, a redrawn bar with time left on one."""

from __future__ import annotations

import io

from bayesdid import progress as prog
from bayesdid.progress import Progress, duration


def test_lines_off_a_terminal_count_steps_and_time_left(monkeypatch):
    clock = iter([0.0, 10.0, 30.0, 40.0, 50.0])
    monkeypatch.setattr(prog.time, "perf_counter", lambda: next(clock))
    lines = []
    p = Progress("placebo in space", 3, log=lines.append, tty=False)  # t0 = 0
    for name in ("Aldmoor", "Brisk Hollow", "Caskwater"):
        p.step(name)
    # after 1 step at t = 10: 10 s per step, 2 left -> 20 s; after 2 steps at t = 30: 15 s per step, 1 left
    assert lines[0] == "placebo in space 1/3 Aldmoor, about 20s left"
    assert lines[1] == "placebo in space 2/3 Brisk Hollow, about 15s left"
    assert lines[2] == "placebo in space 3/3 Caskwater, 50s in all"


def test_a_terminal_gets_one_redrawn_bar_and_a_final_newline():
    s = io.StringIO()
    p = Progress("checks", 2, log=lambda m: None, stream=s, tty=True, width=10)
    p.step("event_time: ok")
    p.step("pretrend: flag")
    text = s.getvalue()
    assert text.count("\r") == 2 and text.endswith("\n") and text.count("\n") == 1
    assert "[#####.....] 1/2 event_time: ok" in text and "[##########] 2/2 pretrend: flag" in text


def test_silent_without_a_log_and_durations_read_well():
    s = io.StringIO()
    Progress("x", 1, stream=s, tty=True).step()
    assert s.getvalue() == ""
    assert [duration(v) for v in (4.4, 185, 3720)] == ["4s", "3m05s", "1h02m"]
