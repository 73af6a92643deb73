"""The numpy twins of the model (bayesdid/model/twins.py) against the PyMC graph they copy.

* the log prior that power-scaling reads: each variable's density equals the model's own log
  probability term (``model.compile_logp(vars=[v], jacobian=False)``) at random parameter values, to
  1e-8; and every free variable whose prior reads a user-settable scale (a ``prior_*`` container) is
  either in the twin's table or named here as not power-scaled, so a new prior cannot be missed.
"""

from __future__ import annotations

import numpy as np
import pymc as pm
import pytest
from pytensor.graph.traversal import ancestors
from test_priors_used import CASES, _cells

from bayesdid.model.registry import build_model
from bayesdid.model.terms import resolve_scales
from bayesdid.model.twins import POWER_SCALED_PRIORS, log_prior

pytestmark = pytest.mark.slow  # one PyMC model and one logp compile per case

#: Free variables with a user-settable prior scale that power-scaling leaves out (bayesdid.sensitivity):
#: the covariate coefficients, the negative binomial dispersion, the drift spread, and the standard-normal
#: or centred latent levels (the hierarchical level, not a prior the analyst chose).
NOT_POWER_SCALED = {
    "tau_adopter_mean",  # with several adopters the graph samples their mean and draws tau from its exact
    # conditional; tau's own prior N(0, effect) is the generative one the twin scales (model.terms)
    "theta",
    "dispersion",
    "sigma_drift",
    "baseline",
    "baseline_rotated",
    "level_reference",
    "level_target",
}


def _model(case):
    family, groups, adopters, covariates, rows, drift = case
    cells, study = _cells(family, groups, adopters, covariates, rows, drift)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    model, _ = build_model(cells, scales, family)
    return model, scales, cells


@pytest.mark.parametrize("case", CASES, ids=[f"{c[0]}-{c[1]}g-{c[2]}a" + ("-cov" if c[3] else "") for c in CASES])
def test_log_prior_twin_equals_the_models_own_logp(case):
    model, scales, cells = _model(case)
    names = {v.name for v in model.free_RVs}
    assert names & set(POWER_SCALED_PRIORS), "the twin covers none of this model's priors"
    rng = np.random.default_rng(20261203)
    draws = pm.draw(model.free_RVs, draws=5, random_seed=rng)  # 5 joint prior draws of every free variable
    values = {v.name: np.asarray(d) for v, d in zip(model.free_RVs, draws, strict=True)}
    twin = log_prior({k: v[None] for k, v in values.items()}, scales, float(cells.outcome_mean))
    if "rho_unit" in values:  # the twin reads rho = 2 u - 1, the posterior's deterministic
        twin = log_prior(
            {**{k: v[None] for k, v in values.items()}, "rho": 2.0 * values["rho_unit"][None] - 1.0},
            scales,
            float(cells.outcome_mean),
        )
    assert ("rho" in twin) == ("rho_unit" in values)  # persistent gap noise: its prior is checked too
    rvs = [model["rho_unit" if name == "rho" else name] for name in twin]
    terms = model.compile_logp(vars=rvs, jacobian=False, sum=False)  # the model's own terms, one per variable
    for i in range(5):
        point = {}
        for rv in model.free_RVs:
            tr = model.rvs_to_transforms.get(rv)
            x = values[rv.name][i]
            point[model.rvs_to_values[rv].name] = tr.forward(x, *rv.owner.inputs).eval() if tr is not None else x
        got = [float(np.sum(t)) for t in terms(point)]
        for name, g in zip(twin, got, strict=True):
            assert float(twin[name][0, i]) == pytest.approx(g, abs=1e-8, rel=1e-10), (name, i)
    # every free variable whose prior reads a prior_* scale is the twin's or declared as not power-scaled
    for rv in model.free_RVs:
        reads = {
            v.name
            for v in ancestors(rv.owner.inputs)
            if getattr(v, "name", None) and v.name.startswith("prior_") and not v.name.startswith("prior_rho")
        }
        if reads:
            assert rv.name in POWER_SCALED_PRIORS or rv.name in NOT_POWER_SCALED, (rv.name, reads)
