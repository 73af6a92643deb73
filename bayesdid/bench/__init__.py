"""Benchmarks: ``bayesdid bench NAME`` prints one JSON line of figures measured in one run.

Each benchmark lives in its own module of this package and registers under a name in
:data:`REGISTRY` (module path, function name). Speed targets are ratios measured in the same run,
never absolute times in unit tests: this machine is shared and noisy.
"""

from __future__ import annotations

import importlib

__all__ = ["REGISTRY", "run"]

REGISTRY = {
    "collapse": ("bayesdid.bench.collapse", "bench_collapse"),
    "crosscheck": ("bayesdid.bench.crosscheck", "bench_crosscheck"),
    "families": ("bayesdid.bench.families", "bench_families"),
    "placebo": ("bayesdid.bench.placebo", "bench_placebo"),
    "sweep": ("bayesdid.bench.sweep", "bench_sweep"),
    "calibration": ("bayesdid.bench.calibration", "bench_calibration"),
    "weights": ("bayesdid.bench.weights", "bench_weights"),
    "persistence": ("bayesdid.bench.persistence", "bench_persistence"),
    "panel": ("bayesdid.bench.panel", "bench_panel"),
    "plan": ("bayesdid.bench.plan", "bench_plan"),
    "compile": ("bayesdid.bench.compile", "bench_compile"),
    "analyze": ("bayesdid.bench.analyze", "bench_analyze"),
}


def run(name: str, *, quick: bool = False, **kwargs) -> dict:
    from ..errors import BayesDidError

    if name not in REGISTRY:
        raise BayesDidError(f"unknown benchmark '{name}'; choose one of {sorted(REGISTRY)}.")
    mod, fn = REGISTRY[name]
    return getattr(importlib.import_module(mod), fn)(quick=quick, **kwargs)
