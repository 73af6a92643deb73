"""Benchmark: a sweep of prior variants of the demo against one fit of it.

Every timing is the wall time of a fresh ``bayesdid`` process, so each includes what a user waits
for: start-up, the compile (once per worker process), sampling and writing. Measured in one run:

* ``fit``: ``bayesdid fit`` of the demo (case_files/copay_cap, its own sampler settings);
* ``sweep_serial``: ``bayesdid sweep --serial`` of N prior variants (N = 12: base + 11 grid points);
* ``sweep_pool``: the same sweep on the default local pool of 2 workers;
* ``sweep_dask``: the same sweep on a 2-worker Dask LocalCluster on 127.0.0.1.

Reported as ratios to ``fit``; the target is at most 2.5 for 12 variants on a 2-core machine.
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

__all__ = ["bench_sweep"]


def _run(args, env) -> float:
    t0 = time.perf_counter()
    r = subprocess.run([sys.executable, "-m", "bayesdid.cli", *args], env=env, capture_output=True, text=True)
    dt = time.perf_counter() - t0
    if r.returncode != 0:
        raise RuntimeError(f"bayesdid {' '.join(args)} failed ({r.returncode}): {r.stderr[-2000:]}")
    return dt


def bench_sweep(*, quick: bool = False, variants: int | None = None) -> dict:
    root = Path(__file__).resolve().parents[2]
    study = root / "case_files" / "copay_cap" / "study.toml"
    n = variants or (4 if quick else 12)
    # base + (n - 1) grid points: prior scale of the effect x spread across adopters
    effects = [0.1, 0.3, 1.0, 3.0] if n > 4 else [0.3, 3.0]
    spreads = [0.05, 0.1, 0.4] if n > 4 else [0.1]
    points = [(e, s) for e in effects for s in spreads][: n - 1]
    samp = "[sampler]\ndraws = 300\ntune = 300\n" if quick else ""
    lines = [f'study = "{study}"', samp]
    lines += [
        f'[[variant]]\nlabel = "effect={e}, adopter_spread={s}"\npriors = {{ effect = {e}, adopter_spread = {s} }}'
        for e, s in points
    ]
    env = dict(os.environ)
    env["PYTHONPATH"] = str(root) + os.pathsep + env.get("PYTHONPATH", "")
    with tempfile.TemporaryDirectory(prefix="bayesdid-bench-sweep-") as tmp:
        tmp = Path(tmp)
        sw = tmp / "sweep.toml"
        sw.write_text("\n".join(lines) + "\n")
        fit_args = ["fit", str(study), "--out", str(tmp / "fit"), "--quiet"]
        if quick:
            fit_args += ["--draws", "300", "--tune", "300"]
        t_fit = _run(fit_args, env)
        t_serial = _run(["sweep", str(sw), "--out", str(tmp / "serial"), "--serial", "--quiet"], env)
        t_pool = _run(["sweep", str(sw), "--out", str(tmp / "pool"), "--workers", "2", "--quiet"], env)
        t_dask = _run(
            ["sweep", str(sw), "--out", str(tmp / "dask"), "--workers", "2", "--cluster", "local", "--quiet"], env
        )
    return {
        "benchmark": "sweep",
        "variants": n,
        "quick": quick,
        "cpus": os.cpu_count(),
        "load_avg_1min": os.getloadavg()[0],
        "fit_s": round(t_fit, 2),
        "ratio_serial_to_fit": round(t_serial / t_fit, 3),
        "ratio_pool2_to_fit": round(t_pool / t_fit, 3),
        "ratio_dask2_to_fit": round(t_dask / t_fit, 3),
        "target_ratio": 2.5,
    }
