"""Power-scaling prior and likelihood sensitivity (Kallioinen et al. 2023) after every fit.

Power-scaling raises the prior (or the likelihood) to a power alpha near 1 and asks how much the
posterior moves; Pareto-smoothed importance sampling reweights the existing draws, so no refit is
needed. The sensitivity of a parameter is the derivative at alpha = 1 of the cumulative Jensen-Shannon
distance between the base and the power-scaled posterior (``arviz.psense``); values of 0.05 or more
count as sensitive (the threshold of Kallioinen et al. 2023 and of ``arviz.psense_summary``).

Reading (Kallioinen et al. 2023, section 2.4):

* prior >= 0.05 and likelihood >= 0.05: *prior-data conflict*, the prior pulls against the data;
* prior >= 0.05 and likelihood < 0.05: *prior dominates*, the data say little about the parameter
  (with one or two adopters this is expected for ``sigma_tau``, the spread of effects across adopters);
* otherwise: *data dominate*, the prior is not driving the answer.

Which priors are power-scaled: the priors with a user-settable scale (the ``prior_<name>`` data
containers): ``mu_group``, ``sigma_baseline``, ``period_raw``, ``group_period_raw``, ``tau``,
``sigma_tau``, ``sigma``, ``sigma_gap``, ``sigma_shock``. The standard-normal latent deviations of the
non-centred terms (``z_baseline``, ``z_tau``, ``z_gap_scale``) and the centred baselines are the hierarchical level, not
a prior the analyst chose; Kallioinen et al. (2023, section 2.3) recommend leaving such terms out.
The fixed priors of the gap noise's structure, rho's Beta and omega's HalfNormal
(:mod:`bayesdid.model.structure`), are scaled with the joint prior; their own sensitivity is not
reported (they have no user-settable scale).

The log prior is evaluated in numpy from the posterior draws by the model's twin
:func:`bayesdid.model.twins.log_prior` (tested against the model's own logp), so it needs no PyMC
model and works for a cached compiled model.

References
----------
Kallioinen, N., Paananen, T., Buerkner, P.-C. and Vehtari, A. (2023). Detecting and diagnosing
prior and likelihood sensitivity with power-scaling. Statistics and Computing 34, 57.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import xarray as xr

__all__ = [
    "log_prior_dataset",
    "log_likelihood_dataset",
    "power_scaling",
    "PowerScaling",
    "ParameterSensitivity",
    "SENSITIVE",
    "CHECKED_PARAMETERS",
    "diagnosis",
]

#: Sensitivity at or above which a component counts as influential (Kallioinen et al. 2023).
SENSITIVE = 0.05

#: Up to this many adopters the spread of their effects (sigma_tau) is expected to be prior-driven.
FEW_ADOPTERS = 3

#: Parameters whose sensitivity is reported: the effect and the variance parameters.
CHECKED_PARAMETERS = ("tau", "sigma_tau", "sigma_gap", "sigma_shock", "sigma", "sigma_baseline")

_MEANING = {
    "att": "the headline ATT, the adopters' effects weighted by their treated rows (model scale)",
    "tau": "the average effect of the policy (model scale)",
    "sigma_tau": "spread of the effect across adopters",
    "sigma_gap": "structural noise of the group gap per jurisdiction-period (the typical jurisdiction's scale)",
    "sigma_shock": "spread of jurisdiction-period shocks shared by groups",
    "sigma": "residual sd of each group",
    "sigma_baseline": "spread of jurisdiction-group baselines",
}


def log_prior_dataset(fit) -> xr.Dataset:
    """Log prior density of each power-scaled prior at every draw, dims (chain, draw).

    ``log p(theta) = sum_k log p_k(theta_k)`` with p_k Normal(loc, scale) or HalfNormal(scale) as in
    :mod:`bayesdid.model.terms`; one variable per parameter (summed over its own dims). The densities are
    the model's numpy twin :func:`bayesdid.model.twins.log_prior` (tested against the model's logp).
    """
    from .model.twins import POWER_SCALED_PRIORS, log_prior

    post = fit.posterior
    names = [n for n in (*POWER_SCALED_PRIORS, "rho", "omega") if n in post]
    lp = log_prior({n: post[n].to_numpy() for n in names}, fit.scales, float(fit.cells.outcome_mean))
    coords = {"chain": post["chain"], "draw": post["draw"]}
    return xr.Dataset({n: xr.DataArray(v, dims=("chain", "draw"), coords=coords) for n, v in lp.items()})


def log_likelihood_dataset(fit) -> xr.Dataset:
    """Pointwise log-likelihood per (jurisdiction, period), dims (chain, draw, jurisdiction, period)."""
    from .model.registry import pointwise_loglik

    post = fit.posterior
    cells = fit.cells
    ll = pointwise_loglik(fit)
    C, D = post.sizes["chain"], post.sizes["draw"]
    da = xr.DataArray(
        ll.reshape(C, D, *ll.shape[1:]),
        dims=("chain", "draw", "jurisdiction", "period"),
        coords={
            "chain": post["chain"],
            "draw": post["draw"],
            "jurisdiction": list(cells.jurisdictions),
            "period": [str(p) for p in cells.periods],
        },
    )
    return xr.Dataset({"cells": da})


def diagnosis(prior: float, likelihood: float, *, threshold: float = SENSITIVE) -> tuple[str, str]:
    """(code, plain sentence) from the two sensitivities (Kallioinen et al. 2023, section 2.4)."""
    if not (np.isfinite(prior) and np.isfinite(likelihood)):
        return "not_applicable", "sensitivity could not be computed (non-finite importance weights)."
    if prior >= threshold and likelihood >= threshold:
        return (
            "prior_data_conflict",
            "the prior and the data pull in different directions: the answer moves when either is "
            "strengthened; widen or re-centre this prior, or justify it.",
        )
    if prior >= threshold:
        return (
            "prior_dominates",
            "the data say little about this parameter, so its posterior mostly restates the prior; "
            "report it as prior-driven or give the prior a stated reason.",
        )
    if likelihood < threshold:
        return ("weak_both", "neither the prior nor the data move this parameter much under power-scaling.")
    return "ok", "the data dominate; the prior is not driving this parameter."


@dataclass
class ParameterSensitivity:
    """One parameter's power-scaling sensitivities and their reading (see :func:`power_scaling`)."""

    prior: float
    likelihood: float
    joint_prior: float
    diagnosis: str
    joint_diagnosis: str
    reading: str
    meaning: str
    note: str = ""

    def to_dict(self) -> dict:
        d = {
            "prior": self.prior,
            "likelihood": self.likelihood,
            "joint_prior": self.joint_prior,
            "diagnosis": self.diagnosis,
            "joint_diagnosis": self.joint_diagnosis,
            "reading": self.reading,
            "meaning": self.meaning,
        }
        if self.note:
            d["note"] = self.note
        return d


