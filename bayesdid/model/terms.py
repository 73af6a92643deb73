"""Shared hierarchical terms, prior scales and the model-building entry point.

Notation (DESIGN.md): cells c = (j, g, t),

    eta[j,g,t] = b[j,g] + s[j,t] + h[g,t] + e[j,g,t] + tau[j] * D[j,g,t]

with b[j,g] = mu[g] + sigma_b * z_b[j,g] (non-centred), s[j,t] = a[t] + (pooled jurisdiction
shock), h[g,t] the target group's own period effects (zero for the reference group and the first
period), e the structural gap noise on the target group with sd sigma_gap, and
tau[j] = tau + sigma_tau * z_tau[j] over adopters (sampled as their mean and zero-sum contrasts, see
:func:`hierarchical_mean`).

Every prior scale is a ``pm.Data`` container named ``prior_<name>`` so that a sweep over priors
reuses one compiled model (``compiled.with_data(prior_effect=...)``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
import pymc as pm
import pytensor.tensor as pt

from ..cells import Cells
from ..study import PRIOR_NAMES, PriorScales
from .structure import gap_structure, residual_rule, small_matmul, zero_sum_basis  # noqa: F401 - also terms' names

__all__ = [
    "default_scales",
    "resolve_scales",
    "ModelSpec",
    "design_data",
    "hierarchical_mean",
    "event_times_of",
    "event_time_data",
    "EFFECTS",
]

#: The ways the policy enters the mean: one effect per adopter ("att", the default) or one effect per
#: event time k = t - start_j shared by the adopters ("event_time", reference k = -1).
EFFECTS = ("att", "event_time")

#: Default prior scales as multiples of the outcome's pooled standard deviation (model scale).
DEFAULT_MULTIPLES = {
    "intercept": 5.0,
    "baseline_spread": 2.0,
    "period": 1.0,
    "group_period": 1.0,
    "shock_spread": 0.5,
    "gap_noise": 0.5,
    "effect": 1.0,
    "adopter_spread": 0.2,
    "residual": 2.0,
    "covariate": 2.5,
    "dispersion": 1.0,
    # per period: a jurisdiction one spread above the others drifts 0.05 outcome sd per period
    "drift_spread": 0.05,
}


def default_scales(cells: Cells) -> dict[str, float]:
    """Weakly informative prior scales scaled to the outcome's pooled sd (model scale)."""
    sd = float(cells.outcome_sd)
    return {k: m * sd for k, m in DEFAULT_MULTIPLES.items()}


def resolve_scales(cells: Cells, priors: PriorScales) -> dict[str, dict]:
    """Scales used in the fit, with where each came from ('data-scaled' or 'study')."""
    base = default_scales(cells)
    out = {}
    for name in PRIOR_NAMES:
        given = getattr(priors, name)
        out[name] = {
            "scale": float(given) if given is not None else base[name],
            "source": "study" if given is not None else "data-scaled",
            "meaning": PRIOR_NAMES[name],
        }
    return out


@dataclass(frozen=True)
class ModelSpec:
    """Everything that fixes a model's structure (and so its compiled form)."""

    family: str
    design: str
    J: int
    G: int
    T: int
    A: int
    centred: bool = False
    #: Non-Gaussian families: (gap noise, shock) fields centred, see ``families.fields_centred``.
    fields: tuple = ()
    K: int = 0  # covariate columns (theta's length)
    effects: str = "att"
    event_times: tuple = ()
    event_pooled: bool = False
    #: The gap noise over periods as fitted, "persistent" (AR(1)) or "independent"; see
    #: :mod:`bayesdid.model.structure`.
    gap: str = "independent"
    #: The gap-noise scale across jurisdictions as fitted, "per_jurisdiction" (pooled, sigma_gap_j) or
    #: "shared" (one sigma_gap); see :mod:`bayesdid.model.structure`.
    gap_scale: str = "shared"
    #: Gaussian: a separate residual sd (False when the cells cannot identify it, see
    #: :func:`bayesdid.model.structure.residual_rule`).
    residual: bool = True
    #: Pooled jurisdiction-specific linear gap drifts (model.gap_drift), see :func:`hierarchical_mean`.
    drift: bool = False

    def key(self) -> tuple:
        return dataclasses.astuple(self)


