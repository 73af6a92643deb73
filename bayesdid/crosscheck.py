"""The least-squares cross-check, computed on cells, with inference that survives few adopters.

The saturated fixed-effects regression on rows,

    y_i = a[j,g] + b[j,t] + c[g,t] + beta * D[j,g,t] + x_i' theta + e_i      (DDD)
    y_i = a[j]   + b[t]            + beta * D[j,t]   + x_i' theta + e_i      (DiD)

is solved from per-cell statistics only. Its fixed effects F and the treatment D are constant
within a cell c, so by the Frisch-Waugh-Lovell theorem everything follows from

* the weighted annihilator M of the cell-level dummies, weights n_c (a dense matrix with one row
  per non-empty cell, never one per data row): d~ = M d, ybar~ = M ybar, xbar~ = M xbar;
* the within-cell moments ss_c = sum_i (y_i - ybar_c)^2, Sxx_c = sum_i (x_i - xbar_c)(x_i - xbar_c)'
  and Sxy_c = sum_i (x_i - xbar_c)(y_i - ybar_c) (covariates only).

With w~_i = (d~_c, x_i - xbar_c + xbar~_c) the partialled regressors,

    A = sum_i w~_i w~_i',   (beta, theta) = A^{-1} sum_i w~_i y_i,   a = A^{-1} e_1,

and the row residual is e_i = (y_i - ybar_c) - (x_i - xbar_c)' theta + rbar_c, with the cell-mean
residual rbar_c = ybar~_c - d~_c beta - xbar~_c' theta.

Covariance estimators of beta (N rows, k = rank of the full design, G clusters = jurisdictions):

* classical: s^2 a_1 with s^2 = sum_i e_i^2 / (N - k);
* HC1: N / (N - k) * sum_i e_i^2 (a' w~_i)^2;
* CR1 by jurisdiction: G / (G - 1) * (N - 1) / (N - k) * sum_j (a' S_j)^2 with S_j = sum_{i in j} w~_i e_i.

These are the estimators statsmodels calls "nonrobust", "HC1" and "cluster" (with its default
small-sample correction); the tests compare with it on rows.

With covariates, the cluster scores need only the per-cell sums of x, x x' and x y; the HC1 meat
needs per-cell fourth moments of v_i = (1, y_i, x_i) because sum_i e_i^2 (a' w~_i)^2 is a quartic in
(y_i, x_i). It is computed when ``cells.extra["covariates"]["moment4"]`` holds them (see
:data:`COVARIATE_KEYS`) and reported as not available otherwise.

Inference that survives few treated clusters:

* the restricted wild cluster bootstrap (null imposed, Rademacher or Webb six-point weights, all
  weight vectors enumerated when there are few clusters), with a p-value and an interval by test
  inversion, computed from G x G matrices (no refit per draw);
* placebo-in-space randomization inference: every assignment of the adoption starts to other
  jurisdictions (the real adopters return to the comparison pool, which is what the sharp null of no
  effect allows), the least-squares estimate for each, and the share at least as large in absolute
  value as the real one.

References
----------
Cameron, Gelbach and Miller (2008), REStat 90(3): the wild cluster bootstrap.
Conley and Taber (2011), REStat 93(1): inference with few policy changes.
MacKinnon and Webb (2017), J. Applied Econometrics 32(2): wild bootstrap inference for wildly
different cluster sizes; Webb's six-point weights; the rule of thumb of about five treated clusters.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import linalg, stats
from threadpoolctl import threadpool_limits

from .cells import Cells
from .errors import BayesDidError
from .fixed_effects import _fixed_effects, cell_design

__all__ = [
    "cell_design",
    "least_squares_estimate",
    "cross_check",
    "permutation_test",
    "cross_check_not_applicable",
    "bootstrap_weights",
    "WEIGHT_KINDS",
    "COVARIATE_KEYS",
    "FEW_TREATED",
]

#: Webb's six-point distribution: +-sqrt(1/2), +-1, +-sqrt(3/2), each with probability 1/6.
_WEBB = np.array([-math.sqrt(1.5), -1.0, -math.sqrt(0.5), math.sqrt(0.5), 1.0, math.sqrt(1.5)])
WEIGHT_KINDS = {
    "rademacher": "Rademacher weights: -1 or +1, each with probability 1/2",
    "webb": "Webb six-point weights: +-sqrt(1/2), +-1, +-sqrt(3/2), each with probability 1/6",
}
#: What the cross-check reads from ``cells.extra["covariates"]`` (arrays on the model scale).
COVARIATE_KEYS = {
    "names": "list of K covariate names",
    "sx": "(J, G, T, K) per-cell sums of x",
    "sxx": "(J, G, T, K, K) per-cell sums of x x'",
    "sxy": "(J, G, T, K) per-cell sums of x * y",
    "moment4": "optional, (J, G, T, P, P, P, P) per-cell sums of v(x)v(x)v(x)v with v = (1, y, x_1..x_K), "
    "P = K + 2; needed only for the HC1 error with covariates",
}
#: Fewer treated clusters than this and CR1 is called unreliable (MacKinnon and Webb 2017, rule of thumb).
FEW_TREATED = 5


# ------------------------------------------------------------------------------------------------
# the partialled design on cells
# ------------------------------------------------------------------------------------------------
@dataclass(eq=False)
class _Design:
    """Kept cells, their weights and the orthonormal basis of the weighted fixed-effect space."""

    cells: Cells
    keep: np.ndarray  # (J*G*T,) bool
    jj: np.ndarray
    gg: np.ndarray
    tt: np.ndarray
    cluster: np.ndarray  # cluster code 0..C-1 of each kept cell
    cluster_jur: np.ndarray  # original jurisdiction index of each cluster
    n: np.ndarray
    ybar: np.ndarray
    ss: np.ndarray
    U: np.ndarray  # (m, r) orthonormal basis of the column space of sqrt(n) F
    rank: int
    columns: int
    xbar: np.ndarray | None = None  # (m, K)
    sxx_w: np.ndarray | None = None  # (m, K, K)
    sxy_w: np.ndarray | None = None  # (m, K)
    moment4: np.ndarray | None = None  # (m, P, P, P, P)
    covariates: tuple = ()
    bounds: np.ndarray | None = None  # first kept cell of each cluster
    nobs: float | None = None  # rows, when n holds summed sampling weights instead of row counts
    weighted_hc1: tuple | None = None  # per-cell sum w^2, sum w^2 (y - ybar), sum w^2 (y - ybar)^2
    cache: dict = field(default_factory=dict)

    @property
    def K(self) -> int:
        return len(self.covariates)

    @property
    def rows(self) -> float:
        return float(self.n.sum()) if self.nobs is None else self.nobs

    @property
    def clusters(self) -> int:
        return len(self.cluster_jur)

    def resid(self, v: np.ndarray) -> np.ndarray:
        """M v: residual of the weighted (weights n) projection of cell vectors on the fixed effects."""
        sq = np.sqrt(self.n)
        x = v * (sq if v.ndim == 1 else sq[:, None])
        fitted = self.U @ (self.U.T @ x)
        return v - fitted / (sq if v.ndim == 1 else sq[:, None])

    def treat_vector(self, start: np.ndarray) -> np.ndarray:
        """D over the kept cells for adoption starts ``start`` (J,), target group only."""
        c = self.cells
        return ((self.gg == c.target) & (self.tt >= np.asarray(start)[self.jj])).astype(float)

    def cluster_sum(self, v: np.ndarray) -> np.ndarray:
        """Sums over the cells of each cluster (kept cells are ordered by jurisdiction)."""
        return np.add.reduceat(v, self.bounds, axis=0)


def _design(cells: Cells) -> _Design:
    J, G, T = cells.shape
    jj, gg, tt = np.meshgrid(np.arange(J), np.arange(G), np.arange(T), indexing="ij")
    keep = cells.n > 0
    if cells.weight is not None:  # a weight of 0 drops a jurisdiction-period, as in the likelihood
        keep &= (np.asarray(cells.weight) > 0)[:, None, :]
    keep = keep.ravel()
    jj, gg, tt = jj.ravel()[keep], gg.ravel()[keep], tt.ravel()[keep]
    if keep.sum() == 0:
        raise BayesDidError("the least-squares cross-check found no non-empty cells; check the table's rows.")
    n = cells.n.ravel()[keep].astype(float)
    ybar = cells.sum_y.ravel()[keep] / n
    ss, nobs, hc1_parts = cells.ss.ravel()[keep], None, ()
    sampling = cells.extra.get("weights") if cells.extra else None
    if sampling is not None:  # weighted least squares: cell weights sum w, within sums sum w (y - ybar_w)^2
        n = np.asarray(sampling["sum_w"], dtype=float).ravel()[keep]
        ss = np.asarray(sampling["ss_w"], dtype=float).ravel()[keep]
        nobs = float(np.asarray(sampling["rows"]).ravel()[keep].sum())
        hc1_parts = tuple(
            np.asarray(sampling[k], dtype=float).ravel()[keep] for k in ("sum_w2", "w2_dev", "w2_dev2") if k in sampling
        )
    panel = cells.extra.get("panel") if cells.extra else None
    absorbed = 0
    if panel is not None:  # unit fixed effects by centring: the regression with unit dummies
        ss = np.asarray(panel["ss_ls"], dtype=float).ravel()[keep]
        absorbed = int(panel["absorbed"])
    F, _ = _fixed_effects(jj, gg, tt, J, G, T, cells.target)
    Fs = F * np.sqrt(n)[:, None]
    # rank-revealing QR: the first r columns of Q span the weighted fixed-effect space
    q, rr, _ = linalg.qr(Fs, mode="economic", pivoting=True)
    diag = np.abs(np.diag(rr))
    tol = diag.max() * max(Fs.shape) * np.finfo(float).eps * 10 if diag.size else 0.0
    r = int((diag > tol).sum())
    u = q
    cj = np.unique(jj)
    code = np.full(J, -1)
    code[cj] = np.arange(len(cj))
    assert np.all(np.diff(jj) >= 0)  # cells are ordered jurisdiction-major
    bounds = np.flatnonzero(np.r_[True, np.diff(jj) > 0])
    des = _Design(
        cells=cells,
        keep=keep,
        jj=jj,
        gg=gg,
        tt=tt,
        cluster=code[jj],
        cluster_jur=cj,
        n=n,
        ybar=ybar,
        ss=ss,
        U=u[:, :r],
        rank=r + absorbed,
        columns=F.shape[1],
        bounds=bounds,
        nobs=nobs,
        weighted_hc1=hc1_parts if len(hc1_parts) == 3 else None,
    )
    cov = cells.extra.get("covariates") if cells.extra else None
    if cov:
        missing = [k for k in ("names", "sx", "sxx", "sxy") if k not in cov]
        if missing:
            raise BayesDidError(
                f"cells.extra['covariates'] lacks {missing}; the cross-check needs "
                f"{ {k: v for k, v in COVARIATE_KEYS.items() if k != 'moment4'} }."
            )
        names = tuple(cov["names"])
        K = len(names)
        P = K + 2
        want = {"sx": (J, G, T, K), "sxx": (J, G, T, K, K), "sxy": (J, G, T, K), "moment4": (J, G, T, P, P, P, P)}
        arrays = {}
        for key, shape in want.items():
            if cov.get(key) is None:
                continue
            arr = np.asarray(cov[key], dtype=float)
            if arr.shape != shape:
                raise BayesDidError(
                    f"cells.extra['covariates']['{key}'] has shape {arr.shape}; expected {shape} "
                    f"for {K} covariate(s) {list(names)} on {J} x {G} x {T} cells."
                )
            arrays[key] = arr.reshape(J * G * T, *shape[3:])[keep]
        sx, sxx, sxy = arrays["sx"], arrays["sxx"], arrays["sxy"]
        sy = cells.sum_y.ravel()[keep]
        des.covariates = names
        des.xbar = sx / n[:, None]
        des.sxx_w = sxx - sx[:, :, None] * sx[:, None, :] / n[:, None, None]
        des.sxy_w = sxy - sx * (sy / n)[:, None]
        des.moment4 = arrays.get("moment4")
    return des


@dataclass(eq=False)
class _Fit:
    beta: float
    theta: np.ndarray
    A: np.ndarray
    Ainv: np.ndarray
    Wt: np.ndarray  # (m, K+1) cell part of the partialled regressors
    rbar: np.ndarray  # cell-mean residuals
    within_ssr: np.ndarray  # per-cell within sum of squared residuals
    dof: float  # N - k


def _partialled(des: _Design):
    if "yt" not in des.cache:
        des.cache["yt"] = des.resid(des.ybar)
        if des.K:
            des.cache["xt"] = des.resid(des.xbar)
            des.cache["Axx"] = (des.cache["xt"] * des.n[:, None]).T @ des.cache["xt"] + des.sxx_w.sum(0)
            des.cache["cx"] = (des.cache["xt"] * des.n[:, None]).T @ des.cache["yt"] + des.sxy_w.sum(0)
    return des.cache


def _raw_sxx(des: _Design) -> np.ndarray:
    """Per-cell sums of x x' (within part plus the cell-mean part)."""
    return des.sxx_w + des.n[:, None, None] * des.xbar[:, :, None] * des.xbar[:, None, :]


