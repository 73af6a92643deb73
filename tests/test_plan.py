"""Planning before the data (bayesdid plan): assurance, false decisions, the normal approximation.

Every fit here uses one DiD structure (30 jurisdictions x 8 periods: the largest layout of each plan
and the pilot's table), so the process compiles it once (bayesdid.sample caches compiled models).
"""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest

from bayesdid.cli import main
from bayesdid.plan import (
    Layout,
    load_plan,
    make_plan,
    normal_assurance,
    plan_tasks,
    progress_path,
    run_plan,
    simulate_cells,
    simulate_noise,
)

# One adopter starting at period 5 of 8 (T0 = T1 = 4), 29 comparisons, 20 rows per cell, residual sd 1,
# gap noise sd 0.1: v = 0.01 + 1/20 = 0.06, V = v (1/4 + 1/4)(1 + 1/29), sqrt(V) = 0.176.
DID = {
    "title": "Invented plan: a DiD in Valmora's regions",
    "layout": {
        "design": "DiD",
        "comparisons": 29,
        "periods": 8,
        "starts": [5],
        "rows_per_cell": 20,
        "period_name": "quarter",
    },
    "noise": {"gap": 0.1, "residual": 1.0, "baseline": 0.3, "period": 0.1},
    "effects": {"values": [0.0, -0.2, -1.0]},
    "decision": {"threshold": 0.0, "level": 0.9, "direction": "below"},
    "simulation": {
        "reps": 50,
        "seed": 1603,
        "draws": 200,
        "tune": 200,
        "chains": 2,
        "placebos": 199,
        "gap_over_time": "independent",
    },  # the normal approximation's assumption: independent noise
}
SQRT_V = math.sqrt((0.1**2 + 1 / 20) * 0.5 * (1 + 1 / 29))


def write_plan_file(path, raw: dict) -> str:
    """A plan dict as TOML text (the subset of TOML the plan uses)."""
    lines = []
    if "title" in raw:
        lines.append(f'title = "{raw["title"]}"')
    for sec, body in raw.items():
        if sec == "title":
            continue
        lines.append(f"[{sec}]")
        for k, v in body.items():
            lines.append(f"{k} = {json.dumps(v)}")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return str(path)


def with_(raw: dict, sec: str, **kw) -> dict:
    out = {k: (dict(v) if isinstance(v, dict) else v) for k, v in raw.items()}
    out[sec] = {**out.get(sec, {}), **kw}
    return out


# ---- the normal approximation itself (no fits) ---------------------------------------------------


def test_normal_formula_values():
    plan = make_plan(DID)
    lay = plan.layouts[0]
    na0 = normal_assurance(plan, lay, 0.0)
    # at the threshold the rule concludes with probability 1 - level (derivation in the docstring)
    assert na0["assurance"] == pytest.approx(0.1, abs=1e-12)
    assert na0["sd"] == pytest.approx(SQRT_V, rel=1e-12)
    assert na0["width_95"] == pytest.approx(2 * 1.959964 * SQRT_V, rel=1e-6)
    # Phi(0.2 / sqrt V - z_0.9) from scipy.stats
    from scipy import stats

    assert normal_assurance(plan, lay, -0.2)["assurance"] == pytest.approx(
        stats.norm.cdf(0.2 / SQRT_V - stats.norm.ppf(0.9)), rel=1e-12
    )
    # DDD with equal residual sds: both groups' sampling noise enters the gap
    ddd = make_plan(with_(DID, "layout", design="DDD"))
    assert normal_assurance(ddd, ddd.layouts[0], 0.0)["sd"] == pytest.approx(
        math.sqrt((0.01 + 2 / 20) * 0.5 * (1 + 1 / 29)), rel=1e-12
    )
    assert normal_assurance(make_plan(with_(DID, "noise", rho=0.5)), lay, 0.0)["assurance"] is None


