"""Calibration and coverage (issue 8): a tiny run in this process, and the pieces checked alone.

A run of three reps with short chains cannot show that coverage is 95%; it can show that no rep
fails, that the shares and their Monte Carlo errors are well formed, that the SBC ranks are not
degenerate, that the files are written and parse, and that a fixed seed reproduces the reps. The
statistical parts (the SBC chi-square, the ECDF band, the prior draws) are checked on their own with
many cheap simulated draws and tolerances from their Monte Carlo error.
"""

from __future__ import annotations

import csv
import json
import math
import pickle

import numpy as np
import pytest

from bayesdid import calibration as cal
from bayesdid.calibration.coverage import _shift_treated
from bayesdid.calibration.sbc import _draw_prior
from bayesdid.calibration.scenarios import _cells_of
from bayesdid.errors import BayesDidError

TIMING = {"wall_s", "sample_s", "compile_s"}
SMALL = dict(
    scenario="one_adopter", reps=3, sbc_reps=3, draws=150, tune=150, chains=2, seed=7, workers=1, cross_check_draws=99
)


@pytest.fixture(scope="session")
def small_run():
    # One compile of the one-adopter structure; every later fit in this file re-samples through the cache.
    return cal.run_calibration(**SMALL)


def _strip(rows):
    return [{k: v for k, v in r.items() if k not in TIMING} for r in rows]


def test_no_rep_fails(small_run):
    s = small_run["summary"]
    assert s["failed"] == []
    assert len(small_run["rows"]) == 3 and len(small_run["sbc_rows"]) == 3
    assert all(r["ok"] and r["error"] == "" for r in small_run["rows"] + small_run["sbc_rows"])


def test_coverage_shares_and_mcse(small_run):
    cov = small_run["summary"]["coverage"]
    assert set(cov) == {"posterior", "cr1", "wild", "permutation"}
    for method, res in cov.items():
        for lvl in ("50", "90", "95"):
            c = res[f"cover_{lvl}"]
            assert c["reps"] == 3, method
            assert 0.0 <= c["coverage"] <= 1.0
            assert c["mcse"] == pytest.approx(math.sqrt(c["coverage"] * (1 - c["coverage"]) / 3))
    # Nested intervals of one posterior: a 50% interval is inside the 90%, inside the 95%.
    for r in small_run["rows"]:
        assert r["posterior_width_50"] < r["posterior_width_90"] < r["posterior_width_95"]
        assert r["posterior_cover_50"] <= r["posterior_cover_90"] <= r["posterior_cover_95"]
        assert r["truth"] == pytest.approx(-0.2)  # one adopter, no spread: the ATT is the scenario's tau
    b = cov["posterior"]["bias"]
    assert b["rmse"] >= abs(b["mean"])


def test_sbc_ranks_not_degenerate(small_run):
    for name in ("tau", "sigma_gap"):
        ranks = [r[f"{name}_rank"] for r in small_run["sbc_rows"]]
        assert all(0 <= k <= cal.SBC_DRAWS for k in ranks)
        # A broken model or a truth taken from the wrong prior piles the ranks at 0 or L; with
        # uniform ranks all three at an extreme has probability (2/100)^3 = 8e-6.
        assert not all(k in (0, cal.SBC_DRAWS) for k in ranks), ranks
        assert small_run["summary"]["sbc"][name]["p_value"] is not None
        # each rep's bulk ESS of the parameter (2 chains x 150 draws), and the summary's share below 99
        ess = np.array([r[f"{name}_ess"] for r in small_run["sbc_rows"]])
        assert np.all((ess > 0) & (ess < 3 * 300)), ess
        assert small_run["summary"]["sbc"][name]["share_ess_below_ranked"] == pytest.approx(np.mean(ess < 99))


def test_reproducible_for_a_fixed_seed(small_run):
    again = cal.run_calibration(**SMALL)
    assert _strip(again["rows"]) == _strip(small_run["rows"])
    assert _strip(again["sbc_rows"]) == _strip(small_run["sbc_rows"])


