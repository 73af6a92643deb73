"""Helpers for the cross-check tests: cells from rows, covariate sums, and a plain row-level design.

Everything here works on rows with numpy only, so the tests compare the cell-based cross-check with
an independent computation (and with statsmodels) on the same rows.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd

from bayesdid.cells import collapse_frame
from bayesdid.simulate import Scenario, simulate
from bayesdid.study import make_study


def study_for(frame: pd.DataFrame, starts: dict, *, ddd: bool):
    kw = dict(table="invented.csv", outcome="y", jurisdiction="region", period="period", adopters=starts)
    if ddd:
        kw.update(group="group", target_group="target")
    return make_study(**kw)


def cells_from_rows(
    frame: pd.DataFrame, starts: dict, *, ddd: bool, x: np.ndarray | None = None, names=None, moment4: bool = True
):
    """Collapse invented rows; with ``x`` (N, K) add the covariate sums of the issue-3 contract."""
    study = study_for(frame, starts, ddd=ddd)
    cells = collapse_frame(study, frame)
    if x is not None:
        j, g, t = codes(cells, frame)
        J, G, T = cells.shape
        K = x.shape[1]
        idx = (j * G + g) * T + t
        size = J * G * T
        y = frame["y"].to_numpy(float)
        sx = np.zeros((size, K))
        sxx = np.zeros((size, K, K))
        sxy = np.zeros((size, K))
        np.add.at(sx, idx, x)
        np.add.at(sxx, idx, x[:, :, None] * x[:, None, :])
        np.add.at(sxy, idx, x * y[:, None])
        cov = {
            "names": list(names or [f"x{k}" for k in range(K)]),
            "sx": sx.reshape(J, G, T, K),
            "sxx": sxx.reshape(J, G, T, K, K),
            "sxy": sxy.reshape(J, G, T, K),
        }
        if moment4:
            v = np.column_stack([np.ones(len(y)), y, x])
            P = v.shape[1]
            m4 = np.zeros((size, P, P, P, P))
            np.add.at(m4, idx, np.einsum("ia,ib,ic,id->iabcd", v, v, v, v))
            cov["moment4"] = m4.reshape(J, G, T, P, P, P, P)
        cells.extra["covariates"] = cov
    return cells


def codes(cells, frame):
    """(jurisdiction, group, period) index of each row, in the cells' order."""
    jmap = {v: i for i, v in enumerate(cells.jurisdictions)}
    tmap = {str(v): i for i, v in enumerate(cells.periods)}
    j = frame["region"].map(jmap).to_numpy(int)
    t = frame["period"].astype(str).map(tmap).to_numpy(int)
    if cells.design == "DDD":
        gmap = {v: i for i, v in enumerate(cells.groups)}
        g = frame["group"].map(gmap).to_numpy(int)
    else:
        g = np.zeros(len(frame), dtype=int)
    return j, g, t


def row_design(cells, frame, x: np.ndarray | None = None):
    """A full-rank dummy matrix on the rows (written out here, independently of bayesdid):

    DDD: one dummy per jurisdiction x group, per jurisdiction x period except each jurisdiction's
    first period, per target x period except the first; DiD: per jurisdiction and per period except
    the first. Then the treatment column (index returned) and the covariates.
    """
    j, g, t = codes(cells, frame)
    J, G, T = cells.shape
    N = len(frame)
    cols = []
    if G == 2:
        for jj, gg in itertools.product(range(J), range(G)):
            cols.append((j == jj) & (g == gg))
        for jj, tt in itertools.product(range(J), range(1, T)):
            cols.append((j == jj) & (t == tt))
        for tt in range(1, T):
            cols.append((g == cells.target) & (t == tt))
    else:
        for jj in range(J):
            cols.append(j == jj)
        for tt in range(1, T):
            cols.append(t == tt)
    start = cells.start[j]
    d = (g == cells.target) & (t >= start)
    cols.append(d)
    X = np.column_stack(cols).astype(float)
    dcol = X.shape[1] - 1
    if x is not None:
        X = np.column_stack([X, x])
    assert X.shape[0] == N
    return X, dcol, j


def scenario_rows(*, J=6, T=5, ddd=True, starts=None, rows=30, seed=1, gap_sd=0.2, tau=-0.3, K=0, fixed=False):
    """Invented rows with a known truth (bayesdid.simulate) and optional covariates with effects."""
    sc = Scenario(
        jurisdictions=J,
        periods=T,
        groups=2 if ddd else 1,
        starts=starts or {0: 2},
        rows_per_cell=rows,
        tau=tau,
        gap_sd=gap_sd,
        fixed_cells=fixed,
    )
    frame, truth = simulate(sc, seed)
    x = None
    if K:
        rng = np.random.default_rng(seed + 1000)
        x = rng.normal(size=(len(frame), K)) + 0.3 * frame["period"].to_numpy(float)[:, None] / T
        frame = frame.copy()
        frame["y"] = frame["y"] + x @ np.linspace(0.5, -0.4, K)
        x = x - x.mean(0)  # centred, as the covariate contract says
    return frame, truth, x
