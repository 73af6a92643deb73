"""Shared fixtures. Compiled models are cached per process by bayesdid.sample, so fixtures that fit
the same model structure re-sample without a recompile; keep draws small.

The suite shares compiled models between its processes and runs through the compile cache in the
clone's ``.cache/bayesdid`` (git-ignored), unless BAYESDID_CACHE_DIR names another folder; it is set
here, before bayesdid (and so PyTensor and numba) is imported.

Every model the suite asks for, in this process or in the processes its tests start, is logged to
``compile-log-<pid>.jsonl`` in that folder (BAYESDID_COMPILE_LOG, see bayesdid.modelcache); at the end
the session prints, per test file, the real compiles with their seconds and the loads from disk."""

from __future__ import annotations

import os
import time
import warnings
from pathlib import Path

os.environ.setdefault("BAYESDID_CACHE_DIR", str(Path(__file__).resolve().parent.parent / ".cache" / "bayesdid"))
# One log per session (other sessions may share the cache folder); removed once its table is printed.
os.environ.setdefault(
    "BAYESDID_COMPILE_LOG", str(Path(os.environ["BAYESDID_CACHE_DIR"]) / f"compile-log-{os.getpid()}.jsonl")
)

import numpy as np
import pandas as pd
import pytest

from bayesdid import make_study
from bayesdid.cells import collapse
from bayesdid.simulate import Scenario, simulate

warnings.filterwarnings("ignore", category=RuntimeWarning, module="arviz_stats")
_SESSION_START = time.time()


def study_of(folder: Path, frame: pd.DataFrame, truth: dict, *, ddd: bool = True, **kw):
    """Write ``frame`` as ``folder/table.csv`` and return the study over it (simulate()'s column names)."""
    path = Path(folder) / "table.csv"
    frame.to_csv(path, index=False)
    return make_study(
        table=path,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group" if ddd else None,
        target_group="target" if ddd else None,
        adopters=truth["starts"],
        **kw,
    )


def sim_study(tmp_path_factory, sc: Scenario, data_seed: int, name: str, **kw):
    """Simulate, write the table, return (study, cells, frame, truth)."""
    frame, truth = simulate(sc, data_seed)
    study = study_of(tmp_path_factory.mktemp(name), frame, truth, ddd=sc.groups == 2, **kw)
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


def compile_table(records: list[dict]) -> list[str]:
    """Lines of the end-of-session table: per test file, real compiles (count, seconds, distinct
    structures ignoring sizes), loads from disk and reuses within a process; the costliest first."""
    files: dict[str, dict] = {}
    for r in records:
        f = files.setdefault(
            (r.get("test") or "(outside a test)").split("::")[0],
            {"compiled": 0, "compile_s": 0.0, "loaded": 0, "in-process": 0, "keys": set()},
        )
        how = r.get("how")
        if how == "compiled":
            f["compiled"] += 1
            f["compile_s"] += float(r.get("seconds", 0.0))
            f["keys"].add(r.get("structure"))
        elif how in ("loaded", "in-process"):
            f[how] += 1
    compiled = [r for r in records if r.get("how") == "compiled"]
    lines = [
        f"{len(compiled)} real compile(s), {sum(float(r['seconds']) for r in compiled):.0f} s; "
        f"{len({r['key'] for r in compiled})} distinct model(s), "
        f"{len({r['structure'] for r in compiled})} distinct structure(s) ignoring sizes",
        f"{'test file':<44} {'compiles':>8} {'seconds':>8} {'structures':>10} {'loads':>6} {'reused':>6}",
    ]
    for name, f in sorted(files.items(), key=lambda kv: (-kv[1]["compile_s"], kv[0])):
        lines.append(
            f"{name:<44} {f['compiled']:>8} {f['compile_s']:>8.0f} {len(f['keys']):>10} "
            f"{f['loaded']:>6} {f['in-process']:>6}"
        )
    return lines


def pytest_terminal_summary(terminalreporter):
    from bayesdid.modelcache import read_log

    log = Path(os.environ["BAYESDID_COMPILE_LOG"])
    records = [r for r in read_log(log) if r.get("time", 0) >= _SESSION_START]
    if log.name == f"compile-log-{os.getpid()}.jsonl":
        log.unlink(missing_ok=True)
    if records:
        terminalreporter.write_sep("=", "compiled models per test file (tests/conftest.py)")
        for line in compile_table(records):
            terminalreporter.write_line(line)
