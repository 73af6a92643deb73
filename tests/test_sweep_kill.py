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
    rows = [
        (j, g, t, float(rng.normal(10 + (g == "target") - 0.5 * (j == "Arvel" and g == "target" and t >= 3), 1)))
        for j in names
        for g in ("other", "target")
        for t in range(1, 5)
        for _ in range(2)
    ]
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
    sweep.write_text(
        'study = "study.toml"\n[sampler]\nchains = 1\ndraws = 20\ntune = 20\nseed = 1\n[priors]\neffect = [0.3]\n'
    )
    return sweep


@pytest.mark.slow
@pytest.mark.parametrize("where", [[], ["--cluster", "local"]], ids=["pool", "dask-local"])
def test_sigkill_of_the_main_process_takes_the_workers_along_and_the_rerun_completes(tmp_path, where):
    sweep = _write_case(tmp_path)
    out = tmp_path / "out"
    cmd = [
        sys.executable,
        "-m",
        "bayesdid.cli",
        "sweep",
        str(sweep),
        "--out",
        str(out),
        "--workers",
        "2",
        *where,
        "--quiet",
    ]
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
    workers: set[int] = set()
    try:
        deadline = time.time() + 180
        # the pool's workers; a local Dask cluster's workers and multiprocessing's resource tracker
        while time.time() < deadline and len(_children(proc.pid)) < 2 + bool(where):
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
    rerun = subprocess.run(cmd[:7] + ["--serial", "--quiet"], capture_output=True, text=True, timeout=900)
    assert rerun.returncode == 0, rerun.stderr
    assert "2 of 2 variant(s) done" in rerun.stdout
    assert not (out / ".sweep.lock").exists() and not (out / ".staging").exists()
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
    rows = pd.read_csv(out / "summary.csv")
    assert list(rows["status"]) == ["done", "done"]


def test_lock_of_a_dead_or_reused_pid_is_stale_and_a_live_one_refuses(tmp_path):
    from bayesdid.errors import SweepError
    from bayesdid.outputs import process_start
    from bayesdid.sweep.resume import _Lock

    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    pid = int(dead.stdout)
    lock = tmp_path / ".sweep.lock"
    for body in (
        str(pid),
        json.dumps({"owner": owner_tag(pid)}),  # a dead owner (old and new formats)
        json.dumps({"owner": owner_tag(os.getppid()), "start": "1"}),
    ):  # a live pid, another start time
        lock.write_text(body)
        with _Lock(tmp_path):
            assert json.loads(lock.read_text())["owner"] == owner_tag()
        assert not lock.exists()
    lock.write_text(json.dumps({"owner": owner_tag(os.getppid()), "start": process_start(os.getppid())}))
    with pytest.raises(SweepError, match=rf"another sweep \(process {os.getppid()}\) is writing"):
        with _Lock(tmp_path):
            pass
    assert json.loads(lock.read_text())["owner"] == owner_tag(os.getppid())  # left as it was


# ---- an external Dask cluster: its workers stay (they are the cluster's); the sweep's work on them stops ----
def _wait_file(path: Path, seconds: float) -> None:
    end = time.time() + seconds
    while not path.exists():
        assert time.time() < end, f"{path} did not appear"
        time.sleep(0.2)


