"""Persistent (AR(1)) gap noise: the exact cell likelihood against row-level references, the
independent form as its rho = 0 case, the study switch and its fallback, and rho recovered."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from conftest import sim_study, study_of
from scipy import stats

from bayesdid import make_study
from bayesdid.cells import Cells, collapse
from bayesdid.errors import PersistenceFallbackWarning, StudyError
from bayesdid.model.gaussian import NP, cell_arrays, jt_loglik, jt_loglik_ar1
from bayesdid.model.structure import gap_structure, resolve_gap
from bayesdid.model.terms import model_spec
from bayesdid.simulate import Scenario, simulate


def _rows(rng, J, G, T, empty=(), target=1):
    """Random rows per (j, g, t); ``empty`` lists the cells left without rows."""
    rows = []
    for j in range(J):
        for g in range(G):
            for t in range(T):
                if (j, g, t) in empty:
                    continue
                for _ in range(int(rng.integers(1, 4))):
                    rows.append((j, g, t, float(rng.normal(0.3 * g + 0.1 * t, 1.0))))
    return rows


def _cells(rows, J, G, T, weight=None, start=None):
    n = np.zeros((J, G, T))
    s1 = np.zeros((J, G, T))
    s2 = np.zeros((J, G, T))
    for j, g, t, y in rows:
        n[j, g, t] += 1
        s1[j, g, t] += y
        s2[j, g, t] += y * y
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(n > 0, s1 / np.maximum(n, 1), 0.0)
    ss = s2 - n * mean**2
    return Cells(
        jurisdictions=tuple(f"J{j}" for j in range(J)),
        groups=("ref", "tgt") if G == 2 else ("all",),
        periods=tuple(range(T)),
        design="DDD" if G == 2 else "DiD",
        target=G - 1,
        start=np.asarray(start if start is not None else [T] * J),
        n=n,
        sum_y=s1,
        sum_y2=s2,
        ss=ss,
        rows=len(rows),
        weight=weight,
    )


def _row_level(rows, m, sig, s_sd, sg, rho, G, weight):
    """Row-level log density: per jurisdiction, the rows are one multivariate normal with
    cov = sigma_g^2 I + s_sd[j]^2 [same period] + sg_j^2 rho^|t - t'| [both target group]
    (scipy.stats.multivariate_normal; the model of DESIGN.md with rho over periods). ``sg`` is one
    scale or one per jurisdiction (J,)."""
    total = 0.0
    tgt = G - 1
    for j in sorted({r[0] for r in rows}):
        rj = [r for r in rows if r[0] == j and weight[j, r[2]] > 0]
        if not rj:
            continue
        g = np.array([r[1] for r in rj])
        t = np.array([r[2] for r in rj])
        y = np.array([r[3] for r in rj])
        mu = m[j, g, t]
        cov = np.diag(sig[g] ** 2)
        if G == 2:
            cov = cov + s_sd[j] ** 2 * (t[:, None] == t[None, :])
        both = (g[:, None] == tgt) & (g[None, :] == tgt)
        sg_j = float(np.ravel(sg)[j]) if np.ndim(sg) else sg
        cov = cov + sg_j**2 * rho ** np.abs(t[:, None] - t[None, :]) * both
        total += stats.multivariate_normal(mu, cov).logpdf(y)
    return total


@pytest.mark.parametrize("scale", ["shared", "per_jurisdiction"])
@pytest.mark.parametrize("G", [2, 1])
@pytest.mark.parametrize("rho", [0.7, -0.4, 0.0])
def test_ar1_cell_likelihood_equals_row_level_mvn(G, rho, scale):
    """Exact collapse + Kalman filter == scipy.stats.multivariate_normal on the rows, to 1e-8,
    with an empty target cell, an empty reference cell, an empty whole jurisdiction-period and a
    zero-weight jurisdiction-period (all drop out); with one gap-noise scale, or each jurisdiction's
    own (a (J, 1) column, as the model passes sigma_gap_j). rho = 0 checks the independent form's
    :func:`jt_loglik` too."""
    rng = np.random.default_rng(7 + G)
    J, T = 3, 6
    empty = {(0, G - 1, 2), (1, 0, 4), (2, 0, 1), (2, G - 1, 1)}
    rows = _rows(rng, J, G, T, empty)
    weight = np.ones((J, T))
    weight[1, 3] = 0.0
    weight[0, 5] = 0.0
    cells = _cells(rows, J, G, T, weight=weight)
    m = rng.normal(0.0, 0.5, (J, G, T))
    sig = np.array([0.9, 1.3])[:G] if G == 2 else np.array([1.1])
    s_sd = np.array([0.4, 0.25, 0.6])  # the adopter's shock has its own sd in the model
    sg = 0.5 if scale == "shared" else np.array([[0.5], [0.2], [1.4]])
    d = cell_arrays(cells)
    tq = G - 1
    if G == 2:
        kw = dict(m_r=m[:, 0, :], sigma_r=sig[0], sigma_shock=s_sd[:, None])
    else:
        kw = dict(m_r=np.zeros((J, T)), sigma_r=1.0, sigma_shock=0.0)
    got = jt_loglik_ar1(d, m_q=m[:, tq, :], sigma_q=sig[tq], sigma_gap=sg, rho=rho, xp=NP, **kw).sum()
    ref = _row_level(rows, m, sig, s_sd, sg, rho, G, weight)
    assert got == pytest.approx(ref, abs=1e-8, rel=0)
    if rho == 0.0:
        indep = jt_loglik(d, m_q=m[:, tq, :], sigma_q=sig[tq], sigma_gap=sg, xp=NP, **kw).sum()
        assert indep == pytest.approx(ref, abs=1e-8, rel=0)
    if scale == "per_jurisdiction":  # the scales matter: the shared one gives another density
        other = _row_level(rows, m, sig, s_sd, 0.5, rho, G, weight)
        assert abs(other - ref) > 1e-3


@pytest.mark.parametrize("G", [2, 1])
def test_rho_zero_is_the_independent_model_bit_for_bit(G):
    """rho = 0 makes the AR(1) form the independent one: every (j, t) term identical (construction)."""
    rng = np.random.default_rng(3)
    J, T = 4, 7
    rows = _rows(rng, J, G, T, {(0, G - 1, 3), (3, 0, 0)})
    w = np.ones((J, T))
    w[2, 2] = 0.0
    d = cell_arrays(_cells(rows, J, G, T, weight=w))
    S = 5  # draws, as the netCDF writer evaluates them
    m = rng.normal(0, 0.5, (S, J, G, T))
    sg = rng.uniform(0.1, 1.0, (S, 1, 1))
    kw = dict(
        m_r=m[:, :, 0, :],
        m_q=m[:, :, G - 1, :],
        sigma_r=rng.uniform(0.5, 2, (S, 1, 1)),
        sigma_q=rng.uniform(0.5, 2, (S, 1, 1)),
        sigma_shock=rng.uniform(0.1, 1, (S, 1, 1)) if G == 2 else np.zeros((S, 1, 1)),
        sigma_gap=sg,
    )
    if G == 1:
        kw["m_r"], kw["sigma_r"] = np.zeros((S, 1, 1)), np.ones((S, 1, 1))
    a = jt_loglik_ar1(d, rho=np.zeros((S, 1, 1)), **kw)
    b = jt_loglik(d, **kw)
    np.testing.assert_array_equal(a, b)
    # and a correlation changes it (the test above could not pass by ignoring rho)
    assert not np.allclose(jt_loglik_ar1(d, rho=np.full((S, 1, 1), 0.5), **kw).sum(), b.sum())


def test_switch_and_fallback_recorded(tmp_path):
    frame, truth = simulate(Scenario(jurisdictions=6, periods=6, starts={0: 3}), 1)
    st = study_of(tmp_path, frame, truth)
    assert st.model.gap_over_time == "persistent"  # on by default
    cells = collapse(st, frame)
    assert gap_structure(cells).over_time == "persistent"
    assert model_spec(cells).gap == "persistent"
    ind = collapse(st.replace(model={"gap_over_time": "independent"}), frame)
    assert model_spec(ind).gap == "independent"
    with pytest.raises(StudyError, match="model.gap_over_time.*'persistent' or 'independent'"):
        st.replace(model={"gap_over_time": "ar1"})
    # two pre-policy periods: the persistent form cannot be learned -> independent, with a warning
    frame2, truth2 = simulate(Scenario(jurisdictions=6, periods=6, starts={0: 2}), 1)
    st2 = study_of(tmp_path, frame2, truth2)
    with warnings.catch_warnings():
        warnings.simplefilter("error", PersistenceFallbackWarning)
        c2 = collapse(st2, frame2)  # no warning at the boundary: a refused study must print only its error
    with pytest.warns(PersistenceFallbackWarning, match="2 pre-policy period"):
        resolve_gap(c2)
    g = gap_structure(c2)
    assert (g.over_time, g.requested) == ("independent", "persistent") and "fewer than 3" in g.fallback
    assert model_spec(c2).gap == "independent"
    with warnings.catch_warnings():
        warnings.simplefilter("error", PersistenceFallbackWarning)
        assert resolve_gap(c2, "independent").fallback is None  # asked for: no warning


@pytest.mark.slow
def test_rho_recovered_on_simulated_panel(tmp_path_factory):
    """A DiD panel whose jurisdiction-period noise is AR(1) with rho 0.7 (gap-dominated cells):
    the posterior of rho covers the truth and excludes 0. One data set, a fixed seed; the
    posterior sd of rho here is about 0.05 (40 jurisdictions x 12 periods)."""
    sc = Scenario(
        jurisdictions=40,
        periods=12,
        groups=1,
        starts={0: 6},
        gap_sd=0.2,
        gap_rho=0.7,
        rows_per_cell=60,
        residual_sd=0.5,
    )
    st, cells, _, _ = sim_study(tmp_path_factory, sc, 5, "rho", draws=400, tune=400, seed=3)
    from bayesdid import analyse

    an = analyse(st, cells=cells, full_cross_check=False)
    rho = an.fit.draws("rho")
    lo, hi = np.quantile(rho, [0.005, 0.995])
    assert lo < 0.7 < hi
    assert lo > 0.3
    s = an.summary()
    assert s["model"]["gap_noise"]["over_time"] == "persistent"
    assert s["persistence"]["rho"]["mean"] == pytest.approx(float(rho.mean()))


def test_smoothing_draws_mean_equals_dense_conditional():
    """With z = 0 the forward-filter backward-sampling pass returns E[e | y], which must equal the
    dense Gaussian conditional Sigma_e[:, o] (Sigma_e[o, o] + diag V[o])^-1 y[o] (textbook algebra)."""
    from bayesdid.model.gaussian import ar1_smoothing_draws

    rng = np.random.default_rng(11)
    T, rho, sg2 = 7, 0.6, 0.3
    y = rng.normal(0, 1, (1, 1, T))
    V = rng.uniform(0.05, 0.5, (1, 1, T))
    o = np.ones((1, 1, T))
    o[..., 2] = 0.0
    o[..., 5] = 0.0
    got = ar1_smoothing_draws(y, V, o, np.full((1, 1, 1), sg2), np.full((1, 1, 1), rho), np.zeros((1, 1, T)))[0, 0]
    t = np.arange(T)
    Se = sg2 * rho ** np.abs(t[:, None] - t[None, :])
    ob = o[0, 0] > 0
    ref = Se[:, ob] @ np.linalg.solve(Se[np.ix_(ob, ob)] + np.diag(V[0, 0, ob]), y[0, 0, ob])
    np.testing.assert_allclose(got, ref, rtol=1e-10, atol=1e-12)


@pytest.fixture(scope="module")
def castle_one_adopter():
    """causaldata package, data set castle (state-year panel 2000-2010, one row per state and year):
    the state that adopted in 2006 and the 29 states that never adopt; the others are dropped."""
    from causaldata import castle

    d = castle.load_pandas().data
    first = d[d["post"] > 0].groupby("sid")["year"].min()
    adopter = int(first[first == 2006].index[0])
    never = sorted(set(d["sid"]) - set(first.index))
    keep = d[d["sid"].isin(never + [adopter])].copy()
    keep["state"] = "S" + keep["sid"].astype(str)
    return keep[["state", "year", "homicide"]].reset_index(drop=True), f"S{adopter}"


@pytest.mark.slow
def test_castle_one_row_per_cell_fits_cleanly(tmp_path, castle_one_adopter):
    """One row per cell: no separate residual sd (0 within-cell df), the fit passes the diagnostics
    of Vehtari et al. (2021) at the default sampler settings, and the least-squares estimate equals
    statsmodels' two-way fixed effects on the same rows (log homicide rate)."""
    import statsmodels.formula.api as smf

    from bayesdid import analyse

    df, adopter = castle_one_adopter
    p = tmp_path / "castle.csv"
    df.to_csv(p, index=False)
    st = make_study(
        table=p,
        outcome="homicide",
        jurisdiction="state",
        period="year",
        log_outcome=True,
        adopters={adopter: 2006},
        seed=12,
    )
    an = analyse(st, full_cross_check=False)
    s = an.summary()
    assert s["model"]["residual_sd"]["separate"] is False and s["model"]["residual_sd"]["within_cell_df"] == 0
    assert "sigma" not in an.fit.posterior
    assert s["model"]["gap_noise"]["over_time"] == "persistent"
    assert s["diagnostics"]["ok"], s["diagnostics"]["advice"]
    import pandas as pd

    df = pd.read_csv(p)  # the rows as bayesdid read them (the package stores float32, the CSV its decimal form)
    d = df.assign(ly=np.log(df["homicide"]), D=((df["state"] == adopter) & (df["year"] >= 2006)).astype(float))
    ref = smf.ols("ly ~ C(state) + C(year) + D", data=d).fit().params["D"]
    assert an.least_squares["estimate"] == pytest.approx(ref, rel=1e-8)
    # a placebo on the same panel re-samples the compiled model with new data (no residual-sd
    # containers in the compiled graph: with_data must not be handed them)
    from bayesdid import sample

    before = sample.COMPILES["count"]
    other = sorted(set(df["state"]) - {adopter})[0]
    pl = analyse(st.replace(policy={"adopters": {other: 2005}}), full_cross_check=False)
    assert sample.COMPILES["count"] == before and np.isfinite(pl.effects.effect.summary["mean"])


