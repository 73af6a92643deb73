"""The headline's wording follows the evidence: clear effect, null effect, failed diagnostics."""

from __future__ import annotations

import pytest
from report_fixtures import fake_summary

from bayesdid.report.words import evidence, headline


def test_clear_effect_states_direction_interval_and_probabilities():
    s = fake_summary("clear")
    assert evidence(s) == "clear"
    text = headline(s, outcome="emergency visits", policy="the cap")
    assert text == ("Across the two adopting jurisdictions the cap most likely lowered emergency visits by 7% "
                    "(90% interval 2% to 12% lower); the probability of any reduction is 98%, of a reduction "
                    "larger than 5% is 74%.")


def test_null_effect_says_no_clear_effect_and_keeps_the_numbers():
    s = fake_summary("null")
    assert evidence(s) == "null"
    text = headline(s)
    assert "no clear effect" in text
    assert "most likely lowered" not in text
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
    e.update(median=0.07, eti_90=[0.02, 0.12], prob_gt_0=0.97, prob_lt_0=0.03, threshold=0.05,
             prob_beyond_threshold=0.7)
    text = headline(s)
    assert "most likely raised the outcome by 7% (90% interval 2% to 12% higher)" in text
    assert "the probability of any increase is 97%, of an increase larger than 5% is 70%" in text


def test_one_adopter_is_named_and_certainty_is_never_rounded_to_100_percent():
    s = fake_summary("clear", adopters=("Norvale",))
    s["effect_percent"].update(prob_lt_0=0.9995, prob_beyond_threshold=0.996)
    text = headline(s)
    assert text.startswith("In the adopting jurisdiction, Norvale, the policy most likely lowered")
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
        {"measure": "rate ratio", "median": 0.88, "eti_90": [0.81, 0.96], "prob_lt_1": 0.991, "prob_gt_1": 0.009,
         "threshold": 0.95, "prob_beyond_threshold": 0.80},
        {"measure": "rate difference per 1,000 units of exposure", "median": -3.1, "eti_90": [-5.2, -0.9]},
    ]
    text = headline(s, outcome="emergency visits")
    assert "most likely lowered the rate of emergency visits by 12% (90% interval 4% to 19% lower)" in text
    assert "the probability of any reduction is 99%, of a reduction larger than 5% is 80%" in text
    assert "rate ratio over the treated cells, 0.88" in text
    assert "rate difference per 1,000 units of exposure, -3.1 (90% interval -5.2 to -0.9)" in text
    assert "0.123" not in text and "own units" not in text
