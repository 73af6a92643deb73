"""Seeded generator of the invented demo cases: writes each case's table, study file and truth.

Run from the repository root: ``python case_files/make_cases.py`` (``bayesdid demo`` calls it when a
table is missing). Every place name, number and scenario here is invented.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from bayesdid.simulate import Scenario, region_names, simulate  # noqa: E402

QUARTERS = [f"{y}Q{q}" for y in (2023, 2024, 2025) for q in (1, 2, 3, 4)]

COPAY_STUDY = """\
# Invented scenario: in two of forty regions of the fictional Republic of Valmora, a monthly copay
# cap on maintenance drugs took effect for enrollees with a chronic condition (the target group);
# enrollees without one (the reference group) were not affected. Outcome: out-of-pocket spending per
# enrollee-quarter, analysed on the log scale, so effects read as percent changes.
title = "Valmora copay cap for chronic-condition enrollees"

[data]
table = "enrollees.csv"
outcome = "oop_spend"
jurisdiction = "region"
period = "quarter"
group = "condition"

[policy]
target_group = "chronic"
adopters = {{ "Norvale" = "{s1}", "Kestrel Bay" = "{s2}" }}

[model]
log_outcome = true

[sampler]
chains = 2
draws = 2000   # the gap-noise spread mixes slowly with persistent gap noise (bulk ESS about 20% of draws)
tune = 1000
seed = 4242

[decision]
threshold = -0.05   # a cut of more than 5% is the level the ministry called meaningful

[wording]           # how the report and the headline name things
policy = "the copay cap"
outcome = "out-of-pocket spending"
unit = "dollars per enrollee-quarter"
target = "chronic-condition enrollees"
"""


def make_copay_cap(out: Path = HERE / "copay_cap", seed: int = 20261202) -> dict:
    names = region_names(40)
    sc = Scenario(
        jurisdictions=40,
        periods=12,
        groups=2,
        starts={0: 6, 1: 8},
        rows_per_cell=45.0,
        tau=-0.13,
        tau_spread=0.02,
        intercept=(3.6, 4.3),
        baseline_sd=0.25,
        period_sd=0.05,
        shock_sd=0.06,
        group_period_sd=0.03,
        gap_sd=0.04,
        residual_sd=0.8,
    )
    frame, truth = simulate(sc, seed, names=names)
    frame = frame.rename(columns={"y": "log_spend", "group": "condition"})
    frame["condition"] = np.where(frame["condition"] == "target", "chronic", "none")
    frame["quarter"] = np.asarray(QUARTERS, dtype=object)[frame["period"].to_numpy() - 1]
    frame["oop_spend"] = np.round(np.exp(frame["log_spend"]), 2)
    frame = frame[["region", "quarter", "condition", "oop_spend"]]
    out.mkdir(parents=True, exist_ok=True)
    frame.to_csv(out / "enrollees.csv", index=False)
    starts = {k: QUARTERS[v - 1] for k, v in truth["starts"].items()}
    (out / "study.toml").write_text(COPAY_STUDY.format(s1=starts["Norvale"], s2=starts["Kestrel Bay"]))
    truth = {
        "effect_log": truth["tau"],
        "effect_percent": float(np.expm1(truth["tau"])),
        "per_adopter_log": truth["tau_adopter"],
        "starts": starts,
        "rows": truth["rows"],
        "seed": seed,
        "note": "values the generator used; the demo fit should recover them",
    }
    (out / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")
    return truth


NURSE_STUDY = """\
# Invented scenario: in two of twenty-four regions of the fictional Republic of Valmora, a free
# after-hours nurse advice line opened for enrollees aged 65 and over (the target group); younger
# adult enrollees (the reference group) could not use it. Outcome: emergency department visits per
# region, quarter, age band, sex and risk band, with enrollee-quarters as exposure, so effects read
# as rate ratios and visits averted per 1,000 enrollee-quarters. Sex and a three-level risk band
# adjust for who is enrolled in each region and quarter.
title = "Valmora nurse advice line and emergency visits of older enrollees"

[data]
table = "visits.csv"
outcome = "ed_visits"
jurisdiction = "region"
period = "quarter"
group = "age_band"
exposure = "enrolled_quarters"

[policy]
target_group = "65+"
adopters = {{ "Norvale" = "{s1}", "Kestrel Bay" = "{s2}" }}

[model]
family = "poisson"
covariates = "C(sex) + C(risk_band)"

[sampler]
chains = 2
draws = 3000   # the spread of shocks shared by the groups mixes slowly (bulk ESS about 10% of draws)
tune = 1000
seed = 5151

[decision]
threshold = -0.10   # a rate cut of more than 10% is what the health board called worth the cost

[wording]
policy = "the nurse advice line"
outcome = "emergency visits"
unit = "visits per enrolled quarter"
target = "enrollees aged 65 and over"
"""


def make_nurse_line(out: Path = HERE / "nurse_line", seed: int = 20261203) -> dict:
    from bayesdid.simulate_families import CountScenario, simulate_family

    names = region_names(24)
    sc = CountScenario(
        family="poisson",
        jurisdictions=24,
        periods=8,
        groups=2,
        starts={0: 4, 1: 5},
        rows_per_cell=150,
        tau=-0.18,
        level=(-2.2, -1.5),
        baseline_sd=0.25,
        period_sd=0.06,
        shock_sd=0.05,
        group_period_sd=0.03,
        gap_sd=0.04,
        theta=(0.15, 0.45, 1.0),
        exposure=(0.25, 1.0),
    )
    frame, truth = simulate_family(sc, seed, names=names)
    quarters = QUARTERS[:8]
    frame["quarter"] = np.asarray(quarters, dtype=object)[frame["period"].to_numpy() - 1]
    frame["age_band"] = np.where(frame["group"] == "target", "65+", "18-64")
    frame = frame.rename(columns={"y": "ed_visits", "exposure": "enrolled_quarters", "risk": "risk_band"})
    # The health board publishes counts per region, quarter, age band, sex and risk band: aggregate the
    # enrollee rows (the exact collapse makes this the same likelihood as the enrollee-level table).
    keys = ["region", "quarter", "age_band", "sex", "risk_band"]
    frame = frame.groupby(keys, as_index=False, sort=True)[["enrolled_quarters", "ed_visits"]].sum()
    frame["enrolled_quarters"] = frame["enrolled_quarters"].round(2)
    frame["ed_visits"] = frame["ed_visits"].astype(int)
    frame = frame[keys + ["enrolled_quarters", "ed_visits"]]
    out.mkdir(parents=True, exist_ok=True)
    frame.to_csv(out / "visits.csv", index=False)
    starts = {k: quarters[v - 1] for k, v in truth["starts"].items()}
    (out / "study.toml").write_text(NURSE_STUDY.format(s1=starts["Norvale"], s2=starts["Kestrel Bay"]))
    truth = {
        "effect_log_rate": truth["tau"],
        "rate_ratio_treated_cells": truth["rate_ratio"],
        "rate_difference_per_1000_treated_cells": truth["rate_difference_per_1000"],
        "starts": starts,
        "rows": truth["rows"],
        "seed": seed,
        "note": "values the generator used (table aggregated per region, quarter, age band, sex and "
        "risk band; exposure rounded to 2 decimals); "
        "the demo fit should recover them",
    }
    (out / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")
    return truth


CASES = {"copay_cap": make_copay_cap, "nurse_line": make_nurse_line}


def make(name: str) -> dict:
    return CASES[name]()


if __name__ == "__main__":
    for name in sys.argv[1:] or list(CASES):
        print(name, make(name))
