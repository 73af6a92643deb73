"""The calibration study: one rep by kind, the executors over reps, and the run of a scenario."""

from __future__ import annotations

import dataclasses
import json
import time
from pathlib import Path

import numpy as np

from ..errors import BayesDidError
from ..progress import Progress
from .coverage import _coverage_rep
from .sbc import _sbc_rep, sbc_prior
from .scenarios import _scenario
from .summary import coverage_table, sbc_table
from .tasks import SBC_DRAWS, RepTask


def run_rep(task: RepTask) -> dict:
    """Run one rep; never raises: a failure comes back as ``ok = False`` with the error text."""
    t0 = time.perf_counter()
    base = {
        "kind": task.kind,
        "scenario": task.scenario,
        "rep": task.rep,
        "data_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
    }
    try:
        with np.errstate(all="ignore"):
            row = _coverage_rep(task) if task.kind == "coverage" else _sbc_rep(task)
        return {**base, "ok": True, "error": "", **row, "wall_s": time.perf_counter() - t0}
    except Exception as exc:  # noqa: BLE001 - a failing rep is reported, not allowed to stop the study
        return {**base, "ok": False, "error": f"{type(exc).__name__}: {exc}", "wall_s": time.perf_counter() - t0}


def _rep_lost(task: RepTask, exc: BaseException) -> dict:
    return {
        "kind": task.kind,
        "scenario": task.scenario,
        "rep": task.rep,
        "data_seed": task.seeds[0],
        "sampler_seed": task.seeds[1],
        "ok": False,
        "wall_s": float("nan"),
        "error": f"the worker running this rep stopped: {type(exc).__name__}: {exc}",
    }


class _SweepExecutor:
    """The sweep's executors (``bayesdid.sweep.EXECUTORS``) for calibration reps: ``map`` yields the
    records as they complete (the study sorts them by kind and rep)."""

    def __init__(self, kind: str, workers: int, cluster: str | None):
        self.kind, self.workers, self.cluster = kind, workers, cluster
        self.name = {"serial": "in-process", "pool": f"process pool ({workers} workers)", "dask": f"dask ({cluster})"}[
            kind
        ]

    def map(self, fn, tasks):
        from ..sweep import EXECUTORS

        yield from EXECUTORS[self.kind](list(tasks), self.workers, self.cluster, fn=fn, lost=_rep_lost)

    def close(self):
        pass


def make_executor(workers: int = 2, cluster: str | None = None):
    """An object with ``map(fn, tasks) -> iterator of results as they complete`` and ``close()``.

    The sweep's executors: ``cluster`` (a Dask scheduler address, or "local" for a local Dask
    cluster of ``workers`` processes) wins; else ``workers`` = 1 runs in-process and more use the
    local process pool.
    """
    if not isinstance(workers, int) or isinstance(workers, bool) or workers < 1:
        raise BayesDidError(f"--workers: expected a whole number of at least 1, found {workers!r}.")
    if cluster:
        return _SweepExecutor("dask", workers, cluster)
    return _SweepExecutor("serial" if workers == 1 else "pool", workers, None)


def run_calibration(
    *,
    scenario: str = "one_adopter",
    reps: int = 200,
    sbc_reps: int | None = None,
    draws: int = 500,
    tune: int = 500,
    chains: int = 2,
    seed: int = 20261202,
    workers: int = 2,
    cluster: str | None = None,
    cross_check_draws: int = 999,
    progress_path: str | Path | None = None,
    log=None,
) -> dict:
    """Run the coverage and SBC reps of one scenario; return the summary and the per-rep rows.

    Returns
    -------
    dict
        ``summary`` (scenario, settings, ``coverage`` by method, ``sbc``, failures, timing) and
        ``rows`` (coverage reps) and ``sbc_rows``. With ``progress_path`` each rep's row is also
        appended to that file (JSON lines) as it arrives, so a long run that is stopped keeps its reps.
        With ``log`` (a function of one line) the reps show progress: a bar with counts and time left on
        a terminal, one line per rep otherwise (:mod:`bayesdid.progress`).
    """
    cs = _scenario(scenario)
    sbc_reps = reps if sbc_reps is None else sbc_reps
    for key, v, low in (
        ("--reps", reps, 1),
        ("--sbc-reps", sbc_reps, 0),
        ("--draws", draws, 100),
        ("--tune", tune, 50),
        ("--chains", chains, 1),
    ):
        if isinstance(v, bool) or not isinstance(v, int) or v < low:
            raise BayesDidError(f"{key}: expected a whole number of at least {low}, found {v!r}.")
    if (draws * chains) < SBC_DRAWS and sbc_reps:
        raise BayesDidError(f"--draws x --chains must be at least {SBC_DRAWS} for the SBC ranks.")
    prior = sbc_prior(scenario, seed) if sbc_reps else {}
    common = dict(
        scenario=scenario, base_seed=seed, draws=draws, tune=tune, chains=chains, cross_check_draws=cross_check_draws
    )
    tasks = [RepTask(kind="coverage", rep=i, **common) for i in range(reps)]
    tasks += [RepTask(kind="sbc", rep=i, sbc_prior=prior, **common) for i in range(sbc_reps)]
    ex = make_executor(workers, cluster)
    t0 = time.perf_counter()
    results = []
    jsonl = open(progress_path, "a", encoding="utf-8") if progress_path else None
    try:
        steps = Progress(f"calibration reps ({scenario})", len(tasks), log=log)
        for r in ex.map(run_rep, tasks):
            results.append(r)
            steps.step(f"{r['kind']} rep {r['rep']}" + ("" if r["ok"] else " failed"))
            if jsonl:
                jsonl.write(json.dumps(r, default=str) + "\n")
                jsonl.flush()
    finally:
        ex.close()
        if jsonl:
            jsonl.close()
    wall = time.perf_counter() - t0
    results.sort(key=lambda r: (r["kind"] != "coverage", r["rep"]))  # executors yield as reps complete
    rows = [r for r in results if r["kind"] == "coverage"]
    sbc_rows = [r for r in results if r["kind"] == "sbc"]
    failed = [{"kind": r["kind"], "rep": r["rep"], "error": r["error"]} for r in results if not r["ok"]]
    summary = {
        "scenario": scenario,
        "about": cs.about,
        "model_assumes": cs.model_assumes,
        "truth_tau": cs.scenario.tau,
        "scenario_parameters": dataclasses.asdict(cs.scenario),
        "reps": reps,
        "sbc_reps": sbc_reps,
        "failed": failed,
        "settings": {
            "draws": draws,
            "tune": tune,
            "chains": chains,
            "seed": seed,
            "cross_check_draws": cross_check_draws,
            "executor": ex.name,
        },
        "coverage": coverage_table(rows),
        "coverage_note": (
            "share of reps whose interval holds the true ATT; mcse = sqrt(p (1 - p) / N). "
            "Posterior: equal-tailed intervals of the ATT. cr1: estimate +- t(G-1) x CR1 se. wild "
            "and permutation: covered at level a when the test of the true effect has p >= 1 - a "
            "(restricted wild cluster bootstrap, Webb weights; placebo-in-space permutation)."
        ),
        "sbc": sbc_table(sbc_rows) if sbc_reps else {"reason": "not run (--sbc-reps 0)"},
        "sbc_prior": prior,
        "timing": {"wall_s": wall, "rep_wall_s_median": float(np.median([r["wall_s"] for r in results]))},
    }
    return {"summary": summary, "rows": rows, "sbc_rows": sbc_rows}
