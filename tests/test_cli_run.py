"""The command line end to end on the invented demo case (tiny draws): the run folder's contents."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import xarray as xr

from bayesdid.cli import main
from bayesdid.data import file_sha256

pytestmark = pytest.mark.slow

CASE = Path(__file__).resolve().parent.parent / "case_files" / "copay_cap"


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "run"
    code = main(["demo", "--out", str(out), "--draws", "200", "--tune", "200", "--quiet"])
    return code, out


def test_demo_writes_complete_run_folder(demo_run, capsys):
    code, out = demo_run
    assert code == 0
    # the demo runs the whole analysis: the fit, every check, a three-variant sweep and the report
    assert sorted(p.name for p in out.iterdir()) == [
        "checks",
        "manifest.json",
        "posterior.nc",
        "report.html",
        "summary.json",
        "sweep",
        "trends.csv",
    ]
    checks = json.loads((out / "checks" / "checks.json").read_text())
    assert all(
        checks[c]["status"] in ("ok", "flag", "not applicable")
        for c in ("event_time", "pretrend", "placebo_time", "comparison", "placebo_space")
    )
    verdict = json.loads((out / "sweep" / "verdict.json").read_text())
    assert verdict["status"] == "ok" and len(verdict["rows"]) == 3
    # the pooled-drift variant (a Gaussian case) ran as its own structure and shows in the report
    drift = next(r for r in verdict["rows"] if r["label"] == "pooled gap drifts (model.gap_drift)")
    sweep_rows = {r["label"]: r for r in json.loads((out / "sweep" / "manifest.json").read_text())["variants"]}
    vdir = out / "sweep" / "variants" / drift["id"]
    vs = json.loads((vdir / "summary.json").read_text())
    assert vs["model"]["gap_noise"]["drift"] is True and "drift_spread" in vs["priors"]
    assert drift["effect_mean"] == pytest.approx(vs["effect"]["mean"])
    base = verdict["rows"][0]
    base_sd = json.loads((out / "sweep" / "variants" / base["id"] / "summary.json").read_text())["effect"]["sd"]
    assert drift["shift_sd"] == pytest.approx(abs(drift["effect_mean"] - base["effect_mean"]) / base_sd, rel=1e-6)
    html = (out / "report.html").read_text()
    assert "pooled gap drifts (model.gap_drift)" in html and "shift from the base" in html
    assert "pooled gap drifts (model.gap_drift)" in sweep_rows
    s = json.loads((out / "summary.json").read_text())
    for key in (
        "mean",
        "median",
        "sd",
        "eti_90",
        "eti_95",
        "hdi_90",
        "prob_gt_0",
        "prob_lt_0",
        "prob_beyond_threshold",
    ):
        assert key in s["effect"] and key in s["effect_percent"]
    assert s["effect"]["eti_95"][0] < s["effect"]["eti_90"][0] < s["effect"]["median"] < s["effect"]["eti_90"][1]
    assert s["effect"]["prob_gt_0"] + s["effect"]["prob_lt_0"] == pytest.approx(1.0)
    assert {"rhat_max", "ess_bulk_min", "ess_tail_min", "divergences", "ok"} <= set(s["diagnostics"])
    assert s["data"]["design"] == "DDD" and s["data"]["jurisdictions"] == 40
    assert sorted(s["data"]["adopters"]) == ["Kestrel Bay", "Norvale"]
    assert {"collapse_s", "compile_s", "sample_s"} <= set(s["timing"])
    assert len(s["per_adopter"]) == 2
    assert "estimate" in s["least_squares"]
    assert all(v["scale"] > 0 for v in s["priors"].values())
    # the invented truth is a cut of about 12%; a 200-draw fit still brackets it in its 95% interval
    truth = json.loads((CASE / "truth.json").read_text())
    lo, hi = s["effect_percent"]["eti_95"]
    assert lo < truth["effect_percent"] < hi
    m = json.loads((out / "manifest.json").read_text())
    assert m["data_sha256"] == file_sha256(CASE / "enrollees.csv")
    assert m["seed"] == 4242 and m["study"]["policy"]["target_group"] == "chronic"
    assert {"pymc", "nutpie", "arviz", "numpy", "pandas"} <= set(m["versions"])


def test_posterior_file_has_named_dims_with_labels(demo_run):
    _, out = demo_run
    t = xr.open_datatree(out / "posterior.nc", engine="h5netcdf")
    assert {"posterior", "log_likelihood", "sample_stats", "observed_data", "constant_data"} <= set(t.children)
    post = t["posterior"]
    assert "Norvale" in list(post["jurisdiction"].values)
    assert list(post["period"].values)[:2] == ["2023Q1", "2023Q2"]
    assert t["log_likelihood"]["cells"].dims == ("chain", "draw", "jurisdiction", "period")
    assert t["constant_data"]["n"].sum() > 40000


def test_seed_override_and_strict_exit(tmp_path, demo_run):
    code, out = demo_run
    s = json.loads((out / "summary.json").read_text())
    # 200 draws cannot reach ESS 400: --strict must turn the failed diagnostics into exit 3
    assert s["diagnostics"]["ok"] is False
    out2 = tmp_path / "strict"
    assert (
        main(["demo", "--out", str(out2), "--draws", "200", "--tune", "200", "--seed", "99", "--strict", "--quiet"])
        == 3
    )
    m = json.loads((out2 / "manifest.json").read_text())
    assert m["seed"] == 99
