"""`bayesdid bench panel`: posterior coverage with unit fixed effects on a panel with large unit effects.

Invented balanced panel from the calibration scenario ``did`` (31 jurisdictions, one adopter starting
in the 5th of 8 periods, gap noise sd 0.2, residual sd 1): every cell holds the same 12 units in each
period, and each unit carries a persistent effect of sd 2 (twice the residual sd). Per rep the rows
are fitted with ``data.unit`` and, every fourth rep, also without (pooled); both are scored against the
true ATT. Prints one JSON line: coverage shares with Monte Carlo standard errors sqrt(p(1 - p)/reps),
median 95% widths (the unit role should be narrower), biases.
"""

from __future__ import annotations

import json
import math
import sys
import time

import numpy as np

from ..cells import collapse
from ..effects import att_weights
from ..model.terms import resolve_scales
from ..sample import fit_cells
from ..simulate import Scenario, simulate
from ..study import PriorScales, SamplerSettings, make_study

__all__ = ["bench_panel", "panel_rows"]

UNITS_PER_CELL, UNIT_SD = 12, 2.0


def panel_rows(seed: int):
    """Invented panel rows (one per unit and period) and the true ATT."""
    sc = Scenario(
        jurisdictions=31,
        periods=8,
        groups=1,
        starts={0: 4},
        rows_per_cell=UNITS_PER_CELL,
        fixed_cells=True,
        tau=-0.2,
        gap_sd=0.2,
        shock_sd=0.1,
        residual_sd=1.0,
    )
    frame, truth = simulate(sc, seed)
    # rows come cell by cell (jurisdiction-major, then period), UNITS_PER_CELL rows each: the k-th row
    # of every period of a jurisdiction is the same unit
    k = np.arange(len(frame)) % UNITS_PER_CELL
    frame["person"] = frame["region"].astype(str) + "#" + k.astype(str)
    rng = np.random.default_rng([seed, 2])
    codes, uniq = np.unique(frame["person"].to_numpy(), return_inverse=True)
    frame["y"] = frame["y"] + UNIT_SD * rng.standard_normal(len(codes))[uniq]
    return frame, truth["starts"], truth["tau"]


def bench_panel(
    *,
    quick: bool = False,
    reps: int | None = None,
    seed: int = 20261204,
    draws: int | None = None,
    tune: int | None = None,
    **_ignored,
) -> dict:
    reps = reps if reps is not None else (4 if quick else 200)
    settings = dict(chains=2, draws=draws or (200 if quick else 500), tune=tune or (200 if quick else 500))
    t0 = time.perf_counter()
    out = {"unit": [], "pooled": []}
    for r in range(reps):
        frame, starts, truth = panel_rows(int(np.random.SeedSequence([seed, r]).generate_state(1)[0]))
        for kind in out if r % 4 == 0 else ("unit",):
            study = make_study(
                table="invented.csv",
                outcome="y",
                jurisdiction="region",
                period="period",
                adopters=starts,
                unit="person" if kind == "unit" else None,
            )
            cells = collapse(study, frame)
            scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
            fit = fit_cells(cells, scales, SamplerSettings(seed=2000 + r, **settings))
            att = fit.draws("tau_adopter") @ att_weights(cells)
            lo, hi = np.quantile(att, [0.025, 0.975])
            out[kind].append((lo <= truth <= hi, hi - lo, float(att.mean()) - truth))
            # one line per fit on stderr: a long run cut short still tells its reps
            print(
                json.dumps(
                    {
                        "rep": r,
                        "kind": kind,
                        "cover_95": bool(lo <= truth <= hi),
                        "width_95": float(hi - lo),
                        "error": float(att.mean()) - truth,
                    }
                ),
                file=sys.stderr,
                flush=True,
            )
    line = {"benchmark": "panel", "reps": reps, "pooled_reps": len(out["pooled"]), "draws": settings["draws"]}
    for kind, rows in out.items():
        p = float(np.mean([c for c, _, _ in rows]))
        line[f"{kind}_cover_95"] = p
        line[f"{kind}_cover_95_mcse"] = round(math.sqrt(p * (1 - p) / len(rows)), 4)
        line[f"{kind}_width_95_median"] = float(np.median([w for _, w, _ in rows]))
        line[f"{kind}_bias"] = float(np.mean([b for _, _, b in rows]))
    line["wall_s"] = round(time.perf_counter() - t0, 1)
    return line