# ---- parallel-trends sensitivity (bayesdid.trends) ------------------------------------------------------

_DRIFT = dict(jurisdictions=40, periods=12, groups=1, starts={0: 6}, rows_per_cell=60, residual_sd=0.5)


@pytest.mark.slow
def test_trends_breakdown_where_the_construction_puts_it(tmp_path_factory):
    """Injected departures of known size, with little noise (cell means within 0.007, gap noise
    0.005: the largest pre-period change is the construction's 0.2 up to about 0.03).
    The adopter's pre-period gap alternates +-0.1 (period-to-period changes of 0.2) and after the
    start departs by 0.2 (k + 1): the effect (truth 0) reads as 0.2 x mean(k + 1) = 0.7, and the
    bound M x 0.2 x 3.5 reaches it at M = 0.2 / 0.2 = 1 by construction; the 95% interval's own
    half-width (about 2 posterior sd, ~0.1 here, i.e. ~0.15 in M) moves the breakdown below 1.
    Without departures the M = 0 row is the main fit's 95% interval (same draws)."""
    from bayesdid import analyse

    sc = Scenario(**{**_DRIFT, "residual_sd": 0.05}, tau=0.0, gap_sd=0.005, pre_wiggle=0.1, post_drift=0.2)
    st, _, frame, _ = sim_study(tmp_path_factory, sc, 8, "drift", draws=400, tune=400, seed=4)
    # Independent gap noise: the construction's arithmetic (effect 0.7) holds for it. With the default
    # AR(1) noise a steady post-policy departure with near-noiseless comparisons is read as a
    # persistent (rho near 1) gap path and the effect shrinks toward 0.13; the bound's own arithmetic,
    # which is what this test checks, does not depend on which noise produced the draws. One shared
    # gap-noise scale likewise: the adopter alone carries the injected wiggle and departure, which
    # its own pooled scale would read as noise (widening the effect's interval, not the bound).
    st = st.replace(model={"gap_over_time": "independent", "gap_scale": "shared"})
    cells = collapse(st, frame)
    an = analyse(st, cells=cells, full_cross_check=False)
    tb = an.trends
    assert tb.status == "ok"
    assert tb.pre_change[cells.jurisdictions[cells.adopters[0]]]["median"] == pytest.approx(0.2, abs=0.04)
    m0 = tb.breakdown["M_zero"]
    assert 0.7 < m0 < 1.02
    grid = {r["M"]: r for r in tb.rows}
    assert grid[0.5]["lower_95"] > 0 > grid[1.5]["lower_95"]  # excludes zero at 0.5, includes it at 1.5
    assert grid[0.0]["lower_95"] == pytest.approx(an.effects.effect.summary["eti_95"][0], abs=1e-12)
    # the command on the run folder the fit writes: same numbers, its own grid, CSV and summary section
    import json

    from bayesdid.cli import main
    from bayesdid.run import write_run

    run = write_run(an, tmp_path_factory.mktemp("drift_run") / "run")
    assert (run / "trends.csv").is_file()
    assert main(["trends", str(run), "--multiples", "0,1,0.5"]) == 0
    s = json.loads((run / "summary.json").read_text())["parallel_trends"]
    assert s["multiples"] == [0.0, 0.5, 1.0]
    assert s["breakdown"]["M_zero"] == pytest.approx(m0, abs=1e-9)
    import pandas as pd

    csv = pd.read_csv(run / "trends.csv")
    assert list(csv["M"]) == [0.0, 0.5, 1.0]
    assert csv["lower_95"].iloc[1] == pytest.approx(grid[0.5]["lower_95"], rel=1e-12)
    assert main(["trends", str(run), "--multiples", "0,-1"]) == 2

    clean = Scenario(**_DRIFT, tau=-0.3, gap_sd=0.2, gap_rho=0.5)
    st2, cells2, _, _ = sim_study(tmp_path_factory, clean, 9, "nodrift", draws=400, tune=400, seed=4)
    an2 = analyse(st2, cells=cells2, full_cross_check=False)
    row0 = an2.trends.rows[0]
    e = an2.effects.effect.summary
    assert row0["M"] == 0.0
    assert [row0["lower_95"], row0["upper_95"]] == e["eti_95"]  # M = 0 is the main fit, exactly
    assert row0["prob_reduction"] == e["prob_lt_0"]


