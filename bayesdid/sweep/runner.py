"""Running a sweep: the variants still to run, the executor, the progress bar and the tables after each variant."""

from __future__ import annotations

import shutil
import time
from pathlib import Path

from ..errors import SweepError
from ..progress import Progress
from .executors import EXECUTORS
from .resume import _Lock, _rows_now, check_sweep_folder, read_results, variant_is_complete
from .spec import SweepPlan, load_sweep
from .tables import _write_tables


def run_sweep(
    plan: SweepPlan | str | Path,
    out: str | Path,
    *,
    executor: str = "pool",
    workers: int = 2,
    cluster: str | None = None,
    progress: bool = False,
    log=None,
) -> dict:
    """Run every variant that is not already complete in ``out``; write the tables; return a report.

    Parameters
    ----------
    plan : SweepPlan or path of a sweep file
    out : folder of the sweep's results (created; reused on a rerun)
    executor : 'serial' (in this process), 'pool' (local process pool, the default) or 'dask'
    workers : processes of the pool or of a local Dask cluster
    cluster : for 'dask', a scheduler address or 'local' (a LocalCluster on 127.0.0.1)

    Returns
    -------
    dict with ``ran``, ``skipped``, ``failed`` (id -> error), ``compiles`` (pid -> compiles),
    ``rows`` (summary.csv as dicts), ``verdict`` and ``seconds``.
    """
    say = log or (lambda m: None)
    if not isinstance(plan, SweepPlan):
        plan = load_sweep(plan)
    if executor not in EXECUTORS:
        raise SweepError(f"unknown executor '{executor}'; choose one of {sorted(EXECUTORS)}.")
    if executor == "dask" and not cluster:
        raise SweepError("the Dask executor needs --cluster: a scheduler address (tcp://host:8786) or 'local'.")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise SweepError(f"--workers: expected a whole number of at least 1, found {workers!r}.")
    out = check_sweep_folder(out)
    t0 = time.perf_counter()
    (out / "variants").mkdir(parents=True, exist_ok=True)
    with _Lock(out):
        staging = out / ".staging"
        shutil.rmtree(staging, ignore_errors=True)  # leftovers of a killed run
        for p in (out / "variants").glob(".*"):
            shutil.rmtree(p, ignore_errors=True)
        # half-written tables (outputs.atomic_write; .tmp- from earlier versions): only the lock's owner writes them
        for p in [*out.glob(".*.tmp-*"), *out.glob(".*.partial-*")]:
            if p.is_file():
                p.unlink(missing_ok=True)
        staging.mkdir()
        todo, skipped = [], []
        for v in plan.variants:
            folder = out / "variants" / v.id
            if variant_is_complete(folder, v.id):
                skipped.append(v.id)
                continue
            todo.append(
                {
                    "id": v.id,
                    "label": v.label,
                    "raw": v.raw,
                    "base_dir": str(plan.base.table.parent),
                    "drop": v.overrides.get("drop", []),
                    "overrides": v.overrides,
                    "seed": v.seed,
                    "folder": str(folder.resolve()),
                    "staging": str((staging / v.id).resolve()),
                    "data_sha256": plan.data_sha256[str(Path(v.raw["data"]["table"]))],
                }
            )
        say(
            f"{len(plan.variants)} variant(s): {len(skipped)} already done, {len(todo)} to run "
            f"({executor}{'' if executor == 'serial' else f', {workers} worker(s)'})"
        )
        meta = {
            "executor": executor,
            "workers": workers if executor != "serial" else 1,
            "cluster": cluster,
            "compiles_per_worker": {},
            "cache_loads_per_worker": {},
            "last_run": {"ran": [], "skipped": skipped},
        }
        failed, compiles, loads = {}, {}, {}
        # a bar with counts and time left on a terminal, one line per variant otherwise (bayesdid.progress)
        bar = Progress(f"variants ({len(skipped)} already done)", len(todo), log=(say if progress else None))
        rows = read_results(out, plan)
        if todo:
            for rec in EXECUTORS[executor](todo, workers, cluster):
                compiles[str(rec["pid"])] = compiles.get(str(rec["pid"]), 0) + rec["compiles"]
                loads[str(rec["pid"])] = loads.get(str(rec["pid"]), 0) + rec.get("loads", 0)
                meta["last_run"]["ran"].append(rec["id"])
                if rec["status"] == "failed":
                    failed[rec["id"]] = rec["error"]
                    say(f"variant {rec['id']} ({rec['label']}) failed: {rec['error']}")
                meta["compiles_per_worker"] = compiles
                meta["cache_loads_per_worker"] = loads
                rows = _rows_now(out, plan, failed)
                _write_tables(out, plan, rows, meta)
                bar.step(f"{rec['id']} {rec['status']}")
        rows = _rows_now(out, plan, failed)
        meta["seconds"] = time.perf_counter() - t0
        ver = _write_tables(out, plan, rows, meta)
        shutil.rmtree(staging, ignore_errors=True)
    return {
        "ran": meta["last_run"]["ran"],
        "skipped": skipped,
        "failed": failed,
        "compiles": compiles,
        "loads": loads,
        "rows": rows,
        "verdict": ver,
        "seconds": meta["seconds"],
        "out": str(out),
    }
