"""The family registry: how each outcome family's model is built, what it has, and what it reports.

Each family is one :class:`~bayesdid.model.family.Family` record (defined in :mod:`.family`, which
imports nothing of the package so that the study file and the data checks below the model can read
it; re-exported here): which sufficient statistics its cells keep, the size column of its rows, its
link and whether the effect reads as a ratio, its natural-scale measures, the priors and study
options it has. :func:`build_model`, :func:`data_arrays` and :func:`pointwise_loglik` dispatch on
the record (the cell model, or records with latent fields), so nothing outside ``model/`` needs to
branch on the family's name (``tests/test_house.py`` fails on any such branch).

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

import numpy as np
import pymc as pm

from ..cells import Cells
from ..study import PRIOR_NAMES
from . import families, gaussian
from .families import FAMILY_BUILDERS, build_family
from .family import FAMILIES, FAMILY_RECORDS, Family, family_record
from .gaussian import build_gaussian
from .terms import ModelSpec, coords_of, model_spec

__all__ = [
    "Family",
    "FAMILIES",
    "FAMILY_RECORDS",
    "family_record",
    "FAMILY_PRIORS",
    "model_priors",
    "study_priors",
    "NATURAL_MEASURES",
    "build_model",
    "data_arrays",
    "pointwise_loglik",
]

#: Priors of each family beyond the shared ones (see the module docstring), read off the records.
FAMILY_PRIORS = {n: f.extra_priors for n, f in FAMILY_RECORDS.items()}
#: What each family reports on the natural scale (summary.json ``effect_natural``), read off the records.
NATURAL_MEASURES = {n: f.natural_measures for n, f in FAMILY_RECORDS.items()}
_SHARED = ("intercept", "baseline_spread", "period", "gap_noise", "effect")


def model_priors(
    family: str, design: str, n_adopters: int, covariates: bool, *, drift: bool = False, residual: bool = True
) -> tuple[str, ...]:
    """The prior names the model of this family and design reads, in :data:`PRIOR_NAMES` order.

    ``drift``: the model has pooled linear gap drifts; ``residual=False``: a Gaussian model without a
    separate residual sd (cells of one row)."""
    have = set(_SHARED) | set(family_record(family).extra_priors)
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
    return model_priors(
        study.model.family,
        "DDD" if study.columns.group else "DiD",
        len(study.policy.adopters),
        bool(study.model.covariates),
        drift=bool(getattr(study.model, "gap_drift", False)),
    )


def build_model(
    cells: Cells,
    scales: dict[str, float],
    family: str = "gaussian",
    *,
    effects: str = "att",
    event_times: tuple | None = None,
    event_pooled: bool = False,
) -> tuple[pm.Model, ModelSpec]:
    """Build the PyMC model of ``family`` on ``cells`` with the given prior scales."""
    spec = model_spec(cells, family, effects=effects, event_times=event_times, event_pooled=event_pooled)
    terms = (
        ({"drift": True} if spec.drift else {})
        if spec.effects == "att"
        else {"effects": "event_time", "event_times": spec.event_times, "event_pooled": spec.event_pooled}
    )
    if family_record(family).cell_model:
        return build_gaussian(
            cells,
            scales,
            coords_of(cells, spec.event_times),
            gap=spec.gap,
            gap_scale=spec.gap_scale,
            residual=spec.residual,
            **terms,
        ), spec
    if family in FAMILY_BUILDERS:
        return build_family(
            cells,
            scales,
            coords_of(cells, spec.event_times),
            family,
            gap=spec.gap,
            gap_scale=spec.gap_scale,
            **{k: v for k, v in terms.items() if k != "drift"},
        ), spec
    raise NotImplementedError(f"family '{family}' is not built yet")


def pointwise_loglik(fit) -> np.ndarray:
    """Log-likelihood of each jurisdiction-period for every draw: (S, J, T). Gaussian: the shock and gap
    noise integrated out (:func:`bayesdid.model.gaussian.pointwise_loglik`); other families: given the
    latent fields (:func:`bayesdid.model.families.pointwise_loglik`)."""
    if family_record(fit.spec.family).cell_model:
        return gaussian.pointwise_loglik(fit)
    return families.pointwise_loglik(fit)


def data_arrays(cells: Cells, family: str) -> dict[str, np.ndarray]:
    """The data arrays the model of ``family`` reads beyond the design: the cells' moment sums for the cell
    model (:func:`bayesdid.model.gaussian.cell_arrays`), the records otherwise
    (:func:`bayesdid.model.families.data_arrays`)."""
    if family_record(family).cell_model:
        return gaussian.cell_arrays(cells)
    return families.data_arrays(cells, family)
