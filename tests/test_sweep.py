"""Sweeps: the sweep file, variant ids, executors, resumability, compile counts and the verdict.

Fits use the invented demo case (case_files/copay_cap) with 2 chains x 200 draws: these tests compare
runs with each other (same seeds, same draws), not with a truth, so few draws suffice.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import xarray as xr

from bayesdid import sample
from bayesdid.errors import SweepError
from bayesdid.model.terms import model_spec
from bayesdid.sweep import SUMMARY_COLUMNS, load_sweep, run_sweep, variant_is_complete, verdict

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "case_files" / "copay_cap" / "study.toml"

GRID = f"""
study = "{DEMO}"
[sampler]
draws = 200
tune = 200
seed = 5
[priors]
effect = [0.3, 3.0]
adopter_spread = [0.05, 0.2, 0.6]
"""


def write(tmp, text, name="sweep.toml"):
    p = Path(tmp) / name
    p.write_text(text)
    return p


def read_csv(path):
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


# ---- the sweep file --------------------------------------------------------------------------
@pytest.mark.parametrize(
    "body,match",
    [
        ("colour = 1", r"unknown key\(s\) \['colour'\] at the top"),
        ("[priors]\neffekt = [1.0]", r"unknown prior name\(s\) \['effekt'\].*allowed names"),
        ("[priors]\neffect = [-1.0]", r"sweep key 'priors.effect': expected a list of positive numbers"),
        ("[priors]\neffect = []", r"sweep key 'priors.effect': expected a non-empty list"),
        ('[comparisons]\ndrop = [["Norvale"]]', r"'Norvale' adopts the policy"),
        ('[comparisons]\ndrop = [["Atlantis"]]', r"comparisons.drop\[0\]'.*'Atlantis'"),
        ("[comparisons]\nleave_one = true", r"unknown key\(s\) \['leave_one'\] in \[comparisons\]"),
        ('combine = "all"', r"sweep key 'combine': expected 'one_at_a_time' or 'grid'"),
        ('[[options]]\nlog_outcome = "yes"', r"variant 'model.log_outcome=yes' does not make a valid study"),
        ("[[variant]]\nflavour = 1", r"unknown key\(s\) \['flavour'\] in \[\[variant\]\] number 1"),
    ],
)
def test_sweep_file_errors_name_the_key(tmp_path, body, match):
    p = write(tmp_path, f'study = "{DEMO}"\n' + body)
    with pytest.raises(SweepError, match=match):
        load_sweep(p)


def test_missing_files(tmp_path):
    with pytest.raises(SweepError, match="does not exist"):
        load_sweep(tmp_path / "nope.toml")
    with pytest.raises(SweepError, match="sweep key 'study'"):
        load_sweep(write(tmp_path, "[priors]\neffect = [1.0]"))


def test_cli_bad_sweep_exits_2_and_writes_nothing(tmp_path):
    from bayesdid.cli import main

    p = write(tmp_path, f'study = "{DEMO}"\n[priors]\nnope = [1.0]')
    assert main(["sweep", str(p), "--out", str(tmp_path / "out"), "--serial", "--quiet"]) == 2
    assert not (tmp_path / "out").exists()


def test_variant_ids_are_stable_and_content_based(tmp_path):
    a = load_sweep(write(tmp_path, GRID))
    b = load_sweep(write(tmp_path, GRID, "again.toml"))
    assert [v.id for v in a.variants] == [v.id for v in b.variants]
    assert len(a.variants) == 7 and a.variants[0].label == "base"  # base + a 2 x 3 grid
    assert len({v.id for v in a.variants}) == 7 and len({v.seed for v in a.variants}) == 7
    c = load_sweep(write(tmp_path, GRID.replace("seed = 5", "seed = 6"), "seed6.toml"))
    assert not {v.id for v in a.variants} & {v.id for v in c.variants}
    d = load_sweep(write(tmp_path, GRID.replace("0.6]", "0.7]"), "changed.toml"))
    same = {v.id for v in a.variants} & {v.id for v in d.variants}
    assert len(same) == 5  # base and the four grid points without adopter_spread = 0.6


def test_axes_one_at_a_time_and_grid(tmp_path):
    body = f"""study = "{DEMO}"