def _fit(des: _Design, d: np.ndarray) -> _Fit:
    c = _partialled(des)
    dt = des.resid(d)
    Wt = dt[:, None] if not des.K else np.column_stack([dt, c["xt"]])
    A = (Wt * des.n[:, None]).T @ Wt
    rhs = (Wt * des.n[:, None]).T @ c["yt"]
    if des.K:
        A[1:, 1:] += des.sxx_w.sum(0)
        rhs[1:] += des.sxy_w.sum(0)
    scale = float((des.n * d * d).sum())
    if scale == 0 or A[0, 0] <= 1e-10 * scale:
        raise BayesDidError(
            "the treatment indicator is absorbed by the fixed effects (no adopter has target-group "
            "cells both before and after its start next to comparison cells); the least-squares "
            "estimate is not identified."
        )
    if des.K:
        # scaled by the raw second moments, a (near) zero eigenvalue means a covariate is collinear
        raw = np.sqrt(np.r_[scale, np.maximum(np.einsum("ckk->k", _raw_sxx(des)), 1e-300)])
        collinear = np.linalg.eigvalsh(A / np.outer(raw, raw)).min() < 1e-9
    if des.K and collinear:
        raise BayesDidError(
            f"the covariates {list(des.covariates)} are collinear with each other, the treatment or "
            "the fixed effects (for example a covariate constant within jurisdiction-periods); "
            "drop or combine them in model.covariates."
        )
    coef = np.linalg.solve(A, rhs)
    theta = coef[1:]
    rbar = c["yt"] - Wt @ coef
    within = des.ss.copy()
    if des.K:
        within += -2 * des.sxy_w @ theta + np.einsum("cab,a,b->c", des.sxx_w, theta, theta)
    k = des.rank + 1 + des.K
    return _Fit(
        beta=float(coef[0]),
        theta=theta,
        A=A,
        Ainv=np.linalg.inv(A),
        Wt=Wt,
        rbar=rbar,
        within_ssr=within,
        dof=des.rows - k,
    )


