"""Individual covariates: a Wilkinson formula parsed with formulaic, centred, checked and summed.

``model.covariates = "age + C(sex)"`` becomes a row-level design ``X`` (rows, K) without the
intercept (the baselines carry the level), each column centred at its mean over the rows used,
``x~ = x - mean(x)``. Centring changes no effect: it only moves the baselines, and it keeps the
coefficients ``theta`` nearly uncorrelated with them in the posterior.

Per cell c the sufficient statistics of the Gaussian family with covariates are (DESIGN.md)

    n_c,  sum y,  sum y^2,  sx_c = sum x~,  sxx_c = sum x~ x~',  sxy_c = sum x~ y,

and for ``u = y - x~' theta`` the within-cell sum of squares is

    SS_u,c = SS_y,c - 2 theta' Wxy_c + theta' Wxx_c theta,
    Wxx_c = sxx_c - sx_c sx_c' / n_c,   Wxy_c = sxy_c - sx_c sum_y_c / n_c,

with the cell mean ``ubar_c = ybar_c - theta' sx_c / n_c``. Summed over cells the raw sums give the
overall ``X'X`` and ``X'y``. ``Wxx`` and ``Wxy`` are computed in two passes (cell means first) so
they keep their digits in large cells.

Needs only numpy, pandas and formulaic.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .errors import DataRoleError, StudyError

__all__ = ["parse_formula", "required_columns", "design_matrix", "cell_sums", "DISCRETE_MAX_LEVELS"]

#: A design column with at most this many distinct values counts as discrete (collapsible per
#: pattern); more, and a non-Gaussian family falls back to the row-level likelihood (common practice).
DISCRETE_MAX_LEVELS = 20


def parse_formula(spec: str):
    """Parse ``model.covariates`` with formulaic; errors name the key and the parser's complaint."""
    import formulaic

    if "~" in spec:
        raise StudyError(
            f"study key 'model.covariates': {spec!r} has a left-hand side ('~'); give only the "
            "covariate terms, e.g. \"age + C(sex)\" (the outcome is 'data.outcome')."
        )
    try:
        formula = formulaic.Formula(spec)
    except Exception as exc:  # formulaic raises several syntax error types
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise StudyError(
            f"study key 'model.covariates': {spec!r} is not a formula formulaic can read "
            f"({first}). Write terms joined by '+', e.g. \"age + C(sex)\"."
        ) from None
    return formula


def required_columns(spec: str | None) -> list[str]:
    """Table columns a covariate formula reads (sorted)."""
    if not spec:
        return []
    return sorted(str(v) for v in parse_formula(spec).required_variables)


def design_matrix(spec: str, frame: pd.DataFrame) -> dict:
    """Row-level centred design of the covariates.

    Returns
    -------
    dict
        ``X`` (rows, K) centred, ``names`` (K,), ``means`` (K,) centring values, ``discrete`` (True
        when every column has at most :data:`DISCRETE_MAX_LEVELS` distinct values).

    Raises
    ------
    DataRoleError
        A column the formula needs is missing from the table, or the formula produces no column.
    """
    import formulaic

    missing = [c for c in required_columns(spec) if c not in frame.columns]
    if missing:
        raise DataRoleError(
            f"column(s) {missing} named in 'model.covariates' are not in the table; fix the "
            "formula or the table's header."
        )
    try:
        mm = formulaic.model_matrix(spec, frame, na_action="raise")
    except Exception as exc:
        raise DataRoleError(
            f"'model.covariates' = {spec!r} could not be evaluated on the table "
            f"({type(exc).__name__}: {str(exc).splitlines()[0] if str(exc) else ''})."
        ) from None
    names = [c for c in mm.columns if c != "Intercept"]
    if not names:
        raise StudyError(
            f"study key 'model.covariates': {spec!r} gives no covariate column; drop the key or name a column."
        )
    X = np.asarray(mm[names], dtype=float)
    means = X.mean(axis=0)
    Xc = X - means
    discrete = all(len(np.unique(X[:, k])) <= DISCRETE_MAX_LEVELS for k in range(X.shape[1]))
    return {"X": Xc, "names": [str(n) for n in names], "means": means, "discrete": bool(discrete)}


def cell_sums(X: np.ndarray, y: np.ndarray, idx: np.ndarray, size: int, n: np.ndarray) -> dict:
    """Per-cell sums of the centred covariates (flat cell index ``idx`` of each row).

    Returns ``sx`` (C, K), ``sxx`` (C, K, K), ``sxy`` (C, K) and the within-cell ``wxx``, ``wxy``
    computed in two passes.
    """
    R, K = X.shape
    sx = np.column_stack([np.bincount(idx, weights=X[:, k], minlength=size) for k in range(K)])
    sxy = np.column_stack([np.bincount(idx, weights=X[:, k] * y, minlength=size) for k in range(K)])
    sxx = np.empty((size, K, K))
    safe = np.where(n > 0, n, 1.0)
    xbar = sx / safe[:, None]
    ybar = np.bincount(idx, weights=y, minlength=size) / safe
    dx = X - xbar[idx]
    dy = y - ybar[idx]
    wxx = np.empty((size, K, K))
    wxy = np.column_stack([np.bincount(idx, weights=dx[:, k] * dy, minlength=size) for k in range(K)])
    for k in range(K):
        for m in range(k, K):
            v = np.bincount(idx, weights=X[:, k] * X[:, m], minlength=size)
            sxx[:, k, m] = sxx[:, m, k] = v
            w = np.bincount(idx, weights=dx[:, k] * dx[:, m], minlength=size)
            wxx[:, k, m] = wxx[:, m, k] = w
    return {"sx": sx, "sxx": sxx, "sxy": sxy, "wxx": wxx, "wxy": wxy, "rows_n": np.asarray(n, dtype=float)}