def test_trend_multiples_refused_when_negative(tmp_path):
    frame, truth = simulate(Scenario(jurisdictions=6, periods=6, starts={0: 3}), 1)
    st = study_of(tmp_path, frame, truth)
    assert st.trends.multiples == (0.0, 0.25, 0.5, 1.0, 1.5, 2.0)
    with pytest.raises(StudyError, match=r"trends.multiples.*zero or more"):
        st.replace(trends={"multiples": [0, 0.5, -1]})
    with pytest.raises(StudyError, match=r"decision.level"):
        st.replace(decision={"level": 1.2})
    study_file = tmp_path / "s.toml"
    study_file.write_text(f"""
[data]
table = "{tmp_path / "t.csv"}"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "group"
[policy]
target_group = "target"
adopters = {{ "{next(iter(truth["starts"]))}" = 4 }}
[trends]
multiples = [0, -0.5]
""")
    from bayesdid.cli import main

    assert main(["fit", str(study_file), "--out", str(tmp_path / "out")]) == 2
    assert not (tmp_path / "out").exists()


def test_bisection_finds_the_smallest_multiple():
    from bayesdid.trends import _bisect

    assert _bisect(lambda M: M >= 1.3) == pytest.approx(1.3, abs=1e-3)
    assert _bisect(lambda M: True) == 0.0
    assert _bisect(lambda M: False) is None