def _errors(des: _Design, f: _Fit) -> dict:
    """Classical, HC1 and CR1 standard errors of beta (see the module docstring)."""
    n, N, C = des.n, des.rows, des.clusters
    a = f.Ainv[:, 0]
    ssr = float((f.within_ssr + n * f.rbar**2).sum())
    out = {"se_classical": math.sqrt(ssr / f.dof * f.Ainv[0, 0])}
    # cluster scores S_j = sum_{i in j} w~_i e_i
    score = f.Wt * (n * f.rbar)[:, None]
    if des.K:
        score[:, 1:] += des.sxy_w - des.sxx_w @ f.theta
    s_j = des.cluster_sum(score @ a)
    cr1 = C / (C - 1) * (N - 1) / f.dof if C > 1 else float("nan")
    out["se_cr1"] = math.sqrt(cr1 * float((s_j**2).sum())) if C > 1 else None
    out["factor_cr1"] = cr1
    out["factor_hc1"] = N / f.dof
    out["hc1_reason"] = None
    if des.nobs is not None and des.weighted_hc1 is None:
        out["se_hc1"] = None
        out["hc1_reason"] = (
            "not computed: the cells lack the per-cell sums of w^2, w^2 e and w^2 e^2 that its meat "
            "needs; CR1 and the wild cluster bootstrap are weighted"
        )
    elif des.nobs is not None:  # weighted rows: sum_i w_i^2 e_i^2 with e_i = (y_i - ybar_c) + rbar_c
        sw2, w2d, w2d2 = des.weighted_hc1
        e2 = w2d2 + 2 * f.rbar * w2d + f.rbar**2 * sw2
        out["se_hc1"] = math.sqrt(N / f.dof * float((e2 * (a[0] * f.Wt[:, 0]) ** 2).sum()))
    elif not des.K:
        e2 = f.within_ssr + n * f.rbar**2
        out["se_hc1"] = math.sqrt(N / f.dof * float((e2 * (a[0] * f.Wt[:, 0]) ** 2).sum()))
    elif des.moment4 is not None:
        th, az = f.theta, a[1:]
        m = len(n)
        u = np.column_stack([f.rbar - des.ybar + des.xbar @ th, np.ones(m), np.tile(-th, (m, 1))])
        xt = _partialled(des)["xt"]
        q = np.column_stack([a[0] * f.Wt[:, 0] + (xt - des.xbar) @ az, np.zeros(m), np.tile(az, (m, 1))])
        meat = np.einsum("cabde,ca,cb,cd,ce->", des.moment4, u, u, q, q)
        out["se_hc1"] = math.sqrt(N / f.dof * float(meat))
    else:
        out["se_hc1"] = None
        out["hc1_reason"] = (
            "not available with covariates unless the cells carry per-cell fourth moments "
            "(cells.extra['covariates']['moment4']); the HC1 meat sum_i e_i^2 (a'w_i)^2 is a "
            "quartic in the row values"
        )
    return out


