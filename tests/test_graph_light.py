"""The models are built without PyMC's parameter checks (``check_bounds=False``): every parameter the
checks guarded is positive by construction (half-normal scales are sampled on the log scale, prior scales
are validated positive by the study), so the checks only cost graph nodes and compile time. The log
density must be the same as with the checks, at any point: evaluated here in PyTensor's Python mode
(no compile) at random points of the unconstrained space, for the Gaussian and the Poisson demo
models and the event-time model."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pymc as pm
import pytest

from bayesdid.model.registry import build_model
from bayesdid.model.terms import event_times_of, resolve_scales
from bayesdid.run import prepare
from bayesdid.study import load_study

CASES = Path(__file__).resolve().parent.parent / "case_files"


@pytest.mark.parametrize("case,effects", [("copay_cap", "att"), ("nurse_line", "att"), ("copay_cap", "event_time")])
def test_log_density_equals_the_checked_one(case, effects, monkeypatch):
    study = load_study(CASES / case / "study.toml")
    cells, _, _ = prepare(study)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    terms = {} if effects == "att" else {"effects": "event_time", "event_times": event_times_of(cells)}
    light, _ = build_model(cells, scales, study.model.family, **terms)
    assert light.check_bounds is False
    orig = pm.Model.__init__

    def checked(self, *a, **k):
        k["check_bounds"] = True
        orig(self, *a, **k)

    monkeypatch.setattr(pm.Model, "__init__", checked)
    full, _ = build_model(cells, scales, study.model.family, **terms)
    assert full.check_bounds is True
    f_light = light.compile_logp(mode="FAST_COMPILE")
    f_full = full.compile_logp(mode="FAST_COMPILE")
    rng = np.random.default_rng(7)
    ip = light.initial_point(random_seed=1)
    for _ in range(3):
        point = {k: v + rng.normal(0, 0.3, size=np.shape(v)) for k, v in ip.items()}
        a, b = f_light(point), f_full(point)
        assert np.isfinite(a) and a == pytest.approx(b, rel=1e-12, abs=1e-9)
