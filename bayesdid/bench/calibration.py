"""Benchmark ``calibration``: coverage of the ATT intervals and simulation-based calibration of one scenario.

``bayesdid bench calibration --reps N --scenario NAME --out DIR`` simulates N data sets of the scenario
(invented, :data:`bayesdid.calibration.SCENARIOS`), fits each, runs the least-squares cross-check, and
runs N simulation-based-calibration reps (``--sbc-reps`` to change); writes calibration.json,
coverage_reps.csv, sbc_reps.csv and sbc_ranks.png into DIR atomically, and prints one JSON line of
the headline shares (coverage with Monte Carlo standard errors, SBC p-values). ``--quick`` is a smoke
run: 4 reps, 200 draws.
"""

from __future__ import annotations

import sys
from pathlib import Path

__all__ = ["bench_calibration"]


def bench_calibration(
    *,
    quick: bool = False,
    reps: int | None = None,
    scenario: str = "one_adopter",
    out: str | None = None,
    workers: int = 2,
    cluster: str | None = None,
    sbc_reps: int | None = None,
    draws: int | None = None,
    tune: int | None = None,
    seed: int = 20261202,
    replace: bool = False,
) -> dict:
    from ..calibration import run_calibration, write_calibration
    from ..calibration.scenarios import _scenario
    from ..run import atomic_folder

    _scenario(scenario)
    reps = reps if reps is not None else (4 if quick else 200)
    draws = draws if draws is not None else (200 if quick else 500)
    tune = tune if tune is not None else (200 if quick else 500)
    out = out or f"runs/calibration-{scenario}"
    atomic_folder(out, replace=replace, kind="calibration").check()  # refuse before any work, not after an hour
    target = Path(out)
    target.parent.mkdir(parents=True, exist_ok=True)
    progress = target.with_name(f".{target.name}.reps.jsonl")  # reps so far; removed once DIR is written
    progress.unlink(missing_ok=True)
    result = run_calibration(
        scenario=scenario,
        reps=reps,
        sbc_reps=sbc_reps,
        draws=draws,
        tune=tune,
        seed=seed,
        workers=workers,
        cluster=cluster,
        progress_path=progress,
        log=lambda m: print(f"bayesdid: {m}", file=sys.stderr, flush=True),  # a bar on a terminal
    )
    write_calibration(result, out, replace=replace)
    progress.unlink(missing_ok=True)
    s = result["summary"]
    cov = s["coverage"]
    line = {
        "benchmark": "calibration",
        "scenario": scenario,
        "reps": reps,
        "sbc_reps": s["sbc_reps"],
        "failed": len(s["failed"]),
        "out": str(Path(out)),
    }
    for m, res in cov.items():
        for lvl in ("50", "90", "95"):
            c = res.get(f"cover_{lvl}", {})
            line[f"{m}_cover_{lvl}"] = c.get("coverage")
            line[f"{m}_cover_{lvl}_mcse"] = c.get("mcse")
        w = res.get("width_95", {})
        line[f"{m}_width_95_median"] = w.get("median")
    line["posterior_bias"] = cov["posterior"].get("bias", {}).get("mean")
    line["ls_bias"] = cov["cr1"].get("bias", {}).get("mean")
    for name in ("tau", "sigma_gap", "rho", "omega"):
        line[f"sbc_{name}_p"] = s["sbc"].get(name, {}).get("p_value")
    line["wall_s"] = s["timing"]["wall_s"]
    return line