# ------------------------------------------------------------------------------------------------
# wild cluster bootstrap, restricted
# ------------------------------------------------------------------------------------------------
def bootstrap_weights(kind: str, clusters: int, draws: int, seed: int) -> tuple[np.ndarray, bool]:
    """Weights v (clusters, B) for the wild cluster bootstrap and whether they are a full enumeration.

    All 2^G (Rademacher) or 6^G (Webb) weight vectors are used when there are no more of them than
    ``draws``; otherwise ``draws`` vectors are drawn with ``numpy.random.default_rng(seed)``.
    """
    if kind not in WEIGHT_KINDS:
        raise BayesDidError(f"crosscheck.weights: expected one of {sorted(WEIGHT_KINDS)}, found {kind!r}.")
    values = np.array([-1.0, 1.0]) if kind == "rademacher" else _WEBB
    if len(values) ** clusters <= draws:
        grid = np.array(list(itertools.product(values, repeat=clusters)), dtype=float).T
        return grid.reshape(clusters, -1), True
    rng = np.random.default_rng(seed)
    return values[rng.integers(0, len(values), size=(clusters, draws))], False


class _Wild:
    """Bootstrap t statistics t*(beta0) for the restricted wild cluster bootstrap.

    With y* = yhat_R + v_j e~_i (e~ the residuals with beta = beta0 imposed), the bootstrap
    estimate and its cluster scores are linear in v:

        beta* - beta0 = alpha' v,     a' S*_j = (K v)_j,
        K = diag(alpha) - C - B A^{-1} G',

    where G_j = sum_{i in j} w~_i e~_i, alpha_j = a'G_j, B_j = a' sum_{i in j} w~_i w~_i', and C
    carries the part of the fixed-effect projection of v*e~ that crosses clusters. So each draw
    costs O(clusters^2); nothing is refitted.
    """

    def __init__(self, des: _Design, f: _Fit, V: np.ndarray, se_cr1: float, factor: float):
        self.des, self.f, self.V, self.se, self.factor = des, f, V, se_cr1, factor
        c = _partialled(des)
        n, a = des.n, f.Ainv[:, 0]
        self.a = a
        sq = np.sqrt(n)
        omega = n * (f.Wt @ a)
        self.Om = des.cluster_sum(des.U * (omega / sq)[:, None])  # (C, r)
        bcell = (n * (f.Wt @ a))[:, None] * f.Wt
        if des.K:
            bcell[:, 1:] += des.sxx_w @ a[1:]
        self.Bm = des.cluster_sum(bcell)  # (C, q)
        self.dt = f.Wt[:, 0]
        if des.K:
            self.cz_d = (c["xt"] * n[:, None]).T @ self.dt

    def _parts(self, beta0: float):
        """(G, Km) at beta0; both are affine in beta0 (the restricted residuals are)."""
        des, f = self.des, self.f
        c = _partialled(des)
        n = des.n
        ebar = c["yt"] - beta0 * self.dt
        theta_r = np.zeros(0)
        if des.K:
            theta_r = np.linalg.solve(c["Axx"], c["cx"] - beta0 * self.cz_d)
            ebar = ebar - c["xt"] @ theta_r
        g = f.Wt * (n * ebar)[:, None]
        if des.K:
            g[:, 1:] += des.sxy_w - des.sxx_w @ theta_r
        G = des.cluster_sum(g)  # (C, q)
        alpha = G @ self.a
        H = des.cluster_sum(des.U * (n * ebar / np.sqrt(n))[:, None])  # (C, r)
        Km = np.diag(alpha) - self.Om @ H.T - self.Bm @ f.Ainv @ G.T
        return alpha, Km

    def tstar(self, beta0: float) -> tuple[float, np.ndarray]:
        """The CR1 t statistic of the data and the bootstrap t* (B,) under beta = beta0."""
        if not hasattr(self, "_affine"):
            a0, k0 = self._parts(0.0)
            a1, k1 = self._parts(1.0)
            self._affine = (a0, a1 - a0, k0, k1 - k0)
        a0, da, k0, dk = self._affine
        alpha, Km = a0 + beta0 * da, k0 + beta0 * dk
        num = alpha @ self.V
        with np.errstate(divide="ignore", invalid="ignore"):
            ts = num / np.sqrt(self.factor * ((Km @ self.V) ** 2).sum(0))
        t = (self.f.beta - beta0) / self.se
        return t, ts

    def pvalue(self, beta0: float) -> float:
        t, ts = self.tstar(beta0)
        return float(np.mean(np.abs(np.nan_to_num(ts, nan=0.0)) >= abs(t) * (1 - 1e-12)))

    def interval(self, level: float = 0.95) -> tuple[float | None, float | None]:
        """Test inversion: the beta0 at which the bootstrap p-value falls below 1 - level."""
        alpha = 1 - level
        step = self.se if self.se and math.isfinite(self.se) and self.se > 0 else max(abs(self.f.beta), 1.0)
        bounds = []
        for sign in (-1.0, 1.0):
            inside, out = self.f.beta, None
            for k in range(40):
                cand = self.f.beta + sign * step * 2.0**k
                if self.pvalue(cand) < alpha:
                    out = cand
                    break
                inside = cand
            if out is None:
                bounds.append(None)  # unbounded within 2^40 standard errors
                continue
            for _ in range(60):
                mid = 0.5 * (inside + out)
                if self.pvalue(mid) < alpha:
                    out = mid
                else:
                    inside = mid
                if abs(out - inside) <= 1e-7 * step:
                    break
            bounds.append(0.5 * (inside + out))
        return bounds[0], bounds[1]


