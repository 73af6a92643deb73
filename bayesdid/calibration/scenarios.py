"""Calibration scenarios: the named data-generating processes and how each rep gets its rows and cells."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from ..errors import BayesDidError
from ..simulate import Scenario, simulate


@dataclass(frozen=True)
class CalibrationScenario:
    """A named data-generating process: the simulation scenario and what it is meant to show."""

    name: str
    scenario: Scenario
    about: str
    model_assumes: bool = True  # False: the noise departs from the model's assumptions
    #: "simulated" (the scenario's rows) or "castle_placebo" (the causaldata castle panel, its real
    #: adopters dropped, one random remaining state given a fake policy from a random year; truth 0)
    source: str = "simulated"


def _sc(**kw) -> Scenario:
    base = dict(
        jurisdictions=31,
        periods=8,
        groups=2,
        starts={0: 4},
        rows_per_cell=8.0,
        tau=-0.2,
        gap_sd=0.2,
        shock_sd=0.1,
        residual_sd=1.0,
    )
    base.update(kw)
    return Scenario(**base)


SCENARIOS: dict[str, CalibrationScenario] = {
    "one_adopter": CalibrationScenario(
        "one_adopter",
        _sc(),
        "DDD, one adopter and 30 comparison jurisdictions, 8 periods (start at the 5th), about 8 rows "
        "per cell, Gaussian structural gap noise sd 0.2 (larger than a cell mean's sampling error, "
        "1/sqrt(8) = 0.35, would suggest it is negligible), effect -0.2",
    ),
    "staggered": CalibrationScenario(
        "staggered",
        _sc(jurisdictions=33, starts={0: 3, 1: 4, 2: 5}),
        "DDD, three adopters starting in periods 4, 5 and 6, 30 comparison jurisdictions, otherwise as "
        "one_adopter; the same effect in every adopter",
    ),
    "did": CalibrationScenario(
        "did",
        _sc(groups=1),
        "DiD (no group split), one adopter and 30 comparison jurisdictions, otherwise as one_adopter",
    ),
    "heavy_tails": CalibrationScenario(
        "heavy_tails",
        _sc(gap_df=3.0),
        "as one_adopter, but the gap noise is Student t with 3 degrees of freedom (same sd 0.2), heavier-"
        "tailed than the model's Normal",
        model_assumes=False,
    ),
}


def _ar1(**kw) -> Scenario:
    """Persistent gap noise dominating the cells (as in the issue's table): 40 jurisdictions, 12 periods,
    one adopter from period 7, gap sd 0.2, about 400 rows per cell, effect -0.1."""
    base = dict(
        jurisdictions=40,
        periods=12,
        groups=2,
        starts={0: 6},
        rows_per_cell=400.0,
        tau=-0.1,
        gap_sd=0.2,
        shock_sd=0.1,
        residual_sd=1.0,
    )
    base.update(kw)
    return Scenario(**base)


SCENARIOS.update(
    {
        "ar1_ddd_0": CalibrationScenario(
            "ar1_ddd_0",
            _ar1(gap_rho=0.0),
            "DDD, 40 jurisdictions x 12 periods, one adopter from period 7, about 400 rows per cell, gap noise "
            "sd 0.2 independent over periods (rho 0), effect -0.1",
        ),
        "ar1_ddd_05": CalibrationScenario(
            "ar1_ddd_05", _ar1(gap_rho=0.5), "as ar1_ddd_0 with AR(1) gap noise, rho 0.5"
        ),
        "ar1_ddd_08": CalibrationScenario(
            "ar1_ddd_08", _ar1(gap_rho=0.8), "as ar1_ddd_0 with AR(1) gap noise, rho 0.8"
        ),
        "ar1_did_08": CalibrationScenario(
            "ar1_did_08",
            _ar1(groups=1, gap_rho=0.8),
            "DiD version of ar1_ddd_08 (jurisdiction-period noise AR(1), rho 0.8)",
        ),
        "ar1_staggered_08": CalibrationScenario(
            "ar1_staggered_08",
            _ar1(jurisdictions=42, starts={0: 5, 1: 6, 2: 7}, gap_rho=0.8),
            "as ar1_ddd_08 with three adopters starting in periods 6, 7 and 8",
        ),
        "one_row_did": CalibrationScenario(
            "one_row_did",
            Scenario(
                jurisdictions=50,
                periods=16,
                groups=1,
                starts={0: 8},
                rows_per_cell=1,
                fixed_cells=True,
                tau=-0.1,
                gap_sd=0.1,
                gap_rho=0.5,
                residual_sd=0.05,
            ),
            "DiD with one row per jurisdiction-period, as state-year data come: 50 jurisdictions, 16 periods, one "
            "adopter from period 9, AR(1) jurisdiction-period noise sd 0.1 with rho 0.5 plus row noise sd 0.05, effect -0.1",
        ),
        "castle_placebo": CalibrationScenario(
            "castle_placebo",
            Scenario(groups=1, tau=0.0),
            "placebo laws on the castle-doctrine state panel of the causaldata package (2000-2010, one row per "
            "state and year, outcome log homicide rate): the states that ever adopted are dropped, each rep gives "
            "one random remaining state a fake policy from a random year 2003-2009; the truth is no effect, so "
            "coverage is one minus the false-positive rate",
            source="castle_placebo",
        ),
    }
)


def castle_placebo_frame(seed: int):
    """(frame, truth) of one placebo-law rep on the castle panel (see the scenario's text)."""
    from causaldata import castle

    d = castle.load_pandas().data
    adopted = set(d.loc[d["post"] > 0, "sid"])
    keep = d[~d["sid"].isin(adopted)]
    rng = np.random.default_rng(seed)
    states = sorted(set(keep["sid"]))
    fake = int(rng.choice(states))
    year = int(rng.integers(2003, 2010))
    frame = pd.DataFrame(
        {
            "region": "S" + keep["sid"].astype(int).astype(str),
            "period": keep["year"].astype(int),
            "y": np.log(keep["homicide"].to_numpy(float)),
        }
    )
    return frame, {"tau": 0.0, "tau_adopter": {f"S{fake}": 0.0}, "starts": {f"S{fake}": year}}


def _scenario(name: str) -> CalibrationScenario:
    if name not in SCENARIOS:
        raise BayesDidError(f"calibration scenario '{name}' is unknown; choose one of {sorted(SCENARIOS)}.")
    return SCENARIOS[name]


def _frame_of(cs: CalibrationScenario, seed: int):
    if cs.source == "castle_placebo":
        return castle_placebo_frame(seed)
    return simulate(cs.scenario, seed)


def _cells_of(frame, sc: Scenario, truth: dict):
    from ..cells import collapse_frame
    from ..study import make_study

    ddd = sc.groups == 2
    study = make_study(
        table="invented.csv",
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
    )
    return collapse_frame(study, frame)