def _graph_point_fit(model, cells, rng):
    """A one-draw 'fit' at a random point of the model, read through PyMC's own graph (as in
    test_families_loglik), and the model's own log density of the observed cells there."""
    from types import SimpleNamespace

    ip = model.initial_point()
    point = {k: v + rng.normal(0, 0.4, np.shape(v)) for k, v in ip.items()}
    names = [
        n
        for n in (
            "baseline",
            "period_effect",
            "group_period_effect",
            "tau_adopter",
            "sigma",
            "sigma_gap",
            "sigma_gap_j",
            "sigma_shock",
            "rho",
            "gap_drift",
            "effect_deviation",
        )
        if n in model.named_vars
    ]
    outs = model.replace_rvs_by_values([model[n] for n in names])
    fn = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore", point_fn=True)
    vals = dict(zip(names, fn(point)))
    logp = model.compile_fn(
        model.logp(vars=[model["cells"]], sum=True), inputs=model.value_vars, on_unused_input="ignore", point_fn=True
    )(point)
    scales = {n[len("prior_") :]: float(model[n].get_value()) for n in model.named_vars if n.startswith("prior_")}
    spec = model_spec(cells)
    return (
        SimpleNamespace(cells=cells, spec=spec, scales=scales, draws=lambda n: np.asarray(vals[n])[None, ...]),
        float(logp),
        vals,
    )


