"""One analysis end to end, per outcome family and design, through the real commands.

Each case (tests/e2e_runs.py) runs ``fit``, ``checks``, a two-variant ``sweep`` and ``report`` with
tiny draws on invented data. Every report section must hold real content (a figure, a table or a
stated result) or a specific reason it cannot apply; never an internal error, a traceback or a
"not available" gap, since every command ran. ``BAYESDID_E2E_ALL=1`` runs the full matrix of
families (slow: one compile per family and design).
"""

from __future__ import annotations

import html
import json
import re
import shutil

import pytest
from e2e_runs import MATRIX, quiet_main

from bayesdid.report import HEADINGS
from bayesdid.report.html import render_report


def sections(text: str) -> dict:
    return dict(re.findall(r'<section id="([\w-]+)">(.*?)</section>', text, flags=re.S))


@pytest.mark.parametrize("name", MATRIX)
def test_every_command_succeeds_and_every_section_has_content(name, e2e_run):
    case = e2e_run(name)
    assert case["codes"] == {"fit": 0, "checks": 0, "sweep": 0, "report": 0}, case["logs"]
    text = (case["run"] / "report.html").read_text(encoding="utf-8")
    assert [html.unescape(h) for h in re.findall(r"<h2>(.*?)</h2>", text)] == [h for _, h in HEADINGS]
    secs = sections(text)
    for anchor, body in secs.items():
        for bad in (
            "could not be drawn",
            "Traceback",
            "Not available in this run folder",
            "KeyError",
            "not valid JSON",
        ):
            assert bad not in body, (name, anchor, bad)
    checks = json.loads((case["run"] / "checks" / "checks.json").read_text())
    for check in ("event_time", "pretrend", "placebo_time", "comparison", "placebo_space"):
        st = checks[check]["status"]
        assert st in ("ok", "flag", "not applicable"), (name, check, checks[check]["reason"])
        assert checks[check]["reason"]
    # figures: the effect, event time, pre-trend band, comparison, placebo in space, sweep, cross-check
    for anchor in ("effect", "event-time", "pretrend", "comparison", "placebo", "sensitivity", "cross-check"):
        st = {"event-time": "event_time", "pretrend": "pretrend", "comparison": "comparison"}.get(anchor)
        if st and checks[st]["status"] == "not applicable":
            assert html.escape(checks[st]["reason"], quote=True)[:40] in secs[anchor]
            continue
        assert "<img " in secs[anchor], (name, anchor)
    assert "tight effect prior" in secs["sensitivity"]
    # every family fits the persistent (AR(1)) gap noise by default (8 periods, first start at index 5)
    # and says so: summary.json's gap-noise form, rho's posterior, and the report's sentence
    s = json.loads((case["run"] / "summary.json").read_text())
    assert s["model"]["gap_noise"]["over_time"] == "persistent" and not s["model"]["gap_noise"]["fallback"]
    assert -1 < s["persistence"]["rho"]["mean"] < 1
    assert html.escape(s["persistence"]["sentence"][:40], quote=True) in text


@pytest.mark.parametrize("name", MATRIX)
def test_raw_paths_adopter_effects_and_rank_plots(name, e2e_run):
    """The raw-data figure, the per-adopter figure (two adopters in every case) and rank plots exactly when
    the sampler diagnostics failed; the raw figure's numbers are the cell means the fit wrote."""
    import numpy as np
    import xarray as xr

    from bayesdid.report.reader import RunFolder

    case = e2e_run(name)
    run = case["run"]
    secs = sections((run / "report.html").read_text(encoding="utf-8"))
    assert "Each adopter&#x27;s observed path" in secs["data"] or "Each adopter's observed path" in secs["data"]
    assert "Effect in each adopting jurisdiction" in secs["effect"]
    ok = json.loads((run / "summary.json").read_text())["diagnostics"]["ok"]
    assert ("Rank plots of the worst-mixing quantities" in secs["diagnostics"]) is (not ok)
    folder = RunFolder(run)
    c = folder.cell_means()
    with xr.open_datatree(run / "posterior.nc", engine="h5netcdf") as tree:
        cm = tree["observed_data"]["cell_mean"].values
        n = tree["constant_data"]["n"].values
    assert np.array_equal(np.isnan(c["mean"]), n == 0)
    assert np.allclose(c["mean"][n > 0], cm[n > 0])
    assert int((c["start"] < len(c["periods"])).sum()) == 2 and len(c["jurisdictions"]) == 12
    ranks = folder.worst_mixing(3)
    assert len(ranks) == 3
    for r in ranks.values():  # a permutation of 0..S-1 over all chains' draws
        assert np.array_equal(np.sort(r.reshape(-1)), np.arange(r.size))


def test_the_report_opens_posterior_nc_once(e2e_run, monkeypatch):
    # the raw-data figure, the effect's density and (on failed diagnostics) the rank plots all read
    # posterior.nc; the report opens it once for all of them
    import xarray as xr

    run = e2e_run("gaussian_ddd")["run"]
    opened = []
    real = xr.open_datatree
    monkeypatch.setattr(xr, "open_datatree", lambda *a, **k: opened.append(a[0]) or real(*a, **k))
    text = render_report(run)
    assert "Each adopter" in text and opened == [run / "posterior.nc"]