@dataclass
class PowerScaling:
    """The result of :func:`power_scaling`; ``to_dict()`` is summary.json's ``sensitivity`` entry.

    ``status`` is "ok", "attention" (a parameter flagged) or "not applicable" (importance sampling
    failed: ``ok`` is None, ``reason`` says why, ``joint_flagged`` is None and not written).
    """

    method: str
    threshold: float
    alphas: list
    priors_scaled: list
    parameters: dict[str, ParameterSensitivity] = field(default_factory=dict)
    flagged: list = field(default_factory=list)
    joint_flagged: list | None = None
    expected: list | None = None
    ok: bool | None = None
    status: str = "ok"
    reason: str = ""

    def to_dict(self) -> dict:
        d = {
            "method": self.method,
            "threshold": self.threshold,
            "alphas": list(self.alphas),
            "priors_scaled": list(self.priors_scaled),
            "parameters": {k: v.to_dict() for k, v in self.parameters.items()},
            "flagged": list(self.flagged),
        }
        if self.joint_flagged is not None:
            d["joint_flagged"] = list(self.joint_flagged)
        if self.expected is not None:
            d["expected"] = list(self.expected)
        d["ok"] = self.ok
        d["status"] = self.status
        if self.reason:
            d["reason"] = self.reason
        return d