def design_data(cells: Cells, event_times: tuple | None = None) -> dict[str, np.ndarray]:
    """The assignment arrays that placebos change: D and the adopter index of each jurisdiction.

    With ``event_times`` also ``event_by_k`` (K, J, G, T), see :func:`event_time_data`.
    """
    J, G, T = cells.shape
    adopters = cells.adopters
    treat = cells.treated.astype(float)
    by_adopter = np.zeros((len(adopters), J, G, T))
    for a, j in enumerate(adopters):
        by_adopter[a, j] = treat[j]
    out = {"treat_by_adopter": by_adopter, "is_adopter": (cells.start < T).astype(float)}
    if event_times:
        out["event_by_k"] = event_time_data(cells, event_times)
    return out


def event_times_of(cells: Cells) -> tuple[int, ...]:
    """Event times k = t - start_j observed in the adopters' target-group cells, without k = -1.

    The leads and lags are bounded by the data: k runs from the earliest observed pre-period of any
    adopter to its latest observed period; k = -1 (the last period before the start) is the
    reference and has no parameter.
    """
    T = cells.shape[2]
    ks = set()
    for j in cells.adopters:
        obs = np.flatnonzero(cells.n[j, cells.target] > 0)
        ks.update(int(t - cells.start[j]) for t in obs)
    ks.discard(-1)
    return tuple(sorted(k for k in ks if -T < k < T))


def event_time_data(cells: Cells, event_times: tuple) -> np.ndarray:
    """E[k, j, g, t] = 1 when adopter j's target-group cell at period t has event time t - start_j = k."""
    J, G, T = cells.shape
    ks = {k: i for i, k in enumerate(event_times)}
    out = np.zeros((len(event_times), J, G, T))
    for j in cells.adopters:
        for t in range(T):
            i = ks.get(int(t - cells.start[j]))
            if i is not None:
                out[i, j, cells.target, t] = 1.0
    return out


def baseline_centred(cells: Cells) -> bool:
    """Choose the parameterisation of the baselines b[j,g] from how much the data say about them.

    Non-centred terms sample well when the data say little about each member (prior dominates);
    when every baseline is pinned down by many periods of well-filled cells, the non-centred form
    makes a narrow ridge between the group mean and the z's and the centred form samples better.
    The rule compares T * (between-jurisdiction variance of the baselines) with the variance of a
    jurisdiction-group's cell means over time, both read off the cell means (common practice; the
    choice is recorded in summary.json and changes no posterior, only the sampler's path).
    """
    mean = cells.mean
    with np.errstate(invalid="ignore"):
        per_jg = np.nanmean(mean, axis=2)
        between = np.nanmean(np.nanvar(per_jg, axis=0))
        within = np.nanmean(np.nanvar(mean, axis=2))
    T = cells.shape[2]
    if not np.isfinite(between) or not np.isfinite(within) or within <= 0:
        return True
    return bool(T * between / within > 2.0)


def level_gap_rotation(G: int) -> np.ndarray | None:
    """Orthonormal 2 x 2 rotation from (b_0, b_1) to ((b_0 + b_1)/sqrt 2, (b_1 - b_0)/sqrt 2); None unless G == 2."""
    if G != 2:
        return None
    return np.array([[1.0, -1.0], [1.0, 1.0]]) / np.sqrt(2.0)


class _LazyScales(dict):
    """Creates the ``prior_<name>`` data container the first time a term asks for it, so that a
    model holds only the scales it uses (nutpie's ``with_data`` rejects unknown names)."""

    def __init__(self, scales):
        super().__init__()
        self._scales = scales

    def __missing__(self, key):
        v = pm.Data(f"prior_{key}", float(self._scales[key]))
        self[key] = v
        return v


def drift_times(T: int) -> np.ndarray:
    """The period index centred at the panel's middle, t - (T - 1)/2 (the drift's time variable)."""
    return np.arange(T, dtype=float) - (T - 1) / 2.0


