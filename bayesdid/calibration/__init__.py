"""Calibration of the intervals: frequentist coverage at a known truth, and simulation-based calibration.

Two studies, both on invented data from :mod:`bayesdid.simulate`-style generating processes:

Coverage (per scenario, ``reps`` data sets with one fixed effect ``tau``)
    Each rep simulates rows (``Scenario``), collapses them, fits the Gaussian model with the
    data-scaled default priors, and records for the ATT

        ATT = sum_j w_j tau[j],   w_j = treated target-group rows of adopter j / all treated target rows

    whether the equal-tailed 50%, 90% and 95% posterior intervals cover the true ATT, their widths
    and the error of the posterior mean. The least-squares cross-check (:func:`bayesdid.crosscheck.cross_check`)
    is run on the same cells with the true effect subtracted from the treated cells, so that each of
    its tests is a test of the *true* null: CR1 intervals estimate +- t_{G-1} se_CR1, the restricted
    wild cluster bootstrap (covered at level a when its p-value >= 1 - a, the test-inversion reading
    of its interval) and the placebo-in-space permutation test (same reading). Coverage is a share
    over reps with Monte Carlo standard error sqrt(p (1 - p) / N).

Simulation-based calibration (Talts et al. 2018)
    Each rep draws every parameter from the model's own prior (scales fixed once from a pilot data
    set of the scenario with :func:`bayesdid.model.terms.resolve_scales` defaults, and the prior
    location fixed with them), simulates cell statistics from the model (cell means
    Normal(mu_c, sigma_g^2 / n_c), within sums of squares sigma_g^2 chi^2_{n_c - 1}), fits, and takes
    the rank of the true tau and sigma_gap among L = 99 thinned posterior draws. Under a correct
    sampler and model code the ranks are uniform on 0..L; this is tested with a chi-square test over
    equal bins and shown as an ECDF-difference plot with simultaneous 95% bands (Säilynoja, Bürkner
    and Vehtari 2022, the simulation method for the band).

Parallel over reps: :func:`run_rep` is a module-level function of one picklable :class:`RepTask`,
so any executor can map it. :func:`make_executor` hands the reps to the sweep's executors
(:data:`bayesdid.sweep.EXECUTORS`): in-process, the local pool of spawned worker processes, or Dask
(a scheduler address, or "local"); each worker process compiles one model per structure and
re-samples the other reps through the cache in :mod:`bayesdid.sample`.

The code is split by concern: ``scenarios`` (the data-generating processes), ``tasks`` (levels, the
rep task), ``coverage`` (coverage reps), ``sbc`` (SBC reps and their prior), ``summary`` (tables,
the ECDF band and plot, the written folder) and ``runner`` (one rep, the executors, the study).
"""

from __future__ import annotations

from .runner import make_executor, run_calibration, run_rep
from .sbc import sbc_prior
from .scenarios import SCENARIOS, CalibrationScenario
from .summary import coverage_table, ecdf_band, plot_sbc, sbc_table, write_calibration
from .tasks import LEVELS, SBC_DRAWS, RepTask

__all__ = [
    "SCENARIOS",
    "CalibrationScenario",
    "RepTask",
    "run_rep",
    "make_executor",
    "run_calibration",
    "coverage_table",
    "sbc_table",
    "ecdf_band",
    "plot_sbc",
    "write_calibration",
    "LEVELS",
    "SBC_DRAWS",
    "sbc_prior",
]