@pytest.mark.slow  # compiles PyTensor functions (about a minute each on a shared machine)
@pytest.mark.parametrize("kind", ["ddd_drift", "did_one_row", "ddd_independent"])
def test_numpy_twin_matches_the_model_graph(tmp_path, kind):
    """The PyTensor graph (Kalman filter, drifts, no residual sd) and the numpy twin that writes
    posterior.nc's log-likelihood agree at a random point (PyMC's own evaluation as reference)."""
    from bayesdid.model.gaussian import pointwise_loglik
    from bayesdid.model.registry import build_model
    from bayesdid.model.terms import resolve_scales
    from bayesdid.study import PriorScales

    rng = np.random.default_rng(5)
    if kind == "did_one_row":
        sc = Scenario(jurisdictions=6, periods=7, groups=1, starts={0: 4}, rows_per_cell=1, fixed_cells=True)
    else:
        sc = Scenario(jurisdictions=6, periods=7, starts={0: 3, 1: 4}, rows_per_cell=5)
    frame, truth = simulate(sc, 2)
    path = tmp_path / "t.csv"
    frame.to_csv(path, index=False)
    ddd = sc.groups == 2
    st = make_study(
        table=path,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
        gap_over_time="independent" if kind == "ddd_independent" else None,
    )
    if kind == "ddd_drift":
        st = st.replace(model={"gap_drift": True})
    cells = collapse(st, frame)
    spec = model_spec(cells)
    assert spec.drift == (kind == "ddd_drift")
    assert spec.residual == (kind != "did_one_row")
    assert spec.gap == ("independent" if kind == "ddd_independent" else "persistent")
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    model, _ = build_model(cells, scales)
    fake, logp, vals = _graph_point_fit(model, cells, rng)
    assert pointwise_loglik(fake).sum() == pytest.approx(logp, rel=1e-10)
    if kind == "ddd_drift":  # each adopter's post-period deviations are zero outside and sum to zero inside
        eta = vals["effect_deviation"]
        post = cells.treated[cells.adopters][:, cells.target, :]
        assert np.all(eta[~post] == 0) and np.allclose(eta.sum(axis=1), 0, atol=1e-12)
        assert np.any(np.abs(eta[post]) > 1e-3)