# ------------------------------------------------------------------------------------------------
# placebo in space
# ------------------------------------------------------------------------------------------------
def _assignments(des: _Design, limit: int, seed: int):
    """Start vectors: the adopters' starts given to other jurisdictions (the real one included)."""
    cells = des.cells
    J, T = len(cells.jurisdictions), len(cells.periods)
    adopters = [j for j in cells.adopters if j in set(des.cluster_jur.tolist())]
    starts = [int(cells.start[j]) for j in adopters]
    pool = des.cluster_jur.tolist()
    A = len(adopters)
    same = len(set(starts)) <= 1
    count = math.comb(len(pool), A) if same else math.perm(len(pool), A)
    real = tuple(sorted(adopters)) if same else tuple(adopters)
    if count <= limit:
        combos = list(itertools.combinations(pool, A) if same else itertools.permutations(pool, A))
        sampled = False
    else:
        rng = np.random.default_rng(seed)
        seen, combos = {real}, [real]
        while len(combos) < limit:
            pick = tuple(int(x) for x in rng.choice(pool, size=A, replace=False))
            pick = tuple(sorted(pick)) if same else pick
            if pick not in seen:
                seen.add(pick)
                combos.append(pick)
        sampled = True
    out = []
    for combo in combos:
        s = np.full(J, T, dtype=int)
        for j, st in zip(combo, starts):
            s[j] = st
        out.append((combo, s, combo == real))
    return out, count, sampled


