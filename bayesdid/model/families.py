"""Non-Gaussian families on records: the shared terms, the latent shock and gap noise, covariates.

For record r (cell c = (j, g, t) and one covariate pattern x~_r, see :mod:`bayesdid.cells`):

    eta_r = m[j,g,t] + s[j,t] + e[j,t] * [g = target] + x~_r' theta

with ``m`` from :func:`bayesdid.model.terms.hierarchical_mean` (baselines, period effects, target
group period effects, tau[j] D[j,g,t]). Unlike the Gaussian family, the shock ``s`` and the gap
noise ``e`` cannot be integrated out in closed form; they are non-centred latent fields,

    s[j,t] = sigma_s[j] * z_shock[j,t]    (DDD only; a DiD has no within-jurisdiction contrast;
                                           sigma_s = sigma_shock for comparisons, the period scale
                                           for adopters, whose reference group identifies them),
    e[j,t] = sigma_gap * z_gap[j,t],       z ~ Normal(0, 1).

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
from .terms import hierarchical_mean, mean_from_draws

__all__ = ["FAMILY_BUILDERS", "build_family", "data_arrays", "record_loglik", "record_eta_draws",
           "pointwise_loglik", "inverse_link", "NP", "PT"]


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


NP = SimpleNamespace(log=np.log, exp=np.exp, softplus=lambda x: np.logaddexp(0.0, x),
                     expit=special.expit, gammaln=special.gammaln, segment_sum=_np_segment_sum,
                     take_last=lambda a, i: a[..., i])
PT = SimpleNamespace(log=pt.log, exp=pt.exp, softplus=pt.softplus, expit=pt.sigmoid, gammaln=pt.gammaln,
                     segment_sum=_pt_segment_sum, take_last=lambda a, i: a[i])

FAMILY_BUILDERS = ("binomial", "poisson", "negbinomial")
#: Record arrays every non-Gaussian model reads (``pm.Data`` names; shapes follow the data).
RECORD_KEYS = ("rec_cell", "rec_jt", "rec_tgt", "rec_w", "rec_size", "rec_x", "rec_first", "rec_ycell",
               "rec_cellid")


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
        ll = counts.negbinomial_loglik(y, size, eta, phi, cell=d["rec_cellid"], first=d["rec_first"],
                                       y_cell=d["rec_ycell"], n_cells=nc, xp=xp)
    else:
        raise ValueError(f"unknown family '{family}'")
    return d["rec_w"] * ll


def inverse_link(family: str, eta, xp=NP):
    return binomial.inverse_link(eta, xp) if family == "binomial" else counts.inverse_link(eta, xp)


def build_family(cells: Cells, scales: dict[str, float], coords: dict, family: str) -> pm.Model:
    """The PyMC model of a non-Gaussian ``family`` on the records of ``cells``."""
    J, G, T = cells.shape
    arr = data_arrays(cells, family)
    cov = cells.extra.get("covariates")
    K = 0 if cov is None else len(cov["names"])
    if K:
        coords = {**coords, "covariate": list(cov["names"])}
    with pm.Model(coords=coords) as model:
        m, S = hierarchical_mean(cells, scales)
        # only the arrays this family reads: nutpie's with_data rejects names the graph does not use
        keys = ("rec_size", "rec_w") + (("rec_first", "rec_ycell", "rec_cellid") if family == "negbinomial" else ())
        used = ("rec_cell", "rec_jt", "rec_tgt") + (("rec_x",) if K else ()) + keys
        d = {k: pm.Data(k, arr[k]) for k in used}
        obs = pm.Data("rec_y", arr["rec_y"])
        sigma_gap = pm.HalfNormal("sigma_gap", S["gap_noise"])
        z_gap = pm.Normal("z_gap", 0.0, 1.0, dims=("jurisdiction", "period"))
        gap = pm.Deterministic("gap", sigma_gap * z_gap, dims=("jurisdiction", "period"))
        eta = pt.reshape(m, (-1,))[d["rec_cell"]] + pt.reshape(gap, (-1,))[d["rec_jt"]] * d["rec_tgt"]
        if cells.design == "DDD":
            sigma_shock = pm.HalfNormal("sigma_shock", S["shock_spread"])
            z_shock = pm.Normal("z_shock", 0.0, 1.0, dims=("jurisdiction", "period"))
            # As in the Gaussian family: adopters' own shocks are identified by their reference group
            # and are not shrunk toward the comparisons' (wide period-effect scale); comparisons pool.
            ia = S.get("is_adopter")
            if ia is None:  # shared terms without the adopter indicator as data
                ia = pt.as_tensor((cells.start < T).astype(float))
            scale_j = ia * S["period"] + (1.0 - ia) * sigma_shock
            shock = pm.Deterministic("shock", scale_j[:, None] * z_shock, dims=("jurisdiction", "period"))
            eta = eta + pt.reshape(shock, (-1,))[d["rec_jt"]]
        if K:
            theta = pm.Normal("theta", 0.0, S["covariate"], dims=("covariate",))
            eta = eta + pt.dot(d["rec_x"], theta)
        params = [eta]
        if family == "negbinomial":
            disp = pm.HalfNormal("dispersion", S["dispersion"])
            phi = pm.Deterministic("phi", 1.0 / pt.sqr(disp))
            params.append(phi)
        n_cells = J * G * T

        def logp(value, eta, *rest):
            phi_ = rest[0] if family == "negbinomial" else None
            dd = dict(zip(keys, rest[len(params) - 1:]))
            dd["rec_y"] = value
            return record_loglik(family, dd, eta, phi_, xp=PT, n_cells=n_cells)

        pm.CustomDist("cells", *params, *[d[k] for k in keys], logp=logp, observed=obs)
    return model


def record_eta_draws(fit, m: np.ndarray | None = None, *, without_policy: bool = False) -> np.ndarray:
    """Posterior draws of eta_r for every record: shape (S, R) (numpy twin of the model).

    ``without_policy`` removes tau[j] D[j,g,t]: the counterfactual linear predictor.
    """
    from .terms import design_data

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

    For the Gaussian family the shock and gap noise are integrated out (see
    :func:`bayesdid.model.gaussian.pointwise_loglik`); here they are conditioned on.
    """
    family = fit.spec.family
    if family == "gaussian":
        from .gaussian import pointwise_loglik as gauss

        return gauss(fit)
    cells = fit.cells
    J, G, T = cells.shape
    d = data_arrays(cells, family)
    eta = record_eta_draws(fit)
    phi = fit.draws("phi")[:, None] if family == "negbinomial" else None
    ll = record_loglik(family, d, eta, phi, xp=NP)
    return _np_segment_sum(ll, d["rec_jt"], J * T).reshape(ll.shape[0], J, T)
