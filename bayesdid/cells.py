"""Exact collapse of the rows to per-cell sufficient statistics.

A cell is (jurisdiction, group, period); for a DiD the group axis has length one. For a Gaussian
outcome the rows enter the likelihood only through, per cell, the count ``n``, the sum ``sum_y`` and
the sum of squares ``sum_y2``; the within-cell sum of squared deviations ``ss`` is computed in two
passes (mean first) so that it does not lose digits when cells are large.

Needs only numpy and pandas.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from .data import check_roles, period_levels
from .model.family import family_record
from .panels import check_units, within_units
from .study import Study
from .summaries import as_count_rows, check_summary_rows, check_weights, mean_sums, weighted_sums

__all__ = ["Cells", "collapse", "collapse_frame"]


@dataclass(frozen=True, eq=False)
class Cells:
    """Per-cell sufficient statistics on the model scale, with the design around them.

    Arrays have shape (jurisdiction, group, period). ``start[j]`` is the index of the first treated
    period of jurisdiction j, or ``len(periods)`` for a jurisdiction that never adopts.
    """

    jurisdictions: tuple[str, ...]
    groups: tuple[str, ...]
    periods: tuple
    design: str
    target: int  # index of the target group (0 for DiD)
    start: np.ndarray
    n: np.ndarray
    sum_y: np.ndarray
    sum_y2: np.ndarray
    ss: np.ndarray
    rows: int
    log_outcome: bool = False
    outcome_sd: float = 1.0
    outcome_mean: float = 0.0
    weight: np.ndarray | None = None  # per (jurisdiction, period); 0 drops a jurisdiction-period
    extra: dict = field(default_factory=dict)

    # ---- shape and design -------------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, int, int]:
        return self.n.shape

    @property
    def n_cells(self) -> int:
        return int((self.n > 0).sum())

    @property
    def adopters(self) -> np.ndarray:
        return np.flatnonzero(self.start < len(self.periods))

    @property
    def comparisons(self) -> np.ndarray:
        return np.flatnonzero(self.start >= len(self.periods))

    @property
    def reference(self) -> int | None:
        return None if self.design == "DiD" else 1 - self.target

    @property
    def treated(self) -> np.ndarray:
        """D[j, g, t] = 1 for adopter j, target group g and t at or after j's start."""
        J, G, T = self.shape
        post = np.arange(T)[None, :] >= self.start[:, None]
        d = np.zeros((J, G, T), dtype=bool)
        d[:, self.target, :] = post
        return d

    @property
    def mean(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.n > 0, self.sum_y / np.where(self.n > 0, self.n, 1), np.nan)

    def jt_weight(self) -> np.ndarray:
        J, _, T = self.shape
        return np.ones((J, T)) if self.weight is None else self.weight

    def with_starts(self, start: np.ndarray) -> Cells:
        """The same cells with another assignment of start periods (placebos)."""
        return replace(self, start=np.asarray(start, dtype=int))

    def with_weight(self, weight: np.ndarray) -> Cells:
        return replace(self, weight=np.asarray(weight, dtype=float))

    def describe(self) -> dict:
        return {
            "rows": int(self.rows),
            "cells": self.n_cells,
            "jurisdictions": len(self.jurisdictions),
            "adopters": [self.jurisdictions[j] for j in self.adopters],
            "starts": {self.jurisdictions[j]: _plain(self.periods[self.start[j]]) for j in self.adopters},
            "periods": len(self.periods),
            "groups": list(self.groups),
            "design": self.design,
        }


def _plain(v):
    return v.item() if hasattr(v, "item") else v


def _codes(col: pd.Series) -> tuple[np.ndarray, list]:
    """Integer codes of a column and its unique values (fast on millions of rows)."""
    codes, uniques = pd.factorize(col, sort=False)
    return codes.astype(np.int64), [u.item() if hasattr(u, "item") else u for u in np.asarray(uniques)]


