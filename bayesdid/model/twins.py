"""Numpy twins of the model that draw replicated data (posterior predictive), kept with the model.

:func:`replicate_gaps` replicates the adopters' target-minus-reference gap (or, for a DiD, the target
cell) at given periods: for the Gaussian family from the cell-mean model with the shock and the gap
noise drawn back (AR(1) over periods when the gap noise is persistent); for binomial and count
families on the link scale from the family's own sampling model
(:func:`bayesdid.model.families.replicate_gap_path`). The pre-trend check and the parallel-trends
sensitivity both read it. The formulas are in :mod:`bayesdid.checks.pretrend`.
"""

from __future__ import annotations

import numpy as np

from .families import gap_noise_draws as gap_path_draws
from .families import replicate_gap_path
from .family import family_record
from .gaussian import ar1_smoothing_draws, cell_arrays, residual_draws
from .structure import gap_scale_draws
from .terms import mean_from_draws

__all__ = ["replicate_gaps", "gap_noise_draws"]


def replicate_gaps(fit, j: int, periods: np.ndarray, rng: np.random.Generator):
    """Observed gap, expected gap (S, n) and replicated gap (S, n) of jurisdiction j at ``periods``.

    Gaussian: as in the module docstring. Other families: on the link scale, records replicated from
    the family itself (:func:`bayesdid.model.families.replicate_gap_path`).
    """
    if not family_record(fit.spec.family).cell_model:
        return replicate_gap_path(fit, j, periods, rng)
    cells = fit.cells
    m = mean_from_draws(fit)  # (S, J, G, T)
    sigma = residual_draws(fit)  # (S, G)
    sg = gap_scale_draws(fit)[:, j]  # jurisdiction j's own gap-noise scale (S,)
    S = sigma.shape[0]
    q = cells.target
    n_q = cells.n[j, q, periods]
    mean = cells.mean
    e = sg[:, None] * rng.standard_normal((S, len(periods)))
    if getattr(fit.spec, "gap", "independent") == "persistent":
        # AR(1) gap noise (bayesdid.model.structure): the same normals, chained over the periods
        # with correlation rho^(gap in periods) and the marginal sd kept at sigma_gap_j
        rho = fit.draws("rho")
        z = e.copy()
        for i in range(1, len(periods)):
            c = rho ** float(periods[i] - periods[i - 1])
            e[:, i] = c * e[:, i - 1] + np.sqrt(1.0 - c * c) * z[:, i]
    eps_q = sigma[:, q][:, None] / np.sqrt(n_q)[None, :] * rng.standard_normal((S, len(periods)))
    if cells.design == "DDD":
        r = cells.reference
        n_r = cells.n[j, r, periods]
        s = fit.draws("sigma_shock")[:, None] * rng.standard_normal((S, len(periods)))
        eps_r = sigma[:, r][:, None] / np.sqrt(n_r)[None, :] * rng.standard_normal((S, len(periods)))
        y_q = m[:, j, q, periods] + s + e + eps_q
        y_r = m[:, j, r, periods] + s + eps_r
        expected = m[:, j, q, periods] - m[:, j, r, periods]
        observed = mean[j, q, periods] - mean[j, r, periods]
        return observed, expected, y_q - y_r
    expected = m[:, j, q, periods]
    return mean[j, q, periods], expected, expected + e + eps_q


def gap_noise_draws(fit, rng: np.random.Generator) -> np.ndarray:
    """Draws of the gap noise e[j,t] from its conditional posterior: shape (S, J, T).

    The cell model integrates e out; it is drawn back given the two cell means of each
    jurisdiction-period (formulas in :mod:`bayesdid.checks.comparison`). Families with latent
    fields keep e in the posterior; its draws are used as they are (their period means are in the
    baselines)."""
    if not family_record(fit.spec.family).cell_model:
        return gap_path_draws(fit)
    cells = fit.cells
    arr = cell_arrays(cells)
    m = mean_from_draws(fit)
    sigma = residual_draws(fit)
    sg2 = gap_scale_draws(fit)[:, :, None] ** 2  # (S, J, 1): each jurisdiction's own scale
    q = cells.target
    dq = arr["ybar_q"][None] - m[:, :, q, :]
    C = sigma[:, q][:, None, None] ** 2 * arr["inv_n_q"][None]
    if cells.design == "DDD":
        r = cells.reference
        s2 = fit.draws("sigma_shock")[:, None, None] ** 2
        A = sigma[:, r][:, None, None] ** 2 * arr["inv_n_r"][None] + s2
        dr = arr["ybar_r"][None] - m[:, :, r, :]
        k = arr["p_r"][None] * s2 / A
    else:
        s2 = np.zeros_like(sg2)
        dr = np.zeros_like(dq)
        k = np.zeros_like(dq)
    V = C + s2 + sg2 - k * s2
    if getattr(fit.spec, "gap", "independent") == "persistent":
        # AR(1) gap noise: draw each jurisdiction's whole path jointly (forward filter, backward sampling)
        o = arr["p_q"][None] * arr["w"][None] + 0.0 * dq
        return ar1_smoothing_draws(
            dq - k * dr, C + (s2 - k * s2), o, sg2, fit.draws("rho")[:, None, None], rng.standard_normal(dq.shape)
        )
    pq = arr["p_q"][None]
    mean = pq * sg2 * (dq - k * dr) / V
    var = np.maximum(sg2 - pq * sg2 * sg2 / V, 0.0)
    return mean + np.sqrt(var) * rng.standard_normal(mean.shape)
