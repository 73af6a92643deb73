"""Benchmark ``plan``: assurance at the demo layout, 200 data sets at each of 5 effects.

``bayesdid bench plan`` runs ``bayesdid plan`` in a fresh process on the demo's layout
(``case_files/copay_cap/plan.toml`` without its ``[vary]`` grid: DDD, two adopters, 38 comparison
regions, 12 quarters, 45 rows per cell, effects 0, -5%, -10%, -15%, -20%) with the default 2 local
workers, and prints one JSON line: the wall time of the whole command against the target of 300 s,
how much of it the workers spent compiling (the numba compile is paid once per worker process; a
warm compile cache removes most of it), the fits run, and the median sampling time per fit. The
plan's decisions are printed too, so a speed-up that changes results shows. ``--quick`` is a smoke
run: 10 data sets.

The machine is shared: beside the wall time the bench prints the CPU seconds the command and its
workers used (``getrusage`` of the finished child tree) and the load average before and after. On a
saturated machine the wall time measures the neighbours; ``cpu_s / cpus`` is the wall time the same
work would take with the cores to itself (the work is parallel across the workers but for start-up).
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["bench_plan"]

TARGET_S = 300.0


def bench_plan(
    *, quick: bool = False, reps: int | None = None, workers: int = 2, cluster: str | None = None, **_ignored
) -> dict:
    root = Path(__file__).resolve().parents[2]
    src = (root / "case_files" / "copay_cap" / "plan.toml").read_text(encoding="utf-8")
    text = src.split("\n[vary]")[0] + "\n"  # the demo layout only ([vary] is the file's last section)
    n = reps or (10 if quick else 200)
    env = dict(os.environ)
    env["PYTHONPATH"] = str(root) + os.pathsep + env.get("PYTHONPATH", "")
    with tempfile.TemporaryDirectory(prefix="bayesdid-bench-plan-") as tmp:
        tmp = Path(tmp)
        (tmp / "plan.toml").write_text(text, encoding="utf-8")
        args = [
            sys.executable,
            "-m",
            "bayesdid.cli",
            "plan",
            str(tmp / "plan.toml"),
            "--out",
            str(tmp / "out"),
            "--reps",
            str(n),
            "--workers",
            str(workers),
            "--quiet",
        ]
        if cluster:
            args += ["--cluster", cluster]
        load0 = os.getloadavg()[0]
        cpu0 = resource.getrusage(resource.RUSAGE_CHILDREN)
        t0 = time.perf_counter()
        r = subprocess.run(args, env=env, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        cpu1 = resource.getrusage(resource.RUSAGE_CHILDREN)
        cpu = (cpu1.ru_utime - cpu0.ru_utime) + (cpu1.ru_stime - cpu0.ru_stime)
        if r.returncode != 0:
            raise RuntimeError(f"bayesdid plan failed ({r.returncode}): {r.stderr[-2000:]}")
        s = json.loads((tmp / "out" / "plan.json").read_text())
    run = s["run"]
    per_worker = max(1, len(run["compiles_per_worker"]))
    compile_wall = run["compile_s_total"] / per_worker  # workers compile in parallel
    return {
        "benchmark": "plan",
        "quick": quick,
        "reps": n,
        "effects": len(s["plan"]["effects"]),
        "data_sets_x_effects": n * len(s["plan"]["effects"]),
        "workers": workers,
        "cpus": os.cpu_count(),
        "load_avg_1min_before": round(load0, 2),
        "load_avg_1min_after": round(os.getloadavg()[0], 2),
        "method": s["plan"]["simulation"]["method"],
        "fits": run["fits_now"],
        "compiles_per_worker": run["compiles_per_worker"],
        "cache_loads_per_worker": run.get("cache_loads_per_worker"),
        "wall_s": round(wall, 1),
        "target_s": TARGET_S,
        "ratio_wall_to_target": round(wall / TARGET_S, 3),
        "cpu_s": round(cpu, 1),
        "ratio_cpu_per_core_to_target": round(cpu / min(workers, os.cpu_count() or 1) / TARGET_S, 3),
        "chains_draws_tune": [s["plan"]["simulation"][k] for k in ("chains", "draws", "tune")],
        "data_set_wall_s_median": run.get("data_set_wall_s_median"),
        "compile_s_per_worker": round(compile_wall, 1),
        "ratio_wall_without_compile_to_target": round((wall - compile_wall) / TARGET_S, 3),
        "sample_s_per_fit_median": run["sample_s_per_fit_median"],
        "assurance": {f"{r['effect']:g}": [r["assurance"], r["assurance_mcse"]] for r in s["assurance"]},
        "permutation_power": {f"{r['effect']:g}": r["permutation_power"] for r in s["assurance"]},
        # how far the short chains can move each assurance (compare with its MCSE): flip share, net shift
        "decision_noise": {
            f"{r['effect']:g}": [r.get("decision_flip_share"), r.get("decision_shift")] for r in s["assurance"]
        },
        "coverage_95": {f"{r['effect']:g}": r["coverage_95"] for r in s["assurance"]},
        "diagnostics_ok_share": min(r["diagnostics_ok_share"] for r in s["assurance"]),
    }
