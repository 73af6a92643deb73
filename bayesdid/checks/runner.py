"""Run the checks of a study and write them: ``checks.json`` plus one CSV per plot table.

Folder layout (written atomically with :class:`bayesdid.run.atomic_folder`):

* ``checks.json``: ``title``, ``design``, ``sampler``, ``data`` (as :meth:`Cells.describe`), ``timing``
  and one section per check (``event_time``, ``pretrend``, ``placebo_time``, ``comparison``,
  ``placebo_space``), each with ``status`` ("ok", "flag", "not applicable", "failed"), ``reason``,
  ``threshold``, ``offenders``, the check's numbers and the names of its CSV tables. With
  ``--only NAME`` the other sections read ``{"status": "not run", ...}``.
* CSV tables (columns documented in each check's module): ``event_time.csv``
  (:mod:`~bayesdid.checks.event_time`), ``pretrend_band.csv`` and ``pretrend_stats.csv``
  (:mod:`~bayesdid.checks.pretrend`), ``placebo_time.csv`` and ``placebo_space.csv``
  (:mod:`~bayesdid.checks.placebo`), ``comparison.csv`` (:mod:`~bayesdid.checks.comparison`).
"""

from __future__ import annotations

import dataclasses
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..cells import Cells
from ..contracts import ordered, run_id
from ..errors import BayesDidError
from ..model.terms import resolve_scales
from ..progress import Progress
from ..sample import fit_cells
from ..study import Study, study_to_dict
from .base import CheckResult, effect_weights, failed
from .comparison import comparison_check
from .event_time import event_time_check
from .placebo import placebo_space_check, placebo_time_check
from .pretrend import pretrend_check

__all__ = ["CHECKS", "CheckReport", "run_checks", "write_checks", "default_tolerance"]

CHECKS = ("event_time", "pretrend", "placebo_time", "comparison", "placebo_space")
CHECK_WORDS = {
    "event_time": "one fit with an effect per event time",
    "pretrend": "one fit on the pre-policy data",
    "placebo_time": "one fit with a fake start",
    "comparison": "reads the main fit; a refit per flagged jurisdiction",
    "placebo_space": "one fit per comparison jurisdiction",
}
_NEEDS_MAIN = {"comparison", "placebo_space"}


def default_tolerance(study: Study, cells: Cells) -> tuple[float, str]:
    """Tolerance for the leads: |decision threshold| on the model scale if set, else 0.1 x outcome sd."""
    t = study.decision.threshold
    if t is not None:
        v = abs(float(np.log1p(t))) if cells.log_outcome else abs(float(t))
        return v, "the study's decision threshold (model scale)"
    return 0.1 * float(cells.outcome_sd), "0.1 x the outcome's pooled sd (model scale; common practice)"


@dataclass
class CheckReport:
    """The checks of one study: results by name, with what produced them."""

    study: Study
    cells: Cells
    results: dict
    timing: dict = field(default_factory=dict)
    data_sha256: str | None = None

    def to_dict(self) -> dict:
        out = {
            "title": self.study.title,
            "design": self.cells.design,
            "identity": {
                "data_sha256": self.data_sha256,
                "run_id": run_id(self.data_sha256, study_to_dict(self.study)),
            },
            "sampler": dataclasses.asdict(self.study.sampler),
            "data": self.cells.describe(),
            "timing": self.timing,
        }
        for name in CHECKS:
            r = self.results.get(name)
            out[name] = (
                r.to_dict()
                if r is not None
                else {"status": "not run", "reason": "not selected (--only)", "threshold": {}, "offenders": []}
            )
        return out

    def __str__(self) -> str:
        return "\n".join(str(r) for r in self.results.values())


