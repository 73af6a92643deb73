"""Benchmark ``crosscheck``: the full least-squares cross-check on cells against statsmodels on rows.

Invented data (bayesdid.simulate): 2,000,000 rows, 40 jurisdictions, 12 periods, two groups, two
adopters with different starts (so 40 x 39 = 1,560 placebo assignments are possible and 999 are
sampled). bayesdid: collapse to cells once, then the full cross-check (estimate, classical, HC1 and
CR1 errors, 999 restricted wild bootstrap draws with the test-inversion interval, permutation);
the median of three runs.

The peer is statsmodels OLS on the rows with a full-rank dummy matrix (532 columns here) and its
"nonrobust", "HC1" and "cluster" covariances (one fit, then ``get_robustcov_results`` twice); it
does no bootstrap and no permutation. At 2,000,000 rows its dense design alone would take
2e6 x 532 x 8 bytes = 8.5 GB (and about as much again for the pseudo-inverse), too much for this
shared machine, so it is timed on two random subsamples (50,000 and 100,000 rows; 10,000 and
20,000 with ``--quick``) and extrapolated to the full row count along the straight line through
the two timings and in proportion to the larger one (its cost is linear in the rows: O(N p^2) for the
pseudo-inverse and the HC1 meat); the smaller of the two extrapolations enters the ratio.
Both sides run with one BLAS thread (the cross-check always does; on this shared 2-core machine a
multithreaded BLAS was measured many times slower for both under load).
"""

from __future__ import annotations

import math
import statistics
import time

import numpy as np

__all__ = ["bench_crosscheck"]


def _rows(n_rows: int, seed: int):
    from ..simulate import Scenario, simulate

    J, T, G = 40, 12, 2
    sc = Scenario(
        jurisdictions=J,
        periods=T,
        groups=G,
        starts={0: 6, 1: 8},
        rows_per_cell=math.ceil(n_rows / (J * G * T)),
        tau=-0.05,
        gap_sd=0.05,
        fixed_cells=True,
    )
    return simulate(sc, seed)


def _dummies(cells, frame):
    """Full-rank row dummies of the saturated DDD (plain numpy; the peer's input)."""
    jmap = {v: i for i, v in enumerate(cells.jurisdictions)}
    gmap = {v: i for i, v in enumerate(cells.groups)}
    tmap = {str(v): i for i, v in enumerate(cells.periods)}
    j = frame["region"].map(jmap).to_numpy(int)
    g = frame["group"].map(gmap).to_numpy(int)
    t = frame["period"].astype(str).map(tmap).to_numpy(int)
    J, G, T = cells.shape
    N = len(frame)
    X = np.zeros((N, J * G + J * (T - 1) + (T - 1) + 1))
    r = np.arange(N)
    X[r, j * G + g] = 1.0
    later = t >= 1
    X[r[later], J * G + j[later] * (T - 1) + t[later] - 1] = 1.0
    tg = later & (g == cells.target)
    X[r[tg], J * G + J * (T - 1) + t[tg] - 1] = 1.0
    X[:, -1] = (g == cells.target) & (t >= cells.start[j])
    return X, j


def _peer(cells, frame, n_sub: int, seed: int) -> tuple[float, float]:
    import statsmodels.api as sm

    rng = np.random.default_rng(seed)
    sub = frame.iloc[np.sort(rng.choice(len(frame), size=n_sub, replace=False))]
    t0 = time.perf_counter()
    X, j = _dummies(cells, sub)
    res = sm.OLS(sub["y"].to_numpy(float), X).fit()
    hc1 = res.get_robustcov_results("HC1")
    cl = res.get_robustcov_results("cluster", groups=j)
    elapsed = time.perf_counter() - t0
    _ = (res.bse[-1], hc1.bse[-1], cl.bse[-1])
    return elapsed, float(res.params[-1])


def bench_crosscheck(*, quick: bool = False, rows: int | None = None) -> dict:
    from ..cells import collapse_frame
    from ..crosscheck import cross_check
    from ..study import make_study

    n_rows = rows or (200_000 if quick else 2_000_000)
    subs = (10_000, 20_000) if quick else (50_000, 100_000)
    frame, truth = _rows(n_rows, seed=20261202)
    study = make_study(
        table="invented_bench.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
    )
    t0 = time.perf_counter()
    cells = collapse_frame(study, frame)
    collapse_s = time.perf_counter() - t0
    times, out = [], None
    for _ in range(3):
        t0 = time.perf_counter()
        out = cross_check(cells, seed=1, draws=999, weights="webb", placebos=999)
        times.append(time.perf_counter() - t0)
    cc = statistics.median(times)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):  # as the cross-check itself runs
        peer = {n: _peer(cells, frame, n, seed=n)[0] for n in subs}
    (n1, s1), (n2, s2) = sorted(peer.items())
    slope = (s2 - s1) / (n2 - n1)
    # two extrapolations; the smaller (kinder to statsmodels) is the one the ratio uses
    line = s2 + slope * (n_rows - n2) if slope > 0 else float("inf")
    proportional = s2 * n_rows / n2
    peer_full = min(line, proportional)
    return {
        "benchmark": "crosscheck",
        "rows": int(cells.rows),
        "jurisdictions": len(cells.jurisdictions),
        "cells": int(out["cells"]),
        "regressors": int(out["regressors"]),
        "wild_draws": int(out["wild"]["draws"]),
        "placebo_assignments": int(out["permutation"]["assignments"]),
        "crosscheck_s_median_of_3": round(cc, 3),
        "collapse_s": round(collapse_s, 3),
        "target_s": 10.0,
        "meets_target": bool(cc < 10.0),
        "statsmodels_s_measured": {str(k): round(v, 3) for k, v in peer.items()},
        "statsmodels_s_extrapolated": round(peer_full, 2),
        "statsmodels_s_extrapolated_line": round(line, 2),
        "statsmodels_s_extrapolated_proportional": round(proportional, 2),
        "ratio_statsmodels_over_crosscheck": round(peer_full / cc, 1),
        "ratio_statsmodels_over_collapse_plus_crosscheck": round(peer_full / (cc + collapse_s), 1),
        "scaling": "statsmodels timed on two random row subsamples and extrapolated to all rows, both along the "
        "line through the two timings and in proportion to the larger one; the smaller is used",
        "threads": "one BLAS thread on both sides",
    }
