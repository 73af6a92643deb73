"""The headline's wording follows the evidence: clear effect, null effect, failed diagnostics."""

from __future__ import annotations

import pytest
from report_fixtures import fake_summary

from bayesdid.report.words import check_flags, evidence, headline


def test_clear_effect_states_direction_interval_and_probabilities():
    s = fake_summary("clear")
    assert evidence(s) == "clear"
    text = headline(s, outcome="emergency visits", policy="the cap")
    assert text == (
        "Across the two adopting jurisdictions the cap lowered emergency visits by 7% as a central "
        "estimate (90% interval 2% to 12% lower); the probability of any reduction is 98%, "
        "of a reduction larger than 5% is 74%."
    )
    assert "most likely" not in text  # the median is not a mode


def test_flagged_checks_reach_the_headline():
    s = fake_summary("clear")
    checks = {
        "pretrend": {"status": "flag", "reason": "drift"},
        "comparison": {"status": "flag", "reason": "x", "offenders": [{"jurisdiction": "Ambermoor"}]},
        "placebo_time": {"status": "ok", "reason": "fine"},
        "event_time": {"status": "failed", "reason": "KeyError"},
        "placebo_space": {"status": "ok", "reason": "r", "permutation_p": 0.077, "rank": 3, "n_placebos": 38},
    }
    text = headline(s, flags=check_flags(checks))
    caution = text[text.index("Caution: ") :]
    assert "pre-trend check" in caution and "Ambermoor" in caution
    assert "the event time check could not be completed" in caution
    assert "ranks 3 of 39 by size (permutation p = 0.077)" in caution
    assert "placebo in time" not in caution  # an ok check is not a caution
    # a parallel-trends breakdown below 1 is a caution; at 1 or above, or when not computed, it is not
    trend = {"status": "ok", "breakdown": {"M_zero": 0.62}}
    assert check_flags({}, None, trend) == [
        "the parallel-trends sensitivity breaks down at M = 0.62: a departure after the policy smaller than "
        "the largest change before it would put zero inside the 95% interval"
    ]
    assert "M = 0.62" in headline(s, flags=check_flags({}, None, trend))
    assert check_flags({}, None, {"status": "ok", "breakdown": {"M_zero": 1.4}}) == []
    assert check_flags({}, None, {"status": "not applicable", "breakdown": {"M_zero": 0.5}}) == []
    assert (
        check_flags(
            {"placebo_space": {"status": "ok", "reason": "r", "permutation_p": 0.02, "rank": 1, "n_placebos": 38}}
        )
        == []
    )


def test_null_effect_says_no_clear_effect_and_keeps_the_numbers():
    s = fake_summary("null")
    assert evidence(s) == "null"
    text = headline(s)
    assert "no clear effect" in text
    assert "lowered" not in text.split(":")[0]
    assert "90% interval from -6% to +4%, which includes no change" in text
    assert "the probability of any reduction is 62%" in text
    assert text.endswith("The direction of the effect is not settled by these data.")
    assert not text.startswith("NOT RELIABLE")


def test_failed_diagnostics_lead_with_not_reliable_and_the_reasons():
    s = fake_summary("failed")
    assert evidence(s) == "unreliable"
    text = headline(s)
    assert text.startswith("NOT RELIABLE: R-hat 1.080 >= 1.01 (worst: tau); 7 divergent transitions.")
    assert "rerun with more draws or chains" in text
    # the numbers still follow, so the reader sees what is being withheld
    assert "lowered the outcome by 7%" in text


def test_missing_diagnostics_count_as_unreliable():
    s = fake_summary("clear")
    del s["diagnostics"]
    assert evidence(s) == "unreliable"
    assert headline(s).startswith("NOT RELIABLE: no sampler diagnostics were recorded")


def test_failed_diagnostics_with_a_null_interval_do_not_claim_an_effect():
    s = fake_summary("null")
    s["diagnostics"] = fake_summary("failed")["diagnostics"]
    text = headline(s)
    assert text.startswith("NOT RELIABLE")
    assert "no clear effect" in text and "most likely lowered" not in text