def test_simulated_cells_have_the_stated_variance_components():
    """The cell means of the simulator: the DiD of rep-wise simulated cells has variance V (no fit)."""
    plan = make_plan(DID)
    lay = plan.layouts[0]
    rng = np.random.default_rng(7)
    est = []
    for _ in range(2000):
        cells = simulate_cells(plan, lay, simulate_noise(plan.frame, plan.noise.for_rep(rng), (0, 0), rng), -0.3)
        m = cells.mean[:, 0, :]
        est.append((m[0, 4:].mean() - m[0, :4].mean()) - (m[1:, 4:].mean() - m[1:, :4].mean()))
    est = np.asarray(est)
    # mean -0.3 within 4 MCSE; variance within 4 of its standard errors (sd of a variance ~ V sqrt(2/N))
    assert abs(est.mean() + 0.3) < 4 * SQRT_V / math.sqrt(2000)
    assert abs(est.var(ddof=1) / SQRT_V**2 - 1) < 4 * math.sqrt(2 / 2000)


def test_ar1_gap_noise_has_the_stated_correlation_and_sd():
    plan = make_plan(with_(DID, "noise", rho=0.7, gap=0.5, residual=0.01, period=0.0, baseline=0.0))
    rng = np.random.default_rng(3)
    e = np.concatenate(
        [simulate_noise(plan.frame, plan.noise.for_rep(rng), (0, 0), rng)["ybar"][:, 0, :] for _ in range(300)]
    )  # 9,000 jurisdictions x 8 periods of gap noise (+ 0.01/sqrt 20)
    # stationary AR(1): sd 0.5 in every period, correlation 0.7 at lag 1 and 0.49 at lag 2
    # (tolerances: a few standard errors of a variance or correlation over 9,000 series)
    assert e.std(axis=0) == pytest.approx(np.full(8, 0.5), rel=0.04)
    assert np.corrcoef(e[:, 2], e[:, 3])[0, 1] == pytest.approx(0.7, abs=0.03)
    assert np.corrcoef(e[:, 5], e[:, 7])[0, 1] == pytest.approx(0.49, abs=0.04)


# ---- bad input: exit 2, key named, nothing written ---------------------------------------------

BAD = [
    (with_(DID, "layout", starts=[1]), "layout.starts", "no pre-period"),
    (with_(DID, "layout", comparisons=0), "layout.comparisons", "no comparison"),
    (with_(DID, "layout", starts=[9]), "layout.starts", "start after the last period"),
    (with_(DID, "layout", starts=[0]), "layout.starts", "start before the first period"),
    (with_(DID, "layout", starts=[3, 9]), "layout.starts", "second adopter's start after the last period"),
    (with_(with_(DID, "layout", starts=[7]), "vary", periods=[6, 8]), "vary.periods", "start outside a varied layout"),
    (with_(DID, "vary", comparisons=[0, 29]), "vary.comparisons", "a varied layout without comparisons"),
    (with_(DID, "decision", level=1.0), "decision.level", "level 1"),
    (with_(DID, "decision", level=0), "decision.level", "level 0"),
    (with_(DID, "decision", level=1.5), "decision.level", "level above 1"),
    (with_(DID, "decision", level=-0.2), "decision.level", "negative level"),
    (with_(DID, "decision", level="0.9"), "decision.level", "level as text"),
    (with_(DID, "noise", rho=1.0), "noise.rho", "rho 1"),
    (with_(DID, "effects", values=[]), "effects.values", "no effects"),
    (with_(DID, "layout", colour="blue"), "colour", "unknown key"),
    (with_(DID, "noise", run="no/such/folder"), "noise.run", "missing pilot folder"),
    (with_(DID, "noise", pilot="no/such/study.toml"), "noise.pilot", "missing pilot study"),
    (with_(DID, "simulation", method="fast"), "simulation.method", "unknown method"),
]


