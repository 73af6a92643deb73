"""A sweep whose main process is killed (SIGKILL) while its pool workers run: no worker outlives it by
more than a few seconds, the lock it leaves is recognised as stale, and the rerun completes.

The model is tiny (invented jurisdictions of Valmora, 4 x 2 x 4 cells, 1 chain of 20 draws) so that the
rerun's one compile stays short.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesdid.outputs import owner_tag

pytestmark = [pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")]

ROOT = Path(__file__).resolve().parent.parent


def _children(pid: int) -> set[int]:
    """Every live descendant of ``pid`` (from /proc)."""
    parent_of = {}
    for d in Path("/proc").iterdir():
        if d.name.isdigit():
            try:
                stat = (d / "stat").read_text()
            except OSError:
                continue
            fields = stat.rsplit(")", 1)[1].split()
            if fields[0] != "Z":
                parent_of[int(d.name)] = int(fields[1])
    out, frontier = set(), {pid}
    while frontier:
        frontier = {c for c, p in parent_of.items() if p in frontier} - out
        out |= frontier
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state != "Z"  # a zombie has ended; only its exit status waits to be collected


def _write_case(d: Path) -> Path:
    rng = np.random.default_rng(3)
    names = ["Arvel", "Brisa", "Corran", "Dunmere"]
    rows = [(j, g, t, float(rng.normal(10 + (g == "target") - 0.5 * (j == "Arvel" and g == "target" and t >= 3), 1)))
            for j in names for g in ("other", "target") for t in range(1, 5) for _ in range(2)]
    pd.DataFrame(rows, columns=["region", "group", "period", "y"]).to_csv(d / "table.csv", index=False)
    (d / "study.toml").write_text("""
[data]
table = "table.csv"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "group"
[policy]
target_group = "target"
adopters = { "Arvel" = 3 }
[crosscheck]
draws = 19
placebos = 3
""")
    sweep = d / "sweep.toml"
    sweep.write_text('study = "study.toml"\n[sampler]\nchains = 1\ndraws = 20\ntune = 20\nseed = 1\n'
                     "[priors]\neffect = [0.3]\n")
    return sweep


@pytest.mark.slow
def test_sigkill_of_the_main_process_takes_the_workers_along_and_the_rerun_completes(tmp_path):
    sweep = _write_case(tmp_path)
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "bayesdid.cli", "sweep", str(sweep), "--out", str(out), "--workers", "2", "--quiet"]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    workers: set[int] = set()
    try:
        deadline = time.time() + 180
        while time.time() < deadline and len([p for p in _children(proc.pid)]) < 2:
            assert proc.poll() is None, "the sweep ended before it could be killed"
            time.sleep(0.2)
        time.sleep(3.0)  # the workers are importing and compiling
        workers = _children(proc.pid)
        assert len(workers) >= 2, workers
        assert proc.poll() is None, "the sweep ended before it could be killed"
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        killed_at = time.time()
        while time.time() - killed_at < 10 and any(_alive(p) for p in workers):
            time.sleep(0.1)
        outlived = time.time() - killed_at
        survivors = [p for p in workers if _alive(p)]
    finally:
        for p in _children(proc.pid) | workers:  # only what this test started
            if _alive(p):
                os.kill(p, signal.SIGKILL)
    assert not survivors, f"worker(s) {survivors} outlived the killed sweep by {outlived:.1f} s"
    assert outlived < 5.0
    # what the killed sweep left: its lock, naming a dead owner
    lock = json.loads((out / ".sweep.lock").read_text())
    assert lock["owner"] == owner_tag(proc.pid)
    rerun = subprocess.run(cmd[:-3] + ["--serial", "--quiet"], capture_output=True, text=True, timeout=900)
    assert rerun.returncode == 0, rerun.stderr
    assert "2 of 2 variant(s) done" in rerun.stdout
    assert not (out / ".sweep.lock").exists() and not (out / ".staging").exists()
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
    rows = pd.read_csv(out / "summary.csv")
    assert list(rows["status"]) == ["done", "done"]


def test_lock_of_a_dead_or_reused_pid_is_stale_and_a_live_one_refuses(tmp_path):
    from bayesdid.errors import SweepError
    from bayesdid.outputs import process_start
    from bayesdid.sweep import _Lock

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    lock = tmp_path / ".sweep.lock"
    for body in (str(pid), json.dumps({"owner": owner_tag(pid)}),  # a dead owner (old and new formats)
                 json.dumps({"owner": owner_tag(os.getppid()), "start": "1"})):  # a live pid, another start time
        lock.write_text(body)
        with _Lock(tmp_path):
            assert json.loads(lock.read_text())["owner"] == owner_tag()
        assert not lock.exists()
    lock.write_text(json.dumps({"owner": owner_tag(os.getppid()), "start": process_start(os.getppid())}))
    with pytest.raises(SweepError, match=rf"another sweep \(process {os.getppid()}\) is writing"):
        with _Lock(tmp_path):
            pass
    assert json.loads(lock.read_text())["owner"] == owner_tag(os.getppid())  # left as it was