def _placebo(des: _Design, beta: float, limit: int, seed: int) -> dict:
    cells = des.cells
    plan, count, sampled = _assignments(des, limit, seed)
    S = np.column_stack([s for _, s, _ in plan])  # (J, P) starts of each assignment
    Dm = ((des.gg == cells.target)[:, None] & (des.tt[:, None] >= S[des.jj, :])).astype(float)
    Dt = des.resid(Dm)
    c = _partialled(des)
    n = des.n
    a_dd = (Dt * Dt * n[:, None]).sum(0)
    c_d = (Dt * n[:, None]).T @ c["yt"]
    scale = (Dm * Dm * n[:, None]).sum(0)
    ok = a_dd > 1e-10 * np.maximum(scale, 1e-300)
    if des.K:
        a_dx = (Dt * n[:, None]).T @ c["xt"]  # (P, K)
        q = des.K + 1
        Ap = np.zeros((len(plan), q, q))
        Ap[:, 0, 0] = np.where(ok, a_dd, 1.0)
        Ap[:, 0, 1:] = a_dx
        Ap[:, 1:, 0] = a_dx
        Ap[:, 1:, 1:] = c["Axx"]
        rhs = np.column_stack([c_d, np.tile(c["cx"], (len(plan), 1))])
        est = np.linalg.solve(Ap, rhs[:, :, None])[:, 0, 0]
    else:
        est = c_d / np.where(ok, a_dd, 1.0)
    est = np.where(ok, est, np.nan)
    valid = ok & np.isfinite(est)
    usable = int(valid.sum())
    extreme = int((np.abs(est[valid]) >= abs(beta) * (1 - 1e-10)).sum())
    names = cells.jurisdictions
    placebos = [
        {"adopters": [names[j] for j in combo], "estimate": float(e), "real": bool(real)}
        for (combo, _, real), e, v in zip(plan, est, valid)
        if v
    ]
    result = {
        "p_value": extreme / usable if usable else None,
        "assignments": usable,
        "possible": int(count),
        "sampled": sampled,
        "skipped_not_identified": int((~valid).sum()),
        "rule": (
            "the adopters' start periods given in turn to other jurisdictions "
            + ("(all combinations)" if not sampled else f"({usable} drawn at random of {count})")
            + "; the real adopters return to the comparison pool; p = share of assignments, the real one "
            "included, whose |estimate| is at least the real |estimate|"
        ),
        "estimates": [p["estimate"] for p in placebos if not p["real"]],
    }
    if len(placebos) <= 200:
        result["placebos"] = [p for p in placebos if not p["real"]]
    if usable < 20:
        result["note"] = (
            f"only {usable} assignments: the smallest attainable p-value is {1 / max(usable, 1):.3f}, "
            "so the test cannot reject at 5%"
        )
    return result


