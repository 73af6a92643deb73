"""Shared fixtures. Compiled models are cached per process by bayesdid.sample, so fixtures that fit
the same model structure re-sample without a recompile; keep draws small.

The suite shares compiled models between its processes and runs through the compile cache in the
clone's ``.cache/bayesdid`` (git-ignored), unless BAYESDID_CACHE_DIR names another folder; it is set
here, before bayesdid (and so PyTensor and numba) is imported."""

from __future__ import annotations

import os
import warnings
from pathlib import Path

os.environ.setdefault("BAYESDID_CACHE_DIR", str(Path(__file__).resolve().parent.parent / ".cache" / "bayesdid"))

import numpy as np
import pandas as pd
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.simulate import Scenario, simulate

warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz_stats")


def sim_study(tmp_path_factory, sc: Scenario, data_seed: int, name: str, **kw):
    """Simulate, write the table, return (study, cells, frame, truth)."""
    frame, truth = simulate(sc, data_seed)
    d = tmp_path_factory.mktemp(name)
    path = d / "table.csv"
    frame.to_csv(path, index=False)
    ddd = sc.groups == 2
    study = make_study(table=path, outcome="y", jurisdiction="region", period="period",
                       group="group" if ddd else None, target_group="target" if ddd else None,
                       adopters=truth["starts"], **kw)
    return study, collapse(study, frame), frame, truth


@pytest.fixture(scope="session")
def organ_donations() -> pd.DataFrame:
    """causaldata package, data set organ_donations (Kessler and Roth 2014)."""
    from causaldata import organ_donations as od

    return od.load_pandas().data.copy()


@pytest.fixture
def rng():
    return np.random.default_rng(12345)


@pytest.fixture(scope="session")
def e2e_run(tmp_path_factory):
    """Build (once per session) the run folder of an end-to-end case with the real commands
    (tests/e2e_runs.py): ``e2e_run("poisson_ddd")`` -> dict with run, codes, logs, ..."""
    from e2e_runs import build_case

    root = tmp_path_factory.mktemp("e2e")
    built: dict = {}

    def get(name: str) -> dict:
        if name not in built:
            built[name] = build_case(name, root)
        return built[name]

    return get
