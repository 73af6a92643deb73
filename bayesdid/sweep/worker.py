"""One variant, run in a worker: the cells collapsed once per worker, the fit and its folder."""

from __future__ import annotations

import os
import shutil
import time
from dataclasses import replace
from pathlib import Path

import numpy as np

from ..study import Study, _parse, study_to_dict
from ..version import __version__
from .spec import _plain_json

# ---- one variant (runs in a worker) ----------------------------------------------------------
_CELLS: dict = {}


def _cells_for(study: Study):
    """Collapse once per worker per (table, roles, outcome, options); the frame read once per table."""
    from ..cells import collapse
    from ..data import read_table

    key = _plain_json({k: v for k, v in study_to_dict(study).items() if k in ("data", "policy", "model")})
    if key not in _CELLS:
        fkey = ("frame", str(study.table))
        if fkey not in _CELLS:
            _CELLS[fkey] = read_table(study.table)
        _CELLS[key] = collapse(study, _CELLS[fkey])
    return _CELLS[key]


def run_variant(task: dict) -> dict:
    """Fit one variant and write its folder; return a record (never raises).

    ``task``: id, label, raw (resolved study), base_dir, drop, folder, staging, data_sha256.
    The folder is written under ``staging`` (atomically, by :func:`bayesdid.run.write_run`), gets its
    ``variant.json`` last, and is renamed to ``folder`` only when complete.
    """
    from .. import sample
    from ..crosscheck import least_squares_estimate
    from ..run import analyse, dump_json, write_run

    t0 = time.perf_counter()
    before, loads_before = sample.COMPILES["count"], sample.LOADS["count"]
    rec = {"id": task["id"], "label": task["label"], "pid": os.getpid()}
    try:
        study = _parse(task["raw"], Path(task["base_dir"]))
        cells = _cells_for(study)
        base_cells = cells
        drop = task.get("drop") or []
        if drop:
            idx = [cells.jurisdictions.index(c) for c in drop]
            w = cells.jt_weight().copy()
            w[idx, :] = 0.0
            cells = cells.with_weight(w)
        ls_key = ("least_squares", id(base_cells), tuple(drop))
        if ls_key not in _CELLS:  # the cross-check depends on the cells only: once per data set
            lcells = cells
            if drop:
                keep = np.ones(cells.shape, dtype=bool)
                keep[idx] = False
                lcells = replace(
                    cells,
                    n=cells.n * keep,
                    sum_y=cells.sum_y * keep,
                    sum_y2=cells.sum_y2 * keep,
                    ss=cells.ss * keep,
                    weight=None,
                )
            _CELLS[ls_key] = least_squares_estimate(lcells)
        an = analyse(study, cells=cells, least_squares=_CELLS[ls_key])
        an.data_sha256 = task["data_sha256"]
        if drop:
            an.notes.append(
                f"comparison jurisdiction(s) left out (weight 0 in the likelihood, removed from "
                f"the least-squares cross-check): {', '.join(drop)}"
            )
        staging = Path(task["staging"])
        if staging.exists():
            shutil.rmtree(staging)
        write_run(an, staging, argv=["bayesdid", "sweep", task["id"]])
        info = {
            "id": task["id"],
            "label": task["label"],
            "overrides": task["overrides"],
            "seed": task["seed"],
            "status": "done",
            "bayesdid": __version__,
            "pid": os.getpid(),
            "compiles_in_this_run": sample.COMPILES["count"] - before,
            "seconds": time.perf_counter() - t0,
        }
        dump_json(info, staging / "variant.json")
        folder = Path(task["folder"])
        if folder.exists():  # a broken earlier copy: swap it out only now that the new one is complete
            shutil.rmtree(folder)
        os.replace(staging, folder)
        rec.update(status="done", seconds=info["seconds"])
    except Exception as exc:  # recorded; one failing variant does not stop the others
        rec.update(status="failed", error=f"{type(exc).__name__}: {exc}", seconds=time.perf_counter() - t0)
    rec["compiles"] = sample.COMPILES["count"] - before
    rec["compiles_total"] = sample.COMPILES["count"]
    rec["loads"] = sample.LOADS["count"] - loads_before  # from the compile cache on disk
    return rec
