"""What every calibration rep shares: the levels and SBC settings, the picklable rep task, its sampler settings."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

#: Interval levels whose coverage is measured.
LEVELS = (0.5, 0.9, 0.95)
#: Number of thinned posterior draws the SBC rank is taken among (ranks run 0..SBC_DRAWS).
SBC_DRAWS = 99
#: Equal-width bins of the SBC chi-square test (SBC_DRAWS + 1 = 100 rank values, 10 per bin).
SBC_BINS = 10
#: Parameters whose SBC ranks are tested (rho only when the model has persistent gap noise).
SBC_PARAMETERS = ("tau", "sigma_gap", "rho", "omega")
#: Methods compared in the coverage study.
METHODS = ("posterior", "cr1", "wild", "permutation")


@dataclass(frozen=True)
class RepTask:
    """One rep: everything a worker needs (picklable)."""

    kind: str  # "coverage" or "sbc"
    scenario: str
    rep: int
    base_seed: int
    draws: int
    tune: int
    chains: int
    cross_check_draws: int = 999
    sbc_prior: dict = field(default_factory=dict)  # scales, location and sd, fixed for all SBC reps

    @property
    def seeds(self) -> tuple[int, int]:
        """(data seed, sampler seed), derived from the base seed, the kind and the rep index."""
        kind_code = 1 if self.kind == "coverage" else 2
        scen = sum(ord(c) for c in self.scenario)
        s = np.random.SeedSequence([int(self.base_seed), kind_code, scen, int(self.rep)]).generate_state(2)
        return int(s[0]), int(s[1] % (2**31 - 1))


def _settings(task: RepTask, seed: int):
    from ..study import SamplerSettings

    return SamplerSettings(chains=task.chains, draws=task.draws, tune=task.tune, seed=seed)


def _pct(a: float) -> str:
    return str(int(round(a * 100)))
