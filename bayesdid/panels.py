"""Panels (``data.unit``): the same units observed over periods, with unit fixed effects by centring.

Gaussian family only. Each row's outcome (on the model scale) is centred at its unit's mean over the
unit's periods before the collapse: ``y~_it = y_it - ybar_i``.

Estimand. With every unit of a jurisdiction-group observed once in each period that jurisdiction-group
is observed (a balanced panel, which is checked), the cell mean of ``y~`` is the cell mean of ``y``
minus a constant per jurisdiction-group; the model's baselines ``b[j, g]`` absorb that constant, and
every other term, the effect ``tau`` included, is unchanged. So the estimand is the same ATT as
without ``data.unit`` (the pooled one); what changes is the noise: persistent differences between
units no longer enter the cell means' sampling noise, so intervals are narrower when units differ a
lot. The least-squares cross-check is then the regression with unit dummies (same estimate, its
degrees of freedom counting the absorbed unit effects). In an unbalanced panel the subtracted unit
means change with the mix of units present in each period; the cell model would then no longer be
the unit fixed-effects model, so an unbalanced panel is refused (see README "Panels").

Sampling noise. Centring makes a unit's errors dependent: variance ``sigma^2 (1 - 1/T)`` and
correlation ``-1/(T - 1)`` across its T periods. Contrasts of periods within a jurisdiction-group
(all the effect is identified from, the baselines absorbing the rest) keep the variance of the
uncentred errors, ``sigma^2 * sum(c^2) / n``. The model treats the cell means as independent with
variance ``sigma^2 / n``, which gives exactly that variance for such contrasts, provided ``sigma`` is
the uncentred error sd: the within-cell sums of squares of ``y~`` are therefore scaled by
``T / (T - 1)`` (their expectation is ``(n - 1)(1 - 1/T) sigma^2``). The least-squares cross-check
uses the unscaled sums, as the regression with unit dummies does. ``bayesdid bench panel``
measures the resulting coverage.

Needs only numpy and pandas.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from .data import _rows_text
from .errors import DataRoleError
from .study import Study

__all__ = ["check_units", "within_units"]


def _ids(values, limit: int = 5) -> str:
    vals = list(values)
    shown = ", ".join(repr(v) for v in vals[:limit])
    return shown + (f" and {len(vals) - limit} more" if len(vals) > limit else "")


def check_units(study: Study, frame: pd.DataFrame) -> None:
    """Refuse what the unit fixed effects cannot take, naming the units.

    Raises
    ------
    DataRoleError
        A unit missing; a unit in two jurisdictions or two groups (count and a few ids); a unit with
        two rows in one period; a unit not observed in every period its jurisdiction-group is
        observed (an unbalanced panel).
    """
    c = study.columns
    u = frame[c.unit]
    miss = u.isna().to_numpy()
    if miss.any():
        raise DataRoleError(
            f"unit column '{c.unit}' has {_rows_text(miss)} missing; every row of a panel needs its "
            "unit. Fill or drop those rows, or leave out data.unit for a pooled analysis."
        )
    key = u.astype(str)
    for role in ("jurisdiction", "group"):
        col = getattr(c, role)
        if col is None:
            continue
        k = frame.groupby(key, sort=True)[col].nunique()
        moved = k[k > 1]
        if len(moved):
            ex = frame.loc[key.isin(moved.index[:3]), [c.unit, col]].astype(str).drop_duplicates()
            detail = "; ".join(
                f"{uid!r}: {', '.join(sorted(ex.loc[ex[c.unit] == uid, col]))}" for uid in moved.index[:3]
            )
            raise DataRoleError(
                f"{len(moved)} unit(s) of column '{c.unit}' appear in more than one {role} (column '{col}'), e.g. "
                f"{detail}. Unit fixed effects need each unit in one {role} throughout: a unit that moves mixes "
                f"two {role}s' conditions. Drop those units' rows, or assign each to one {role} by a rule stated "
                "in your protocol (say, its first period's)."
            )
    per = frame.groupby([key, frame[c.period].astype(str)], sort=False).size()
    dup = per[per > 1]
    if len(dup):
        ids = list(dict.fromkeys(i for i, _ in dup.index))
        raise DataRoleError(
            f"{len(ids)} unit(s) of column '{c.unit}' have more than one row in a period (e.g. {_ids(ids, 3)}). "
            "A panel here holds one row per unit and period: aggregate each unit's rows per period first (a sum "
            "or a mean, as the outcome means), or leave out data.unit for a pooled analysis."
        )
    cell = frame[c.jurisdiction].astype(str)
    if c.group is not None:
        cell = cell + "\x1f" + frame[c.group].astype(str)
    periods_of_cell = frame.groupby(cell, sort=False)[c.period].nunique()
    periods_of_unit = key.groupby(key, sort=False).size()
    cell_of_unit = cell.groupby(key, sort=False).first()
    need = periods_of_cell.reindex(cell_of_unit.to_numpy()).to_numpy()
    short = periods_of_unit.index[periods_of_unit.to_numpy() < need]
    if len(short):
        raise DataRoleError(
            f"{len(short)} unit(s) of column '{c.unit}' are not observed in every period of their jurisdiction"
            f"{' and group' if c.group else ''} (e.g. {_ids(short)}): the panel is unbalanced. bayesdid's unit fixed "
            "effects need a balanced panel (with attrition the centred cell means would mix units differently "
            "in each period). Keep the units observed throughout, or leave out data.unit for the pooled analysis "
            "(same estimand, wider intervals when units differ a lot)."
        )
    single = periods_of_cell[periods_of_cell < 2]
    if len(single):
        raise DataRoleError(
            f"{len(single)} jurisdiction(s){'/group(s)' if c.group else ''} are observed in a single period "
            f"(e.g. {_ids([s.replace(chr(31), '/') for s in single.index])}); with unit fixed effects their units "
            "carry no information. Drop their rows, or leave out data.unit."
        )


def within_units(units: pd.Series, y: np.ndarray) -> dict:
    """Centre ``y`` within units; per row the scale ``T_i / (T_i - 1)`` of the squared deviations.

    Returns ``y`` (centred), ``scale`` (per row), ``units`` (their number).
    """
    code, uniques = pd.factorize(units.astype(str), sort=False)
    size = np.bincount(code).astype(float)
    mean = np.bincount(code, weights=y) / size
    T = size[code]
    return {"y": y - mean[code], "scale": np.where(T > 1, T / np.maximum(T - 1, 1), 1.0), "units": len(uniques)}