def hierarchical_mean(
    cells: Cells,
    scales: dict[str, float],
    *,
    effects: str = "att",
    event_times: tuple | None = None,
    event_pooled: bool = False,
    levels=None,
    drift: bool = False,
):
    """Add the shared terms to the current model; return (m, extras).

    ``m`` is the (J, G, T) mean without the jurisdiction-period shock and the gap noise (both are
    integrated out exactly in the Gaussian family, or added as non-centred terms by the others).

    Parameters
    ----------
    effects : {"att", "event_time"}
        "att" (default): ``tau[j] * D[j,g,t]``. "event_time": ``beta[k] * E[k,j,g,t]`` summed over
        the event times k = t - start_j of the adopters' target-group cells, with
        ``beta[k] ~ Normal(0, prior_effect)`` for every k except the reference k = -1 (beta = 0), or,
        with ``event_pooled``, ``beta[k] = sigma_event * z[k]``, ``sigma_event ~ HalfNormal(prior_effect)``
        (partial pooling of the path towards zero). The assignment E is the data container
        ``event_by_k`` (dims event_time, jurisdiction, group, period).
    event_times : tuple of int
        The k with a parameter (default :func:`event_times_of`).
    drift : bool
        Pooled jurisdiction-specific linear gap drifts (``model.gap_drift``): the target group's
        mean (a DiD: the jurisdiction's) gets ``g[j] * (t - (T - 1)/2)``, ``g[j] = sigma_drift z[j]``,
        ``sigma_drift ~ HalfNormal(prior_drift_spread)`` for comparison jurisdictions; an adopter's
        drift is not pooled, ``g[a] ~ Normal(0, prior_effect^2)``. An adopter's drift must be learned from its
        pre-policy periods only (its post-policy path is what the effect is read from), so each
        adopter's post-policy target cells also get free deviations ``eta[a, t] ~ Normal(0,
        prior_effect^2)``, centred over its post-policy periods: the post-policy cells are then fitted
        whatever the drift, carry no information about it, and tau[a] is the mean of the adopter's
        per-period effects net of its drift extrapolated from before the policy.
    levels : callable, optional
        ``levels(mu, scale_j, S, centred) -> b`` builds the (J, G) baselines instead of the default
        hierarchical normal ``b[j,g] ~ Normal(mu[g], scale_j^2)`` (the non-Gaussian families fold the
        jurisdiction's mean shock and mean gap noise into them, see :mod:`bayesdid.model.families`).
    """
    J, G, T = cells.shape
    A = len(cells.adopters)
    S = _LazyScales(scales)
    loc = pm.Data("outcome_location", float(cells.outcome_mean))
    lift = zero_sum_basis(T)

    mu = pm.Normal("mu_group", loc, S["intercept"], dims=("group",))
    sigma_b = pm.HalfNormal("sigma_baseline", S["baseline_spread"])
    # Comparison jurisdictions' baselines are pooled; adopters' baselines get the wide intercept
    # prior instead, so that an adopter whose level differs from the comparisons (selection into
    # the policy often goes with level) is never shrunk toward them, which would leak the level
    # difference into the effect. `is_adopter` is data, so placebos reassign it without a recompile.
    is_adopter = pm.Data("is_adopter", (cells.start < T).astype(float), dims=("jurisdiction",))
    S["is_adopter"] = is_adopter
    scale_j = (is_adopter * S["intercept"] + (1.0 - is_adopter) * sigma_b)[:, None]
    # With two groups the baselines are sampled in the rotated basis w = b R (level and gap of each
    # jurisdiction, see `level_gap_rotation`). The prior is isotropic per jurisdiction, so the rotated
    # prior is the same normal with the mean rotated: the model is unchanged, only the coordinates the
    # sampler moves in. The data pin a jurisdiction's gap far more tightly than its level (the shared
    # shocks move both groups), which makes b[j,0] and b[j,1] correlate near 1 in the posterior; in
    # the rotated basis the two are close to independent and a diagonal mass matrix fits them.
    R = level_gap_rotation(G)
    centred = baseline_centred(cells)
    if levels is not None:
        b = levels(mu, scale_j, S, centred)
    elif centred and R is not None:
        w = pm.Normal("baseline_rotated", small_matmul(mu[None, :], R), scale_j, shape=(J, G))
        b = pm.Deterministic("baseline", small_matmul(w, R.T), dims=("jurisdiction", "group"))
    elif centred:
        b = pm.Normal("baseline", mu[None, :], scale_j, dims=("jurisdiction", "group"))
    else:
        z_b = pm.Normal("z_baseline", 0.0, 1.0, shape=(J, G))
        if R is not None:
            z_b = small_matmul(z_b, R.T)
        b = pm.Deterministic("baseline", mu[None, :] + scale_j * z_b, dims=("jurisdiction", "group"))

    a_raw = pm.Normal("period_raw", 0.0, S["period"], shape=(T - 1,))
    a = small_matmul(a_raw[None, :], lift.T)[0]
    pm.Deterministic("period_effect", a, dims=("period",))
    m = b[:, :, None] + a[None, None, :]
    if G == 2:
        h_raw = pm.Normal("group_period_raw", 0.0, S["group_period"], shape=(T - 1,))
        h = small_matmul(h_raw[None, :], lift.T)[0]
        pm.Deterministic("group_period_effect", h, dims=("period",))
        hg = pt.stack([pt.zeros((T,)), h])  # reference group first, target second
        m = m + hg[None, :, :]

    if drift:
        tt = pt.as_tensor(drift_times(T))
        sig_d = pm.HalfNormal("sigma_drift", S["drift_spread"])
        z_d = pm.Normal("z_drift", 0.0, 1.0, dims=("jurisdiction",))
        # Adopters' drifts are not pooled toward the comparisons' (as their baselines are not): a
        # place that adopts because its gap was moving must keep its own drift, learned from its own
        # pre-policy periods; they get the wide prior Normal(0, prior_effect^2) per period.
        scale_d = is_adopter * S["effect"] + (1.0 - is_adopter) * sig_d
        g = pm.Deterministic("gap_drift", scale_d * z_d, dims=("jurisdiction",))
        path = g[:, None] * tt[None, :]
        m = m + (pt.stack([pt.zeros((J, T)), path], axis=1) if G == 2 else path[:, None, :])

    if effects == "event_time":
        ks = tuple(event_times) if event_times is not None else event_times_of(cells)
        E = pm.Data("event_by_k", event_time_data(cells, ks), dims=("event_time", "jurisdiction", "group", "period"))
        if event_pooled:
            sig = pm.HalfNormal("sigma_event", S["effect"])
            z = pm.Normal("z_event", 0.0, 1.0, dims=("event_time",))
            beta = pm.Deterministic("event_effect", sig * z, dims=("event_time",))
        else:
            beta = pm.Normal("event_effect", 0.0, S["effect"], dims=("event_time",))
        return m + (beta[:, None, None, None] * E).sum(axis=0), S
    if effects != "att":
        raise ValueError(f"effects must be one of {EFFECTS}, got {effects!r}")
    treat = pm.Data(
        "treat_by_adopter", design_data(cells)["treat_by_adopter"], dims=("adopter", "jurisdiction", "group", "period")
    )
    if drift:  # free post-policy deviations per adopter, centred over its post periods (see `drift`)
        post = treat.sum(axis=(1, 2))  # (A, T): 1 at the adopter's post-policy periods
        raw = S["effect"] * pm.Normal("z_effect_deviation", 0.0, 1.0, shape=(A, T))
        centre = (post * raw).sum(axis=1) / pt.maximum(post.sum(axis=1), 1.0)
        eta = pm.Deterministic("effect_deviation", post * (raw - centre[:, None]), dims=("adopter", "period"))
        m = m + (eta[:, None, None, :] * treat).sum(axis=0)
    if A > 1:
        # tau_a = tau + sigma_tau z is written as its mean over adopters abar plus zero-sum contrasts:
        #   abar ~ Normal(0, s_e^2 + sigma_tau^2 / A)        (tau integrated out; centred: data pin it)
        #   tau_a = abar + sigma_tau Q w,  w ~ Normal(0, I)  (Q: orthonormal zero-sum basis; non-centred)
        #   tau | abar ~ Normal(abar s_e^2 / v, s_e^2 sigma_tau^2 / (A v)),  v = s_e^2 + sigma_tau^2 / A,
        # with tau = mean + sd * u, u ~ Normal(0, 1) (tau enters no likelihood). This is the same joint
        # prior of (tau, sigma_tau, tau_a), z - mean(z) = Q Q'z and mean(z) being independent; only the
        # coordinates differ. The data pin abar (the adopters' common effect) and say little about
        # the contrasts when there are few adopters, so abar is centred and the contrasts are not. In
        # the plain non-centred form a well-measured tau + sigma_tau z_a is a curved ridge (it
        # diverged at 5M rows); in the plain centred form tau and sigma_tau make a funnel.
        sigma_tau = pm.HalfNormal("sigma_tau", S["adopter_spread"])
        se2 = S["effect"] ** 2
        s2a = sigma_tau**2 / A
        v = se2 + s2a
        abar = pm.Normal("tau_adopter_mean", 0.0, pt.sqrt(v))
        w = pm.Normal("z_tau_contrast", 0.0, 1.0, shape=(A - 1,))
        tau_a = pm.Deterministic(
            "tau_adopter", abar + sigma_tau * small_matmul(w[None, :], zero_sum_basis(A).T)[0], dims=("adopter",)
        )
        u = pm.Normal("u_tau", 0.0, 1.0)
        pm.Deterministic("tau", abar * se2 / v + pt.sqrt(se2 * s2a / v) * u)
        m = m + (tau_a[:, None, None, None] * treat).sum(axis=0)  # no BLAS call, see small_matmul
        return m, S
    tau = pm.Normal("tau", 0.0, S["effect"])
    tau_a = pm.Deterministic("tau_adopter", pt.reshape(tau, (1,)), dims=("adopter",))
    m = m + (tau_a[:, None, None, None] * treat).sum(axis=0)
    return m, S


