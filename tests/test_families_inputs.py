"""Bad inputs of binary, count and covariate studies: a clear error, exit code 2, nothing written.

Every case fails in the table checks or the collapse, before any model is compiled.
"""

from __future__ import annotations

import numpy as np
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.cli import main
from bayesdid.simulate_families import CountScenario, simulate_family


@pytest.fixture(scope="module")
def counts_frame():
    frame, truth = simulate_family(
        CountScenario(family="poisson", jurisdictions=6, periods=4, starts={0: 2}, rows_per_cell=6), 3
    )
    return frame, truth


@pytest.fixture(scope="module")
def binary_frame():
    frame, truth = simulate_family(
        CountScenario(family="binomial", jurisdictions=6, periods=4, starts={0: 2}, rows_per_cell=6), 4
    )
    return frame, truth


def _write(tmp_path, frame, truth, family, extra_data="", model_extra=""):
    frame.to_csv(tmp_path / "t.csv", index=False)
    starts = ", ".join(f'"{k}" = {v}' for k, v in truth["starts"].items())
    (tmp_path / "s.toml").write_text(f"""
[data]
table = "t.csv"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "group"
{extra_data}

[policy]
target_group = "target"
adopters = {{ {starts} }}

[model]
family = "{family}"
{model_extra}
""")
    return tmp_path / "s.toml"


def _fails(tmp_path, capsys, path, match):
    out = tmp_path / "run"
    code = main(["fit", str(path), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2, err
    assert not out.exists(), "no partial output on bad input"
    flat = " ".join(err.split())
    assert match in flat, flat
    return flat


def test_binary_outcome_not_zero_one(tmp_path, capsys, binary_frame):
    f, truth = binary_frame
    f = f.copy()
    f.loc[[3, 8], "y"] = 2
    msg = _fails(tmp_path, capsys, _write(tmp_path, f, truth, "binomial"), "must be 0 or 1 for family 'binomial'")
    assert "2 row(s) (table lines 5, 10)" in msg


@pytest.mark.parametrize("value, match", [(-1, "are negative"), (1.5, "are not whole numbers")])
def test_negative_or_fractional_counts(tmp_path, capsys, counts_frame, value, match):
    f, truth = counts_frame
    f = f.copy()
    f.loc[5, "y"] = value
    _fails(tmp_path, capsys, _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"'), match)


@pytest.mark.parametrize(
    "value, match", [(0.0, "zero or negative"), (-2.0, "zero or negative"), (np.nan, "missing or infinite")]
)
def test_bad_exposure(tmp_path, capsys, counts_frame, value, match):
    f, truth = counts_frame
    f = f.copy()
    f.loc[7, "exposure"] = value
    msg = _fails(tmp_path, capsys, _write(tmp_path, f, truth, "negbinomial", 'exposure = "exposure"'), match)
    assert "exposure column 'exposure'" in msg and "table lines 9" in msg


def test_trials_below_successes(tmp_path, capsys, binary_frame):
    f, truth = binary_frame
    f = f.copy()
    f["trials"] = 3
    f["y"] = 1
    f.loc[4, "y"] = 4
    msg = _fails(
        tmp_path, capsys, _write(tmp_path, f, truth, "binomial", 'trials = "trials"'), "is below the successes"
    )
    assert "first: 4 successes of 3 trials" in msg


def test_constant_covariate(tmp_path, capsys, counts_frame):
    f, truth = counts_frame
    f = f.copy()
    f["plan"] = 7.0
    _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "plan + C(sex)"'),
        "covariate column 'plan'",
    )


def test_covariate_collinear_with_fixed_structure(tmp_path, capsys, counts_frame):
    """A region-level attribute is absorbed by the jurisdiction x group effects."""
    f, truth = counts_frame
    f = f.copy()
    zone = {r: ("coast" if i % 2 else "inland") for i, r in enumerate(sorted(f["region"].unique()))}
    f["zone"] = f["region"].map(zone)
    _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "C(sex) + C(zone)"'),
        "covariate column 'C(zone)[T.inland]' (from 'model.covariates') is collinear with the fixed structure",
    )


def test_covariate_collinear_with_another(tmp_path, capsys, counts_frame):
    f, truth = counts_frame
    f = f.copy()
    f["male"] = (f["sex"] == "male").astype(float)
    _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "C(sex) + male"'),
        "covariate column 'male' (from 'model.covariates') is collinear with the earlier covariate(s)",
    )


def test_missing_covariate_values_error_then_drop(tmp_path, capsys, counts_frame):
    f, truth = counts_frame
    f = f.copy()
    f["age"] = np.random.default_rng(1).integers(20, 80, len(f)).astype(float)
    f.loc[[2, 11, 12], "age"] = np.nan
    msg = _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "age + C(sex)"'),
        "covariate column 'age' has 3 missing",
    )
    assert 'model.missing = "drop"' in msg
    study = make_study(
        table=tmp_path / "t.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        family="poisson",
        exposure="exposure",
        covariates="age + C(sex)",
        missing="drop",
    )
    cells = collapse(study, f)
    assert cells.rows == len(f) - 3
    assert cells.extra["dropped_rows"]["count"] == 3
    assert cells.extra["dropped_rows"]["by_column"] == {"age": 3}
    # exposure of the kept rows only
    assert cells.n.sum() == pytest.approx(f["exposure"].drop(index=[2, 11, 12]).sum())


def test_unknown_formula_column_and_bad_formula(tmp_path, capsys, counts_frame):
    f, truth = counts_frame
    _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "C(sex) + height"'),
        "['height'] named in the study are not in the table",
    )
    _fails(
        tmp_path,
        capsys,
        _write(tmp_path, f, truth, "poisson", 'exposure = "exposure"', 'covariates = "C(sex) +"'),
        "is not a formula formulaic can read",
    )


def test_continuous_covariate_falls_back_to_rows(counts_frame):
    from bayesdid.errors import RowLevelFallbackWarning

    f, truth = counts_frame
    f = f.copy()
    f["score"] = np.random.default_rng(2).standard_normal(len(f))
    study = make_study(
        table="t.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        family="poisson",
        exposure="exposure",
        covariates="score + C(sex)",
    )
    with pytest.warns(RowLevelFallbackWarning, match="cannot be collapsed exactly"):
        cells = collapse(study, f)
    assert len(cells.extra["records"]["y"]) == len(f)
    assert cells.extra["likelihood"].startswith("row-level")
