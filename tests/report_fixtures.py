"""Fake run folders for the report tests: the files a fit, the checks and a sweep write.

Invented numbers and invented place names (the Republic of Valmora of the demo); nothing here is
estimated. Real fits are used where the tests need them (the demo run of the browser test).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import xarray as xr

SCRIPT_NAME = "<script>alert(1)</script>"


def effect_block(median, lo, hi, *, p_lt=0.98, beyond=0.74, threshold=-0.05, measure="percent change"):
    return {
        "mean": median,
        "median": median,
        "sd": (hi - lo) / 3.3,
        "eti_90": [lo, hi],
        "eti_95": [lo - 0.01, hi + 0.01],
        "hdi_90": [lo, hi],
        "prob_gt_0": 1 - p_lt,
        "prob_lt_0": p_lt,
        "threshold": threshold,
        "prob_beyond_threshold": beyond,
        "measure": measure,
    }


def fake_summary(kind: str = "clear", *, adopters=("Norvale", "Kestrel Bay"), percent: bool = True) -> dict:
    """A summary.json as `bayesdid fit` writes it; kind is 'clear', 'null' or 'failed'."""
    if kind == "null":
        e = effect_block(-0.01, -0.06, 0.04, p_lt=0.62, beyond=0.18)
    else:
        e = effect_block(-0.07, -0.12, -0.02, p_lt=0.98, beyond=0.74)
    model = effect_block(
        float(np.log1p(e["median"])),
        float(np.log1p(e["eti_90"][0])),
        float(np.log1p(e["eti_90"][1])),
        p_lt=e["prob_lt_0"],
        beyond=e["prob_beyond_threshold"],
        threshold=float(np.log1p(-0.05)),
        measure="difference in log outcome",
    )
    ok = kind != "failed"
    diag = {
        "rhat_max": 1.003 if ok else 1.08,
        "ess_bulk_min": 900.0 if ok else 95.0,
        "ess_tail_min": 850.0 if ok else 110.0,
        "divergences": 0 if ok else 7,
        "thresholds": {
            "rhat_max": 1.01,
            "ess_bulk_min": 400,
            "ess_tail_min": 400,
            "divergences": 0,
            "source": "Vehtari et al. (2021), Bayesian Analysis 16(2)",
        },
        "ok": ok,
        "problems": [] if ok else ["R-hat 1.080 >= 1.01 (worst: tau)", "7 divergent transitions"],
        "advice": "" if ok else "R-hat 1.080 >= 1.01 (worst: tau); 7 divergent transitions. Run more draws.",
    }
    per = []
    for i, a in enumerate(adopters):
        row = {"adopter": a, "start": f"2024Q{3 + i}", "weight": 1 / len(adopters), **model}
        row["percent"] = dict(e)
        per.append(row)
    out = {
        "title": "Valmora copay cap (test run)",
        "effect": model,
        "per_adopter": per,
        "least_squares": {"estimate": -0.081, "regressors": 120, "cells": 240, "method": "OLS with fixed effects"},
        "diagnostics": diag,
        "data": {
            "rows": 12000,
            "cells": 240,
            "jurisdictions": 10,
            "adopters": list(adopters),
            "starts": {a: f"2024Q{3 + i}" for i, a in enumerate(adopters)},
            "periods": 12,
            "groups": ["none", "chronic"],
            "design": "DDD",
        },
        "priors": {"effect": {"scale": 0.9, "source": "data-scaled", "meaning": "sd of the prior on tau"}},
        "timing": {"collapse_s": 0.1, "compile_s": 40.0, "sample_s": 2.0},
        "model": {"family": "gaussian", "log_outcome": True, "design": "DDD", "likelihood": "exact on cells"},
        "notes": [],
    }
    if percent:
        out["effect_percent"] = e
    else:
        out["effect"] = effect_block(-0.7, -1.2, -0.2, measure="difference in outcome", threshold=-0.5)
    return out


def write_fake_run(
    root: Path, *, kind="clear", adopters=("Norvale", "Kestrel Bay"), full_crosscheck=True, title=None
) -> Path:
    """A run folder with summary.json, manifest.json and posterior.nc, as a fit writes them.

    Checks and sweeps are never typed by hand here: tests that need them use the folders the real
    commands write (the ``e2e_run`` fixture, tests/e2e_runs.py).
    """
    root = Path(root)
    root.mkdir(parents=True, exist_ok=True)
    s = fake_summary(kind, adopters=adopters)
    if title is not None:
        s["title"] = title
    s["sensitivity"] = {
        "parameters": {"tau": {"prior": 0.012, "likelihood": 0.094, "diagnosis": "no prior-data conflict"}}
    }
    if full_crosscheck:
        s["least_squares"].update(
            {
                "se_classical": 0.02,
                "se_hc1": 0.025,
                "se_cr1": 0.015,
                "p_cr1": 0.001,
                "ci_wild_95": [-0.16, 0.01],
                "p_wild": 0.09,
                "p_permutation": 0.12,
                "clusters": 10,
                "treated_clusters": len(adopters),
                "advice": "Few treated clusters: read the permutation p-value and the posterior.",
            }
        )
    (root / "summary.json").write_text(json.dumps(s, indent=1), encoding="utf-8")
    manifest = {
        "created": "2026-12-02T00:00:00Z",
        "seed": 7,
        "sampler": {"chains": 2, "draws": 100},
        "table": "enrollees.csv",
        "data_sha256": "0" * 64,
        "command": ["bayesdid", "fit"],
        "versions": {"bayesdid": "0.1.0"},
        "study": {
            "data": {"outcome": "oop_spend", "jurisdiction": "region", "period": "quarter", "group": "condition"}
        },
    }
    (root / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    rng = np.random.default_rng(11)
    att = rng.normal(s["effect"]["median"], 0.03, size=(2, 200))
    post = xr.Dataset({"att": (("chain", "draw"), att)}, coords={"chain": [0, 1], "draw": np.arange(200)})
    xr.DataTree.from_dict({"posterior": post}).to_netcdf(root / "posterior.nc", engine="h5netcdf")
    return root
