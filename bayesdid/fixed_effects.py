"""The fixed structure of the saturated regression on cells, and what a covariate must do beside it.

``cell_design`` builds the cell-level dummies (jurisdiction x group, jurisdiction x period and
target x period for a DDD; jurisdiction and period for a DiD) and the treatment column;
``check_identified`` refuses a covariate that is constant or collinear with that structure. Both
read the cells' arrays only (``shape``, ``n``, ``sum_y``, ``treated``, ``target``, ``design``), so this
module sits beside :mod:`bayesdid.cells` without importing it; the least-squares cross-check
(:mod:`bayesdid.crosscheck`) and the collapse (:mod:`bayesdid.cells`) both use it.
"""

from __future__ import annotations

import numpy as np

from .errors import DataRoleError

__all__ = ["cell_design", "check_identified"]


def cell_design(cells, treat: np.ndarray | None = None):
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
    F, names = _fixed_effects(jj, gg, tt, J, G, T, cells.target)
    X = np.column_stack([F, D.ravel()[keep].astype(float)])
    names = names + ["treatment"]
    ybar = cells.sum_y.ravel()[keep] / cells.n.ravel()[keep]
    return X, ybar, cells.n.ravel()[keep].astype(float), jj, names, len(names) - 1


def _fixed_effects(jj, gg, tt, J, G, T, target):
    """Cell-level dummies: jurisdiction x group, jurisdiction x period (first period absorbed) and
    target x period (DDD); jurisdiction and period (DiD)."""
    m = len(jj)
    rows = np.arange(m)
    if G == 2:
        names = [f"jurisdiction:group[{j * G + g}]" for j in range(J) for g in range(G)]
        names += [f"jurisdiction:period[{j * T + t}]" for j in range(J) for t in range(1, T)]
        names += [f"target:period[{t}]" for t in range(1, T)]
        F = np.zeros((m, J * G + J * (T - 1) + (T - 1)))
        F[rows, jj * G + gg] = 1.0
        off = J * G
        later = tt >= 1
        F[rows[later], off + jj[later] * (T - 1) + tt[later] - 1] = 1.0
        off += J * (T - 1)
        tg = later & (gg == target)
        F[rows[tg], off + tt[tg] - 1] = 1.0
    else:
        names = [f"jurisdiction[{j}]" for j in range(J)] + [f"period[{t}]" for t in range(1, T)]
        F = np.zeros((m, J + T - 1))
        F[rows, jj] = 1.0
        later = tt >= 1
        F[rows[later], J + tt[later] - 1] = 1.0
    return F, names


def check_identified(cells, sums: dict, names: list[str], *, rtol: float = 1e-8) -> None:
    """Refuse a covariate that is constant, or collinear with the fixed structure or earlier covariates.

    The fixed structure is the least-squares cross-check's saturated design (jurisdiction x group,
    jurisdiction x period and group x period effects and the treatment indicator for a DDD;
    jurisdiction and period effects and the treatment for a DiD), which is constant within cells. So
    the residual cross-product of the covariates after those dummies is, from cell sums alone,

        M = sum_c Wxx_c + R' diag(n) R,   R = residual of the cell means sx_c / n_c on the dummies,

    and covariate k is not identified when its share of ``M`` left after the earlier covariates
    (the Schur complement) falls below ``rtol`` times its total sum of squares.

    Raises
    ------
    DataRoleError
        Naming the covariate column and what it is collinear with.
    """
    n = sums["rows_n"]  # rows per cell (flat); the design's cells are those with cells.n > 0
    keep = cells.n.ravel() > 0
    total = sums["sxx"][keep].sum(axis=0)  # centred at overall means, so this is the total SS
    for k, nm in enumerate(names):
        if total[k, k] <= 1e-12 * max(1.0, np.abs(total).max()):
            raise DataRoleError(
                f"covariate column '{nm}' (from 'model.covariates') is constant over the rows "
                "used; it carries no information. Remove it from the formula."
            )
    X, _, nn, _, _, _ = cell_design(cells)
    nk = np.maximum(n[keep], 1.0)
    xbar = sums["sx"][keep] / nk[:, None]
    sw = np.sqrt(nk)
    beta, *_ = np.linalg.lstsq(X * sw[:, None], xbar * sw[:, None], rcond=None)
    R = xbar - X @ beta
    M = sums["wxx"][keep].sum(axis=0) + (R * nk[:, None]).T @ R
    K = len(names)
    for k in range(K):
        alone = M[k, k] / total[k, k]
        if alone < rtol:
            what = (
                "jurisdiction x group, jurisdiction x period and group x period effects and the treatment"
                if cells.design == "DDD"
                else "jurisdiction and period effects and the treatment"
            )
            raise DataRoleError(
                f"covariate column '{names[k]}' (from 'model.covariates') is collinear with the "
                f"fixed structure ({what}): it does not vary within those, so its coefficient "
                "cannot be told apart from them. Remove it from the formula."
            )
        if k:
            P = M[:k, :k]
            sol = np.linalg.lstsq(P, M[:k, k], rcond=None)[0]
            schur = M[k, k] - M[k, :k] @ sol
            if schur / total[k, k] < rtol:
                raise DataRoleError(
                    f"covariate column '{names[k]}' (from 'model.covariates') is collinear with "
                    f"the earlier covariate(s) {names[:k]} given the fixed structure. Remove "
                    "one of them from the formula."
                )