def coords_of(cells: Cells, event_times: tuple = ()) -> dict[str, list]:
    out = {
        "jurisdiction": list(cells.jurisdictions),
        "group": list(cells.groups),
        "period": [str(p) for p in cells.periods],
        "adopter": [cells.jurisdictions[j] for j in cells.adopters],
    }
    if event_times:
        out["event_time"] = [int(k) for k in event_times]
    return out


#: A field is centred only when the data inform each member this many times better than its spread
#: does (near a ratio of 1 both forms sample about as well, and a margin keeps similar data sets, and
#: so sweeps and tests, on one compiled structure).
CENTRE_MARGIN = 4.0


def fields_centred(cells: Cells, family: str) -> tuple[bool, bool]:
    """Centre the gap-noise and shock fields when the cells measure them better than their spread.

    A non-centred latent field samples well when each member is weakly informed by the data, and
    makes a narrow curved ridge when the data pin it; the centred form is the opposite (Betancourt
    and Girolami 2015; Papaspiliopoulos, Roberts and Skold 2007). The rule compares, on the link
    scale, the sampling variance of one cell's linear predictor (1/events for counts,
    1/(n p (1 - p)) for binomial; the mean over cells) with the spread of the field read off the
    cells: the variance of the two-way (jurisdiction, period) residuals of the gap series (target
    minus reference) and of the reference series, less their sampling part. The gap is informed by
    two cells (variance 2 v_cell in a DDD, v_cell in a DiD); the shock by the pair (v_cell / 2). A
    field is centred when that variance, times :data:`CENTRE_MARGIN`, is below the field's spread.
    It uses neither the start periods nor the adopters, so placebos keep the model's structure; the
    choice changes no posterior, only the sampler's path, and is recorded in the model structure.
    """
    n, y = cells.n, cells.sum_y
    ok = n > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        if family == "binomial":
            p = (y + 0.5) / (n + 1.0)
            eta = np.log(p / (1.0 - p))
            var = 1.0 / ((n + 1.0) * p * (1.0 - p))
        else:
            eta = np.log((y + 0.5) / n)
            var = 1.0 / (y + 0.5)
    eta = np.where(ok, eta, np.nan)
    if not ok.any():
        return False, False
    v_cell = float(np.mean(var[ok]))

    def spread(series):
        with np.errstate(invalid="ignore"):
            r = series - np.nanmean(series, axis=1, keepdims=True)
            r = r - np.nanmean(r, axis=0, keepdims=True)
            return float(np.nanmean(r * r))

    J, _, T = cells.shape
    keep = (1.0 - 1.0 / J) * (1.0 - 1.0 / T)  # share of iid noise left in two-way residuals
    q = eta[:, cells.target, :]
    m = CENTRE_MARGIN
    if cells.design == "DDD":
        ref = eta[:, cells.reference, :]
        v_gap = spread(q - ref) - keep * 2.0 * v_cell
        v_shock = spread(ref) - keep * v_cell
        return bool(m * 2.0 * v_cell < v_gap), bool(m * 0.5 * v_cell < v_shock)
    v_gap = spread(q) - keep * v_cell
    return bool(m * v_cell < v_gap), False


