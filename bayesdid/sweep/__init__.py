"""Batch sweeps: a base study plus variants, run in-process, on a local process pool or on Dask.

The sweep file (TOML) names a base study and the variants to run against it::

    study = "../copay_cap/study.toml"   # base study, relative to this file
    combine = "one_at_a_time"           # or "grid": every combination of the axes below

    [sampler]                           # applied to every variant (chains, draws, tune, seed)
    draws = 500

    [priors]                            # a grid over prior scales: each key a list of scales
    effect = [0.05, 0.5]
    gap_noise = [0.1, 0.3]

    [comparisons]                       # comparison jurisdictions left out of the likelihood
    leave_each_out = true
    drop = [["Aldmoor", "Brisk Hollow"]]

    [covariates]
    formulas = ["", "age"]              # "" = no covariates

    [outcomes]
    columns = ["oop_spend"]

    [[options]]                         # model options of one variant each
    log_outcome = false

    [[variant]]                         # hand-written variants (placebo assignments, anything)
    label = "placebo: Ormsby from 2024Q1"
    policy = { adopters = { "Ormsby" = "2024Q1" } }

With ``combine = "one_at_a_time"`` (the default) each axis varies alone around the base study (the
points of the prior grid are one axis); ``"grid"`` crosses every axis. The base study itself is
always the first variant, labelled ``base``.

Each variant gets a stable id, the first 12 hex digits of the SHA-256 of its resolved study (in
study-file layout), its dropped jurisdictions, the base seed, the data file's SHA-256 and the
bayesdid version; its sampler seed derives from the base seed and that content hash. Variants that
share a model structure share one compiled model per worker (the cache in :mod:`bayesdid.sample`);
leaving comparison jurisdictions out gives their jurisdiction-periods weight 0 in the likelihood,
so the structure does not change.

Results in ``DIR``::

    variants/<id>/        one run folder per variant (posterior.nc, summary.json, manifest.json,
                          variant.json), written under .staging/ and renamed into place when complete
    summary.csv           one row per variant (see :data:`SUMMARY_COLUMNS`)
    manifest.json         versions, the sweep file and its hash, the base study, the executor, every
                          variant with its status, seed, folder or error, compiles per worker
    verdict.json          :func:`verdict` of the finished variants (read by the HTML report)

A rerun skips every variant whose folder is complete (variant.json names the id, the JSON files
load, posterior.nc opens) and runs only the missing, broken or failed ones. A failing variant is
recorded with its error and does not stop the others.

The code is split by concern: ``spec`` (the sweep file and its variants), ``worker`` (one variant),
``executors`` (serial, process pool, Dask), ``tables`` (summary row, tables, manifest, verdict),
``resume`` (complete folders, the lock, the --out check) and ``runner`` (:func:`run_sweep`).
"""

from __future__ import annotations

from .executors import EXECUTORS
from .resume import check_sweep_folder, read_results, variant_is_complete
from .runner import run_sweep
from .spec import SweepPlan, Variant, derived_seed, load_sweep, variant_id
from .tables import SUMMARY_COLUMNS, verdict
from .worker import run_variant

__all__ = [
    "Variant",
    "SweepPlan",
    "load_sweep",
    "run_sweep",
    "verdict",
    "SUMMARY_COLUMNS",
    "variant_is_complete",
    "read_results",
    "check_sweep_folder",
    "EXECUTORS",
    "run_variant",
    "variant_id",
    "derived_seed",
]
