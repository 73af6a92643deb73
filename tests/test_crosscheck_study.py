"""The [crosscheck] section of the study file, and the command line's --no-cross-check."""

from __future__ import annotations

import json
import textwrap

import pytest

from bayesdid.errors import StudyError
from bayesdid.study import CrossCheckSettings, load_study, make_study, study_to_dict

BASE = textwrap.dedent("""\
    title = "Invented: Brindlecombe clinic fee waiver"
    [data]
    table = "rows.csv"
    outcome = "visits"
    jurisdiction = "district"
    period = "month"
    [policy]
    adopters = { "Brindlecombe" = 4 }
    """)


def write(tmp_path, extra=""):
    p = tmp_path / "study.toml"
    p.write_text(BASE + extra, encoding="utf-8")
    return p


def test_defaults_when_the_section_is_absent(tmp_path):
    s = load_study(write(tmp_path))
    assert s.crosscheck == CrossCheckSettings()
    assert (s.crosscheck.draws, s.crosscheck.weights) == (999, "webb")


def test_section_is_read_and_round_trips(tmp_path):
    s = load_study(write(tmp_path, '[crosscheck]\nseed = 11\ndraws = 4999\nweights = "rademacher"\nplacebos = 50\n'))
    assert s.crosscheck == CrossCheckSettings(seed=11, draws=4999, weights="rademacher", placebos=50)
    assert study_to_dict(s)["crosscheck"] == {"seed": 11, "draws": 4999, "weights": "rademacher", "placebos": 50}
    m = make_study(
        table="rows.csv",
        outcome="visits",
        jurisdiction="district",
        period="month",
        adopters={"Brindlecombe": 4},
        crosscheck={"seed": 11, "draws": 4999, "weights": "rademacher", "placebos": 50},
    )
    assert m.crosscheck == s.crosscheck


@pytest.mark.parametrize(
    "extra, match",
    [
        (
            "[crosscheck]\nreps = 9\n",
            r"unknown key\(s\) \['reps'\] in \[crosscheck\]; allowed keys are "
            r"\['draws', 'placebos', 'seed', 'weights'\]",
        ),
        (
            '[crosscheck]\nweights = "mammen"\n',
            r"study key 'crosscheck.weights': expected one of \['webb', 'rademacher'\]",
        ),
        ("[crosscheck]\ndraws = 5\n", r"study key 'crosscheck.draws': expected an integer of at least 19, found 5"),
        ("[crosscheck]\nseed = -1\n", r"study key 'crosscheck.seed': expected an integer of at least 0"),
        ("[crosscheck]\ndraws = 99.5\n", r"study key 'crosscheck.draws': expected an integer"),
    ],
)
def test_bad_settings_name_the_key(tmp_path, extra, match):
    with pytest.raises(StudyError, match=match):
        load_study(write(tmp_path, extra))


def test_replace_is_validated(tmp_path):
    s = load_study(write(tmp_path))
    assert s.replace(crosscheck={"draws": 199}).crosscheck.draws == 199
    with pytest.raises(StudyError, match="crosscheck.weights"):
        s.replace(crosscheck={"weights": "normal"})


def test_fit_parser_has_no_cross_check_flag():
    from bayesdid.cli import build_parser

    args = build_parser().parse_args(["fit", "s.toml", "--out", "o", "--no-cross-check"])
    assert args.no_cross_check is True
    assert build_parser().parse_args(["fit", "s.toml", "--out", "o"]).no_cross_check is False


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore::bayesdid.errors.DiagnosticsWarning")  # tiny draws on purpose
def test_fit_fills_least_squares_and_no_cross_check_skips_the_costly_parts(tmp_path):
    """End to end on the invented copay_cap demo case with tiny draws (one compile, shared)."""
    from bayesdid.cli import case_dir, main

    study = case_dir("copay_cap") / "study.toml"
    common = ["--draws", "60", "--tune", "60", "--chains", "1", "--quiet"]
    assert main(["fit", str(study), "--out", str(tmp_path / "full"), *common]) == 0
    assert main(["fit", str(study), "--out", str(tmp_path / "quick"), "--no-cross-check", *common]) == 0
    full = json.loads((tmp_path / "full" / "summary.json").read_text())["least_squares"]
    quick = json.loads((tmp_path / "quick" / "summary.json").read_text())["least_squares"]
    for k in (
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
        "advice",
    ):
        assert k in full and k in quick
    assert full["treated_clusters"] == 2 and full["clusters"] == 40
    assert 0 < full["p_wild"] <= 1 and 0 < full["p_permutation"] <= 1
    assert quick["p_wild"] is None and quick["p_permutation"] is None
    assert quick["estimate"] == full["estimate"] and quick["se_cr1"] == full["se_cr1"]
    assert "unreliable" in full["advice"]
