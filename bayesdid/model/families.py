"""Non-Gaussian families on records: the shared terms, the latent shock and gap noise, covariates.

For record r (cell c = (j, g, t) and one covariate pattern x~_r, see :mod:`bayesdid.cells`):

    eta_r = m[j,g,t] + s[j,t] + e[j,t] * [g = target] + x~_r' theta

with ``m`` from :func:`bayesdid.model.terms.hierarchical_mean` (baselines, period effects, target
group period effects, tau[j] D[j,g,t]). Unlike the Gaussian family, the shock ``s`` and the gap
noise ``e`` cannot be integrated out in closed form; they stay latent fields,

    s[j,t] ~ Normal(0, sigma_s[j]^2)      (DDD only; a DiD has no within-jurisdiction contrast;
                                           sigma_s = sigma_shock for comparisons, the period scale
                                           for adopters, whose reference group identifies them),
    e[j,t] ~ Normal(0, sigma_gap^2)       (gap_over_time = "independent"), or, by default, a
                                           stationary AR(1) within each jurisdiction (below).

With ``gap_scale = "per_jurisdiction"`` (an option; the default is one shared scale) sigma_gap is jurisdiction j's own pooled scale
sigma_gap_j (:mod:`bayesdid.model.structure`) in every formula below: the fields are per jurisdiction,
so each row of them simply takes its own scale.

Each field's mean over periods enters the likelihood only beside the baseline, so it is integrated
into the baselines exactly (they become the identified levels b + mean_t s (+ mean_t e on the target
group)) and the fields keep their zero-sum deviations; each part is centred or non-centred by a
data rule (:func:`fields_centred`, ``baseline_centred``). Nothing of the model changes, only the
coordinates the sampler moves in.

**Persistent gap noise** (:mod:`bayesdid.model.structure`; the shock stays independent). Per
jurisdiction ``e = sigma_gap L z``, ``z ~ Normal(0, I_T)`` (non-centred innovations), with ``L`` the
lower-triangular AR(1) factor ``L[t,s] = rho^(t-s) w_s`` (``w_0 = 1``, ``w_s = sqrt(1 - rho^2)``):
``e[0] = sigma_gap z[0]``, ``e[t] = rho e[t-1] + sigma_gap sqrt(1 - rho^2) z[t]``, written as one
broadcast product (no loop over periods in the graph). Under AR(1) the mean ``ebar`` of the path is
no longer independent of its deviations ``d = e - ebar``, so the folding changes but stays exact:
the map ``z -> d`` has one null direction, ``n = L^-1 1 ∝ (1, c, ..., c)``, ``c = sqrt((1 - rho) /
(1 + rho))``, and since ``ebar = a'z`` with ``a = L'1 / T`` and ``a'n = sigma_gap``,

    ebar | d ~ Normal(ebar(z) - sigma_gap n'z / |n|^2,  sigma_gap^2 / |n|^2),  |n|^2 = 1 + (T-1) c^2.

The target level is folded with this conditional law (its mean shifted, its variance
``sigma_gap^2 / |n|^2`` in place of ``sigma_gap^2 / T``), and the component of z along n reaches no
likelihood (a prior-only standard normal). At rho = 0, n ∝ 1 and this is the independent folding
exactly. When the data pin the gap (:func:`fields_centred`), the path e itself is the parameter
(the AR(1) density, z = L^-1 e by differences) and the same conditional law is used.

The gap noise is what the effect is judged against, and it gives every treated cell over-dispersion
on the link scale. The likelihood of each family is in :mod:`.binomial` and :mod:`.counts`; it is
written once against an array namespace (:data:`NP`, :data:`PT`) so numpy and PyTensor share it.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pymc as pm
import pytensor.tensor as pt
from scipy import special

from ..cells import Cells
from . import binomial, counts
from .structure import RHO_PRIOR, gap_scale_draws, gap_scale_terms
from .terms import (  # noqa: F401 (fields_centred, CENTRE_MARGIN: kept importable here)
    CENTRE_MARGIN,
    design_data,
    fields_centred,
    hierarchical_mean,
    mean_from_draws,
    small_matmul,
    zero_sum_basis,
)

__all__ = [
    "FAMILY_BUILDERS",
    "build_family",
    "data_arrays",
    "record_loglik",
    "record_eta_draws",
    "pointwise_loglik",
    "inverse_link",
    "NP",
    "PT",
    "ar1_factor",
    "ar1_mean_given_deviations",
    "ar1_gap_deviations",
]


def _np_segment_sum(v, index, size):
    v = np.asarray(v, dtype=float)
    out = np.zeros(v.shape[:-1] + (size,))
    if v.ndim == 1:
        np.add.at(out, index, v)
    else:
        flat = out.reshape(-1, size)
        vv = v.reshape(-1, v.shape[-1])
        for i in range(flat.shape[0]):
            flat[i] = np.bincount(index, weights=vv[i], minlength=size)
    return out


def _pt_segment_sum(v, index, size):
    return pt.inc_subtensor(pt.zeros((size,))[index], v)


NP = SimpleNamespace(
    log=np.log,
    exp=np.exp,
    softplus=lambda x: np.logaddexp(0.0, x),
    expit=special.expit,
    gammaln=special.gammaln,
    segment_sum=_np_segment_sum,
    take_last=lambda a, i: a[..., i],
)
PT = SimpleNamespace(
    log=pt.log,
    exp=pt.exp,
    softplus=pt.softplus,
    expit=pt.sigmoid,
    gammaln=pt.gammaln,
    segment_sum=_pt_segment_sum,
    take_last=lambda a, i: a[i],
)


def ar1_factor(rho, T: int, xp=NP):
    """The AR(1) factor ``L[t,s] = rho^(t-s) w_s`` for t >= s (0 above), ``w_0 = 1``,
    ``w_s = sqrt(1 - rho^2)``, so that ``sigma L z`` is a stationary AR(1) path of marginal sd sigma
    for ``z ~ Normal(0, I)``. numpy: ``rho`` of any shape, result (..., T, T); PyTensor: scalar rho."""
    lag = np.subtract.outer(np.arange(T), np.arange(T))
    lower = (lag >= 0).astype(float)
    idx = np.maximum(lag, 0)
    if xp is PT:
        # one elementwise expression of constants and rho (PyTensor fuses it into a single op); the
        # powers' gradient k rho^(k-1) is finite except at rho = 0 exactly, which rho's Beta prior
        # never proposes
        first = np.zeros((T, T))
        first[:, 0] = 1.0
        return (
            rho ** pt.as_tensor(idx.astype(float))
            * pt.as_tensor(lower)
            * (pt.as_tensor(first) + pt.as_tensor(1.0 - first) * pt.sqrt(1.0 - rho * rho))
        )
    rho = np.asarray(rho, dtype=float)
    pw = rho[..., None] ** np.arange(T)
    w = np.concatenate([np.ones(rho.shape + (1,)), np.repeat(np.sqrt(1.0 - rho * rho)[..., None], T - 1, -1)], -1)
    return pw[..., idx] * lower * w[..., None, :]


def ar1_mean_given_deviations(z, e, sigma_gap, rho, xp=NP):
    """Conditional law of a path's mean given its zero-sum deviations (module docstring).

    ``z`` (..., J, T) the innovations, ``e = sigma_gap L z`` the path; ``sigma_gap`` and ``rho``
    broadcast against (..., J). Returns (mean shift (..., J), variance) of ``ebar | e - ebar``.
    """
    T = e.shape[-1]
    c2 = (1.0 - rho) / (1.0 + rho)
    n2 = 1.0 + (T - 1) * c2
    c = pt.sqrt(c2) if xp is PT else np.sqrt(c2)
    nz = z[..., 0] + c * z[..., 1:].sum(axis=-1)
    return e.mean(axis=-1) - sigma_gap * nz / n2, sigma_gap**2 / n2


def ar1_gap_deviations(sigma_gap, rho, z):
    """numpy: zero-sum deviations over periods of AR(1) paths ``sigma_gap L(rho) z``.

    ``rho`` (S,), ``sigma_gap`` (S,) or matching z's leading axes (e.g. (S, J), each jurisdiction's
    own scale), ``z`` (S, ..., T): returns (S, ..., T)."""
    sg, rho = np.asarray(sigma_gap, dtype=float), np.asarray(rho, dtype=float)
    L = ar1_factor(rho, z.shape[-1])  # (S, T, T)
    extra = z.ndim - 2
    L = L.reshape(L.shape[:1] + (1,) * extra + L.shape[1:])
    e = sg.reshape(sg.shape + (1,) * (z.ndim - sg.ndim)) * (z[..., None, :] * L).sum(axis=-1)
    return e - e.mean(axis=-1, keepdims=True)


FAMILY_BUILDERS = ("binomial", "poisson", "negbinomial")
#: Record arrays every non-Gaussian model reads (``pm.Data`` names; shapes follow the data).
RECORD_KEYS = ("rec_cell", "rec_jt", "rec_tgt", "rec_w", "rec_size", "rec_x", "rec_first", "rec_ycell", "rec_cellid")


def data_arrays(cells: Cells, family: str) -> dict[str, np.ndarray]:
    """The arrays of the records for ``compiled.with_data`` (and the model's data containers).

    ``rec_y`` the successes or events, ``rec_size`` the trials or exposure, ``rec_cell`` the flat
    cell index (j, g, t), ``rec_jt`` the flat jurisdiction-period index, ``rec_tgt`` 1 on the
    target group, ``rec_w`` the jurisdiction-period weight (0 drops it), ``rec_x`` (R, K) the centred
    covariate pattern; for negbinomial ``rec_cellid`` (cells numbered 0..C-1), ``rec_first`` and
    ``rec_ycell`` (the cell's event total).
    """
    rec = cells.extra["records"]
    J, G, T = cells.shape
    cell = np.asarray(rec["cell"], dtype=np.int64)
    j = cell // (G * T)
    g = (cell // T) % G
    t = cell % T
    jt = j * T + t
    uniq, first_idx, cellid = np.unique(cell, return_index=True, return_inverse=True)
    first = np.zeros(len(cell))
    first[first_idx] = 1.0
    y = np.asarray(rec["y"], dtype=float)
    return {
        "rec_y": y,
        "rec_cell": cell,
        "rec_jt": jt.astype(np.int64),
        "rec_tgt": (g == cells.target).astype(float),
        "rec_w": cells.jt_weight().ravel()[jt].astype(float),
        "rec_size": np.asarray(rec["size"], dtype=float),
        "rec_x": np.asarray(rec["x"], dtype=float).reshape(len(cell), -1),
        "rec_first": first,
        "rec_ycell": np.bincount(cellid, weights=y)[cellid],
        "rec_cellid": cellid.astype(np.int64),
    }


def record_loglik(family: str, d: dict, eta, phi=None, xp=NP, n_cells: int | None = None):
    """Per-record log-likelihood (weighted by ``rec_w``), up to a parameter-free constant."""
    y, size = d["rec_y"], d["rec_size"]
    if family == "binomial":
        ll = binomial.record_loglik(y, size, eta, xp)
    elif family == "poisson":
        ll = counts.poisson_loglik(y, size, eta, xp)
    elif family == "negbinomial":
        nc = int(np.max(d["rec_cellid"])) + 1 if n_cells is None else n_cells
        ll = counts.negbinomial_loglik(
            y, size, eta, phi, cell=d["rec_cellid"], first=d["rec_first"], y_cell=d["rec_ycell"], n_cells=nc, xp=xp
        )
    else:
        raise ValueError(f"unknown family '{family}'")
    return d["rec_w"] * ll


def inverse_link(family: str, eta, xp=NP):
    return binomial.inverse_link(eta, xp) if family == "binomial" else counts.inverse_link(eta, xp)


def _ar1_innovations(path, sigma_gap, rho):
    """PyTensor: the innovations z of AR(1) paths e (J, T) (``e = sigma_gap L z`` inverted by differences)."""
    s = pt.sqrt(1.0 - rho * rho)
    z0 = path[:, :1] / sigma_gap
    rest = (path[:, 1:] - rho * path[:, :-1]) / (sigma_gap * s)
    return pt.concatenate([z0, rest], axis=1)


def _ar1_path_logp(value, sigma_gap, rho):
    """Log density of stationary AR(1) paths (J, T), marginal sd sigma_gap, as elementwise terms: that of
    the innovations minus log |det sigma_gap L| = T log sigma_gap + (T - 1)/2 log(1 - rho^2) per path
    (spread as log sigma_gap on every period and the second part on periods 1..T-1)."""
    z = _ar1_innovations(value, sigma_gap, rho)
    later = pt.concatenate([pt.zeros((1,)), pt.ones((value.shape[-1] - 1,))])
    return -0.5 * z * z - 0.5 * np.log(2 * np.pi) - pt.log(sigma_gap) - 0.5 * pt.log(1.0 - rho * rho) * later[None, :]


def build_family(
    cells: Cells,
    scales: dict[str, float],
    coords: dict,
    family: str,
    *,
    gap: str = "independent",
    gap_scale: str = "shared",
    **terms,
) -> pm.Model:
    """The PyMC model of a non-Gaussian ``family`` on the records of ``cells``.

    ``gap`` is ``"persistent"`` (AR(1) gap noise over periods, module docstring; ``rho = 2 u - 1``,
    ``u ~ Beta(prior_rho_a, prior_rho_b)`` as in the Gaussian family) or ``"independent"``;
    ``gap_scale="per_jurisdiction"``: each jurisdiction's own pooled gap-noise scale ``sigma_gap_j``.
    ``terms`` go to :func:`~bayesdid.model.terms.hierarchical_mean` (``effects="event_time"`` with its
    event times: one effect per event time, for the event-time check)."""
    J, G, T = cells.shape
    persistent = gap == "persistent"
    arr = data_arrays(cells, family)
    cov = cells.extra.get("covariates")
    K = 0 if cov is None else len(cov["names"])
    if K:
        coords = {**coords, "covariate": list(cov["names"])}
    with pm.Model(coords=coords, check_bounds=False) as model:
        gap_c, shock_c = fields_centred(cells, family)
        jt = ("jurisdiction", "period")
        Q = zero_sum_basis(T)
        ddd = cells.design == "DDD"
        fields = {}

        def levels(mu, scale_j, S, centred):
            # Only b[j,g] + mean_t s[j,t] (+ mean_t e[j,t] on the target group) reaches the
            # likelihood, so the per-jurisdiction means of the two fields are integrated into the
            # baselines exactly: per jurisdiction the pair of levels is bivariate normal with
            #   var_r = v_b + v_s / T,  cov = v_s / T,  var_q = v_b + v_s / T + v_e,
            # written as level_r ~ N(mu_r, var_r), level_q | level_r ~ N(mu_q + shift + k (level_r - mu_r),
            # var_q - k cov), k = cov / var_r; independent gap noise: v_e = sigma_gap^2 / T, shift 0;
            # persistent: the law of the path's mean given its deviations (module docstring). The fields keep only their zero-sum deviations over
            # periods, s_dev = Q u with u ~ N(0, v_s I) (Q orthonormal, zero-sum), the exact law of
            # s - mean(s). Without this the mean of a field and the baseline form a ridge that only the
            # priors close. "baseline" then reports these identified levels.
            _, sg_j = gap_scale_terms(S, gap_scale, J)
            per_j = gap_scale == "per_jurisdiction"
            # sigma_gap: (J, 1) per jurisdiction against (J, T) paths, or the shared scalar
            sigma_gap = sg_j[:, None] if per_j else sg_j
            v_b = scale_j[:, 0] ** 2
            fields["sigma_gap"] = sg_j  # (J,) or scalar: what deviations() takes
            if persistent:
                # the AR(1) path and the conditional law of its mean given its deviations (docstring)
                u = pm.Beta("rho_unit", pm.Data("prior_rho_a", RHO_PRIOR["a"]), pm.Data("prior_rho_b", RHO_PRIOR["b"]))
                rho = pm.Deterministic("rho", 2.0 * u - 1.0)
                if gap_c:
                    path = pm.CustomDist(
                        "gap_path",
                        sigma_gap,
                        rho,
                        logp=_ar1_path_logp,
                        shape=(J, T),
                        support_point=lambda rv, size, *a: pt.zeros((J, T)),
                    )
                    zz = _ar1_innovations(path, sigma_gap, rho)
                else:
                    zz = pm.Normal("z_gap_innovation", 0.0, 1.0, shape=(J, T))
                    path = sigma_gap * (zz[:, None, :] * ar1_factor(rho, T, PT)[None, :, :]).sum(axis=-1)
                shift, v_e = ar1_mean_given_deviations(zz, path, sg_j, rho, PT)
                fields["gap_deviations"] = path - path.mean(axis=1, keepdims=True)
            else:
                shift, v_e = 0.0, sg_j**2 / T
            if ddd:
                sigma_shock = pm.HalfNormal("sigma_shock", S["shock_spread"])
                # As in the Gaussian family: adopters' own shocks are identified by their reference
                # group and are not shrunk toward the comparisons' (wide period-effect scale).
                ia = S["is_adopter"]
                sd_s = ia * S["period"] + (1.0 - ia) * sigma_shock
                fields["sd_shock"] = sd_s
                v_s = sd_s**2
                var_r = v_b + v_s / T
                cov = v_s / T
                var_q = var_r + v_e
                k = cov / var_r
                sd_r, sd_q = pt.sqrt(var_r), pt.sqrt(var_q - k * cov)
                r, q = cells.reference, cells.target
                if centred:
                    lev_r = pm.Normal("level_reference", mu[r], sd_r, dims=("jurisdiction",))
                    lev_q = pm.Normal("level_target", mu[q] + shift + k * (lev_r - mu[r]), sd_q, dims=("jurisdiction",))
                else:
                    z = pm.Normal("z_level", 0.0, 1.0, shape=(J, 2))
                    lev_r = mu[r] + sd_r * z[:, 0]
                    lev_q = mu[q] + shift + k * (lev_r - mu[r]) + sd_q * z[:, 1]
                cols = [None, None]
                cols[r], cols[q] = lev_r, lev_q
                b = pt.stack(cols, axis=1)
            else:
                sd = pt.sqrt(v_b + v_e)
                if centred:
                    b = pm.Normal("level_target", mu[0] + shift, sd, dims=("jurisdiction",))[:, None]
                else:
                    b = (mu[0] + shift + sd * pm.Normal("z_level", 0.0, 1.0, dims=("jurisdiction",)))[:, None]
            return pm.Deterministic("baseline", b, dims=("jurisdiction", "group"))

        m, S = hierarchical_mean(cells, scales, levels=levels, **terms)
        # only the arrays this family reads: nutpie's with_data rejects names the graph does not use
        keys = ("rec_size", "rec_w") + (("rec_first", "rec_ycell", "rec_cellid") if family == "negbinomial" else ())
        used = ("rec_cell", "rec_jt", "rec_tgt") + (("rec_x",) if K else ()) + keys
        d = {k: pm.Data(k, arr[k]) for k in used}
        obs = pm.Data("rec_y", arr["rec_y"])

        def deviations(name, sd_j, centred_):
            # sd_j: (J,) or scalar; the zero-sum deviations over periods of a field with that sd.
            sd = sd_j[:, None] if getattr(sd_j, "ndim", 0) == 1 else sd_j
            if centred_:
                u = pm.Normal(f"{name}_basis", 0.0, sd, shape=(J, T - 1))
            else:
                u = sd * pm.Normal(f"z_{name}", 0.0, 1.0, shape=(J, T - 1))
            return pm.Deterministic(name, small_matmul(u, Q.T), dims=jt)

        if persistent:
            gap = pm.Deterministic("gap", fields["gap_deviations"], dims=jt)
        else:
            gap = deviations("gap", fields["sigma_gap"], gap_c)
        eta = pt.reshape(m, (-1,))[d["rec_cell"]] + pt.reshape(gap, (-1,))[d["rec_jt"]] * d["rec_tgt"]
        if ddd:
            shock = deviations("shock", fields["sd_shock"], shock_c)
            eta = eta + pt.reshape(shock, (-1,))[d["rec_jt"]]
        if K:
            theta = pm.Normal("theta", 0.0, S["covariate"], dims=("covariate",))
            eta = eta + (d["rec_x"] * theta[None, :]).sum(axis=1)  # no BLAS call (see small_matmul)
        params = [eta]
        if family == "negbinomial":
            disp = pm.HalfNormal("dispersion", S["dispersion"])
            phi = pm.Deterministic("phi", 1.0 / pt.sqr(disp))
            params.append(phi)
        n_cells = J * G * T

        def logp(value, eta, *rest):
            phi_ = rest[0] if family == "negbinomial" else None
            dd = dict(zip(keys, rest[len(params) - 1 :]))
            dd["rec_y"] = value
            return record_loglik(family, dd, eta, phi_, xp=PT, n_cells=n_cells)

        pm.CustomDist("cells", *params, *[d[k] for k in keys], logp=logp, observed=obs)
    return model


def record_eta_draws(fit, m: np.ndarray | None = None, *, without_policy: bool = False) -> np.ndarray:
    """Posterior draws of eta_r for every record: shape (S, R) (numpy twin of the model).

    ``without_policy`` removes tau[j] D[j,g,t]: the counterfactual linear predictor.
    """
    cells = fit.cells
    d = data_arrays(cells, fit.spec.family)
    m = mean_from_draws(fit) if m is None else m
    if without_policy:
        m = m - np.tensordot(fit.draws("tau_adopter"), design_data(cells)["treat_by_adopter"], axes=1)
    S = m.shape[0]
    eta = m.reshape(S, -1)[:, d["rec_cell"]]
    eta = eta + fit.draws("gap").reshape(S, -1)[:, d["rec_jt"]] * d["rec_tgt"]
    if cells.design == "DDD":
        eta = eta + fit.draws("shock").reshape(S, -1)[:, d["rec_jt"]]
    if d["rec_x"].shape[1]:
        eta = eta + fit.draws("theta") @ d["rec_x"].T
    return eta


def pointwise_loglik(fit) -> np.ndarray:
    """Log-likelihood of each jurisdiction-period for every draw, given the latent fields: (S, J, T).

    Binomial and count families only; :func:`bayesdid.model.registry.pointwise_loglik` dispatches on
    the family (the Gaussian one integrates the shock and gap noise out).
    """
    family = fit.spec.family
    cells = fit.cells
    J, G, T = cells.shape
    d = data_arrays(cells, family)
    eta = record_eta_draws(fit)
    phi = fit.draws("phi")[:, None] if family == "negbinomial" else None
    ll = record_loglik(family, d, eta, phi, xp=NP)
    return _np_segment_sum(ll, d["rec_jt"], J * T).reshape(ll.shape[0], J, T)


def _link_of_cell(family: str, y, size):
    """The cell's empirical link-scale value: log((Y + 1/2) / E) for counts, logit((Y + 1/2) / (N - Y + 1/2))
    for binomial (the half keeps empty or full cells finite; the same rule on observed and replicated
    data, so it shifts both alike)."""
    if family == "binomial":
        return np.log((y + 0.5) / (size - y + 0.5))
    return np.log((y + 0.5) / size)


def replicate_gap_path(fit, j: int, periods: np.ndarray, rng: np.random.Generator):
    """Observed, expected and replicated link-scale gap of jurisdiction j at ``periods``, non-Gaussian.

    The twin of the Gaussian replication in :mod:`bayesdid.checks.pretrend` for the families whose
    shock and gap noise stay latent. Per posterior draw: fresh gap-noise deviations ``e = Q u``,
    ``u ~ N(0, sigma_gap_j^2 I)`` (jurisdiction j's scale; the model's own law of the zero-sum deviations; the mean is in the
    baselines; persistent gap noise: fresh AR(1) paths of each draw's rho and sigma_gap with their
    mean over periods removed, :func:`ar1_gap_deviations`), the shock and covariate terms as drawn,
    then every record of the cells is replicated from the family (binomial successes of its trials;
    Poisson events of its exposure; for negbinomial a Gamma(phi, phi) multiplier per cell first). Each cell is summarised by its empirical
    link value (:func:`_link_of_cell`); the gap is target minus reference (DDD) or the target cell
    itself (DiD). The expected gap is the link of the cell's expected totals without the gap noise.

    Returns ``observed`` (n,), ``expected`` (S, n) and ``replicated`` (S, n).
    """
    cells = fit.cells
    family = fit.spec.family
    J, G, T = cells.shape
    d = data_arrays(cells, family)
    m = mean_from_draws(fit)
    S = m.shape[0]
    per = np.asarray(periods, dtype=int)
    pos = np.full(T, -1)
    pos[per] = np.arange(len(per))
    rc = d["rec_cell"]
    rj, rg, rt = rc // (G * T), (rc // T) % G, rc % T
    keep = (rj == j) & (pos[rt] >= 0)
    groups = [cells.target] if cells.design == "DiD" else [cells.target, cells.reference]
    keep &= np.isin(rg, groups)
    idx = np.flatnonzero(keep)
    size, y, tgt = d["rec_size"][idx], d["rec_y"][idx], d["rec_tgt"][idx]
    slot = pos[rt[idx]] * G + rg[idx]  # (period slot, group) of each record
    n_slot = len(per) * G
    eta0 = m.reshape(S, -1)[:, rc[idx]]
    if cells.design == "DDD":
        eta0 = eta0 + fit.draws("shock")[:, j, :][:, rt[idx]]
    if d["rec_x"].shape[1]:
        eta0 = eta0 + fit.draws("theta") @ d["rec_x"][idx].T
    sg = gap_scale_draws(fit)[:, j]  # jurisdiction j's own scale
    if getattr(fit.spec, "gap", "independent") == "persistent":
        # fresh AR(1) paths of the fitted rho and sigma_gap_j, their mean removed (it is in the levels)
        e = ar1_gap_deviations(sg, fit.draws("rho"), rng.standard_normal((S, T)))
    else:
        u = sg[:, None] * rng.standard_normal((S, T - 1))
        e = u @ zero_sum_basis(T).T  # (S, T)
    eta = eta0 + e[:, rt[idx]] * tgt
    inv = NP.expit if family == "binomial" else np.exp
    mu = size * inv(eta)
    if family == "binomial":
        y_rep = rng.binomial(np.round(size).astype(np.int64), np.clip(inv(eta), 0.0, 1.0)).astype(float)
    elif family == "negbinomial":
        phi = fit.draws("phi")[:, None]
        cell_of = np.unique(slot, return_inverse=True)[1]
        mult = rng.gamma(phi, 1.0 / phi, size=(S, int(cell_of.max()) + 1))
        y_rep = rng.poisson(mu * mult[:, cell_of]).astype(float)
    else:
        y_rep = rng.poisson(mu).astype(float)

    def by_slot(v):
        return _np_segment_sum(v, slot, n_slot).reshape(*v.shape[:-1], len(per), G)

    E = by_slot(size)
    obs = _link_of_cell(family, by_slot(y), E)
    rep = _link_of_cell(family, by_slot(y_rep), E[None])
    expected_tot = by_slot(size * inv(eta0))
    with np.errstate(divide="ignore"):
        if family == "binomial":
            p = expected_tot / E[None]
            exp_link = np.log(p / (1.0 - p))
        else:
            exp_link = np.log(expected_tot / E[None])
    q = cells.target
    if cells.design == "DDD":
        r = cells.reference
        return (obs[:, q] - obs[:, r], exp_link[..., q] - exp_link[..., r], rep[..., q] - rep[..., r])
    return obs[:, q], exp_link[..., q], rep[..., q]


def gap_noise_draws(fit) -> np.ndarray:
    """Posterior draws of the gap-noise deviations e[j,t] of a non-Gaussian fit: (S, J, T).

    Their mean over periods is folded into the baselines, so only changes over time are meaningful
    (differences of period means, as the comparison check takes, are exact)."""
    return fit.draws("gap")