def model_spec(
    cells: Cells,
    family: str = "gaussian",
    *,
    effects: str = "att",
    event_times: tuple | None = None,
    event_pooled: bool = False,
) -> ModelSpec:
    """The structure of the model; ``effects="event_time"`` fixes the event times in the key."""
    J, G, T = cells.shape
    cov = cells.extra.get("covariates")
    fields = ()
    gap = gap_structure(cells).over_time
    gap_scale = gap_structure(cells).scale
    residual = residual_rule(cells)["separate"] if family == "gaussian" else True
    drift = bool(gap_structure(cells).drift) and family == "gaussian" and effects == "att"
    if family != "gaussian":
        fields = fields_centred(cells, family)
    if effects == "event_time":
        ks = tuple(int(k) for k in (event_times if event_times is not None else event_times_of(cells)))
        return ModelSpec(
            family=family,
            design=cells.design,
            J=J,
            G=G,
            T=T,
            A=len(cells.adopters),
            centred=baseline_centred(cells),
            fields=fields,
            effects="event_time",
            event_times=ks,
            event_pooled=bool(event_pooled),
            gap=gap,
            gap_scale=gap_scale,
            residual=residual,
            K=0 if cov is None else len(cov["names"]),
        )
    return ModelSpec(
        family=family,
        design=cells.design,
        J=J,
        G=G,
        T=T,
        A=len(cells.adopters),
        centred=baseline_centred(cells),
        fields=fields,
        gap=gap,
        gap_scale=gap_scale,
        residual=residual,
        drift=drift,
        K=0 if cov is None else len(cov["names"]),
    )