@pytest.mark.parametrize("name", MATRIX)
def test_the_att_is_one_number_in_the_summary_the_posterior_file_and_the_checks(name, e2e_run):
    # summary.json's effect (effects.compute_effects), posterior.nc's `att` (run.py) and the real
    # effect of the placebo-in-space check (checks) come from one weight rule (effects.att_weights)
    import numpy as np
    import pandas as pd

    run = e2e_run(name)["run"]
    s = json.loads((run / "summary.json").read_text())
    with xr_open(run / "posterior.nc") as tree:
        att = np.asarray(tree["posterior"]["att"].values).reshape(-1)
    assert att.mean() == pytest.approx(s["effect"]["mean"], rel=1e-9, abs=1e-12)
    # the checks refit the main model (same settings and seed): two estimates of one posterior mean,
    # equal when the sampler repeats itself, else within 4 sd of their difference, sd sqrt(2 / ESS)
    ps = pd.read_csv(run / "checks" / "placebo_space.csv")
    real = ps.loc[ps["role"] == "real", "mean"]
    if len(real):
        ess = max(float(s["diagnostics"]["ess_bulk_min"]), 4.0)
        tol = 4 * s["effect"]["sd"] * (2 / ess) ** 0.5
        assert float(real.iloc[0]) == pytest.approx(s["effect"]["mean"], abs=tol)


def xr_open(path):
    import xarray as xr

    return xr.open_datatree(path, engine="h5netcdf")


@pytest.mark.parametrize("name", MATRIX)
def test_checks_sweep_and_run_carry_one_identity(name, e2e_run):
    run = e2e_run(name)["run"]
    s = json.loads((run / "summary.json").read_text())["identity"]
    m = json.loads((run / "manifest.json").read_text())
    c = json.loads((run / "checks" / "checks.json").read_text())["identity"]
    w = json.loads((run / "sweep" / "manifest.json").read_text())
    assert len(s["data_sha256"]) == 64 and len(s["run_id"]) == 16
    assert s == c == {"data_sha256": m["data_sha256"], "run_id": m["run_id"]}
    assert (w["base_data_sha256"], w["run_id"]) == (s["data_sha256"], s["run_id"])


def test_the_report_refuses_checks_from_other_data(e2e_run, tmp_path):
    a, b = e2e_run("gaussian_ddd"), e2e_run("gaussian_did")
    mixed = tmp_path / "mixed"
    shutil.copytree(a["run"], mixed)
    shutil.rmtree(mixed / "checks")
    shutil.copytree(b["run"] / "checks", mixed / "checks")
    code, out, err = quiet_main(["report", str(mixed)])
    assert code == 2
    err = " ".join(err.split())  # the message is wrapped to the terminal: where depends on the path's length
    assert "checks/checks.json" in err and "other data than the run" in err
    assert (
        not (mixed / "report.html").exists()
        or (mixed / "report.html").read_bytes() == (a["run"] / "report.html").read_bytes()
    )


def test_the_report_reads_a_table_by_its_declared_columns(e2e_run, tmp_path):
    run = tmp_path / "run"
    shutil.copytree(e2e_run("gaussian_ddd")["run"], run)
    (run / "checks" / "event_time.csv").write_text("k,estimate\n-1,0\n")
    secs = sections(render_report(run))
    assert "table &#x27;event_time&#x27; should have the columns" in secs["event-time"]
    assert "missing [&#x27;event_time&#x27;" in secs["event-time"]


def _effect_text(run_dir) -> str:
    return html.unescape(sections(render_report(run_dir))["effect"])


@pytest.mark.parametrize("name", MATRIX)
def test_the_natural_scale_caption_is_the_familys_and_two_probabilities_are_explained(name, e2e_run):
    from bayesdid.model.family import family_record

    case = e2e_run(name)
    rec = family_record(case["family"])
    text = _effect_text(case["run"])
    s = json.loads((case["run"] / "summary.json").read_text())
    # the natural-scale table is shown when it adds a measure to the effect table (not for a log outcome,
    # whose percent change is the effect table itself); its caption is then the family's
    headline = (s.get("effect_percent") or s["effect"])["measure"]
    shown = any(n["measure"] != headline for n in s["effect_natural"])
    assert ("On the natural scale" in text) == shown == ("effect_percent" not in s)
    assert (rec.natural_caption in text) == shown
    if rec.cell_model:  # a Gaussian model has no trials or exposure to average with
        assert "trials" not in text and "exposure" not in text
    ratio = next((n for n in s["effect_natural"] if n.get("no_effect") == 1.0), None)
    assert (ratio is not None) == rec.ratio_scale
    explained = "because the two average differently" in text
    if ratio is None:
        assert not explained
        return
    model_p, natural_p = f"{s['effect']['prob_gt_0']:.1%}", f"{ratio['prob_gt_1']:.1%}"
    assert explained == (model_p != natural_p)
    # the same run with the two probabilities apart (88% and 86%, as seen on a count DDD): explained
    # in one sentence naming both; with them equal as shown: no sentence
    for p_model, p_natural, expect in ((0.88, 0.86, True), (0.861, 0.8612, False)):
        s2 = json.loads(json.dumps(s))
        s2["effect"]["prob_gt_0"] = p_model
        next(n for n in s2["effect_natural"] if n.get("no_effect") == 1.0)["prob_gt_1"] = p_natural
        copy = case["run"].parent / f"two_probabilities_{p_model}"
        shutil.rmtree(copy, ignore_errors=True)
        shutil.copytree(case["run"], copy)
        (copy / "summary.json").write_text(json.dumps(s2), encoding="utf-8")
        t = _effect_text(copy)
        assert ("because the two average differently" in t) == expect
        if expect:
            assert f"{p_model:.1%} on the model scale and {p_natural:.1%} for the {ratio['measure']}" in t
        shutil.rmtree(copy)