def test_files_written_atomically_and_parse(small_run, tmp_path):
    out = tmp_path / "cal"
    cal.write_calibration(small_run, out)
    assert sorted(p.name for p in out.iterdir()) == [
        "calibration.json",
        "coverage_reps.csv",
        "manifest.json",
        "sbc_ranks.png",
        "sbc_reps.csv",
    ]
    summary = json.loads((out / "calibration.json").read_text())
    assert summary["coverage"]["posterior"]["cover_95"]["reps"] == 3
    with open(out / "coverage_reps.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [int(r["rep"]) for r in rows] == [0, 1, 2]
    assert float(rows[0]["truth"]) == pytest.approx(-0.2)
    with open(out / "sbc_reps.csv", newline="") as fh:
        assert len(list(csv.DictReader(fh))) == 3
    assert (out / "sbc_ranks.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # A non-empty folder is refused and left as it was; no temporary folder is left behind.
    with pytest.raises(BayesDidError, match="already exists and is not empty"):
        cal.write_calibration(small_run, out)
    assert json.loads((out / "calibration.json").read_text()) == summary
    assert [p.name for p in tmp_path.iterdir()] == ["cal"]


def test_cli_bench_calibration(small_run, tmp_path, capsys):
    from bayesdid.cli import main

    out = tmp_path / "cli"
    code = main(
        [
            "bench",
            "calibration",
            "--reps",
            "2",
            "--sbc-reps",
            "2",
            "--draws",
            "150",
            "--tune",
            "150",
            "--workers",
            "1",
            "--seed",
            "3",
            "--out",
            str(out),
        ]
    )
    assert code == 0
    line = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    assert line["reps"] == 2 and line["failed"] == 0
    assert 0.0 <= line["posterior_cover_95"] <= 1.0 and line["posterior_cover_95_mcse"] is not None
    assert (out / "calibration.json").exists()
    assert not list(tmp_path.glob(".*reps.jsonl"))  # the progress file goes once the folder is written


@pytest.mark.parametrize(
    "argv, match",
    [
        (["bench", "calibration", "--scenario", "nowhere"], "calibration scenario 'nowhere' is unknown"),
        (
            ["bench", "collapse", "--reps", "3"],
            "--reps: 'bayesdid bench collapse' does not take this option; calibration, panel, plan, weights do",
        ),
        (["bench", "calibration", "--reps", "0", "--scenario", "did"], "--reps: expected a whole number"),
    ],
)
def test_cli_bad_options_exit_2(argv, match, tmp_path, capsys):
    from bayesdid.cli import main

    code = main([*argv, "--out", str(tmp_path / "never")]) if "calibration" in argv else main(argv)
    assert code == 2
    assert match in capsys.readouterr().err.replace("\n  ", " ")
    assert not (tmp_path / "never").exists()


def test_shifting_the_treated_cells_moves_the_estimate_by_the_shift():
    # OLS is linear in y: subtracting d from every treated row moves the treatment coefficient by
    # exactly d and leaves the residuals (so the CR1 error) unchanged (textbook algebra).
    from bayesdid.crosscheck import cross_check
    from bayesdid.simulate import simulate

    sc = cal.SCENARIOS["staggered"].scenario
    frame, truth = simulate(sc, 11)
    cells = _cells_of(frame, sc, truth)
    d = np.where(cells.start < len(cells.periods), 0.3, 0.0)
    a = cross_check(cells, full=False)
    b = cross_check(_shift_treated(cells, d), full=False)
    assert b["estimate"] == pytest.approx(a["estimate"] - 0.3, abs=1e-9)
    assert b["se_cr1"] == pytest.approx(a["se_cr1"], rel=1e-9)


def test_prior_draws_follow_the_stated_prior():
    # tau ~ Normal(0, effect) and sigma_gap ~ HalfNormal(gap_noise), whose mean is s sqrt(2 / pi)
    # (textbook). 4,000 draws: the sd of tau is within 4 x s / sqrt(2 x 4000) of s, the mean of
    # sigma_gap within 4 x (its sd s sqrt(1 - 2/pi)) / sqrt(4000) of its mean (Monte Carlo error).
    from bayesdid.simulate import simulate

    prior = cal.sbc_prior("staggered", 5)
    sc = cal.SCENARIOS["staggered"].scenario
    frame, truth = simulate(sc, 5)
    cells = _cells_of(frame, sc, truth)
    rng = np.random.default_rng(0)
    draws = [_draw_prior(cells, prior, rng)[0] for _ in range(4000)]
    tau = np.array([d["tau"] for d in draws])
    gap = np.array([d["sigma_gap"] for d in draws])
    s_e, s_g = prior["scales"]["effect"], prior["scales"]["gap_noise"]
    assert np.std(tau) == pytest.approx(s_e, abs=4 * s_e / math.sqrt(8000))
    assert np.mean(gap) == pytest.approx(
        s_g * math.sqrt(2 / math.pi), abs=4 * s_g * math.sqrt(1 - 2 / math.pi) / math.sqrt(4000)
    )


def test_sbc_chi_square_tells_uniform_from_piled_ranks():
    rng = np.random.default_rng(2)
    uniform = [{"ok": True, "tau_rank": int(k), "sigma_gap_rank": int(k)} for k in rng.integers(0, 100, 400)]
    piled = [{"ok": True, "tau_rank": int(k), "sigma_gap_rank": 99} for k in rng.integers(0, 10, 400)]
    # Under uniform ranks the p-value is uniform: below 0.001 with probability 0.001.
    assert cal.sbc_table(uniform)["tau"]["p_value"] > 0.001
    t = cal.sbc_table(piled)
    assert t["tau"]["p_value"] < 1e-10 and t["sigma_gap"]["share_at_extremes"] == 1.0
    assert cal.sbc_table([])["tau"]["reason"].startswith("not applicable")
    with_ess = [{**r, "tau_ess": e} for r, e in zip(uniform[:4], (50.0, 150.0, 400.0, float("nan")))]
    assert cal.sbc_table(with_ess)["tau"]["share_ess_below_ranked"] == pytest.approx(1 / 3)
    assert cal.sbc_table(uniform)["tau"]["share_ess_below_ranked"] is None


def test_ecdf_band_holds_uniform_ecdfs_95_percent_of_the_time():
    # Säilynoja et al. (2022): the band is simultaneous. Fresh uniform rank sets stay wholly inside
    # in 95% of cases; 600 sets give a Monte Carlo sd of sqrt(0.95 x 0.05 / 600) = 0.009, and the
    # discreteness of the ranks makes the band conservative, so the share is checked in [0.92, 0.995].
    N, L = 30, cal.SBC_DRAWS
    z, lo, hi = cal.ecdf_band(N, sims=2000, seed=3)
    rng = np.random.default_rng(4)
    inside = 0
    for _ in range(600):
        r = rng.integers(0, L + 1, N)
        F = (r[:, None] < np.arange(1, L + 2)[None, :]).mean(axis=0) - z
        inside += bool(np.all((F >= lo - 1e-12) & (F <= hi + 1e-12)))
    assert 0.92 <= inside / 600 <= 0.995


def test_executor_adapter():
    task = cal.RepTask(kind="coverage", scenario="did", rep=4, base_seed=1, draws=100, tune=100, chains=2)
    assert pickle.loads(pickle.dumps(task)) == task
    assert pickle.loads(pickle.dumps(cal.run_rep)) is cal.run_rep
    assert (
        task.seeds
        == cal.RepTask(kind="coverage", scenario="did", rep=4, base_seed=1, draws=500, tune=500, chains=2).seeds
    )
    assert (
        task.seeds
        != cal.RepTask(kind="coverage", scenario="did", rep=5, base_seed=1, draws=100, tune=100, chains=2).seeds
    )
    ex = cal.make_executor(2)
    try:
        # the sweep's process pool (spawned processes): every result, in the order they complete
        assert ex.name == "process pool (2 workers)"
        assert sorted(ex.map(math.sqrt, [4.0, 9.0, 16.0])) == [2.0, 3.0, 4.0]
    finally:
        ex.close()
    assert list(cal.make_executor(1).map(math.sqrt, [9.0, 4.0])) == [3.0, 2.0]  # in-process, in order
    with pytest.raises(BayesDidError, match="--workers: expected a whole number of at least 1"):
        cal.make_executor(0)


def test_reps_show_progress_one_line_each_off_a_terminal(monkeypatch):
    # the rep itself replaced (no fit): what is checked is the progress of the loop over reps
    from bayesdid.calibration import runner

    def fake(task):
        return {
            "kind": task.kind,
            "scenario": task.scenario,
            "rep": task.rep,
            "ok": task.rep != 1,
            "error": "",
            "wall_s": 0,
        }

    monkeypatch.setattr(runner, "run_rep", fake)
    monkeypatch.setattr(runner, "coverage_table", lambda rows: {})
    lines = []
    runner.run_calibration(reps=3, sbc_reps=0, workers=1, log=lines.append)
    assert [m.split(", about")[0].split(", ")[0] for m in lines] == [
        "calibration reps (one_adopter) 1/3 coverage rep 0",
        "calibration reps (one_adopter) 2/3 coverage rep 1 failed",
        "calibration reps (one_adopter) 3/3 coverage rep 2",
    ]
    assert "left" in lines[0] and lines[-1].endswith("in all")
