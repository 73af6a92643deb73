"""What every check returns, and the small numeric helpers the checks share.

A :class:`CheckResult` holds a ``status`` ("ok", "flag", "not applicable" or "failed": the check
raised, and the reason names the error; the other checks still run), the ``threshold``
used (as text and numbers), the ``offenders`` (what tripped the flag), a plain ``reason``, the
numbers behind it (``details``) and the plot data (``tables``: name -> pandas DataFrame, written as
``<name>.csv`` by :func:`bayesdid.checks.runner.write_checks`).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from ..cells import Cells
from ..effects import att_weights as effect_weights  # the ATT's one weight rule, under the checks' name

__all__ = [
    "CheckResult",
    "not_applicable",
    "pre_weight",
    "earliest_start",
    "effect_weights",
    "interval_row",
    "reseed",
    "STATUSES",
    "failed",
]

STATUSES = ("ok", "flag", "not applicable", "failed")


@dataclass
class CheckResult:
    """The outcome of one check; describes itself with :meth:`to_dict` and ``str()``."""

    name: str
    status: str
    reason: str
    threshold: dict = field(default_factory=dict)
    offenders: list = field(default_factory=list)
    details: dict = field(default_factory=dict)
    tables: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.status not in STATUSES:
            raise ValueError(f"status must be one of {STATUSES}, got {self.status!r}")

    def to_dict(self) -> dict:
        return {
            "status": self.status,
            "reason": self.reason,
            "threshold": self.threshold,
            "offenders": self.offenders,
            **self.details,
            "tables": [f"{k}.csv" for k in self.tables],
        }

    def __str__(self) -> str:
        return f"{self.name}: {self.status} - {self.reason}"


def not_applicable(name: str, reason: str, threshold: dict | None = None) -> CheckResult:
    return CheckResult(name=name, status="not applicable", reason=reason, threshold=threshold or {})


def failed(name: str, exc: BaseException) -> CheckResult:
    """The result of a check that raised: status "failed", the error named in the reason."""
    return CheckResult(
        name=name,
        status="failed",
        reason=f"the check could not be completed: {type(exc).__name__}: {exc}",
        details={"error": type(exc).__name__},
    )


def earliest_start(cells: Cells) -> int:
    """Index of the earliest real start period."""
    return int(cells.start[cells.adopters].min())


def pre_weight(cells: Cells) -> np.ndarray:
    """Likelihood weights that keep only policy-free data: each adopter's periods from its start on
    get weight 0; comparison jurisdictions (never treated) keep every period.

    Choice (one of the two the issue allows): rather than cutting the table at the earliest start,
    the treated jurisdiction-periods are dropped with weight 0. The fit keeps the main model's
    shape (its compiled form re-samples with new data, no recompile) and the common period effects
    stay identified by the comparison jurisdictions in every period; the effect parameters have no
    data left and are not read.
    """
    w = cells.jt_weight().copy()
    for j in cells.adopters:
        w[j, cells.start[j] :] = 0.0
    return w


def interval_row(x: np.ndarray, prob: float = 0.9) -> dict:
    """mean, equal-tailed interval and P(> 0) of a scalar's draws (plot-table columns)."""
    x = np.asarray(x, dtype=float).ravel()
    lo, hi = np.quantile(x, [(1 - prob) / 2, 1 - (1 - prob) / 2])
    return {
        "mean": float(np.mean(x)),
        "sd": float(np.std(x, ddof=1)) if x.size > 1 else 0.0,
        "lower_90": float(lo),
        "upper_90": float(hi),
        "prob_gt_0": float(np.mean(x > 0)),
    }


def reseed(settings, offset: int):
    """The sampler settings with a seed derived from the study seed (one offset per check fit)."""
    return dataclasses.replace(settings, seed=int(settings.seed) + int(offset))


def plain(v):
    return v.item() if hasattr(v, "item") else v


def frame(rows: list[dict]) -> pd.DataFrame:
    return pd.DataFrame(rows)