def collapse_frame(study: Study, frame: pd.DataFrame) -> Cells:
    """Collapse a frame whose roles have been checked (see :func:`bayesdid.data.check_roles`)."""
    cols = study.columns
    levels = period_levels(study, frame)
    period_index = {str(v): i for i, v in enumerate(levels)}
    j_code, jur_uniques = _codes(frame[cols.jurisdiction])
    jur_labels = sorted(str(v) for v in jur_uniques)
    jur_index = {v: i for i, v in enumerate(jur_labels)}
    j_code = np.asarray([jur_index[str(v)] for v in jur_uniques], dtype=np.int64)[j_code]
    if cols.group is None:
        groups = ("all",)
        g_code = np.zeros(len(frame), dtype=np.int64)
        target = 0
    else:
        g_raw, g_uniques = _codes(frame[cols.group])
        glev = sorted(str(v) for v in g_uniques)
        target_label = str(study.policy.target_group)
        groups = tuple([g for g in glev if g != target_label] + [target_label])  # reference first
        gi = {g: i for i, g in enumerate(groups)}
        g_code = np.asarray([gi[str(v)] for v in g_uniques], dtype=np.int64)[g_raw]
        target = 1
    t_raw, t_uniques = _codes(frame[cols.period])
    t_code = np.asarray([period_index[str(v)] for v in t_uniques], dtype=np.int64)[t_raw]

    J, G, T = len(jur_labels), len(groups), len(levels)
    y = frame[cols.outcome].to_numpy(dtype=float)
    if study.model.log_outcome:
        y = np.log(y)
    idx = (j_code * G + g_code) * T + t_code
    size = J * G * T
    weighted = None
    if study.summary == "mean":
        k = frame[cols.count].to_numpy(dtype=float)
        n, s1, s2, ss = mean_sums(y, k, frame["__sd"].to_numpy(dtype=float), idx, size)
        rows = int(k.sum())
    elif cols.weight is not None:
        weighted = weighted_sums(y, frame[cols.weight].to_numpy(dtype=float), idx, size)
        n, s1, s2, ss = weighted["n"], weighted["sum_y"], weighted["sum_y2"], weighted["ss"]
        rows = len(frame)
    else:
        panel = within_units(frame[cols.unit], y) if cols.unit is not None else None
        yc = y if panel is None else panel["y"]
        n = np.bincount(idx, minlength=size).astype(float)
        s1 = np.bincount(idx, weights=yc, minlength=size)
        s2 = np.bincount(idx, weights=yc * yc, minlength=size)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = np.where(n > 0, s1 / np.where(n > 0, n, 1), 0.0)
        dev = yc - m[idx]
        ss = np.bincount(idx, weights=dev * dev, minlength=size)
        rows = len(frame)
        if panel is not None:
            # priors scaled by the outcome itself, as without the unit role; centred means sit at 0
            _, raw_sd = _overall(n, np.bincount(idx, weights=y, minlength=size), _within(y, idx, n, size))
            ss_ls = ss
            ss = np.bincount(idx, weights=panel["scale"] * dev * dev, minlength=size)
            jg = np.unique(idx // T)
            panel = {
                "column": cols.unit,
                "units": panel["units"],
                "absorbed": panel["units"] - len(jg),
                "ss_ls": ss_ls.reshape(J, G, T),
                "outcome_sd": raw_sd,
            }

    start = np.full(J, T, dtype=int)
    for a, s in study.policy.adopters:
        start[jur_index[a]] = period_index[str(s)]
    mean, sd = _overall(n, s1, ss)
    if weighted is None and study.summary is None and cols.unit is not None:
        mean, sd = 0.0, panel["outcome_sd"]
    cells = Cells(
        jurisdictions=tuple(jur_labels),
        groups=groups,
        periods=tuple(_plain(v) for v in levels),
        design=study.design,
        target=target,
        start=start,
        n=n.reshape(J, G, T),
        sum_y=s1.reshape(J, G, T),
        sum_y2=s2.reshape(J, G, T),
        ss=ss.reshape(J, G, T),
        rows=rows,
        log_outcome=study.model.log_outcome,
        outcome_sd=sd if sd > 0 else 1.0,
        outcome_mean=mean,
    )
    if cols.unit is not None and panel is not None:
        return replace(
            cells,
            extra={
                "family": study.model.family,
                "panel": panel,
                "likelihood": "exact on cells of the outcome centred within units (unit fixed "
                "effects; balanced panel), within-cell spread scaled by T/(T-1)",
            },
        )
    if weighted is not None:
        shape = (J, G, T)
        return replace(
            cells,
            extra={
                "family": study.model.family,
                "weights": {
                    "column": cols.weight,
                    **{k: weighted[k].reshape(shape) for k in ("sum_w", "ss_w", "rows", "sum_w2", "w2_dev", "w2_dev2")},
                },
                "likelihood": "exact on cells for the Hajek means with Kish effective sizes (jurisdiction-period shock "
                "and gap noise integrated out); within-cell spread by moment match",
            },
        )
    if (
        family_record(study.model.family).cell_model
        and not study.model.covariates
        and not frame.attrs.get("dropped_rows")
    ):
        return cells
    return attach_family(study, frame, cells, idx, y)


def _within(y: np.ndarray, idx: np.ndarray, n: np.ndarray, size: int) -> np.ndarray:
    """Per-cell sums of squared deviations from the cell means (two passes)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, np.bincount(idx, weights=y, minlength=size) / np.where(n > 0, n, 1), 0.0)
    dev = y - m[idx]
    return np.bincount(idx, weights=dev * dev, minlength=size)


def _overall(n: np.ndarray, s1: np.ndarray, ss: np.ndarray) -> tuple[float, float]:
    """Mean and (population) sd of the outcome from the cell statistics alone, so that every input shape
    of the same observations gives the same data-scaled priors."""
    total = float(n.sum())
    if total <= 1:
        return (float(s1.sum()) / total if total > 0 else 0.0), 1.0
    mean = float(s1.sum()) / total
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(n > 0, s1 / np.where(n > 0, n, 1), 0.0)
    var = (float(ss.sum()) + float((n * (m - mean) ** 2).sum())) / total
    return mean, float(np.sqrt(max(var, 0.0)))


def attach_family(study: Study, frame: pd.DataFrame, cells: Cells, idx: np.ndarray, y: np.ndarray) -> Cells:
    """Family and covariate statistics on top of the Gaussian sums (``y`` on the model scale).

    * gaussian with covariates: ``extra["covariates"]`` holds ``names`` (K), ``sx`` (J,G,T,K),
      ``sxx`` (J,G,T,K,K), ``sxy`` (J,G,T,K), the within-cell ``wxx``, ``wxy`` and the centring
      ``means`` (K), all of the centred covariates (see :mod:`bayesdid.covariates`).
    * binomial: ``n`` = trials and ``sum_y`` = successes per cell; poisson and negbinomial: ``n`` =
      exposure and ``sum_y`` = events per cell. The likelihood reads ``extra["records"]``: one record
      per non-empty cell and covariate pattern (``cell`` flat index, ``y``, ``size`` = trials or
      exposure, ``x`` (R, K) centred pattern). With a continuous covariate there is no exact
      per-pattern collapse: one record per row (the row-level likelihood), with a
      :class:`~bayesdid.errors.RowLevelFallbackWarning`.

    ``extra["likelihood"]`` says in words which of these the fit uses.
    """
    import warnings

    from .covariates import cell_sums, design_matrix
    from .errors import RowLevelFallbackWarning
    from .fixed_effects import check_identified

    fam = study.model.family
    family = family_record(fam)
    cols = study.columns
    J, G, T = cells.shape
    size = J * G * T
    extra = {"family": fam}
    if frame.attrs.get("dropped_rows"):
        extra["dropped_rows"] = dict(frame.attrs["dropped_rows"])
    cov = design_matrix(study.model.covariates, frame) if study.model.covariates else None
    if family.cell_model:
        if cov is not None:
            sums = cell_sums(cov["X"], y, idx, size, cells.n.ravel())
            check_identified(cells, sums, cov["names"])
            K = len(cov["names"])
            extra["covariates"] = {
                "names": cov["names"],
                "means": cov["means"],
                "discrete": cov["discrete"],
                "sx": sums["sx"].reshape(J, G, T, K),
                "sxx": sums["sxx"].reshape(J, G, T, K, K),
                "sxy": sums["sxy"].reshape(J, G, T, K),
                "wxx": sums["wxx"].reshape(J, G, T, K, K),
                "wxy": sums["wxy"].reshape(J, G, T, K),
            }
        extra["likelihood"] = "exact on cells (jurisdiction-period shock and gap noise integrated out" + (
            "; covariates through per-cell sums of x, xx' and xy)" if cov else ")"
        )
        return replace(cells, extra=extra)

    yr = frame[cols.outcome].to_numpy(dtype=float)
    size_col = getattr(cols, family.size_role)  # trials or exposure; rows without trials are single trials
    sz = frame[size_col].to_numpy(dtype=float) if size_col else np.ones(len(frame))
    n = np.bincount(idx, weights=sz, minlength=size)
    sum_y = np.bincount(idx, weights=yr, minlength=size)
    new = replace(cells, n=n.reshape(J, G, T), sum_y=sum_y.reshape(J, G, T))
    K = 0 if cov is None else len(cov["names"])
    if cov is not None:
        sums = cell_sums(cov["X"], yr, idx, size, np.bincount(idx, minlength=size).astype(float))
        check_identified(new, sums, cov["names"])
        extra["covariates"] = {"names": cov["names"], "means": cov["means"], "discrete": cov["discrete"]}
    if cov is not None and not cov["discrete"]:
        msg = (
            f"covariates '{study.model.covariates}' include a continuous column (more than "
            f"{_max_levels()} distinct values), so family '{fam}' cannot be collapsed exactly per cell and "
            f"covariate pattern; the likelihood is evaluated on the {len(frame):,} rows (exact, slower)."
        )
        warnings.warn(msg, RowLevelFallbackWarning, stacklevel=3)
        rec = {"cell": idx.astype(np.int64), "y": yr, "size": sz, "x": cov["X"]}
        extra["likelihood"] = "row-level (continuous covariate: no exact collapse); " + msg
        extra["fallback"] = msg
    elif cov is not None:
        X = cov["X"]
        codes = np.zeros(len(frame), dtype=np.int64)
        for k in range(K):
            _, inv = np.unique(X[:, k], return_inverse=True)
            codes = codes * (int(inv.max()) + 1) + inv
        _, pat = np.unique(codes, return_inverse=True)
        key = idx.astype(np.int64) * (int(pat.max()) + 1) + pat
        uk, first, inv = np.unique(key, return_index=True, return_inverse=True)
        rec = {
            "cell": idx[first].astype(np.int64),
            "y": np.bincount(inv, weights=yr),
            "size": np.bincount(inv, weights=sz),
            "x": X[first],
        }
        extra["likelihood"] = (
            f"exact on {len(uk):,} records (cell x covariate pattern), "
            "jurisdiction-period shock and gap noise as non-centred latent terms"
        )
    else:
        cell_ids = np.flatnonzero(n > 0)
        rec = {
            "cell": cell_ids.astype(np.int64),
            "y": sum_y[cell_ids],
            "size": n[cell_ids],
            "x": np.zeros((len(cell_ids), 0)),
        }
        extra["likelihood"] = (
            f"exact on cells ({'successes' if family.size_role == 'trials' else 'events'} and {family.size_role} per cell)"
            ", jurisdiction-period shock and gap noise as non-centred latent terms"
        )
    extra["records"] = rec
    loc = family.link_location(yr.sum(), sz.sum())
    return replace(new, extra=extra, outcome_mean=loc, outcome_sd=1.0)


def _max_levels() -> int:
    from .covariates import DISCRETE_MAX_LEVELS

    return DISCRETE_MAX_LEVELS


def _refuse_constant(study: Study, frame: pd.DataFrame, cells: Cells) -> None:
    """Refuse an outcome with nothing to estimate from: constant overall, over the comparison
    jurisdictions, or (Gaussian) within every comparison cell that holds several rows."""
    from .errors import DataRoleError

    col, fam = study.columns.outcome, study.model.family
    rec = family_record(fam)
    y = frame[col].to_numpy(dtype=float)
    if rec.size_role == "trials":
        trials = frame[study.columns.trials].to_numpy(dtype=float) if study.columns.trials else np.ones(len(y))
        if y.sum() == 0 or y.sum() == trials.sum():
            what = "no success" if y.sum() == 0 else "only successes"
            raise DataRoleError(
                f"outcome column '{col}' holds {what} in every row, so family '{fam}' has nothing "
                "to estimate an effect from. Check that the outcome column is the right one."
            )
        return
    if rec.size_role == "exposure":
        if y.sum() == 0:
            raise DataRoleError(
                f"outcome column '{col}' is 0 in every row: there are no events to estimate an effect "
                "from. Check that the outcome column is the right one."
            )
        return
    if y.min() == y.max():
        raise DataRoleError(
            f"outcome column '{col}' has the same value ({y[0]:g}) in every row: there is nothing to "
            "estimate. Check that the outcome column is the right one."
        )
    comp = cells.comparisons
    jur = frame[study.columns.jurisdiction].astype(str).to_numpy()
    in_comp = np.isin(jur, [cells.jurisdictions[j] for j in comp])
    yc = y[in_comp]
    if yc.size and yc.min() == yc.max():
        raise DataRoleError(
            f"outcome column '{col}' has the same value ({yc[0]:g}) in every row of the comparison "
            "jurisdictions, so they say nothing about how the outcome varies without the policy. "
            "Check the outcome column and the rows of the comparison jurisdictions."
        )
    n, ss = cells.n[comp], cells.ss[comp]
    several = n >= 2
    if several.any() and study.summary is None:
        mean = np.abs(cells.sum_y[comp][several] / n[several])
        # zero spread up to rounding: the two-pass sum of squares of equal values is ~1e-32 of the mean squared
        flat = ss[several] <= n[several] * (1e-10 * mean) ** 2
        if flat.all():
            raise DataRoleError(
                f"outcome column '{col}' does not vary within any comparison cell (jurisdiction, group, period) that "
                "holds several rows: it looks like one value per cell copied onto every row (say a region's rate "
                "on each of its people), which would count each copy as a new observation. Give one row per "
                "cell, or the row-level outcome."
            )


def _coverage(study: Study, cells: Cells) -> list[str]:
    """Refuse an adopter without an observed pre- and post-period; name the comparison jurisdictions seen
    in fewer than two periods (a warning: they contribute nothing to the comparison of changes)."""
    import warnings

    from .errors import DataRoleError, SparseJurisdictionWarning

    seen = (cells.n > 0).all(axis=1) if cells.design == "DDD" else (cells.n[:, 0, :] > 0)  # (J, T)
    how = "with both groups " if cells.design == "DDD" else ""
    for j in cells.adopters:
        s = cells.start[j]
        pre, post = int(seen[j, :s].sum()), int(seen[j, s:].sum())
        if pre == 0 or post == 0:
            raise DataRoleError(
                f"adopter '{cells.jurisdictions[j]}' is observed {how}in {pre} period(s) before its start "
                f"({cells.periods[s]!r}) and {post} from it on; it needs at least one of each to inform the effect. "
                f"Add its rows to the table, or remove it from 'policy.adopters'."
            )
    sparse = [(cells.jurisdictions[j], int(seen[j].sum())) for j in cells.comparisons if seen[j].sum() < 2]
    if not sparse:
        return []
    shown = ", ".join(f"'{name}' ({k} period{'s' if k != 1 else ''})" for name, k in sparse[:8])
    more = f" and {len(sparse) - 8} more" if len(sparse) > 8 else ""
    msg = (
        f"comparison jurisdiction(s) {shown}{more} are observed {how}in fewer than 2 periods, so they contribute "
        "nothing to the comparison of changes (they are kept in the fit). Check the table for missing rows."
    )
    warnings.warn(msg, SparseJurisdictionWarning, stacklevel=3)
    return [msg]


def _gap_of(study: Study, cells: Cells):
    """The gap noise's structure over periods for this study (see :mod:`bayesdid.model.structure`)."""
    from .model.structure import resolve_gap

    asked = study.model.gap_over_time
    return resolve_gap(
        cells, asked, study.model.gap_drift, scale=study.model.gap_scale, warn=False
    )  # warned when the model is fitted (run.analyse)


def collapse(study: Study, frame: pd.DataFrame) -> Cells:
    """Check the roles of ``frame`` and collapse it to cells.

    Raises
    ------
    DataRoleError
        From the role checks; when the outcome is constant (overall, over the comparison
        jurisdictions, or within every comparison cell of several rows); and when an adopter has
        no observed target-group cell in its pre- or post-period (nothing to estimate from).

    Warns
    -----
    SparseJurisdictionWarning
        Naming the comparison jurisdictions observed in fewer than two periods; the message is
        also kept in ``cells.extra["warnings"]`` (and so in the run's notes).
    """
    from .errors import DataRoleError

    study, frame = as_count_rows(study, frame)
    checked = check_roles(study, frame)
    if study.summary == "mean":
        checked = check_summary_rows(study, checked)
    elif study.columns.weight is not None:
        checked[study.columns.weight] = check_weights(study, checked)
    if study.columns.unit is not None:
        check_units(study, checked)
    cells = collapse_frame(study, checked)
    for j in cells.adopters:
        tgt = cells.n[j, cells.target]
        s = cells.start[j]
        if tgt[:s].sum() == 0 or tgt[s:].sum() == 0:
            raise DataRoleError(
                f"adopter '{cells.jurisdictions[j]}' has no rows in the target group "
                "before or after its start; it cannot inform the effect."
            )
    _refuse_constant(study, checked, cells)
    cells = replace(cells, extra={**cells.extra, "gap": _gap_of(study, cells)})
    notes = _coverage(study, cells)
    if notes:
        cells = replace(cells, extra={**cells.extra, "warnings": notes})
    return cells