@pytest.mark.slow
def test_drift_recovered_and_effect_freed_of_it(tmp_path_factory):
    """An adopter whose gap drifts 0.05 per period over the whole panel (before and after its start)
    and comparisons with small drifts (sd 0.005): without gap drifts the effect absorbs the drift
    (about 0.05 x 6 = 0.3 off the truth -0.1, from the mean event time after minus before); with
    model.gap_drift the adopter's drift, learned from its own 6 pre-periods, is recovered and the 95%
    interval covers the truth (its drift is not pooled toward the comparisons' small ones)."""
    from bayesdid import analyse

    sc = Scenario(**_DRIFT, tau=-0.1, gap_sd=0.03, adopter_trend=0.05, trend_sd=0.005)
    st, cells, _, _ = sim_study(tmp_path_factory, sc, 6, "adrift", draws=400, tune=400, seed=2)
    plain = analyse(st, cells=cells, full_cross_check=False).effects.effect.summary
    assert not (plain["eti_95"][0] <= -0.1 <= plain["eti_95"][1])
    assert plain["mean"] > 0.05  # pulled up by the drift
    st_d = st.replace(model={"gap_drift": True})
    cells_d = collapse(st_d, pd_read(st_d))
    an = analyse(st_d, cells=cells_d, full_cross_check=False)
    e = an.effects.effect.summary
    assert e["eti_95"][0] <= -0.1 <= e["eti_95"][1]
    g = an.fit.draws("gap_drift")[:, cells_d.adopters[0]]
    assert abs(np.median(g) - 0.05) < 0.015
    assert an.summary()["model"]["gap_noise"]["drift"] is True


