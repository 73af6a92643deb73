"""Coverage reps: one simulated data set with a known ATT, the posterior and the least-squares intervals."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

from .scenarios import _cells_of, _frame_of, _scenario
from .tasks import LEVELS, RepTask, _pct, _settings


def _shift_treated(cells, effect_by_jur: np.ndarray):
    """Cells with ``effect_by_jur[j]`` subtracted from every treated target-group row (ss unchanged)."""
    d = cells.treated * effect_by_jur[:, None, None]
    sum_y = cells.sum_y - cells.n * d
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(cells.n > 0, sum_y / np.where(cells.n > 0, cells.n, 1.0), 0.0)
    return dataclasses.replace(cells, sum_y=sum_y, sum_y2=cells.ss + cells.n * mean**2)


def _coverage_rep(task: RepTask) -> dict:
    from scipy import stats

    from ..crosscheck import cross_check
    from ..effects import att_weights
    from ..model.terms import resolve_scales
    from ..sample import fit_cells
    from ..study import PriorScales

    cs = _scenario(task.scenario)
    data_seed, sampler_seed = task.seeds
    frame, truth = _frame_of(cs, data_seed)
    cells = _cells_of(frame, cs.scenario, truth)
    effect_j = np.zeros(len(cells.jurisdictions))
    for name, v in truth["tau_adopter"].items():
        effect_j[cells.jurisdictions.index(name)] = v
    w = att_weights(cells)
    att_true = float(np.dot(w, effect_j[cells.adopters]))
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    fit = fit_cells(cells, scales, _settings(task, sampler_seed))
    att = fit.draws("tau_adopter") @ w
    row = {
        "truth": att_true,
        "posterior_mean": float(att.mean()),
        "posterior_sd": float(att.std(ddof=1)),
        "rhat_max": fit.diagnostics.get("rhat_max"),
        "divergences": fit.diagnostics.get("divergences"),
        "diagnostics_ok": bool(fit.diagnostics.get("ok")),
        "sample_s": fit.timing["sample_s"],
        "compile_s": fit.timing["compile_s"],
    }
    for a in LEVELS:
        lo, hi = np.quantile(att, [(1 - a) / 2, (1 + a) / 2])
        row[f"posterior_cover_{_pct(a)}"] = bool(lo <= att_true <= hi)
        row[f"posterior_width_{_pct(a)}"] = float(hi - lo)
    # Least squares on the cells with the truth taken out: every test below is of the true null.
    xc = cross_check(_shift_treated(cells, effect_j), seed=sampler_seed, draws=task.cross_check_draws, placebos=999)
    est = xc["estimate"] + att_true
    se, C = xc["se_cr1"], xc["clusters"]
    row.update({"ls_estimate": est, "se_cr1": se, "clusters": C})
    for a in LEVELS:
        q = stats.t.ppf((1 + a) / 2, C - 1)
        row[f"cr1_cover_{_pct(a)}"] = bool(abs(est - att_true) <= q * se)
        row[f"cr1_width_{_pct(a)}"] = float(2 * q * se)
        p_w, p_p = xc["p_wild"], xc["p_permutation"]
        row[f"wild_cover_{_pct(a)}"] = None if p_w is None else bool(p_w >= 1 - a)
        row[f"permutation_cover_{_pct(a)}"] = None if p_p is None else bool(p_p >= 1 - a)
    lo, hi = xc["ci_wild_95"] or (None, None)
    row["wild_width_95"] = math.inf if lo is None or hi is None else float(hi - lo)
    row["p_wild_at_truth"] = xc["p_wild"]
    row["p_permutation_at_truth"] = xc["p_permutation"]
    return row
