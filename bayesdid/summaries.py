"""Rows that summarise cells, and rows with sampling weights: their exact per-cell statistics.

Three shapes of input besides one observation per row (``data.summary``, see README "Input shapes"):

* ``"mean"``: a row holds the mean ``m`` of ``k`` observations (``data.count``) and their standard
  deviation ``s`` (``data.sd``, divisor k - 1) or the standard error of the mean ``se`` (``data.se``;
  then ``s = se * sqrt(k)``). Such a row is exactly the sufficient statistics of its observations:
  ``n = k``, ``sum y = k m``, ``ss = (k - 1) s^2``. Several rows of one cell (say, age bands) pool
  exactly: ``ss = sum_r (k_r - 1) s_r^2 + sum_r k_r (m_r - ybar)^2``.
* ``"proportion"``: ``p`` of ``k`` people; converted to ``round(p k)`` successes of ``k`` trials.
* ``"rate"``: events per unit of person-time ``x`` (``data.exposure``); converted to ``round(r x)``
  events over ``x``.

Sampling weights (``data.weight``, Gaussian family): per cell the Hajek (ratio) mean
``ybar_w = sum w y / sum w`` and Kish's effective size ``n_eff = (sum w)^2 / sum w^2``. Under iid rows
with fixed weights, ``Var(ybar_w) = sigma^2 / n_eff`` exactly, so the cell mean enters the
likelihood as the mean of n_eff observations; the within-cell part uses
``ss = n_eff / sum w * sum w (y - ybar_w)^2``, whose expectation is ``(n_eff - 1) sigma^2`` (a
moment match, exact in expectation, not in distribution). The ATT weights adopters by the summed
weights of their treated cells (the population they stand for); the least-squares cross-check is
weighted least squares with the row weights.

Needs only numpy and pandas.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pandas as pd

from .data import _numeric, _rows_text
from .errors import DataRoleError
from .study import Study

__all__ = ["as_count_rows", "check_summary_rows", "mean_sums", "weighted_sums", "check_weights"]

#: Largest relative distance of p * count (or rate * exposure) from a whole number accepted as
#: rounding of the published figure (a proportion written with six or more significant digits).
WHOLE_TOLERANCE = 1e-6


def _count(study: Study, frame: pd.DataFrame, *, others: tuple[str, ...] = ()) -> np.ndarray:
    """The count column as floats: whole numbers of at least 1; rows without a count named as mixed."""
    col = study.columns.count
    k = _numeric(frame, col, "count")
    miss = np.isnan(k)
    if miss.any():
        rest = [c for c in others if c is not None]
        bare = miss.copy()
        for c in rest:
            bare &= frame[c].isna().to_numpy()
        if rest and bare.any() and not bare.all():
            raise DataRoleError(
                f"count column '{col}' is empty in {_rows_text(bare)}, which also have no "
                f"{' or '.join(repr(c) for c in rest)}: they look like observation-level rows mixed into a table of "
                f"cell summaries (data.summary = '{study.summary}'). Give one kind of row per table: summarise "
                "those observations into their cells, or drop data.summary and give every observation."
            )
        raise DataRoleError(
            f"count column '{col}' has {_rows_text(miss)} missing; every summary row needs the "
            "number of observations it summarises. Fill or drop those rows."
        )
    bad = ~np.isfinite(k) | (k < 1) | (k != np.round(k))
    if bad.any():
        raise DataRoleError(
            f"count column '{col}' must hold whole numbers of at least 1 (observations per row); "
            f"{_rows_text(bad)} do not (e.g. {k[bad][0]:g}). A row with no observations carries "
            "nothing: drop it."
        )
    return k


def check_summary_rows(study: Study, frame: pd.DataFrame) -> pd.DataFrame:
    """Check the count and spread columns of ``data.summary = "mean"`` rows (after the role checks).

    Adds the within-row standard deviation as column ``"__sd"`` (from ``data.se`` if that is given).

    Raises
    ------
    DataRoleError
        A count missing, below 1 or not whole; an sd (or se) missing where the count exceeds 1, given
        where the count is 1, negative or infinite; rows with neither count nor spread among summary
        rows (observation-level rows mixed in).
    """
    c = study.columns
    spread = c.sd if c.sd is not None else c.se
    k = _count(study, frame, others=(spread,))
    s = _numeric(frame, spread, "sd" if c.sd is not None else "se")
    what = "standard deviation" if c.sd is not None else "standard error"
    miss = np.isnan(s) & (k > 1)
    if miss.any():
        raise DataRoleError(
            f"{'sd' if c.sd is not None else 'se'} column '{spread}' is empty in {_rows_text(miss)} "
            f"whose count ('{c.count}') exceeds 1; a mean of several observations needs their {what}. "
            "Fill it, or drop those rows."
        )
    one = ~np.isnan(s) & (k == 1)
    if one.any():
        raise DataRoleError(
            f"{'sd' if c.sd is not None else 'se'} column '{spread}' holds a value in "
            f"{_rows_text(one)} whose count ('{c.count}') is 1: the {what} of a single observation "
            "is not defined. Leave that field empty, or check the count."
        )
    bad = ~np.isnan(s) & (~np.isfinite(s) | (s < 0))
    if bad.any():
        raise DataRoleError(
            f"{'sd' if c.sd is not None else 'se'} column '{spread}' must be a finite number of at "
            f"least 0; {_rows_text(bad)} are not (e.g. {s[bad][0]:g})."
        )
    sd = np.where(k > 1, s, 0.0)
    if c.se is not None:
        sd = sd * np.sqrt(k)
    out = frame.copy()
    out[c.count] = k
    out["__sd"] = sd
    return out


def mean_sums(y: np.ndarray, k: np.ndarray, sd: np.ndarray, idx: np.ndarray, size: int):
    """Per-cell ``n, sum_y, sum_y2, ss`` of summary rows (mean ``y`` of ``k`` observations, sd ``sd``)."""
    n = np.bincount(idx, weights=k, minlength=size)
    s1 = np.bincount(idx, weights=k * y, minlength=size)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, s1 / np.where(n > 0, n, 1), 0.0)
    dev = y - m[idx]
    ss = np.bincount(idx, weights=(k - 1) * sd * sd + k * dev * dev, minlength=size)
    return n, s1, ss + n * m * m, ss


def check_weights(study: Study, frame: pd.DataFrame) -> np.ndarray:
    """The weight column as floats; missing, zero, negative or infinite weights refused by rows."""
    col = study.columns.weight
    w = _numeric(frame, col, "weight")
    miss = np.isnan(w)
    if miss.any():
        raise DataRoleError(
            f"weight column '{col}' has {_rows_text(miss)} missing; every row needs its sampling "
            "weight. Fill them from the survey's documentation, or drop those rows."
        )
    bad = ~np.isfinite(w) | (w <= 0)
    if bad.any():
        raise DataRoleError(
            f"weight column '{col}' must hold positive, finite sampling weights; {_rows_text(bad)} "
            f"do not (smallest {np.nanmin(np.where(np.isfinite(w), w, np.nan)):g}). A row outside "
            "the population has no weight: drop it rather than give it 0."
        )
    return w


def weighted_sums(y: np.ndarray, w: np.ndarray, idx: np.ndarray, size: int) -> dict[str, np.ndarray]:
    """Per-cell weighted statistics (flat arrays of length ``size``); see the module docstring.

    Returns ``n`` (Kish n_eff), ``sum_y`` (n_eff * Hajek mean), ``sum_y2``, ``ss`` (scaled weighted
    within sum of squares), and for the weighted least squares ``sum_w``, ``ss_w`` = sum w (y - ybar_w)^2,
    ``rows`` (observations per cell), and for its HC1 error ``sum_w2``, ``w2_dev`` = sum w^2 (y - ybar_w)
    and ``w2_dev2`` = sum w^2 (y - ybar_w)^2.
    """
    sw = np.bincount(idx, weights=w, minlength=size)
    sw2 = np.bincount(idx, weights=w * w, minlength=size)
    swy = np.bincount(idx, weights=w * y, minlength=size)
    pos = sw > 0
    safe = np.where(pos, sw, 1.0)
    ybar = np.where(pos, swy / safe, 0.0)
    dev = y - ybar[idx]
    ss_w = np.bincount(idx, weights=w * dev * dev, minlength=size)
    n_eff = np.where(pos, sw * sw / np.where(pos, sw2, 1.0), 0.0)
    ss = np.where(pos, ss_w * n_eff / safe, 0.0)
    w2 = w * w
    return {
        "n": n_eff,
        "sum_y": n_eff * ybar,
        "sum_y2": ss + n_eff * ybar * ybar,
        "ss": ss,
        "sum_w": sw,
        "ss_w": ss_w,
        "rows": np.bincount(idx, minlength=size).astype(float),
        # for the HC1 meat sum_i w_i^2 e_i^2 with e_i = (y_i - ybar_w) + rbar_c
        "sum_w2": sw2,
        "w2_dev": np.bincount(idx, weights=w2 * dev, minlength=size),
        "w2_dev2": np.bincount(idx, weights=w2 * dev * dev, minlength=size),
    }


def _whole(total: np.ndarray, what: str, study: Study, frame: pd.DataFrame, denom: str) -> np.ndarray:
    k = np.round(total)
    off = np.abs(total - k) > WHOLE_TOLERANCE * np.maximum(1.0, np.abs(total))
    if off.any():
        i = int(np.flatnonzero(off)[0])
        raise DataRoleError(
            f"outcome column '{study.columns.outcome}' times '{denom}' is not a whole number of {what} in "
            f"{_rows_text(off)} (first: {total[i]:.6g}); a published figure rounded to few digits cannot be turned "
            f"back into {what} exactly. Give more digits, or give the {what} themselves as the outcome "
            "without data.summary (with 'data.trials' or 'data.exposure')."
        )
    return k


def as_count_rows(study: Study, frame: pd.DataFrame) -> tuple[Study, pd.DataFrame]:
    """Proportions and rates turned exactly into successes of trials and events over exposure.

    Returns a study without ``data.summary`` (proportion: ``data.trials`` = the count column) and the
    frame with the outcome replaced by the whole numbers; other studies pass through unchanged.
    """
    if study.summary not in ("proportion", "rate"):
        return study, frame
    c = study.columns
    if c.outcome not in frame.columns:
        return study, frame  # named by the role checks
    p = _numeric(frame, c.outcome, "outcome")
    out = frame.copy()
    if study.summary == "proportion":
        if c.count not in frame.columns:
            return study, frame
        k = _count(study, frame, others=())
        miss = np.isnan(p)
        if miss.any():
            raise DataRoleError(
                f"outcome column '{c.outcome}' has {_rows_text(miss)} missing; every row needs its "
                "proportion. Fill or drop those rows."
            )
        bad = (p < 0) | (p > 1)
        if bad.any():
            raise DataRoleError(
                f"outcome column '{c.outcome}' holds proportions (data.summary = 'proportion') but "
                f"{_rows_text(bad)} lie outside 0..1 (e.g. {p[bad][0]:g}). Give a share, not a "
                "percent."
            )
        out[c.outcome] = _whole(p * k, "successes", study, frame, c.count)
        out[c.count] = k
        cols = dataclasses.replace(c, trials=c.count, count=None)
    else:
        if c.exposure not in frame.columns:
            return study, frame
        x = _numeric(frame, c.exposure, "exposure")
        miss = np.isnan(p)
        if miss.any():
            raise DataRoleError(
                f"outcome column '{c.outcome}' has {_rows_text(miss)} missing; every row needs its "
                "rate. Fill or drop those rows."
            )
        bad = (p < 0) | ~np.isfinite(p)
        if bad.any():
            raise DataRoleError(
                f"outcome column '{c.outcome}' holds rates (data.summary = 'rate') but "
                f"{_rows_text(bad)} are negative or infinite (e.g. {p[bad][0]:g})."
            )
        if not np.isfinite(x).all() or (x <= 0).any():
            return study, frame  # the exposure checks name these rows
        out[c.outcome] = _whole(p * x, "events", study, frame, c.exposure)
        cols = c
    return study.replace(columns=cols, summary=None), out