@pytest.mark.slow
def test_sigkill_of_a_sweep_on_an_external_cluster_stops_its_work_there(tmp_path):
    """A scheduler and one worker started here stand for someone's cluster. A first sweep warms the
    worker (it compiles the model once and keeps it); a second sweep with many draws is killed while
    its variant samples: within a few seconds the worker runs nothing for it, the worker itself lives
    on, and a rerun of the killed sweep on the same cluster completes."""
    from distributed import Client

    bin_dir = Path(sys.executable).parent
    sched_file = tmp_path / "scheduler.json"
    logs = open(tmp_path / "cluster.log", "w")
    started = [
        subprocess.Popen(
            [
                bin_dir / "dask",
                "scheduler",
                "--host",
                "127.0.0.1",
                "--port",
                "0",
                "--no-dashboard",
                "--scheduler-file",
                str(sched_file),
            ],
            stdout=logs,
            stderr=logs,
            start_new_session=True,
        )
    ]
    observer = None
    try:
        _wait_file(sched_file, 60)
        time.sleep(0.5)
        address = json.loads(sched_file.read_text())["address"]
        started.append(
            subprocess.Popen(
                [
                    bin_dir / "dask",
                    "worker",
                    address,
                    "--nthreads",
                    "1",
                    "--nworkers",
                    "1",
                    "--no-dashboard",
                    "--no-nanny",
                ],
                stdout=logs,
                stderr=logs,
                start_new_session=True,
            )
        )
        observer = Client(address, timeout="60s")
        observer.wait_for_workers(1, timeout=60)

        def running() -> int:
            return sum(observer.run(lambda dask_worker: len(dask_worker.state.executing)).values())

        sweep = _write_case(tmp_path)
        base = [sys.executable, "-m", "bayesdid.cli", "sweep"]
        warm = subprocess.run(
            base + [str(sweep), "--out", str(tmp_path / "warm"), "--cluster", address, "--quiet"],
            capture_output=True,
            text=True,
            timeout=900,
        )
        assert warm.returncode == 0, warm.stderr
        long = tmp_path / "long.toml"
        long.write_text(sweep.read_text().replace("draws = 20\n", "draws = 20000\n"))
        out = tmp_path / "out"
        cmd = base + [str(long), "--out", str(out), "--cluster", address, "--quiet"]
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
        end = time.time() + 300
        while running() < 1:
            assert time.time() < end and proc.poll() is None, "the sweep's variant never started on the worker"
            time.sleep(0.2)
        time.sleep(3.0)  # the compiled model is the worker's already: the variant is sampling
        assert running() == 1 and proc.poll() is None
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        killed_at = time.time()
        while running() and time.time() - killed_at < 60:
            time.sleep(0.1)
        lasted = time.time() - killed_at
        assert lasted < 5.0, f"the killed sweep's variant ran on for {lasted:.1f} s"
        assert all(p.poll() is None for p in started), "the cluster's own processes must live on"
        assert json.loads((out / ".sweep.lock").read_text())["owner"] == owner_tag(proc.pid)
        rerun = subprocess.run(cmd, capture_output=True, text=True, timeout=900)
        assert rerun.returncode == 0, rerun.stderr
        assert "2 of 2 variant(s) done" in rerun.stdout
        assert not [p.name for p in out.iterdir() if p.name.startswith(".")]
    finally:
        if observer is not None:
            observer.close()
        for p in reversed(started):  # only what this test started
            p.send_signal(signal.SIGTERM)
        for p in reversed(started):
            try:
                p.wait(30)
            except subprocess.TimeoutExpired:
                p.kill()
        logs.close()


def _until_stopped(seconds: float) -> str:
    """A task that does nothing but look, as sampling does, whether it is still wanted."""
    from bayesdid.sample import _stop_if_asked

    end = time.time() + seconds
    while time.time() < end:
        _stop_if_asked()
        time.sleep(0.05)
    return "ran to the end"


def test_a_task_dropped_by_the_scheduler_stops_even_when_its_sender_is_on_another_machine():
    """The process check cannot see a sender on another machine; the scheduler's release of the task
    (what a disconnected client causes) must stop it alone."""
    from distributed import Client, LocalCluster

    from bayesdid.on_dask import on_dask

    with (
        LocalCluster(
            n_workers=1, threads_per_worker=1, processes=False, dashboard_address=None, silence_logs=40
        ) as cluster,
        Client(cluster) as client,
    ):
        far = {"owner": "some-other-machine-4242", "start": None}
        kept = client.submit(on_dask, _until_stopped, 1.0, far, pure=False)
        assert kept.result(timeout=30) == "ran to the end"  # not stopped while wanted
        fut = client.submit(on_dask, _until_stopped, 60.0, far, pure=False)
        (worker,) = cluster.workers.values()
        end = time.time() + 30
        while not worker.state.executing:
            assert time.time() < end
            time.sleep(0.05)
        client.cancel(fut)
        t0 = time.time()
        while worker.state.executing and time.time() - t0 < 30:
            time.sleep(0.05)
        assert time.time() - t0 < 3.0, "the dropped task kept running"


def test_no_compile_starts_once_the_work_is_no_longer_wanted(tmp_path):
    from bayesdid import sample
    from bayesdid.cells import collapse
    from bayesdid.data import read_table
    from bayesdid.study import load_study

    _write_case(tmp_path)
    study = load_study(tmp_path / "study.toml")
    cells = collapse(study, read_table(study.table))
    before = sample.COMPILES["count"]
    kept = dict(sample._CACHE)  # other tests' compiled models stay theirs
    sample._CACHE.clear()
    try:
        with sample.stop_when(lambda: True), pytest.raises(sample.Stopped, match="the process that asked"):
            sample.fit_cells(cells, {}, study.sampler)
    finally:
        sample._CACHE.update(kept)
    assert sample.COMPILES["count"] == before
    assert getattr(sample._STOP, "check", None) is None  # the block leaves no check behind
