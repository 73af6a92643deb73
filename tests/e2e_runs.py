"""Run folders made by the real commands, for the tests that read them (report, browser, end to end).

Each case is an invented study (simulated data, invented regions) written as a CSV table, a study
file and a sweep file, then run through the command line exactly as a user would: ``bayesdid fit``,
``bayesdid checks --out RUN/checks``, ``bayesdid sweep --out RUN/sweep --serial`` (two variants: the
base and a tighter effect prior) and ``bayesdid report``, all with tiny draws. The folders are built
once per test session (``e2e_run``), on demand per case.

Cases: ``gaussian_ddd`` (log outcome), ``gaussian_did``, ``poisson_ddd``; more families are listed
in :data:`CASES` and run by ``tests/test_end_to_end.py`` when ``BAYESDID_E2E_ALL=1``.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import warnings
from pathlib import Path

from bayesdid.cli import main
from bayesdid.simulate import Scenario, simulate
from bayesdid.simulate_families import CountScenario, simulate_family

DRAWS = ["--draws", "100", "--tune", "150", "--chains", "2"]

#: name -> (family, design, log outcome)
CASES = {
    "gaussian_ddd": ("gaussian", "DDD", True),
    "gaussian_did": ("gaussian", "DiD", False),
    "poisson_ddd": ("poisson", "DDD", False),
    "binomial_ddd": ("binomial", "DDD", False),
    "negbinomial_did": ("negbinomial", "DiD", False),
    "poisson_did": ("poisson", "DiD", False),
    "binomial_did": ("binomial", "DiD", False),
    "negbinomial_ddd": ("negbinomial", "DDD", False),
    "gaussian_log_did": ("gaussian", "DiD", True),
}
DEFAULT_CASES = ("gaussian_ddd", "gaussian_did", "poisson_ddd")
#: The cases this session runs: all of CASES with BAYESDID_E2E_ALL=1, else DEFAULT_CASES (the end-to-end
#: test and the browser test run over the same reports).
MATRIX = tuple(CASES) if os.environ.get("BAYESDID_E2E_ALL") == "1" else DEFAULT_CASES


def _table(name: str, seed: int = 2026):
    family, design, log = CASES[name]
    groups = 2 if design == "DDD" else 1
    starts = {0: 5, 1: 6}
    if family == "gaussian":
        sc = Scenario(
            jurisdictions=12,
            periods=8,
            groups=groups,
            starts=starts,
            rows_per_cell=20,
            tau=-0.15,
            intercept=(3.0, 3.3) if log else (1.0, 1.3),
        )
        frame, truth = simulate(sc, seed)
        if log:  # a positive, skewed outcome analysed on the log scale
            import numpy as np

            frame["y"] = np.exp(frame["y"] / 4.0)
        return frame, truth
    sc = CountScenario(
        family=family,
        jurisdictions=12,
        periods=8,
        groups=groups,
        starts=starts,
        rows_per_cell=30,
        covariates=False,
        level=(-1.5, -1.0),
        tau=-0.25,
    )
    return simulate_family(sc, seed)


def _study_toml(name: str, truth: dict) -> str:
    family, design, log = CASES[name]
    adopters = ", ".join(f'"{k}" = {v}' for k, v in truth["starts"].items())
    lines = [
        f'title = "Invented {family} {design} study ({name})"',
        "",
        "[data]",
        'table = "table.csv"',
        'outcome = "y"',
        'jurisdiction = "region"',
        'period = "period"',
    ]
    if design == "DDD":
        lines.append('group = "group"')
    if family in ("poisson", "negbinomial"):
        lines.append('exposure = "exposure"')
    lines += ["", "[policy]"]
    if design == "DDD":
        lines.append('target_group = "target"')
    lines += [
        f"adopters = {{ {adopters} }}",
        "",
        "[model]",
        f'family = "{family}"',
        f"log_outcome = {'true' if log else 'false'}",
        "",
        "[decision]",
        f"threshold = {-0.05 if (log or family != 'gaussian') else -0.1}",
        "",
        "[wording]",
        'policy = "the evening clinic hours"',
        'outcome = "urgent visits"',
        'unit = "visits per person"',
    ]
    if design == "DDD":
        lines.append('target = "shift workers"')
    lines.append("")
    return "\n".join(lines)


SWEEP = """study = "study.toml"
title = "effect prior"

[sampler]
draws = 100
tune = 150
chains = 2

[[variant]]
label = "tight effect prior"
priors = { effect = 0.05 }
"""


def quiet_main(argv: list[str]) -> tuple[int, str, str]:
    """Run the command line in-process; returns (exit code, stdout, stderr)."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(argv)
    return code, out.getvalue(), err.getvalue()


def build_case(name: str, root: Path) -> dict:
    """Write the case's inputs under ``root/name`` and run every command; returns paths and exit codes."""
    d = Path(root) / name
    d.mkdir(parents=True, exist_ok=True)
    frame, truth = _table(name)
    frame.to_csv(d / "table.csv", index=False)
    (d / "study.toml").write_text(_study_toml(name, truth), encoding="utf-8")
    (d / "sweep.toml").write_text(SWEEP, encoding="utf-8")
    run = d / "run"
    codes, logs = {}, {}
    steps = {
        "fit": ["fit", str(d / "study.toml"), "--out", str(run), *DRAWS, "--quiet"],
        "checks": ["checks", str(d / "study.toml"), "--out", str(run / "checks"), *DRAWS, "--quiet"],
        "sweep": ["sweep", str(d / "sweep.toml"), "--out", str(run / "sweep"), "--serial", "--quiet"],
        "report": ["report", str(run)],
    }
    for step, argv in steps.items():
        codes[step], out, err = quiet_main(argv)
        logs[step] = out + err
    return {
        "name": name,
        "dir": d,
        "run": run,
        "codes": codes,
        "logs": logs,
        "truth": truth,
        "family": CASES[name][0],
        "design": CASES[name][1],
    }


def summary_of(case: dict) -> dict:
    return json.loads((case["run"] / "summary.json").read_text())