def mean_from_draws(fit) -> np.ndarray:
    """Posterior draws of m[j,g,t] (the cell mean without shock and gap noise): shape (S, J, G, T).

    The numpy twin of :func:`hierarchical_mean`; tests check it against PyMC's own evaluation.
    """
    cells = fit.cells
    J, G, T = cells.shape
    b = fit.draws("baseline")  # (S, J, G)
    a = fit.draws("period_effect")  # (S, T)
    m = b[..., None] + a[:, None, None, :]
    if G == 2:
        h = fit.draws("group_period_effect")
        m[:, :, cells.target, :] += h[:, None, :]
    spec = getattr(fit, "spec", None)
    if getattr(spec, "drift", False):
        m[:, :, cells.target, :] += fit.draws("gap_drift")[:, :, None] * drift_times(T)[None, None, :]
        m += np.einsum("sat,ajgt->sjgt", fit.draws("effect_deviation"), design_data(cells)["treat_by_adopter"])
    if getattr(spec, "effects", "att") == "event_time":
        beta = fit.draws("event_effect")  # (S, K)
        m += np.tensordot(beta, event_time_data(cells, spec.event_times), axes=1)
        return m
    tau_a = fit.draws("tau_adopter")  # (S, A)
    m += np.tensordot(tau_a, design_data(cells)["treat_by_adopter"], axes=1)
    return m