@pytest.mark.parametrize("raw,key,why", BAD, ids=[b[2] for b in BAD])
def test_bad_plan_exits_2_naming_the_key(tmp_path, capsys, raw, key, why):
    path = write_plan_file(tmp_path / "plan.toml", raw)
    out = tmp_path / "out"
    assert main(["plan", path, "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert key in err, err
    assert not out.exists() and not progress_path(out).exists()


def test_bad_command_line_values(tmp_path, capsys):
    path = write_plan_file(tmp_path / "plan.toml", DID)
    assert main(["plan", path, "--out", str(tmp_path / "o"), "--reps", "0"]) == 2
    assert "--reps" in capsys.readouterr().err
    assert main(["plan", path, "--out", str(tmp_path / "o"), "--workers", "0"]) == 2
    assert "--workers" in capsys.readouterr().err
    assert not (tmp_path / "o").exists()


def test_layout_grid_and_frame():
    plan = make_plan(with_(DID, "vary", periods=[6, 8], comparisons=[9, 29]))
    assert [x.key for x in plan.layouts] == ["C29-T8", "C9-T6", "C9-T8", "C29-T6"]
    assert plan.frame == Layout("DiD", 29, 8, (5,), 20)
    assert plan.layouts[1].post_periods == 2 and plan.layouts[1].pre_periods == 4
    # effects sorted, 0 kept; reps do not enter the fingerprint (a rerun with more reps keeps the first)
    assert plan.effects == (-1.0, -0.2, 0.0)
    assert make_plan(with_(DID, "simulation", reps=3)).fingerprint() == make_plan(DID).fingerprint()
    assert len(plan_tasks(plan)) == 4 * 50  # one task per layout and data set, every effect inside


# ---- fits ----------------------------------------------------------------------------------------


@pytest.fixture(scope="session")
def did_result():
    return run_plan(make_plan(DID), workers=1)


def _row(result, effect):
    return next(r for r in result["summary"]["assurance"] if r["effect"] == effect)


@pytest.mark.slow
def test_false_decision_rate_at_zero_is_bounded(did_result):
    """At a true effect of 0 the rule concludes at most 1 - level of the time, up to Monte Carlo error."""
    r = _row(did_result, 0.0)
    assert r["reps"] == 50
    # one-sided bound: 1 - level plus two binomial standard errors at p = 1 - level
    assert r["false_decision_rate"] <= 0.1 + 2 * math.sqrt(0.1 * 0.9 / 50)


@pytest.mark.slow
def test_large_effect_is_detected(did_result):
    r = _row(did_result, -1.0)  # 5.7 sqrt(V) below the threshold: the formula gives 1 - 1e-5
    assert r["assurance"] >= 0.96
    assert r["permutation_power"] >= 0.9  # 30 assignments: the smallest one-sided p is 1/30


@pytest.mark.slow
def test_assurance_agrees_with_the_normal_approximation(did_result):
    """Gaussian DiD, known variance components in the simulator, independent noise: the derivation in
    bayesdid.plan.normal_assurance against the full model, within Monte Carlo error."""
    r = _row(did_result, -0.2)
    p_formula = r["normal_assurance"]
    assert 0.3 < p_formula < 0.6  # the effect sits where assurance is most sensitive
    # three binomial standard errors at the formula's p over 50 reps
    assert abs(r["assurance"] - p_formula) <= 3 * math.sqrt(p_formula * (1 - p_formula) / 50)
    ok = [x for x in did_result["rows"] if x["ok"]]
    # sharper: each posterior's sd is sqrt(V) up to the learned variance and the prior (deterministic in
    # the formula), and its mean is the least-squares DiD estimate
    sd_ratio = np.median([x["posterior_sd"] for x in ok]) / SQRT_V
    assert 0.9 < sd_ratio < 1.15, sd_ratio
    gap = np.median([abs(x["posterior_mean"] - x["ls_estimate"]) for x in ok])
    assert gap < 0.15 * SQRT_V, gap
    widths = _row(did_result, -0.2)["width_95_mean"] / r["normal_width_95"]
    assert 0.9 < widths < 1.15


@pytest.mark.slow
def test_common_random_numbers_and_one_compile(did_result):
    rows = did_result["rows"]
    assert all(x["ok"] for x in rows)
    # rep i has the same noise at every effect: the least-squares estimate moves by exactly the effect
    by = {(x["effect"], x["rep"]): x for x in rows}
    for i in range(5):
        assert by[(-1.0, i)]["ls_estimate"] - by[(0.0, i)]["ls_estimate"] == pytest.approx(-1.0, abs=1e-9)
    assert sum(x["compiles"] for x in did_result["records"]) <= 1
    assert sum(x["fits"] for x in did_result["records"]) == 50  # one fit per data set, effects by reweighting
    assert all(x["method"] == "shift" and x["weights_ess_share"] > 0.9 for x in rows)


@pytest.mark.slow
def test_shifted_draws_agree_with_refits(did_result):
    """The reweighted draws of the effect-0 fit against fits of the shifted data sets themselves."""
    plan = make_plan(with_(with_(DID, "simulation", reps=6, method="refit"), "effects", values=[0.0, -0.2]))
    refit = {(r["effect"], r["rep"]): r for r in run_plan(plan, workers=1)["rows"]}
    shift = {(r["effect"], r["rep"]): r for r in did_result["rows"]}
    assert all(r["method"] == "refit" for r in refit.values())
    for i in range(6):
        a, b = shift[(-0.2, i)], refit[(-0.2, i)]
        # two independent sets of 400 draws (bulk ESS about 200 each): the means differ by about
        # sd sqrt(2/200) = 0.1 sd; allow 0.4 sd (4 standard errors) and 15% on the sd
        assert abs(a["posterior_mean"] - b["posterior_mean"]) < 0.4 * b["posterior_sd"]
        assert a["posterior_sd"] == pytest.approx(b["posterior_sd"], rel=0.15)
        assert abs(a["prob_beyond"] - b["prob_beyond"]) < 0.1
        assert a["ls_estimate"] == pytest.approx(b["ls_estimate"], abs=1e-10)  # the same data set


@pytest.mark.slow
def test_shifted_draws_agree_with_refits_two_adopters():
    """Several adopters: the weights use the prior of their mean effect (sd^2 = s_e^2 + sigma_tau^2 / A)."""
    raw = {
        "layout": {"design": "DDD", "comparisons": 8, "periods": 6, "starts": [4, 5], "rows_per_cell": 20},
        "noise": {"gap": 0.1, "residual": 1.0},
        "effects": {"values": [0.0, -0.3]},
        "decision": {"threshold": 0.0, "level": 0.9},
        "simulation": {"reps": 3, "seed": 77, "draws": 200, "tune": 200, "chains": 2, "placebos": 0},
    }
    shift = {(r["effect"], r["rep"]): r for r in run_plan(make_plan(raw), workers=1)["rows"]}
    refit = {
        (r["effect"], r["rep"]): r
        for r in run_plan(make_plan(with_(raw, "simulation", method="refit")), workers=1)["rows"]
    }
    for i in range(3):
        a, b = shift[(-0.3, i)], refit[(-0.3, i)]
        assert a["method"] == "shift" and b["method"] == "refit"
        # as in the one-adopter test: independent draw sets, 4 standard errors on the mean, 15% on the sd
        assert abs(a["posterior_mean"] - b["posterior_mean"]) < 0.4 * b["posterior_sd"]
        assert a["posterior_sd"] == pytest.approx(b["posterior_sd"], rel=0.15)


@pytest.mark.slow
def test_command_writes_its_folder_resumes_and_shares_one_structure(tmp_path, did_result, capsys):
    """`bayesdid plan` end to end, with a [vary] grid that changes comparisons and periods."""
    from bayesdid import sample

    raw = with_(with_(DID, "vary", periods=[6, 8], comparisons=[9, 29]), "effects", values=[0.0, -1.0])
    raw = with_(raw, "simulation", reps=2, placebos=19)
    path = write_plan_file(tmp_path / "plan.toml", raw)
    out = tmp_path / "plan_out"
    before = sample.COMPILES["count"]
    assert main(["plan", path, "--out", str(out), "--workers", "1", "--quiet"]) == 0
    assert sample.COMPILES["count"] - before <= 1  # four layouts, one structure
    printed = capsys.readouterr().out
    assert "With one adopter, nine comparisons and two quarters after the start (counting the start)" in printed
    for f in (
        "plan.json",
        "assurance.csv",
        "false_decision.csv",
        "reps.csv",
        "assurance.png",
        "report.html",
        "manifest.json",
    ):
        assert (out / f).is_file(), f
    assert not progress_path(out).exists()
    s = json.loads((out / "plan.json").read_text())
    assert len(s["assurance"]) == 4 * 2 and len(s["false_decision"]) == 4
    tab = pd.read_csv(out / "assurance.csv")
    assert set(tab["layout"]) == {"C29-T8", "C9-T6", "C9-T8", "C29-T6"}
    page = (out / "report.html").read_text()
    assert "would be detected with probability" in page
    # the planned layout's sentences lead; the three other layouts of the grid are folded below
    head, folded = page.split("<details>")[0], page.split("<details>")[1].split("</details>")[0]
    assert "29 comparisons and four quarters" in head and "nine comparisons" not in head
    assert "other 3 layout(s)" in folded and "nine comparisons and two quarters" in folded
    # an existing folder is refused without --replace, before any work
    assert main(["plan", path, "--out", str(out), "--quiet"]) == 2

    # resumable: a stopped run's reps (here: the first 2 of 3) are kept and only the rest run
    plan3 = load_plan(path)
    import dataclasses

    prog = tmp_path / "progress.jsonl"
    first = run_plan(plan3, workers=1, progress_file=prog)
    more = run_plan(dataclasses.replace(plan3, reps=3), workers=1, progress_file=prog)
    assert more["summary"]["run"]["kept_from_earlier_run"] == 8  # 4 layouts x 2 data sets
    assert more["summary"]["run"]["ran_now"] == 4
    key = lambda r: (r["layout"], r["effect"], r["rep"])  # noqa: E731
    old = {key(r): r["prob_beyond"] for r in first["rows"]}
    assert len(more["rows"]) == 4 * 2 * 3
    assert all(old[key(r)] == r["prob_beyond"] for r in more["rows"] if key(r) in old)


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore::bayesdid.errors.DiagnosticsWarning")  # tiny draws on purpose
def test_noise_from_a_pilot_run_folder(tmp_path, did_result, capsys):
    """A pilot fitted by `bayesdid fit`: its posterior gives the noise; a DDD plan refuses the DiD pilot."""
    from bayesdid.simulate import Scenario, simulate

    frame, truth = simulate(
        Scenario(jurisdictions=30, periods=8, groups=1, starts={0: 4}, rows_per_cell=20, gap_sd=0.2, residual_sd=1.0),
        11,
    )
    (tmp_path / "pilot.csv").write_text(frame.to_csv(index=False))
    adopters = ", ".join(f'"{k}" = {v}' for k, v in truth["starts"].items())
    (tmp_path / "pilot.toml").write_text(
        'title = "invented pilot"\n[data]\ntable = "pilot.csv"\noutcome = "y"\njurisdiction = "region"\n'
        f'period = "period"\n[policy]\nadopters = {{ {adopters} }}\n[sampler]\ndraws = 150\ntune = 150\n'
    )
    assert (
        main(
            [
                "fit",
                str(tmp_path / "pilot.toml"),
                "--out",
                str(tmp_path / "pilot"),
                "--draws",
                "150",
                "--tune",
                "150",
                "--quiet",
                "--no-cross-check",
            ]
        )
        == 0
    )
    base = {k: v for k, v in DID.items() if k != "noise"}
    ddd = write_plan_file(tmp_path / "ddd.toml", {**with_(base, "layout", design="DDD"), "noise": {"run": "pilot"}})
    capsys.readouterr()
    assert main(["plan", ddd, "--out", str(tmp_path / "x"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "noise.run" in err and "DiD" in err and "DDD" in err
    assert not (tmp_path / "x").exists()

    plan = load_plan(
        write_plan_file(
            tmp_path / "did.toml", {**with_(base, "simulation", reps=4, placebos=0), "noise": {"run": "pilot"}}
        )
    )
    assert plan.noise.source == "run folder"
    res = run_plan(plan, workers=1)
    gaps = [r["gap_sd_true"] for r in res["rows"]]
    post = np.asarray(plan.noise.draws["gap"])
    assert len(set(gaps)) > 1 and all(np.isin(gaps, post))  # one posterior draw per data set
    assert res["summary"]["assurance"][0]["normal_assurance"] is None

    # the pilot table itself (a study file): refused for another design, else fitted once for the noise
    capsys.readouterr()
    ddd_pilot = write_plan_file(
        tmp_path / "ddd_pilot.toml", {**with_(base, "layout", design="DDD"), "noise": {"pilot": "pilot.toml"}}
    )
    assert main(["plan", ddd_pilot, "--out", str(tmp_path / "y"), "--quiet"]) == 2
    assert "noise.pilot" in capsys.readouterr().err and not (tmp_path / "y").exists()
    plan = load_plan(
        write_plan_file(
            tmp_path / "did_pilot.toml",
            {**with_(base, "simulation", reps=3, placebos=0), "noise": {"pilot": "pilot.toml"}},
        )
    )
    assert plan.noise.source == "pilot table" and plan.noise.draws is None
    res = run_plan(plan, workers=1)
    s = res["summary"]["plan"]["noise"]
    assert s["pilot"]["data_sha256"] and s["posterior_draws"] == 300
    # the pilot's gap noise was simulated with sd 0.2: its posterior median is near it
    assert 0.1 < s["posterior_medians"]["gap"] < 0.35
    assert len({r["gap_sd_true"] for r in res["rows"]}) == 3  # one draw per data set


def test_rho_note_follows_what_was_fitted():
    from bayesdid.plan import rho_note

    assert rho_note(False, {"independent"}) is None
    assert "over-confident" in rho_note(True, {"independent"})
    assert "some data sets" in rho_note(True, {"independent", "persistent"})
    assert "learns its correlation" in rho_note(True, {"persistent"})


def test_permutation_reuses_the_design_of_a_layout_exactly():
    """The fixed-effect basis is reused across data sets of one layout: same estimates as a fresh design."""
    from bayesdid.crosscheck import permutation_test

    plan = make_plan(with_(DID, "vary", comparisons=[9, 29]))
    rng = np.random.default_rng(5)
    designs: dict = {}
    for lay in plan.layouts:
        for effect in (0.0, -0.4):
            cells = simulate_cells(plan, lay, simulate_noise(plan.frame, plan.noise.for_rep(rng), (0, 0), rng), effect)
            a = permutation_test(cells, placebos=19, seed=3, designs=designs)
            b = permutation_test(cells, placebos=19, seed=3)
            assert a["estimate"] == pytest.approx(b["estimate"], abs=1e-12)
            assert a["p_value"] == b["p_value"]
            assert np.allclose(a["estimates"], b["estimates"], atol=1e-12)
    assert len(designs) == 2  # one per layout


@pytest.mark.slow
def test_lean_draws_are_the_full_fits_draws():
    """sample.sample_draws (raw nutpie draws of a few variables) gives the draws of fit_cells, same seed."""
    from bayesdid.model.terms import resolve_scales
    from bayesdid.sample import fit_cells, sample_draws
    from bayesdid.study import PriorScales, SamplerSettings

    plan = make_plan(DID)
    rng = np.random.default_rng(9)
    cells = simulate_cells(plan, plan.layouts[0], simulate_noise(plan.frame, plan.noise.for_rep(rng), (0, 0), rng), 0)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, PriorScales()).items()}
    settings = SamplerSettings(chains=2, draws=60, tune=60, seed=21)
    full = fit_cells(cells, scales, settings)
    for cores in (1, 2):  # threads do not change the draws: each chain has its own seeded stream
        lean = sample_draws(cells, scales, settings, ["tau_adopter", "sigma_gap"], cores=cores)
        assert lean.values["tau_adopter"].shape == (2, 60, 1)
        assert np.array_equal(lean.draws("tau_adopter"), full.draws("tau_adopter"))
        assert np.array_equal(lean.draws("sigma_gap"), full.draws("sigma_gap"))
        assert lean.divergences == full.diagnostics["divergences"]
        assert lean.spec.key() == full.spec.key()
    with pytest.raises(KeyError, match="no variable 'tau_typo'"):
        sample_draws(cells, scales, settings, ["tau_typo"])


def test_permutation_at_every_effect_from_two_passes():
    """The linear shortcut (est(c) = est(0) + c (est(1) - est(0))) against a permutation test per effect."""
    from bayesdid.crosscheck import permutation_test
    from bayesdid.plan import _one_sided_p, _permutation_rows

    for raw in (DID, with_(with_(DID, "layout", design="DDD", starts=[4, 6]), "decision", direction="above")):
        plan = make_plan(with_(raw, "simulation", placebos=39))
        lay = plan.layouts[0]
        rng = np.random.default_rng(11)
        noise = simulate_noise(plan.frame, plan.noise.for_rep(rng), (0, 0), rng)
        effects = [0.0, -0.2, 0.35, -1.0]
        rows = _permutation_rows(plan, lay, noise, 5, effects)
        for c, row in zip(effects, rows, strict=True):
            direct = permutation_test(simulate_cells(plan, lay, noise, c), placebos=39, seed=5)
            assert row["ls_estimate"] == pytest.approx(direct["estimate"], abs=1e-10)
            assert row["p_permutation_two_sided"] == pytest.approx(direct["p_value"], abs=1e-12)
            assert row["permutation_assignments"] == direct["assignments"]
            p1 = _one_sided_p(direct["estimate"], direct["estimates"], plan.direction)
            assert row["p_permutation"] == pytest.approx(p1, abs=1e-12)
            assert row["permutation_reject"] == (p1 <= 1 - plan.level + 1e-12)


def test_att_diagnostics_judge_the_inner_fits():
    """The plan's pass rule on the ATT draws: R-hat (halves of one chain), bulk ESS, divergences."""
    from bayesdid.plan import PLAN_ESS_MIN, _att_diagnostics

    rng = np.random.default_rng(4)
    iid = rng.standard_normal((1, 400))
    d = _att_diagnostics(iid, 0)
    assert d["ok"] and abs(d["rhat_max"] - 1) < 0.02 and d["ess_bulk_att"] > PLAN_ESS_MIN
    assert not _att_diagnostics(iid, 1)["ok"]  # a divergence fails the fit
    drift = iid + np.linspace(0, 3, 400)  # one chain whose halves disagree
    assert _att_diagnostics(drift, 0)["rhat_max"] > 1.1 and not _att_diagnostics(drift, 0)["ok"]
    sticky = np.repeat(rng.standard_normal((2, 20)), 20, axis=1)  # two chains, 20 distinct values each
    assert _att_diagnostics(sticky, 0)["ess_bulk_att"] < PLAN_ESS_MIN and not _att_diagnostics(sticky, 0)["ok"]


def test_decision_probability_error_and_expected_flips():
    """prob_beyond_mcse is sqrt(p (1 - p) / S) for independent equally weighted draws; flip_share follows it."""
    from scipy import stats

    from bayesdid.plan import _decide, decision_noise

    plan = make_plan(DID)  # threshold 0, direction below, level 0.9
    rng = np.random.default_rng(8)
    att = rng.normal(-0.25, 0.2, size=2000)  # P(att < 0) = Phi(1.25) = 0.894
    d = _decide(plan, att, None, -0.25, chains=2)
    p = d["prob_beyond"]
    # bulk of 2,000 independent draws: the ESS of the indicator is near 2,000 (within its own noise)
    assert d["prob_beyond_mcse"] == pytest.approx(math.sqrt(p * (1 - p) / 2000), rel=0.15)
    # a chain stuck in blocks of 20 has about 20 times fewer effective draws: about sqrt(20) times the error
    sticky = np.repeat(att[:100], 20)
    assert _decide(plan, sticky, None, -0.25, chains=1)["prob_beyond_mcse"] > 3 * d["prob_beyond_mcse"]
    rows = [
        {"prob_beyond": 0.9, "prob_beyond_mcse": 0.02},  # at the level: a coin flip
        {"prob_beyond": 0.94, "prob_beyond_mcse": 0.02},  # two errors away
        {"prob_beyond": 0.3, "prob_beyond_mcse": 0.0},  # all draws on one side
    ]
    out = decision_noise(plan, rows)
    assert out["flip_share"] == pytest.approx((0.5 + stats.norm.cdf(-2.0) + 0.0) / 3, rel=1e-9)
    # net: the first concludes now and half the time after; the second concludes now, Phi(2) after
    assert out["shift"] == pytest.approx((-0.5 - stats.norm.cdf(-2.0) + 0.0) / 3, rel=1e-9)


def test_plain_words_of_a_share_at_zero_or_one():
    """No (or only) detections: the exact one-sided 95% bound (Clopper-Pearson), not an error of 0."""
    from bayesdid.report.plan_page import _prob_words

    assert _prob_words(0.62, 0.0343, 200) == "0.62 (Monte Carlo error 0.03)"
    # 1 - 0.05^(1/15) = 0.181 (exact binomial bound with no success in 15 trials)
    assert _prob_words(0.0, 0.0, 15) == "0.00 (in none of 15 simulated data sets: at most 0.18 with 95% confidence)"
    assert _prob_words(1.0, 0.0, 200) == "1.00 (in all 200 simulated data sets: at least 0.99 with 95% confidence)"