def power_scaling(fit, *, threshold: float = SENSITIVE, alphas=(0.99, 1.01)) -> PowerScaling:
    """Prior and likelihood power-scaling sensitivity of tau and the variance parameters.

    For each parameter, ``prior`` is its sensitivity to power-scaling its *own* prior (the one set by
    its scale, e.g. ``effect`` for tau), ``joint_prior`` to power-scaling all the priors of
    ``priors_scaled`` together, and ``likelihood`` to power-scaling the likelihood of all cells. The
    ``diagnosis`` reads ``prior`` against ``likelihood``: it answers "does the prior I chose for
    this parameter drive it?"; ``joint_diagnosis`` reads ``joint_prior`` the same way (Kallioinen
    et al. 2023 power-scale the joint prior first, then single priors to find the one at work).

    Returns
    -------
    PowerScaling
        ``method``, ``threshold``, ``alphas``, ``priors_scaled``, ``parameters`` (name ->
        :class:`ParameterSensitivity`: ``prior``, ``likelihood``, ``joint_prior``, ``diagnosis``,
        ``joint_diagnosis``, ``reading``, ``meaning``), ``flagged``, ``joint_flagged``, ``ok``;
        ``to_dict()`` writes them in that order. A parameter with several elements (``sigma`` per
        group) reports its largest sensitivity.
        ``flagged`` lists the parameters with a prior-data conflict or prior dominance; ``ok`` is
        true when none is flagged. ``sigma_tau`` with at most :data:`FEW_ADOPTERS` adopters is
        listed under ``expected`` instead (its spread is barely learnable from so few).
    """
    import arviz as az

    from .effects import att_draws

    lp = log_prior_dataset(fit)
    ll = log_likelihood_dataset(fit)
    names = [n for n in CHECKED_PARAMETERS if n in fit.posterior]
    post = fit.posterior[names]
    if "tau_adopter" in fit.posterior:  # the headline ATT, sum_j w_j tau[j] (effects.py)
        post = post.assign(att=att_draws(fit.posterior["tau_adopter"], fit.cells))
        names = ["att", *names]
    tree = xr.DataTree.from_dict({"posterior": post, "log_prior": lp, "log_likelihood": ll})
    out = PowerScaling(
        method="power-scaling sensitivity, arviz.psense (Kallioinen et al. 2023)",
        threshold=threshold,
        alphas=list(alphas),
        priors_scaled=sorted(lp.data_vars),
    )
    try:
        ps_p = az.psense(tree, var_names=names, group="prior", alphas=alphas)
        ps_l = az.psense(tree, var_names=names, group="likelihood", alphas=alphas)
    except Exception as exc:  # importance sampling can fail on degenerate draws; report, do not crash
        out.ok = None
        out.status = "not applicable"
        out.reason = f"power-scaling could not be computed: {type(exc).__name__}: {exc}"
        return out
    out.joint_flagged = []

    def top(ds, n):
        a = np.asarray(ds[n])
        return float(np.nanmax(a)) if a.size else float("nan")

    for n in names:
        li = top(ps_l, n)
        joint = top(ps_p, n)
        note = ""
        if n in lp:  # the parameter's own prior alone (Kallioinen et al. 2023, section 2.3)
            try:
                own = top(az.psense(tree, var_names=[n], group="prior", alphas=alphas, group_var_names=[n]), n)
            except ValueError as exc:
                # Pareto smoothing refuses a tail of equal log weights. When the parameter's own log
                # prior is the same at every draw (to rounding: the data pin it far inside a wide
                # prior), power-scaling it reweights nothing and the sensitivity is 0; otherwise unknown.
                spread = float(np.ptp(np.asarray(lp[n])))
                own = 0.0 if spread < 1e-6 else float("nan")
                note = (
                    f"its own prior's log density varies by only {spread:.1e} over the draws, so power-scaling "
                    "it moves nothing (sensitivity 0)"
                    if own == 0.0
                    else f"power-scaling its own prior could not be computed ({exc})"
                )
        elif n == "att":  # a function of tau and the adopters' effects: its prior is the joint one
            own = joint
            note = "the ATT has no prior of its own; 'prior' is its sensitivity to power-scaling all priors"
        else:
            own = float("nan")
        code, reading = diagnosis(own, li, threshold=threshold)
        jcode, _ = diagnosis(joint, li, threshold=threshold)
        out.parameters[n] = ParameterSensitivity(
            prior=own,
            likelihood=li,
            joint_prior=joint,
            diagnosis=code,
            joint_diagnosis=jcode,
            reading=reading,
            meaning=_MEANING.get(n, ""),
            note=note,
        )
        if code in ("prior_data_conflict", "prior_dominates"):
            out.flagged.append(n)
        if jcode in ("prior_data_conflict", "prior_dominates"):
            out.joint_flagged.append(n)
            if code not in ("prior_data_conflict", "prior_dominates"):
                out.parameters[n].reading += (
                    f" Power-scaling all priors together moves it more ({joint:.3f}): another prior acts on it "
                    "through the model (with few adopters, usually 'adopter_spread'); a sweep over that scale "
                    "shows by how much."
                )
    n_adopters = len(fit.cells.adopters)
    if "sigma_tau" in out.parameters and n_adopters <= FEW_ADOPTERS and "sigma_tau" in out.flagged:
        # With two or three adopters the spread of their effects cannot be learnt from the data; its
        # posterior leans on the prior by design (the prior is what keeps partial pooling sane).
        # Reported, with that reading, but not counted as a warning sign (common practice).
        out.flagged.remove("sigma_tau")
        out.expected = ["sigma_tau"]
        out.parameters["sigma_tau"].reading += (
            f" Expected with {n_adopters} adopters: their spread is barely learnable, so this prior carries it;"
            " judge the effect by tau's own sensitivity and by a sweep over 'adopter_spread'."
        )
    out.ok = not out.flagged
    out.status = "ok" if out.ok else "attention"
    return out
