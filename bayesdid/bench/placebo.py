"""Benchmark: placebo in space with one compiled model versus separate fresh fits.

Simulated DDD study (invented regions): 40 regions x 12 periods, one adopter, so 39 comparison
regions serve in turn as the fake adopter. Measured in one run:

* ``placebo_s``: :func:`bayesdid.checks.placebo_space_check` over the 39 placebos starting from a cold
  cache (one compile, then ``compiled.with_data`` for each placebo);
* ``fresh_fit_s``: a few placebo fits each from a cold cache (compile + sample), whose median is
  scaled to 39 fits (``fresh_total_est_s`` = 39 x median), because 39 real compiles would take most of an
  hour on this machine.

``ratio`` = placebo_s / fresh_total_est_s (target: at most 0.25).
"""

from __future__ import annotations

import time

import numpy as np

__all__ = ["bench_placebo"]


def bench_placebo(*, quick: bool = False, fresh: int | None = None) -> dict:
    from ..cells import collapse
    from ..checks.placebo import placebo_space_cells, placebo_space_check
    from ..model.terms import resolve_scales
    from ..sample import COMPILES, clear_cache, fit_cells
    from ..simulate import Scenario, simulate
    from ..study import SamplerSettings, make_study

    J, T = (12, 8) if quick else (40, 12)
    sc = Scenario(jurisdictions=J, periods=T, starts={0: T // 2}, rows_per_cell=50, tau=-0.1)
    frame, truth = simulate(sc, 2026)
    study = make_study(
        table="bench.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
    )
    cells = collapse(study, frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    settings = SamplerSettings(chains=2, draws=300 if quick else 500, tune=300 if quick else 500, seed=5)
    n_fresh = fresh or (1 if quick else 2)

    clear_cache()
    c0 = COMPILES["count"]
    t0 = time.perf_counter()
    res = placebo_space_check(cells, scales, settings, np.zeros(10))
    placebo_s = time.perf_counter() - t0
    compiles_placebo = COMPILES["count"] - c0
    n = res.details["n_placebos"]

    fresh_s, compile_s = [], []
    comps = [int(c) for c in cells.comparisons][:n_fresh]
    for c in comps:
        clear_cache()
        pc, _ = placebo_space_cells(cells, c)
        t1 = time.perf_counter()
        f = fit_cells(pc, scales, settings)
        fresh_s.append(time.perf_counter() - t1)
        compile_s.append(f.timing["compile_s"])
    clear_cache()
    est = n * float(np.median(fresh_s))
    return {
        "bench": "placebo",
        "quick": quick,
        "jurisdictions": J,
        "periods": T,
        "placebos": n,
        "compiles_for_placebos": compiles_placebo,
        "placebo_s": round(placebo_s, 2),
        "per_placebo_s": round(placebo_s / n, 3),
        "fresh_fits_timed": len(fresh_s),
        "fresh_fit_s": [round(v, 2) for v in fresh_s],
        "fresh_compile_s": [round(v, 2) for v in compile_s],
        "fresh_total_est_s": round(est, 1),
        "ratio": round(placebo_s / est, 4),
        "target_ratio": 0.25,
        "draws": settings.draws,
        "tune": settings.tune,
        "chains": settings.chains,
    }
