"""How the gap noise behaves over periods: the structure a study asks for and the one fitted.

The gap noise e[j,t] (DDD: of the target-minus-reference gap; DiD: of the jurisdiction-period) is,
within each jurisdiction, either

* ``"persistent"`` (the default): a stationary AR(1) over the periods in their order,
  ``e[j,t] = rho e[j,t-1] + u[j,t]``, ``u ~ Normal(0, sigma_gap^2 (1 - rho^2))``, ``e[j,0] ~
  Normal(0, sigma_gap^2)``, one correlation rho shared by all jurisdictions, learned; or
* ``"independent"``: independent over periods (the special case rho = 0).

Jurisdiction-level outcomes are persistent: a place above its usual level this year tends to be
above it next year (Bertrand, Duflo and Mullainathan 2004, QJE 119(1)). A model that treats periods
as independent lets the baselines absorb the persistent part and learns too small a gap noise, so
its intervals are too narrow exactly when the stakes are highest (one or few adopters).

Prior on rho: ``(rho + 1) / 2 ~ Beta(2.5, 1.5)`` (the two numbers are data containers
``prior_rho_a`` and ``prior_rho_b``). It is weakly informative: its mean is rho = 0.25 and its
central 90% runs from about -0.53 to 0.88, so it leans toward the positive persistence that
state and regional panels show while leaving negative values possible; its density goes to zero
at +-1, which keeps the sampler away from the non-stationary edge where sigma_gap and the
baselines stop being separately identified.

The DDD's shared jurisdiction-period shock s[j,t] stays independent over periods: the triple
difference removes it (both groups of a jurisdiction-period share it), so its persistence cannot
bias the effect or its interval; it only decides how the reference group's cells inform the
target group's, and modelling its serial correlation would cost a second correlation that the data
barely identify.

Rule: persistence needs periods before the policy to be learned and to separate a persistent gap
from the effect. With fewer than :data:`MIN_PRE_PERIODS` pre-policy periods (counted for the adopter
that starts first) the independent form is fitted, with a :class:`~bayesdid.errors.PersistenceFallbackWarning`
that names the reason; the reason is recorded in summary.json.
"""

from __future__ import annotations

import warnings
from dataclasses import asdict, dataclass

import numpy as np

from ..errors import PersistenceFallbackWarning

__all__ = [
    "GAP_FORMS",
    "MIN_PRE_PERIODS",
    "RHO_PRIOR",
    "MIN_WITHIN_DF",
    "GapStructure",
    "resolve_gap",
    "gap_structure",
    "rho_prior_logpdf",
    "residual_rule",
]

#: Study-file values of ``model.gap_over_time``.
GAP_FORMS = ("persistent", "independent")
#: Fewest pre-policy periods with which the persistent form is fitted.
MIN_PRE_PERIODS = 3
#: Beta(a, b) prior on (rho + 1) / 2, see the module docstring.
RHO_PRIOR = {"a": 2.5, "b": 1.5}


@dataclass(frozen=True)
class GapStructure:
    """The gap noise's structure over periods as fitted, with what was asked and why they differ."""

    over_time: str = "persistent"
    requested: str = "persistent"
    fallback: str | None = None
    drift: bool = False

    def to_dict(self) -> dict:
        out = asdict(self)
        out["meaning"] = (
            "gap noise follows a stationary AR(1) over periods within each jurisdiction, one correlation "
            f"rho shared by all, prior (rho + 1)/2 ~ Beta({RHO_PRIOR['a']:g}, {RHO_PRIOR['b']:g})"
            if self.over_time == "persistent"
            else "gap noise independent over periods"
        )
        return out


def pre_periods(cells) -> int:
    """Number of periods before the first adopter's start (0 when nobody adopts)."""
    ad = cells.adopters
    return int(np.min(cells.start[ad])) if len(ad) else 0


def resolve_gap(cells, requested: str = "persistent", drift: bool = False, *, warn: bool = True) -> GapStructure:
    """The structure fitted for ``requested``: the persistent form falls back to the independent one
    when the first adopter has fewer than :data:`MIN_PRE_PERIODS` pre-policy periods."""
    if requested not in GAP_FORMS:
        raise ValueError(f"gap form must be one of {GAP_FORMS}, got {requested!r}")
    if requested == "persistent":
        k = pre_periods(cells)
        if k < MIN_PRE_PERIODS:
            reason = (
                f"the first adopter has {k} pre-policy period(s), fewer than {MIN_PRE_PERIODS}: the "
                "correlation of the gap noise over periods (rho) cannot be learned apart from the effect, "
                "so the gap noise is fitted as independent over periods (model.gap_over_time = "
                "'independent'); its intervals may be too narrow if the outcome is persistent."
            )
            if warn:
                warnings.warn(reason, PersistenceFallbackWarning, stacklevel=2)
            return GapStructure(over_time="independent", requested=requested, fallback=reason, drift=drift)
    return GapStructure(over_time=requested, requested=requested, drift=drift)


def gap_structure(cells) -> GapStructure:
    """The structure recorded on ``cells`` by the collapse (``cells.extra["gap"]``), or the default
    (persistent, with its fallback rule, silently) for cells built without a study."""
    g = cells.extra.get("gap") if cells.extra else None
    if isinstance(g, GapStructure):
        return g
    return resolve_gap(cells, warn=False)


def rho_prior_logpdf(rho: np.ndarray, a: float = RHO_PRIOR["a"], b: float = RHO_PRIOR["b"]) -> np.ndarray:
    """Log density of rho under ``(rho + 1)/2 ~ Beta(a, b)`` (the Jacobian 1/2 included)."""
    from scipy import stats

    return stats.beta.logpdf((np.asarray(rho) + 1.0) / 2.0, a, b) - np.log(2.0)


#: Fewest within-cell degrees of freedom, sum over cells of (n - 1), with which the residual sd is fitted.
MIN_WITHIN_DF = 30


def residual_rule(cells) -> dict:
    """Whether the Gaussian model gets a separate residual sd, and why.

    The rows of a cell inform the residual sd only through their spread around the cell mean, whose
    degrees of freedom are sum over cells of (n - 1). With one row per cell (the usual shape of
    state-year data) that is 0, and the residual sd and the gap noise enter the likelihood only as
    the sum sigma^2 / n + sigma_gap^2: a ridge the sampler cannot cross (R-hat 1.10 seen on a
    state panel). Below :data:`MIN_WITHIN_DF` degrees of freedom the estimate of sigma would rest on
    very few spreads (its relative sd is about 1 / sqrt(2 df), over 13% below 30: common practice
    for a variance's small-sample error), so the model leaves it out: the cell means alone carry the
    likelihood and the gap noise (and, in a DDD, the shared shock) absorbs the rows' own noise.
    The rule reads the cell counts only, so placebos and dropped jurisdictions keep one structure.
    """
    n = np.asarray(cells.n, dtype=float)
    df = float(np.maximum(n - 1.0, 0.0).sum())
    separate = df >= MIN_WITHIN_DF
    out = {"separate": bool(separate), "within_cell_df": int(df), "threshold": MIN_WITHIN_DF}
    if not separate:
        out["reason"] = (
            f"the cells hold {int(df)} within-cell degree(s) of freedom (sum of rows - 1 over cells), "
            f"fewer than {MIN_WITHIN_DF}: the residual sd is not identified apart from the gap noise, "
            "so it is left out and the gap noise absorbs the rows' own noise (the fit uses the cell "
            "means alone)."
        )
    return out