def pd_read(study):
    import pandas as pd

    return pd.read_csv(study.table)


@pytest.mark.slow
def test_trends_breakdown_on_the_link_scale_for_counts(tmp_path):
    """The bound for a count outcome (Poisson), on the link scale, where the construction puts it.

    Invented Poisson DiD, 30 jurisdictions x 12 periods, one row per cell with about 40,000 expected
    events (Poisson noise of a cell's log rate about 0.005) and gap noise sd 0.005. The adopter's
    log-rate gap alternates +-0.1 before its start (changes of 0.2) and departs by 0.2 (k + 1)
    after it: the effect (truth 0) reads as 0.2 x mean(k + 1) = 0.7 on the log scale, and the bound
    M x 0.2 x 3.5 reaches it at M = 1 by construction (the same arithmetic as the gaussian test
    above; the interval's own half-width moves the breakdown a little below 1). M = 0 is the main
    fit's interval exactly; ``bayesdid trends`` on the run folder the fit writes gives the same M.
    Independent gap noise and one shared scale, as in the gaussian test: the bound's arithmetic is
    what is checked."""
    import json

    import pandas as pd

    from bayesdid import analyse
    from bayesdid.cli import main
    from bayesdid.run import write_run

    rng = np.random.default_rng(2026)
    J, T, s = 30, 12, 6
    k = np.arange(T) - s
    eta = (
        np.log(40.0)
        + 0.3 * rng.standard_normal((J, 1))
        + 0.1 * rng.standard_normal((1, T))
        + 0.005 * rng.standard_normal((J, T))
    )
    eta[0] += np.where(k < 0, 0.1 * (-1.0) ** np.arange(T), 0.2 * (k + 1))
    exposure = 1000.0
    y = rng.poisson(exposure * np.exp(eta))
    names = [f"R{j:02d}" for j in range(J)]
    frame = pd.DataFrame(
        {
            "region": np.repeat(names, T),
            "period": np.tile(np.arange(1, T + 1), J),
            "y": y.ravel().astype(float),
            "exposure": exposure,
        }
    )
    path = tmp_path / "counts.csv"
    frame.to_csv(path, index=False)
    st = make_study(
        table=path,
        outcome="y",
        jurisdiction="region",
        period="period",
        adopters={names[0]: s + 1},
        family="poisson",
        exposure="exposure",
        draws=400,
        tune=400,
        chains=2,
        seed=4,
    ).replace(model={"gap_over_time": "independent", "gap_scale": "shared"})
    cells = collapse(st, frame)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        an = analyse(st, cells=cells, full_cross_check=False)
    tb = an.trends
    assert tb.status == "ok", tb.reason
    assert tb.scale.startswith("link: log rate")
    assert tb.pre_change[names[0]]["median"] == pytest.approx(0.2, abs=0.04)
    assert an.effects.effect.summary["mean"] == pytest.approx(0.7, abs=0.1)
    m0 = tb.breakdown["M_zero"]
    assert 0.7 < m0 < 1.02
    grid = {r["M"]: r for r in tb.rows}
    assert grid[0.5]["lower_95"] > 0 > grid[1.5]["lower_95"]
    e = an.effects.effect.summary
    assert [grid[0.0]["lower_95"], grid[0.0]["upper_95"]] == e["eti_95"]  # M = 0 is the main fit, exactly
    run = write_run(an, tmp_path / "run")
    s_json = json.loads((run / "summary.json").read_text())["parallel_trends"]
    assert s_json["status"] == "ok" and s_json["breakdown"]["M_zero"] == pytest.approx(m0, abs=1e-9)
    from bayesdid.report.html import render_report

    html = render_report(run)
    assert (
        "Departures from parallel trends" in html
        and "Not applicable" not in html.split("parallel trends</h3>")[1][:200]
    )
    assert "95% interval (rate ratio)" in html and f"{np.exp(grid[0.0]['lower_95']):.3f}" in html
    assert main(["trends", str(run), "--multiples", "0,0.5,1"]) == 0
    again = json.loads((run / "summary.json").read_text())["parallel_trends"]
    assert again["breakdown"]["M_zero"] == pytest.approx(m0, abs=1e-9)
    assert again["grid"][1]["lower_95"] == pytest.approx(grid[0.5]["lower_95"], rel=1e-12)
