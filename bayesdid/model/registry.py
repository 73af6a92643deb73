"""What each outcome family's model has, in one place: its priors and its natural-scale measures.

The model of every family shares the hierarchical terms (:mod:`.terms`); which prior scales it then
reads depends on the family and the design:

* always: ``intercept``, ``baseline_spread``, ``period``, ``gap_noise``, ``effect``;
* a DDD (two groups): ``group_period`` (the target group's own period effects) and
  ``shock_spread`` (the jurisdiction-period shock the triple difference removes); a DiD has neither;
* two or more adopters: ``adopter_spread`` (one adopter has no spread of effects);
* gaussian: ``residual`` (each group's row-level sd), unless the cells cannot identify it
  (:func:`bayesdid.model.structure.residual_rule`); negbinomial: ``dispersion``;
* with covariates: ``covariate``; with pooled linear gap drifts (``model.gap_drift``): ``drift_spread``.

A prior the fitted model does not have is neither listed in summary.json nor accepted by a sweep.
"""

from __future__ import annotations

from ..study import FAMILIES, PRIOR_NAMES

__all__ = ["FAMILY_PRIORS", "model_priors", "study_priors", "NATURAL_MEASURES"]

#: Priors of each family beyond the shared ones (see the module docstring).
FAMILY_PRIORS = {"gaussian": ("residual",), "binomial": (), "poisson": (), "negbinomial": ("dispersion",)}
#: What each family reports on the natural scale (summary.json ``effect_natural``).
NATURAL_MEASURES = {
    "gaussian": ("the ATT in outcome units, or the percent change exp(ATT) - 1 for a log outcome",),
    "binomial": ("risk difference, percentage points", "risk ratio"),
    "poisson": ("rate ratio", "rate difference per 1,000 units of exposure",
                "events averted per 1,000 units of exposure", "events averted in the treated cells (total)"),
}
NATURAL_MEASURES["negbinomial"] = NATURAL_MEASURES["poisson"]
_SHARED = ("intercept", "baseline_spread", "period", "gap_noise", "effect")


def model_priors(family: str, design: str, n_adopters: int, covariates: bool, *, drift: bool = False,
                 residual: bool = True) -> tuple[str, ...]:
    """The prior names the model of this family and design reads, in :data:`PRIOR_NAMES` order.

    ``drift``: the model has pooled linear gap drifts; ``residual=False``: a Gaussian model without a
    separate residual sd (cells of one row)."""
    if family not in FAMILIES:
        raise ValueError(f"unknown family '{family}'; choose one of {list(FAMILIES)}")
    have = set(_SHARED) | set(FAMILY_PRIORS[family])
    if not residual:
        have.discard("residual")
    if drift:
        have.add("drift_spread")
    if design == "DDD":
        have |= {"group_period", "shock_spread"}
    if n_adopters >= 2:
        have.add("adopter_spread")
    if covariates:
        have.add("covariate")
    return tuple(n for n in PRIOR_NAMES if n in have)


def study_priors(study) -> tuple[str, ...]:
    """:func:`model_priors` of a :class:`~bayesdid.study.Study` (read from its settings, no data)."""
    return model_priors(study.model.family, "DDD" if study.columns.group else "DiD", len(study.policy.adopters),
                        bool(study.model.covariates), drift=bool(getattr(study.model, "gap_drift", False)))