def test_an_increase_reads_as_raised_with_the_probability_of_an_increase():
    s = fake_summary("clear")
    e = s["effect_percent"]
    e.update(
        median=0.07, eti_90=[0.02, 0.12], prob_gt_0=0.97, prob_lt_0=0.03, threshold=0.05, prob_beyond_threshold=0.7
    )
    text = headline(s)
    assert "raised the outcome by 7% as a central estimate (90% interval 2% to 12% higher)" in text
    assert "the probability of any increase is 97%, of an increase larger than 5% is 70%" in text


def test_one_adopter_is_named_and_certainty_is_never_rounded_to_100_percent():
    s = fake_summary("clear", adopters=("Norvale",))
    s["effect_percent"].update(prob_lt_0=0.9995, prob_beyond_threshold=0.996)
    text = headline(s)
    assert text.startswith("In the adopting jurisdiction, Norvale, the policy lowered")
    assert "100%" not in text
    assert "the probability of any reduction is over 99%" in text


@pytest.mark.parametrize("kind", ["clear", "null"])
def test_model_scale_outcomes_are_stated_in_outcome_units(kind):
    s = fake_summary(kind, percent=False)
    if kind == "null":
        s["effect"].update(median=-0.1, eti_90=[-0.6, 0.4])
    text = headline(s)
    assert "%" not in text.split(";")[0].replace("90% interval", "")
    assert "in the outcome's own units" in text
    assert ("no clear effect" in text) == (kind == "null")
    assert "(90% interval " in text


def test_count_outcome_headline_reads_the_rate_ratio_not_the_link_scale():
    """Counts: the sentence states the rate ratio over the treated cells as a percent change, its
    probabilities against a ratio of 1, and the rate difference; never the log-rate coefficient."""
    s = fake_summary("clear")
    s.pop("effect_percent", None)
    s["model"] = {"family": "poisson"}
    s["effect"] = {**s["effect"], "median": -0.1234, "eti_90": [-0.2, -0.05]}  # log rate ratio (link scale)
    s["effect_natural"] = [
        {
            "measure": "rate ratio",
            "median": 0.88,
            "eti_90": [0.81, 0.96],
            "prob_lt_1": 0.991,
            "prob_gt_1": 0.009,
            "threshold": 0.95,
            "prob_beyond_threshold": 0.80,
        },
        {"measure": "rate difference per 1,000 units of exposure", "median": -3.1, "eti_90": [-5.2, -0.9]},
    ]
    text = headline(s, outcome="emergency visits")
    assert "lowered the rate of emergency visits by 12% as a central estimate (90% interval 4% to 19% lower)" in text
    assert "the probability of any reduction is 99%, of a reduction larger than 5% is 80%" in text
    assert "rate ratio over the treated cells, 0.88" in text
    assert "rate difference per 1,000 units of exposure, -3.1 (90% interval -5.2 to -0.9)" in text
    assert "0.123" not in text and "own units" not in text


def test_the_study_wording_names_policy_outcome_unit_and_target(tmp_path):
    from bayesdid.errors import StudyError
    from bayesdid.report.words import headline_of
    from bayesdid.study import make_study, study_to_dict

    st = make_study(
        table="t.csv",
        outcome="oop_spend",
        jurisdiction="region",
        period="quarter",
        group="condition",
        target_group="chronic",
        adopters={"Norvale": 3},
        wording={
            "policy": "the copay cap",
            "outcome": "out-of-pocket spending",
            "target": "chronic-condition enrollees",
            "unit": "dollars",
        },
    )
    raw = study_to_dict(st)
    assert raw["wording"]["policy"] == "the copay cap"
    s = fake_summary("clear", percent=False)
    text = headline_of(s, raw)
    assert (
        "the copay cap lowered out-of-pocket spending of chronic-condition enrollees by 0.7 dollars as a "
        "central estimate"
    ) in text
    plain = headline_of(s, {"data": {"outcome": "oop_spend"}})
    assert "the policy lowered the outcome (oop_spend) by 0.7 (in the outcome's own units)" in plain
    with pytest.raises(StudyError, match=r"wording.outcome"):
        make_study(table="t.csv", outcome="y", jurisdiction="j", period="t", adopters={"a": 2}, wording={"outcome": 3})
    with pytest.raises(StudyError, match=r"unknown key"):
        make_study(
            table="t.csv", outcome="y", jurisdiction="j", period="t", adopters={"a": 2}, wording={"colour": "teal"}
        )
