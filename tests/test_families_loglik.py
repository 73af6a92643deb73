"""Collapsed versus row-level log-likelihoods of every family (no sampler; numpy, scipy, PyTensor).

Reference: scipy.stats on the rows (binom, poisson, multivariate_normal, gamma with
scipy.integrate.quad for the cell-gamma negative binomial). "Up to a constant" is checked by
evaluating the difference collapsed - row-level at two random parameter values: it must not move.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, linalg, special, stats

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.model import families, gaussian
from bayesdid.model.registry import build_model, pointwise_loglik
from bayesdid.model.structure import gap_scale_draws
from bayesdid.model.terms import model_spec, resolve_scales
from bayesdid.simulate import Scenario, simulate
from bayesdid.simulate_families import CountScenario, simulate_family
from bayesdid.study import PriorScales


def _study(frame, truth, family, covariates=None, **kw):
    ddd = "group" in frame
    return make_study(
        table="unused.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
        family=family,
        covariates=covariates,
        **kw,
    )


def _hand_design(frame, names):
    """Covariate columns built by hand with pandas (not by formulaic), in the order and treatment
    coding the model reports (``C(var)[T.level]``), centred at their row means."""
    cols = []
    for nm in names:
        var, level = nm[2:].split(")[T.")
        cols.append((frame[var].astype(str) == level[:-1]).to_numpy(dtype=float))
    X = np.column_stack(cols)
    return X - X.mean(axis=0)


def _codes(cells, frame):
    j = frame["region"].map({v: i for i, v in enumerate(cells.jurisdictions)}).to_numpy()
    t = frame["period"].map({v: i for i, v in enumerate(cells.periods)}).to_numpy()
    g = (
        frame["group"].map({v: i for i, v in enumerate(cells.groups)}).to_numpy()
        if "group" in frame
        else np.zeros(len(frame), dtype=int)
    )
    return j, g, t


def _random_params(rng, cells, K):
    J, G, T = cells.shape
    return {
        "m": rng.normal(-1.5, 0.5, (J, G, T)),
        "s": rng.normal(0, 0.3, (J, T)),
        "e": rng.normal(0, 0.3, (J, T)),
        "theta": rng.normal(0, 0.5, K),
        "phi": rng.uniform(2, 30),
    }


def _collapsed(family, cells, p):
    d = families.data_arrays(cells, family)
    J, G, T = cells.shape
    eta = p["m"].ravel()[d["rec_cell"]] + p["e"].ravel()[d["rec_jt"]] * d["rec_tgt"]
    if cells.design == "DDD":
        eta = eta + p["s"].ravel()[d["rec_jt"]]
    eta = eta + d["rec_x"] @ p["theta"]
    return float(families.record_loglik(family, d, eta, p["phi"]).sum())


def _row_eta(cells, frame, X, p):
    j, g, t = _codes(cells, frame)
    eta = p["m"][j, g, t] + p["e"][j, t] * (g == cells.target)
    if cells.design == "DDD":
        eta = eta + p["s"][j, t]
    return eta + X @ p["theta"]


def _nb_rows(cells, frame, X, p):
    """Row-level cell-gamma negative binomial: integrate u_c out numerically per cell (scipy)."""
    j, g, t = _codes(cells, frame)
    eta = _row_eta(cells, frame, X, p)
    mu = frame["exposure"].to_numpy() * np.exp(eta)
    y = frame["y"].to_numpy()
    phi = p["phi"]
    key = (j * cells.shape[1] + g) * cells.shape[2] + t
    total = 0.0
    for c in np.unique(key):
        sel = key == c
        yc, mc = y[sel], mu[sel]

        def logf(u):
            return stats.poisson.logpmf(yc, mc * u).sum() + stats.gamma.logpdf(u, phi, scale=1 / phi)

        grid = np.linspace(1e-3, 6, 400)
        lmax = max(logf(u) for u in grid)
        val, _ = integrate.quad(lambda u: np.exp(logf(u) - lmax), 0, np.inf, limit=200, epsabs=0, epsrel=1e-11)
        total += lmax + np.log(val)
    return total


@pytest.mark.parametrize("family", ["binomial", "poisson", "negbinomial"])
@pytest.mark.parametrize("design", ["DDD", "DiD"])
def test_collapsed_equals_rows_up_to_constant(family, design):
    rng = np.random.default_rng(7)
    sc = CountScenario(
        family=family,
        jurisdictions=4,
        periods=3,
        groups=2 if design == "DDD" else 1,
        starts={0: 1},
        rows_per_cell=12 if family != "negbinomial" else 3,
        trials=3 if family == "binomial" else 1,
    )
    frame, truth = simulate_family(sc, 11)
    kw = {"exposure": "exposure"} if family != "binomial" else {"trials": "trials"}
    cells = collapse(_study(frame, truth, family, "C(sex) + C(risk)", **kw), frame)
    # exact collapse reduces rows to cell x pattern records (12 patterns at most per cell... 6 here)
    assert len(cells.extra["records"]["y"]) < len(frame)
    names = cells.extra["covariates"]["names"]
    assert names == ["C(sex)[T.male]", "C(risk)[T.low]", "C(risk)[T.mid]"]  # reference levels first in sort
    X = _hand_design(frame, names)
    diffs = []
    for _ in range(2):
        p = _random_params(rng, cells, 3)
        eta = _row_eta(cells, frame, X, p)
        y = frame["y"].to_numpy()
        if family == "binomial":
            rows = stats.binom.logpmf(y, frame["trials"].to_numpy(), special.expit(eta)).sum()
        elif family == "poisson":
            rows = stats.poisson.logpmf(y, frame["exposure"].to_numpy() * np.exp(eta)).sum()
        else:
            rows = _nb_rows(cells, frame, X, p)
        diffs.append(_collapsed(family, cells, p) - rows)
    # the constant itself (sum log C(n,y), sum y log E - log y!) must not depend on the parameters
    assert diffs[0] == pytest.approx(diffs[1], abs=1e-7)


def test_zero_one_binomial_and_no_covariates():
    """A 0/1 outcome without covariates collapses to one record per cell: successes and trials."""
    sc = CountScenario(family="binomial", jurisdictions=5, periods=3, starts={0: 1}, rows_per_cell=30, covariates=False)
    frame, truth = simulate_family(sc, 3)
    cells = collapse(_study(frame, truth, "binomial"), frame)
    rec = cells.extra["records"]
    assert len(rec["y"]) == cells.n_cells == 5 * 2 * 3
    grp = frame.groupby(["region", "group", "period"])["y"].agg(["sum", "count"])
    j, g, t = cells.jurisdictions[0], cells.groups[cells.target], cells.periods[2]
    assert cells.sum_y[0, cells.target, 2] == grp.loc[(j, g, t), "sum"]
    assert cells.n[0, cells.target, 2] == grp.loc[(j, g, t), "count"]


def _mvn_rows(cells, frame, y, X, par):
    """Row-level Gaussian with the shock and gap noise integrated out: per jurisdiction-period the
    rows are multivariate normal with covariance sigma_g^2 I + sigma_s^2 11' + sigma_gap^2 qq'
    (q = target-group indicator), scipy.stats.multivariate_normal."""
    j, g, t = _codes(cells, frame)
    mean = par["m"][j, g, t] + X @ par["theta"]
    total = 0.0
    for jj in range(cells.shape[0]):
        for tt in range(cells.shape[2]):
            sel = (j == jj) & (t == tt)
            q = (g[sel] == cells.target).astype(float)
            sig = par["sigma"][g[sel]]
            cov = np.diag(sig**2) + par["sigma_gap"] ** 2 * np.outer(q, q)
            if cells.design == "DDD":
                cov = cov + par["sigma_shock"] ** 2
            total += stats.multivariate_normal.logpdf(y[sel], mean[sel], cov)
    return total


@pytest.mark.parametrize("design", ["DDD", "DiD"])
def test_gaussian_with_covariates_collapsed_equals_rows(design):
    """Gaussian + covariates: the per-cell sums (n, sum y, sum y^2, sum x, x x', x y) reproduce the
    row-level likelihood exactly (no constant at all here: both sides are complete densities)."""
    rng = np.random.default_rng(5)
    sc = Scenario(
        jurisdictions=4,
        periods=3,
        groups=2 if design == "DDD" else 1,
        starts={0: 1},
        rows_per_cell=5,
        fixed_cells=False,
    )
    frame, truth = simulate(sc, 2)
    frame["age"] = rng.normal(50, 10, len(frame))
    frame["sex"] = rng.choice(["female", "male"], len(frame))
    frame["y"] = frame["y"] + 0.02 * frame["age"] + 0.3 * (frame["sex"] == "male")
    cells = collapse(_study(frame, truth, "gaussian", "age + C(sex)"), frame)
    cov = cells.extra["covariates"]
    assert cov["names"] == ["age", "C(sex)[T.male]"]
    X = np.column_stack([frame["age"], frame["sex"] == "male"]).astype(float)
    X = X - X.mean(axis=0)
    np.testing.assert_allclose(cov["means"], [frame["age"].mean(), (frame["sex"] == "male").mean()])
    # overall X'X and X'y are the sums of the per-cell sums
    np.testing.assert_allclose(cov["sxx"].sum(axis=(0, 1, 2)), X.T @ X, rtol=1e-10)
    np.testing.assert_allclose(cov["sxy"].sum(axis=(0, 1, 2)), X.T @ frame["y"].to_numpy(), rtol=1e-10)
    J, G, T = cells.shape
    arr = gaussian.cell_arrays(cells)
    for _ in range(2):
        par = {
            "m": rng.normal(1, 0.5, (J, G, T)),
            "theta": rng.normal(0, 0.3, 2),
            "sigma": rng.uniform(0.5, 1.5, G),
            "sigma_gap": rng.uniform(0.1, 0.5),
            "sigma_shock": rng.uniform(0.1, 0.5) if design == "DDD" else 0.0,
        }
        d = gaussian.covariate_adjusted(arr, par["theta"])
        r = cells.reference if design == "DDD" else None
        ll = gaussian.jt_loglik(
            d,
            m_r=par["m"][:, r, :] if r is not None else np.zeros((J, T)),
            m_q=par["m"][:, cells.target, :],
            sigma_r=par["sigma"][r] if r is not None else 1.0,
            sigma_q=par["sigma"][cells.target],
            sigma_shock=par["sigma_shock"],
            sigma_gap=par["sigma_gap"],
        ).sum()
        assert ll == pytest.approx(_mvn_rows(cells, frame, frame["y"].to_numpy(), X, par), rel=1e-10, abs=1e-8)


def _fake_fit(model, cells, family, rng):
    """A one-draw 'fit' at a random point of the model, read through PyMC's own graph."""
    ip = model.initial_point()
    point = {k: v + rng.normal(0, 0.4, np.shape(v)) for k, v in ip.items()}
    names = [
        n
        for n in (
            "baseline",
            "period_effect",
            "group_period_effect",
            "tau_adopter",
            "gap",
            "shock",
            "theta",
            "phi",
            "sigma",
            "sigma_gap",
            "sigma_gap_j",
            "sigma_shock",
            "rho",
            "z_gap_innovation",
            "gap_path",
        )
        if n in model.named_vars
    ]
    outs = model.replace_rvs_by_values([model[n] for n in names])  # evaluate at the point, not sample
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore", point_fn=True)
    vals = dict(zip(names, fn(point)))
    logp = model.compile_fn(
        model.logp(vars=[model["cells"]], sum=True), inputs=model.value_vars, on_unused_input="ignore", point_fn=True
    )(point)
    spec = model_spec(cells, family)
    scales = {n[len("prior_") :]: float(model[n].get_value()) for n in model.named_vars if n.startswith("prior_")}
    fake = SimpleNamespace(cells=cells, spec=spec, scales=scales, draws=lambda n: np.asarray(vals[n])[None, ...])
    return fake, float(logp)


@pytest.mark.parametrize(
    "family,gap",
    [
        ("binomial", "independent"),
        ("poisson", "independent"),
        ("negbinomial", "independent"),
        ("gaussian", "independent"),
        ("binomial", "persistent"),
        ("poisson", "persistent"),
        ("negbinomial", "persistent"),
    ],
)
@pytest.mark.parametrize("gap_centred", [False, True])
def test_numpy_twin_matches_pytensor_graph(family, gap, gap_centred, monkeypatch):
    """The model's observed-variable log density (PyTensor) equals the numpy twin used for draws; with
    persistent gap noise the graph's gap deviations also equal the numpy AR(1) twin
    (:func:`families.ar1_gap_deviations`) of the point's rho, each jurisdiction's sigma_gap_j and
    innovations."""
    rng = np.random.default_rng(21)
    if gap_centred and family == "gaussian":
        pytest.skip("the gaussian family has no latent gap field")
    monkeypatch.setattr(families, "fields_centred", lambda cells, fam: (gap_centred, gap_centred))
    if family == "gaussian":
        frame, truth = simulate(Scenario(jurisdictions=5, periods=4, starts={0: 2}, rows_per_cell=6), 4)
        frame["age"] = rng.normal(40, 8, len(frame))
        cells = collapse(_study(frame, truth, family, "age"), frame)
    else:
        # persistent needs 3 pre-policy periods (else the independent form is fitted)
        T, starts = (4, {0: 2, 1: 3}) if gap == "independent" else (6, {0: 3, 1: 4})
        frame, truth = simulate_family(
            CountScenario(family=family, jurisdictions=5, periods=T, starts=starts, rows_per_cell=8), 9
        )
        kw = {"exposure": "exposure"} if family != "binomial" else {}
        cells = collapse(_study(frame, truth, family, "C(sex) + C(risk)", **kw), frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    model, spec = build_model(cells, scales, family)
    assert spec.gap == gap
    fake, logp = _fake_fit(model, cells, family, rng)
    ll = pointwise_loglik(fake)
    assert ll.shape == (1, cells.shape[0], cells.shape[2])
    assert ll.sum() == pytest.approx(logp, rel=1e-9)
    if gap == "persistent":
        sg, rho, gap_ = gap_scale_draws(fake), fake.draws("rho"), fake.draws("gap")  # sg: (S, J)
        if gap_centred:
            path = fake.draws("gap_path")
            np.testing.assert_allclose(gap_, path - path.mean(axis=-1, keepdims=True), rtol=1e-12, atol=1e-14)
        else:
            twin = families.ar1_gap_deviations(sg, rho, fake.draws("z_gap_innovation"))
            np.testing.assert_allclose(gap_, twin, rtol=1e-10, atol=1e-14)


def _ar1_cov(T, sg, rho):
    """Stationary AR(1) covariance sg^2 rho^|t-s| (scipy.linalg.toeplitz; textbook autocovariance)."""
    return sg**2 * linalg.toeplitz(rho ** np.arange(T))


@pytest.mark.parametrize("rho", [0.0, 0.6, -0.4, 0.95])
def test_ar1_factor_is_the_recursion_and_the_stationary_covariance(rho):
    """numpy and PyTensor factors agree; L z follows e[t] = rho e[t-1] + sqrt(1 - rho^2) z[t] from
    e[0] = z[0]; L L' is the stationary AR(1) correlation rho^|t-s| (textbook)."""
    import pytensor.tensor as pt

    T = 7
    L = families.ar1_factor(np.array(rho), T)
    np.testing.assert_allclose(L @ L.T, _ar1_cov(T, 1.0, rho), atol=1e-12)
    z = np.random.default_rng(3).standard_normal(T)
    e = np.empty(T)
    e[0] = z[0]
    for t in range(1, T):
        e[t] = rho * e[t - 1] + np.sqrt(1 - rho**2) * z[t]
    np.testing.assert_allclose(L @ z, e, rtol=1e-12, atol=1e-14)
    r = pt.dscalar("r")
    np.testing.assert_allclose(families.ar1_factor(r, T, families.PT).eval({r: rho}), L, rtol=1e-12, atol=1e-15)


@pytest.mark.parametrize("rho", [0.0, 0.5, 0.9, -0.6])
def test_ar1_mean_folding_is_the_exact_joint_law(rho):
    """The model's construction of an AR(1) path's mean and deviations has the true joint law.

    Construction (bayesdid.model.families): d = e - mean(e) with e = sg L z, z ~ N(0, I_T); the mean
    drawn from its conditional given d, shift(z) + sqrt(v) xi, xi ~ N(0, 1). Both sides are linear in
    Gaussians, so the check is exact on covariances: B B' of the construction equals A Sigma A' of the
    true path (A: the mean row over the centring matrix; Sigma the AR(1) covariance). Reference:
    Gaussian conditioning (textbook), scipy.linalg.toeplitz for Sigma."""
    T, sg = 6, 0.7
    Z = np.eye(T)  # each row one unit innovation
    E = sg * Z @ families.ar1_factor(np.array(rho), T).T
    shift, v = families.ar1_mean_given_deviations(Z, E, sg, rho)
    D = E - E.mean(axis=1, keepdims=True)
    B = np.zeros((T + 1, T + 1))  # rows: (mean, d_0..d_T-1); columns: (z_0..z_T-1, xi)
    B[0, :T], B[0, T] = shift, np.sqrt(v)
    B[1:, :T] = D.T
    A = np.vstack([np.full((1, T), 1.0 / T), np.eye(T) - 1.0 / T])
    np.testing.assert_allclose(B @ B.T, A @ _ar1_cov(T, sg, rho) @ A.T, atol=1e-12)
    if rho == 0.0:  # the independent folding: no shift, variance sg^2 / T
        assert np.allclose(shift, 0.0, atol=1e-15) and v == pytest.approx(sg**2 / T, rel=1e-14)


def test_fresh_ar1_deviations_have_the_ar1_law():
    """The numpy twin that draws fresh gap noise (replicate_gap_path) gives deviations with covariance
    A Sigma A' (as above); tolerance 4 Monte Carlo sd of a sample covariance over S draws,
    sqrt((s_ii s_jj + s_ij^2) / S) (Wishart variance, textbook)."""
    rng = np.random.default_rng(8)
    S, T, sg, rho = 40000, 8, 0.3, 0.7
    d = families.ar1_gap_deviations(np.full(S, sg), np.full(S, rho), rng.standard_normal((S, T)))
    A = np.eye(T) - 1.0 / T
    want = A @ _ar1_cov(T, sg, rho) @ A.T
    got = d.T @ d / S
    mc = np.sqrt((np.outer(np.diag(want), np.diag(want)) + want**2) / S)
    assert np.all(np.abs(got - want) < 4 * mc)
    np.testing.assert_allclose(d.sum(axis=1), 0.0, atol=1e-12)


@pytest.mark.parametrize("gap_centred", [False, True])
def test_rho_zero_equals_the_independent_field_log_density(gap_centred, monkeypatch):
    """At rho = 0 the persistent model's joint log density is the independent model's exactly (to
    rounding), at matched points, after removing the two terms the persistent form adds: rho's own
    prior and the one direction of the gap innovations that reaches no likelihood (at rho = 0 the
    jurisdiction mean of the innovations; centred: of the path). Matched points: the same values of
    every shared parameter; innovations z = z_gap Q' + xi 1/sqrt(T) (Q the zero-sum basis)."""
    from scipy import stats as st

    from bayesdid.model.structure import GapStructure
    from bayesdid.model.terms import zero_sum_basis

    monkeypatch.setattr(families, "fields_centred", lambda cells, fam: (gap_centred, gap_centred))
    frame, truth = simulate_family(
        CountScenario(family="poisson", jurisdictions=5, periods=6, starts={0: 3, 1: 4}, rows_per_cell=8), 9
    )
    cells = collapse(_study(frame, truth, "poisson", "C(sex) + C(risk)", exposure="exposure"), frame)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    J, _, T = cells.shape
    one = {"scale": "shared", "scale_requested": "shared"}  # one scale: this test is about rho
    cells.extra["gap"] = GapStructure(over_time="independent", requested="independent", **one)
    ind, _ = build_model(cells, scales, "poisson")
    cells.extra["gap"] = GapStructure(**one)
    per, spec = build_model(cells, scales, "poisson")
    assert spec.gap == "persistent"
    rng = np.random.default_rng(5)
    p_ind = {k: v + rng.normal(0, 0.4, np.shape(v)) for k, v in ind.initial_point().items()}
    Q = zero_sum_basis(T)
    xi = rng.normal(size=J)
    p_per = {k: v for k, v in p_ind.items() if k not in ("z_gap", "gap_basis")}
    p_per["rho_unit_logodds__"] = np.array(0.0)  # rho_unit = 1/2: rho = 0
    sg = float(np.exp(p_ind["sigma_gap_log__"]))
    if gap_centred:
        p_per["gap_path"] = p_ind["gap_basis"] @ Q.T + xi[:, None] / np.sqrt(T)
        extra = st.norm.logpdf(xi, 0.0, sg).sum()  # |path|^2 = |basis|^2 + xi^2
    else:
        p_per["z_gap_innovation"] = p_ind["z_gap"] @ Q.T + xi[:, None] / np.sqrt(T)
        extra = st.norm.logpdf(xi).sum()
    assert set(p_per) == set(per.initial_point())
    total_ind = float(ind.compile_logp()(p_ind))
    total_per = float(per.compile_logp()(p_per))
    rho_term = float(per.compile_logp(vars=[per["rho_unit"]])(p_per))
    assert total_per - rho_term - extra == pytest.approx(total_ind, rel=1e-12, abs=1e-9)
    # and rho away from 0 changes it (the test can fail)
    p_per["rho_unit_logodds__"] = np.array(1.0)
    assert (
        abs(
            float(per.compile_logp()(p_per))
            - float(per.compile_logp(vars=[per["rho_unit"]])(p_per))
            - extra
            - total_ind
        )
        > 1e-3
    )