# ------------------------------------------------------------------------------------------------
# the public face
# ------------------------------------------------------------------------------------------------
def _advice(treated: int, clusters: int) -> str:
    if treated < FEW_TREATED:
        return (
            f"Only {treated} treated cluster(s) of {clusters}: the CR1 standard error and its p-value are "
            f"unreliable here (cluster-robust errors over-reject with fewer than about {FEW_TREATED} treated "
            "clusters; MacKinnon and Webb 2017, rule of thumb; Conley and Taber 2011). Trust the placebo-in-"
            "space permutation p-value and the posterior instead; the restricted wild cluster bootstrap is "
            "safer than CR1 but tends to under-reject, with wide or unbounded intervals, when one or two "
            "clusters are treated."
        )
    return (
        f"{treated} treated clusters of {clusters}: CR1 is usually adequate at this number (MacKinnon and Webb "
        "2017, rule of thumb); the restricted wild cluster bootstrap p-value is the safer check and should "
        "agree with it, and the permutation p-value and the posterior are there to confirm."
    )


def cross_check(
    cells: Cells,
    *,
    seed: int = 20261202,
    draws: int = 999,
    weights: str = "webb",
    full: bool = True,
    placebos: int = 999,
    level: float = 0.95,
) -> dict:
    """The least-squares cross-check of a study's cells.

    Parameters
    ----------
    cells : Cells
        Per-cell statistics (covariates, when present, in ``cells.extra["covariates"]``, see
        :data:`COVARIATE_KEYS`). Cells with weight 0 are left out, as in the likelihood.
    seed, draws, weights
        Wild cluster bootstrap: seed of ``numpy.random.default_rng``, number of weight vectors (all
        of them are enumerated when there are no more than ``draws``), and ``"webb"`` or
        ``"rademacher"``. The same seed draws the placebo assignments when they must be sampled.
    full : bool
        False skips the wild bootstrap and the permutation (``bayesdid fit --no-cross-check``); the
        estimate and the three standard errors are kept.
    placebos : int
        Largest number of placebo assignments; more possible assignments are sampled at random.
    level : float
        Level of the intervals (0.95 gives ``ci_wild_95``).

    Returns
    -------
    dict
        ``estimate`` (beta of the saturated regression), ``se_classical``, ``se_hc1``, ``se_cr1``,
        ``p_cr1`` (two-sided, t with clusters - 1 degrees of freedom), ``p_wild``, ``ci_wild_95``,
        ``p_permutation``, ``clusters``, ``treated_clusters``, ``advice``, plus ``ci_cr1_95``,
        ``method`` (regression, covariance estimators and their small-sample factors), ``wild`` and
        ``permutation`` (the placebo distribution) and ``skipped`` (parts not computed and why).

    Raises
    ------
    BayesDidError
        If the treatment is absorbed by the fixed effects or a setting is out of range.
    """
    if weights not in WEIGHT_KINDS:
        raise BayesDidError(f"crosscheck.weights: expected one of {sorted(WEIGHT_KINDS)}, found {weights!r}.")
    if not (0 < level < 1):
        raise BayesDidError(f"cross-check level: expected a number between 0 and 1, found {level!r}.")
    # The matrices here have one row per cell, so they are small: a multithreaded BLAS only adds
    # overhead, and on a shared CPU it was measured 10-20 times slower than one thread.
    with threadpool_limits(limits=1, user_api="blas"):
        return _cross_check(cells, seed=seed, draws=draws, weights=weights, full=full, placebos=placebos, level=level)