[priors]
effect = [0.3, 3.0]
[comparisons]
leave_each_out = true
[[options]]
log_outcome = false
label = "levels"
[[variant]]
label = "placebo in space: Bellcrest from 2024Q3"
policy = {{ adopters = {{ "Bellcrest" = "2024Q3" }} }}
"""
    one = load_sweep(write(tmp_path, body))
    n_comp = 38  # 40 regions, 2 adopters
    assert len(one.variants) == 1 + 2 + n_comp + 1 + 1
    labels = [v.label for v in one.variants]
    assert "levels" in labels and "placebo in space: Bellcrest from 2024Q3" in labels
    plac = one.variants[labels.index("placebo in space: Bellcrest from 2024Q3")]
    assert plac.raw["policy"]["adopters"] == {"Bellcrest": "2024Q3"}
    grid = load_sweep(write(tmp_path, body.replace("study =", 'combine = "grid"\nstudy ='), "grid.toml"))
    assert len(grid.variants) == 1 + 2 * n_comp * 1 + 1


# ---- verdict (no fitting) ----------------------------------------------------------------------
def _r(i, mean, lo, hi, plt0, pb, status="done"):
    return {
        "id": i,
        "label": i,
        "status": status,
        "effect_mean": mean,
        "effect_sd": 0.05,
        "eti90_low": lo,
        "eti90_high": hi,
        "prob_lt_0": plt0,
        "prob_beyond_threshold": pb,
    }


def test_verdict_finds_breaks_and_the_biggest_move():
    rows = [
        _r("base", -0.13, -0.22, -0.04, 0.99, 0.9),
        _r("a", -0.12, -0.21, -0.03, 0.98, 0.85),
        _r("b", -0.03, -0.12, 0.06, 0.7, 0.3),
        _r("c", 0, 0, 0, 0, 0, status="failed"),
    ]
    v = verdict(rows)
    checks = {c["check"]: c for c in v["checks"]}
    assert checks["sign"]["holds"] is True and checks["sign"]["held_by"] == 3
    assert checks["interval"]["holds"] is False and checks["interval"]["breaks"] == ["b"]
    assert checks["decision"]["breaks"] == ["b"]
    assert v["holds"] is False and v["moves_most"]["id"] == "b"
    assert abs(v["moves_most"]["shift_sd"] - 0.10 / 0.05) < 1e-9
    assert v["moves_probability_most"]["id"] == "b" and v["not_judged"] == ["c"]
    assert verdict([_r("base", 0, 0, 0, 0, 0, status="failed")])["status"] == "not applicable"
    nothr = [dict(r, prob_beyond_threshold="") for r in rows[:2]]
    assert {c["check"]: c for c in verdict(nothr)["checks"]}["decision"]["status"] == "not applicable"


# ---- executors ---------------------------------------------------------------------------------
NUMERIC = [c for c in SUMMARY_COLUMNS if c not in ("id", "label", "status", "overrides", "error", "sample_s")]


def _key_of():
    from bayesdid.cells import collapse
    from bayesdid.data import read_table
    from bayesdid.study import load_study

    st = load_study(DEMO)
    return model_spec(collapse(st, read_table(st.table))).key()


@pytest.fixture(scope="module")
def serial_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("sweep") / "serial"
    plan = load_sweep(write(out.parent, GRID))
    cached = _key_of() in sample._CACHE
    before = sample.COMPILES["count"] + sample.LOADS["count"]
    lines = []
    rep = run_sweep(plan, out, executor="serial", progress=True, log=lines.append)
    serial_run_lines[:] = lines
    return plan, out, rep, sample.COMPILES["count"] + sample.LOADS["count"] - before, cached


serial_run_lines: list = []


def test_serial_run_shows_one_progress_line_per_variant_off_a_terminal(serial_run):
    plan, *_ = serial_run
    steps = [m for m in serial_run_lines if m.startswith("variants (0 already done) ")]
    assert [m.split()[4] for m in steps] == [f"{k}/7" for k in range(1, 8)]
    assert all(" done" in m for m in steps) and "left" in steps[0] and steps[-1].endswith("in all")


def test_serial_grid_one_compile_and_tables(serial_run):
    plan, out, rep, compiles, cached = serial_run
    # one compiled model (compiled, or loaded from the compile cache) serves the 7 variants (none if an
    # earlier test of this process had it already)
    assert compiles == (0 if cached else 1)
    assert len(rep["ran"]) == 7 and not rep["failed"]
    rows = read_csv(out / "summary.csv")
    assert [r["id"] for r in rows] == [v.id for v in plan.variants]
    assert all(r["status"] == "done" for r in rows)
    assert list(rows[0]) == SUMMARY_COLUMNS
    man = json.loads((out / "manifest.json").read_text())
    assert man["executor"] == "serial" and len(man["variants"]) == 7
    ver = json.loads((out / "verdict.json").read_text())
    assert ver["judged"] == 7 and ver["base"] == plan.variants[0].id
    for v in plan.variants:
        assert variant_is_complete(out / "variants" / v.id, v.id)
        s = json.loads((out / "variants" / v.id / "summary.json").read_text())
        assert s["priors"]["effect"]["scale"] == pytest.approx(
            v.raw["priors"].get("effect", s["priors"]["effect"]["scale"])
        )
        assert "sensitivity" in s


def _same_rows(a, b):
    ra, rb = read_csv(a / "summary.csv"), read_csv(b / "summary.csv")
    assert [r["id"] for r in ra] == [r["id"] for r in rb]
    for x, y in zip(ra, rb):
        for c in NUMERIC:
            # same seed, same compiled code: nutpie's draws are reproducible bit for bit
            assert x[c] == y[c], (x["label"], c, x[c], y[c])


@pytest.mark.slow
def test_local_pool_matches_serial(serial_run):
    plan, out, rep, _, _ = serial_run
    pool = out.parent / "pool"
    r = run_sweep(plan, pool, executor="pool", workers=2)
    _same_rows(out, pool)
    # the serial run put the structure in the compile cache: no worker compiles, each loads it once,
    # whatever number of variants it ran
    assert 1 <= len(r["compiles"]) <= 2 and all(n == 0 for n in r["compiles"].values()), r["compiles"]
    assert all(n == 1 for n in r["loads"].values()), r["loads"]


@pytest.mark.slow
def test_dask_local_cluster_matches_serial(serial_run):
    plan, out, rep, _, _ = serial_run
    dk = out.parent / "dask"
    r = run_sweep(plan, dk, executor="dask", workers=2, cluster="local")
    _same_rows(out, dk)
    assert 1 <= len(r["compiles"]) <= 2 and all(n == 0 for n in r["compiles"].values()), r["compiles"]
    assert all(n == 1 for n in r["loads"].values()), r["loads"]
    assert json.loads((dk / "manifest.json").read_text())["executor"] == "dask"


def test_failing_variant_is_recorded_and_others_finish(serial_run, tmp_path):
    body = GRID.split("[priors]")[0] + '[[variant]]\nlabel = "no such column"\noutcome = "spend_typo"\n'
    plan = load_sweep(write(tmp_path, body))
    out = tmp_path / "out"
    rep = run_sweep(plan, out, executor="serial")
    bad = plan.variants[1].id
    assert list(rep["failed"]) == [bad] and "spend_typo" in rep["failed"][bad]
    rows = {r["id"]: r for r in read_csv(out / "summary.csv")}
    assert rows[plan.variants[0].id]["status"] == "done"  # the base reused serial_run's compile
    assert rows[bad]["status"] == "failed" and "DataRoleError" in rows[bad]["error"]
    assert not (out / "variants" / bad).exists()
    man = json.loads((out / "manifest.json").read_text())
    assert [v for v in man["variants"] if v["id"] == bad][0]["error"].startswith("DataRoleError")
    # a rerun retries the failed one and skips the finished one
    rep2 = run_sweep(plan, out, executor="serial")
    assert rep2["skipped"] == [plan.variants[0].id] and rep2["ran"] == [bad]


@pytest.mark.slow
def test_sigkill_then_rerun_finishes_each_variant_once(serial_run, tmp_path):
    plan_file = write(tmp_path, GRID)
    plan = load_sweep(plan_file)
    out = tmp_path / "killed"
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    proc = subprocess.Popen(
        [sys.executable, "-m", "bayesdid.cli", "sweep", str(plan_file), "--out", str(out), "--serial", "--quiet"],
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        start_new_session=True,
    )
    deadline = time.time() + 1200
    try:
        while time.time() < deadline:
            done = [v.id for v in plan.variants if variant_is_complete(out / "variants" / v.id, v.id)]
            if len(done) >= 2:
                break
            assert proc.poll() is None, "the sweep ended before it could be killed"
            time.sleep(0.2)
        else:
            pytest.fail("the sweep did not finish two variants in time")
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)  # the session this test started, and only it
        proc.wait()
    done = [v.id for v in plan.variants if variant_is_complete(out / "variants" / v.id, v.id)]
    assert 2 <= len(done) < len(plan.variants)
    stamps = {i: (out / "variants" / i / "variant.json").stat().st_mtime_ns for i in done}
    rep = run_sweep(plan, out, executor="serial")
    assert sorted(rep["skipped"]) == sorted(done)
    assert sorted(rep["ran"]) == sorted(set(v.id for v in plan.variants) - set(done))
    for i, t in stamps.items():  # the finished ones were not recomputed
        assert (out / "variants" / i / "variant.json").stat().st_mtime_ns == t
    names = sorted(p.name for p in (out / "variants").iterdir())
    assert names == sorted(v.id for v in plan.variants)  # each once, no partial folders left
    assert not (out / ".staging").exists() and not (out / ".sweep.lock").exists()
    for v in plan.variants:
        f = out / "variants" / v.id
        assert variant_is_complete(f, v.id)
        tree = xr.open_datatree(f / "posterior.nc", engine="h5netcdf")
        assert tree["posterior"]["tau"].shape == (2, 200)
    rows = read_csv(out / "summary.csv")
    assert [r["status"] for r in rows] == ["done"] * len(plan.variants)
    # and the resumed sweep gives the same table as an uninterrupted one
    _same_rows(serial_run[1], out)


def test_stale_lock_is_taken_over_but_a_live_one_refuses(tmp_path, serial_run):
    plan = load_sweep(write(tmp_path, GRID.split("[priors]")[0]))
    out = tmp_path / "locked"
    (out / "variants").mkdir(parents=True)
    (out / ".sweep.lock").write_text(str(os.getppid()))  # a live process that is not us
    with pytest.raises(SweepError, match="another sweep"):
        run_sweep(plan, out, executor="serial")


def test_case_file_sweep_validates():
    plan = load_sweep(ROOT / "case_files" / "copay_cap" / "sweep.toml")
    labels = [v.label for v in plan.variants]
    # base + 2 x 2 prior grid + 2 comparison subsets + 1 option + 1 placebo + pooled gap drifts
    assert len(plan.variants) == 10 and labels[0] == "base" and "spending in levels" in labels
    drift = next(v for v in plan.variants if v.label == "pooled gap drifts (model.gap_drift)")
    assert drift.overrides == {"model": {"gap_drift": True}} and drift.raw["model"]["gap_drift"] is True
    assert not plan.base.model.gap_drift
    assert plan.base.sampler.draws == 500
    assert any(v.overrides.get("drop") == ["Ambermoor", "Bellcrest"] for v in plan.variants)


def test_broken_variant_folder_is_redone(serial_run, tmp_path):
    import shutil

    plan, out, _, _, _ = serial_run
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    victim = plan.variants[3].id
    (copy / "variants" / victim / "summary.json").write_text('{"effect": ')  # truncated by a crash
    assert not variant_is_complete(copy / "variants" / victim, victim)
    rep = run_sweep(plan, copy, executor="serial")
    assert rep["ran"] == [victim] and len(rep["skipped"]) == len(plan.variants) - 1
    assert variant_is_complete(copy / "variants" / victim, victim)
    _same_rows(out, copy)
