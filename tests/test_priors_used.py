"""Only the priors a model has: the registry checked against the PyMC graph itself, the summary lists
only those, and a sweep over a prior the model lacks is refused (exit 2, nothing written)."""

from __future__ import annotations

import warnings

import pytest
from pytensor.graph.traversal import ancestors

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.cli import main
from bayesdid.model.registry import build_model, model_priors
from bayesdid.model.terms import resolve_scales
from bayesdid.simulate import Scenario, simulate
from bayesdid.simulate_families import CountScenario, simulate_family
from bayesdid.study import PRIOR_NAMES


def _cells(family, groups, adopters, covariates, rows=6, drift=False):
    starts = {0: 4, 1: 5} if adopters == 2 else {0: 4}
    if family == "gaussian":
        frame, truth = simulate(
            Scenario(jurisdictions=8, periods=6, groups=groups, starts=starts, rows_per_cell=rows, fixed_cells=True), 1
        )
        if covariates:
            frame["age"] = (frame.index % 7).astype(float)
    else:
        frame, truth = simulate_family(
            CountScenario(
                family=family,
                jurisdictions=8,
                periods=6,
                groups=groups,
                starts=starts,
                rows_per_cell=10,
                covariates=covariates,
            ),
            1,
        )
    study = make_study(
        table="x.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if groups == 2 else None,
        target_group="target" if groups == 2 else None,
        adopters=truth["starts"],
        family=family,
        exposure="exposure" if family in ("poisson", "negbinomial") else None,
        covariates=("age" if family == "gaussian" else "C(sex)") if covariates else None,
    )
    if drift:
        study = study.replace(model={"gap_drift": True})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return collapse(study, frame), study


CASES = [
    ("gaussian", 2, 2, False, 6, False),
    ("gaussian", 1, 1, False, 6, False),
    ("gaussian", 2, 1, True, 6, False),
    ("gaussian", 2, 2, False, 1, False),
    ("gaussian", 1, 2, False, 6, True),
    ("binomial", 2, 2, False, 6, False),
    ("poisson", 1, 2, True, 6, False),
    ("negbinomial", 2, 1, False, 6, False),
    ("negbinomial", 1, 1, False, 6, False),
]


@pytest.mark.parametrize("family,groups,adopters,covariates,rows,drift", CASES)
def test_registry_names_exactly_the_priors_the_graph_reads(family, groups, adopters, covariates, rows, drift):
    cells, study = _cells(family, groups, adopters, covariates, rows, drift)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    model, spec = build_model(cells, scales, family)
    logp = model.logp()
    used = {
        v.name.removeprefix("prior_")
        for v in ancestors([logp])
        if getattr(v, "name", None) and v.name.startswith("prior_")
    }
    has = model_priors(family, cells.design, len(cells.adopters), covariates, drift=spec.drift, residual=spec.residual)
    assert set(has) == used & set(PRIOR_NAMES)


def test_a_sweep_over_a_prior_the_model_lacks_is_refused(tmp_path, capsys):
    frame, truth = simulate(Scenario(jurisdictions=8, periods=6, groups=1, starts={0: 4}, rows_per_cell=6), 1)
    frame.to_csv(tmp_path / "t.csv", index=False)
    (tmp_path / "study.toml").write_text(
        '[data]\ntable = "t.csv"\noutcome = "y"\njurisdiction = "region"\nperiod = "period"\n'
        f'[policy]\nadopters = {{ "{next(iter(truth["starts"]))}" = {next(iter(truth["starts"].values()))} }}\n'
    )
    (tmp_path / "sweep.toml").write_text('study = "study.toml"\n[priors]\nshock_spread = [0.1, 0.5]\n')
    out = tmp_path / "out"
    assert main(["sweep", str(tmp_path / "sweep.toml"), "--out", str(out), "--serial"]) == 2
    err = capsys.readouterr().err
    assert "['shock_spread']" in err and "does not have" in err and "DiD" in err
    assert not out.exists()