def _cross_check(cells, *, seed, draws, weights, full, placebos, level):
    des = _design(cells)
    d = des.treat_vector(cells.start)
    f = _fit(des, d)
    err = _errors(des, f)
    C = des.clusters
    treated_clusters = int(sum(1 for j in cells.adopters if j in set(des.cluster_jur.tolist())))
    tq = stats.t.ppf(0.5 + level / 2, C - 1) if C > 1 else float("nan")
    se = err["se_cr1"]
    p_cr1 = float(2 * stats.t.sf(abs(f.beta / se), C - 1)) if se else None
    design_text = (
        "jurisdiction x group, jurisdiction x period and group x period fixed effects"
        if cells.design == "DDD"
        else "jurisdiction and period fixed effects (two-way)"
    )
    pct = int(round(level * 100))
    out = {
        "estimate": f.beta,
        "se_classical": err["se_classical"],
        "se_hc1": err["se_hc1"],
        "se_cr1": se,
        "p_cr1": p_cr1,
        "p_wild": None,
        f"ci_wild_{pct}": None,
        "p_permutation": None,
        "clusters": C,
        "treated_clusters": treated_clusters,
        "advice": _advice(treated_clusters, C),
        f"ci_cr1_{pct}": [f.beta - tq * se, f.beta + tq * se] if se else None,
        "rows": int(round(des.rows)),
        "cells": int(len(des.n)),
        "regressors": des.rank + 1 + des.K,
        "covariates": list(des.covariates),
        "method": {
            "regression": f"OLS on the rows with {design_text} and the treatment indicator"
            + (f", covariates {list(des.covariates)}" if des.K else "")
            + "; solved exactly from per-cell statistics (Frisch-Waugh-Lovell on cells)",
            "se_classical": "s^2 (X'X)^-1 with s^2 = SSR / (N - k)",
            "se_hc1": "HC1: N / (N - k) x sum_i e_i^2 x_i x_i' sandwich"
            + (f"; {err['hc1_reason']}" if err["hc1_reason"] else ""),
            "se_cr1": "CR1 clustered by jurisdiction: G / (G - 1) x (N - 1) / (N - k) small-sample factor",
            "p_cr1": "two-sided, Student t with G - 1 degrees of freedom",
            "factor_hc1": err["factor_hc1"],
            "factor_cr1": err["factor_cr1"],
            "N": int(round(des.rows)),
            "k": des.rank + 1 + des.K,
            "G": C,
        },
        "skipped": {},
    }
    if not full:
        why = "skipped on request (--no-cross-check)"
        out["skipped"] = {"p_wild": why, f"ci_wild_{pct}": why, "p_permutation": why}
        return out
    if se is None or not math.isfinite(se) or se == 0 or C < 2:
        out["skipped"]["p_wild"] = "not applicable: needs at least two clusters and a positive CR1 error"
    else:
        V, enumerated = bootstrap_weights(weights, C, draws, seed)
        wild = _Wild(des, f, V, se, err["factor_cr1"])
        lo, hi = wild.interval(level)
        out["p_wild"] = wild.pvalue(0.0)
        out[f"ci_wild_{pct}"] = [lo, hi]  # None marks a side that is unbounded
        out["wild"] = {
            "weights": weights,
            "weights_text": WEIGHT_KINDS[weights],
            "draws": int(V.shape[1]),
            "enumerated": enumerated,
            "seed": seed,
            "method": "restricted (null imposed) wild cluster bootstrap of the CR1 t statistic, symmetric "
            "p-value P(|t*| >= |t|); interval by inverting the test over beta0 with the same weights",
        }
        if lo is None or hi is None:
            out["wild"]["note"] = (
                "the interval is unbounded on at least one side (given as null; common with one treated cluster)"
            )
    perm = _placebo(des, f.beta, placebos, seed)
    out["p_permutation"] = perm["p_value"]
    out["permutation"] = perm
    if perm["p_value"] is None:
        out["skipped"]["p_permutation"] = "not applicable: no placebo assignment identifies the effect"
    return out


def permutation_test(cells: Cells, *, placebos: int = 999, seed: int = 20261202, designs: dict | None = None) -> dict:
    """The least-squares estimate and its placebo-in-space distribution, without errors or bootstrap.

    The same assignments and estimates as :func:`cross_check` (``p_value`` two-sided on |estimate|,
    ``estimates`` of the placebo assignments without the real one), for callers that run it on many
    simulated data sets (``bayesdid plan``). ``designs``: a dict the caller keeps between calls; the
    fixed-effect basis (a QR of the cells' design, the costly part) depends only on which cells hold
    rows and how many, so data sets of one layout reuse it (plain cells only: no covariates, sampling
    weights or panel units).
    """
    des = None
    plain = not (set(cells.extra or {}) - {"gap"}) and cells.weight is None
    if designs is not None and plain:
        key = (cells.shape, int(cells.target), cells.design, np.asarray(cells.n, float).tobytes())
        if key in designs:
            base = designs[key]
            keep = base.keep
            des = dataclasses.replace(
                base, cells=cells, ybar=cells.sum_y.ravel()[keep] / base.n, ss=cells.ss.ravel()[keep], cache={}
            )
        else:
            des = designs[key] = _design(cells)
            if len(designs) > 64:  # a worker sees few layouts; keep the memory bounded anyway
                designs.pop(next(iter(designs)))
            des = dataclasses.replace(des, cache={})
    if des is None:
        des = _design(cells)
    f = _fit(des, des.treat_vector(cells.start))
    return {"estimate": f.beta, **_placebo(des, f.beta, placebos, seed)}


def cross_check_not_applicable(reason: str) -> dict:
    """The cross-check's keys, all empty, with the reason it could not run."""
    keys = (
        "estimate",
        "se_classical",
        "se_hc1",
        "se_cr1",
        "p_cr1",
        "p_wild",
        "ci_wild_95",
        "p_permutation",
        "clusters",
        "treated_clusters",
    )
    return {**{k: None for k in keys}, "advice": f"not applicable: {reason}", "not_applicable": reason}


def least_squares_estimate(cells: Cells) -> dict:
    """Point estimate of the saturated fixed-effects regression (equals row-level OLS)."""
    out = cross_check(cells, full=False)
    return {
        "estimate": out["estimate"],
        "regressors": out["regressors"],
        "cells": out["cells"],
        "method": out["method"]["regression"],
    }
