"""Simulation-based calibration reps: parameters drawn from the model's own prior, the rank of each truth."""

from __future__ import annotations

import dataclasses

import numpy as np

# the prior sampler is the model's numpy twin (model/twins.py; tested in tests/test_sbc_prior.py)
from ..model.twins import draw_prior as _draw_prior
from ..model.twins import treat_by_adopter as _treat_by_adopter  # noqa: F401 - the tests' name
from .scenarios import _cells_of, _frame_of, _scenario
from .tasks import SBC_DRAWS, SBC_PARAMETERS, RepTask, _settings


def _prior_cells(template, prior: dict, rng: np.random.Generator, latent: dict | None = None):
    """(truth, cells): a data set drawn from the prior predictive on the design of ``template``.

    Each cell's mean and within sum of squares are drawn as those of its ``n`` Normal rows would be
    (the mean Normal with variance sd^2 / n, the sum of squares sd^2 chi-square(n - 1)).
    """
    truth, mean, sd = _draw_prior(template, prior, rng, latent)
    n = template.n
    ybar = mean + sd / np.sqrt(np.maximum(n, 1.0)) * rng.standard_normal(n.shape)
    ss = sd**2 * rng.chisquare(np.maximum(n - 1.0, 1.0)) * (n > 1)
    cells = dataclasses.replace(
        template,
        sum_y=n * ybar,
        sum_y2=ss + n * ybar**2,
        ss=ss,
        outcome_mean=prior["location"],
        outcome_sd=prior["sd"],
    )
    return truth, cells


def _sbc_rep(task: RepTask) -> dict:
    from ..sample import diagnose, fit_cells

    cs = _scenario(task.scenario)
    data_seed, sampler_seed = task.seeds
    rng = np.random.default_rng(data_seed)
    frame, truth0 = _frame_of(cs, data_seed)
    template = _cells_of(frame, cs.scenario, truth0)  # the design (n per cell, starts) of this rep
    truth, cells = _prior_cells(template, task.sbc_prior, rng)
    fit = fit_cells(cells, task.sbc_prior["scales"], _settings(task, sampler_seed))
    row = {
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "divergences": fit.diagnostics.get("divergences"),
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "sample_s": fit.timing["sample_s"],
        "compile_s": fit.timing["compile_s"],
    }
    for name in SBC_PARAMETERS:
        if name not in truth:
            continue
        d = fit.draws(name).ravel()
        keep = d[np.linspace(0, d.size - 1, SBC_DRAWS).round().astype(int)]
        row[f"{name}_truth"] = truth[name]
        row[f"{name}_rank"] = int(np.sum(keep < truth[name]))
        # bulk ESS of this parameter: below SBC_DRAWS the ranked draws are autocorrelated, which
        # spreads the ranks out (Talts et al. 2018, section 5.1) even when the posterior is right
        row[f"{name}_ess"] = diagnose(fit.tree, var_names=[name])["ess_bulk_min"]
    return row


def sbc_prior(scenario: str, base_seed: int) -> dict:
    """The prior the SBC reps draw from: default scales of a pilot data set, fixed for every rep."""
    from ..model.terms import resolve_scales
    from ..study import PriorScales

    cs = _scenario(scenario)
    frame, truth = _frame_of(cs, int(base_seed))
    cells = _cells_of(frame, cs.scenario, truth)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    return {"scales": scales, "location": float(cells.outcome_mean), "sd": float(cells.outcome_sd)}


# ---- executors -------------------------------------------------------------------------------------
