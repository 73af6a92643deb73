"""The least-squares cross-check, computed on cells.

The saturated fixed-effects regression on rows,

    y_i = a[j,g] + b[j,t] + c[g,t] + beta * D[j,g,t] + e_i      (DDD)
    y_i = a[j]   + b[t]            + beta * D[j,t]   + e_i      (DiD)

has regressors that are constant within a cell, so its coefficients equal weighted least squares
of the cell means on the cell-level dummies with weights n_c (the row-level normal equations
X'X = sum_c n_c x_c x_c', X'y = sum_c x_c sum_y_c). The design matrix has one row per non-empty
cell, never one per data row.
"""

from __future__ import annotations

import numpy as np

from .cells import Cells

__all__ = ["cell_design", "least_squares_estimate"]


def cell_design(cells: Cells, treat: np.ndarray | None = None):
    """Cell-level design of the saturated regression.

    Returns ``(X, ybar, n, cluster, names, d_col)`` for the non-empty cells: the dummy matrix, the
    cell means, the cell counts, the jurisdiction index of each cell, column names and the index
    of the treatment column. ``treat`` (J, G, T) replaces the study's assignment (placebos).
    """
    J, G, T = cells.shape
    D = cells.treated if treat is None else treat
    jj, gg, tt = np.meshgrid(np.arange(J), np.arange(G), np.arange(T), indexing="ij")
    keep = (cells.n > 0).ravel()
    jj, gg, tt = jj.ravel()[keep], gg.ravel()[keep], tt.ravel()[keep]
    m = keep.sum()
    cols, names = [], []

    def block(index, size, label, drop_first=False):
        start = 1 if drop_first else 0
        for k in range(start, size):
            cols.append((index == k).astype(float))
            names.append(f"{label}[{k}]")

    if G == 2:
        block(jj * G + gg, J * G, "jurisdiction:group")
        block(jj * T + tt, J * T, "jurisdiction:period", drop_first=False)
        # drop each jurisdiction's first period (absorbed by jurisdiction:group)
        drop = {f"jurisdiction:period[{j * T}]" for j in range(J)}
        keep_cols = [i for i, nm in enumerate(names) if nm not in drop]
        cols = [cols[i] for i in keep_cols]
        names = [names[i] for i in keep_cols]
        tgt = cells.target
        for t in range(1, T):
            cols.append(((gg == tgt) & (tt == t)).astype(float))
            names.append(f"target:period[{t}]")
    else:
        block(jj, J, "jurisdiction")
        block(tt, T, "period", drop_first=True)
    cols.append(D.ravel()[keep].astype(float))
    names.append("treatment")
    X = np.column_stack(cols) if cols else np.zeros((m, 0))
    ybar = (cells.sum_y.ravel()[keep] / cells.n.ravel()[keep])
    return X, ybar, cells.n.ravel()[keep].astype(float), jj, names, len(names) - 1


def _wls(X, y, w):
    sw = np.sqrt(w)
    coef, *_ = np.linalg.lstsq(X * sw[:, None], y * sw, rcond=None)
    return coef


def least_squares_estimate(cells: Cells) -> dict:
    """Point estimate of the saturated fixed-effects regression (equals row-level OLS)."""
    X, ybar, n, _, names, d = cell_design(cells)
    coef = _wls(X, ybar, n)
    return {"estimate": float(coef[d]), "regressors": len(names), "cells": int(len(ybar)),
            "method": "OLS with jurisdiction x group, jurisdiction x period and group x period fixed effects"
                      if cells.design == "DDD" else "OLS with jurisdiction and period fixed effects (two-way)"}