def run_checks(
    study: Study,
    *,
    cells: Cells | None = None,
    only: str | None = None,
    tolerance: float | None = None,
    pooled: bool = False,
    main_fit=None,
    log=None,
    data_sha256: str | None = None,
) -> CheckReport:
    """Run the checks (all, or ``only`` one) on a study.

    Raises
    ------
    BayesDidError
        If ``only`` names no check.
    """
    say = log or (lambda msg: None)
    if only is not None and only not in CHECKS:
        raise BayesDidError(f"unknown check '{only}' for --only; choose one of {list(CHECKS)}.")
    names = CHECKS if only is None else (only,)
    if cells is None:
        from ..run import prepare

        cells, data_sha256, _ = prepare(study)
    scales = {k: v["scale"] for k, v in resolve_scales(cells, study.priors).items()}
    settings, family = study.sampler, study.model.family
    tol, tol_src = (tolerance, "given") if tolerance is not None else default_tolerance(study, cells)
    results: dict[str, CheckResult] = {}
    timing = {}
    if any(n in _NEEDS_MAIN for n in names) and main_fit is None:
        say("fitting the main model")
        t0 = time.perf_counter()
        try:
            main_fit = fit_cells(cells, scales, settings, family=family)
        except Exception as exc:  # noqa: BLE001 - the checks that do not need it still run
            say(f"the main fit failed: {type(exc).__name__}: {exc}")
        timing["main_fit_s"] = time.perf_counter() - t0
    steps = Progress("checks", len(names), log=log)
    for name in names:
        say(f"check: {name} ({CHECK_WORDS[name]})")
        t0 = time.perf_counter()
        try:
            r = _run_one(name, study, cells, scales, settings, family, tol, tol_src, pooled, main_fit, say)
        except Exception as exc:  # noqa: BLE001 - one failing check must not cost the others
            r = failed(name, exc)
            say(f"check {name} failed: {type(exc).__name__}: {exc}")
        timing[f"{name}_s"] = time.perf_counter() - t0
        results[name] = r
        steps.step(f"{name}: {r.status}")
    return CheckReport(study=study, cells=cells, results=results, timing=timing, data_sha256=data_sha256)


def _run_one(name, study, cells, scales, settings, family, tol, tol_src, pooled, main_fit, say) -> CheckResult:
    if name == "event_time":
        r = event_time_check(cells, scales, settings, tolerance=tol, pooled=pooled, family=family)
        r.threshold["tolerance_source"] = tol_src
        return r
    if name == "pretrend":
        return pretrend_check(cells, scales, settings, family=family)
    if name == "placebo_time":
        return placebo_time_check(cells, scales, settings, lag=study.placebo_lag, family=family)
    if main_fit is None:
        raise RuntimeError("the main fit, which this check reads, did not complete")
    if name == "comparison":
        return comparison_check(cells, scales, settings, main_fit, family=family)
    real = main_fit.draws("tau_adopter") @ effect_weights(cells)
    return placebo_space_check(cells, scales, settings, real, family=family, progress=say)


def write_checks(report: CheckReport, out: str | Path, *, replace: bool = False, argv=None) -> Path:
    """Write checks.json and the CSV tables into ``out`` atomically."""
    import sys

    from ..run import atomic_folder, dump_json, versions

    with atomic_folder(out, replace=replace, kind="checks") as tmp:
        files = []
        for r in report.results.values():
            for name, table in r.tables.items():
                ordered(name, table).to_csv(tmp / f"{name}.csv", index=False)
                files.append(f"{name}.csv")
        body = report.to_dict()
        body["manifest"] = {
            "versions": versions(),
            "study": study_to_dict(report.study),
            "command": list(argv) if argv is not None else sys.argv,
            "files": ["checks.json", *files],
        }
        dump_json(body, tmp / "checks.json")
    return Path(out)


def checks_into_run(study: Study, run_dir: str | Path, log=None, *, cells: Cells | None = None, main_fit=None) -> Path:
    """Run every check for ``study`` and write them into ``run_dir/checks`` (for `bayesdid analyze`,
    whose report reads them from there). ``cells`` and ``main_fit`` pass the run's own collapse and
    fit, so that neither the table nor the main model is read or sampled twice."""
    report = run_checks(study, cells=cells, main_fit=main_fit, log=log)
    return write_checks(report, Path(run_dir) / "checks")
