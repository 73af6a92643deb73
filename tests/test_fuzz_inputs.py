"""Seeded fuzzing of study files and tables through the real command line, stopped before compiling.

Each case takes one of four valid studies (Gaussian DDD, log-outcome DiD, Poisson DDD with a
covariate, binomial with trials), mutates its study file and/or its table at random, and runs
``bayesdid fit`` in this process with the fit itself replaced by a stub that builds the prior scales
and the model structure, then stops. The outcome must be a clean refusal (exit 2, one message, no
traceback, nothing written) or a study that reached the fit; any other exception fails the test
with the case number that reproduces it.
"""

from __future__ import annotations

import copy
import datetime
import random
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tomli_w

import bayesdid.run
from bayesdid.cli import main
from bayesdid.model.terms import model_spec, resolve_scales

CASES, CHUNKS = 320, 8


class Reached(Exception):
    """The study passed every check and reached the fit."""


def _stop_before_compile(study, *, prepared=None, **_):
    cells = prepared[0]
    resolve_scales(cells, study.priors)
    model_spec(cells, study.model.family)
    raise Reached


def _table(rng: np.random.Generator) -> pd.DataFrame:
    rows = [
        (
            f"R{j}",
            g,
            t,
            float(rng.gamma(5, 3)),
            int(rng.poisson(3)),
            1.0 + t / 10,
            int(rng.integers(20, 60)),
            float(rng.integers(0, 2)),
        )
        for j in range(6)
        for g in ("a", "b")
        for t in range(1, 5)
        for _ in range(2)
    ]
    return pd.DataFrame(rows, columns=["region", "grp", "period", "y", "visits", "ex", "age", "flag"])


BASES = [
    {
        "data": {"table": "table.csv", "outcome": "y", "jurisdiction": "region", "period": "period", "group": "grp"},
        "policy": {"target_group": "b", "adopters": {"R0": 3}},
        "sampler": {"draws": 20, "tune": 20},
        "decision": {"threshold": -0.5},
    },
    {
        "title": "did",
        "data": {"table": "table.csv", "outcome": "y", "jurisdiction": "region", "period": "period"},
        "policy": {"adopters": {"R0": 3, "R1": 4}},
        "model": {"log_outcome": True},
        "decision": {"threshold": -0.1},
    },
    {
        "data": {
            "table": "table.csv",
            "outcome": "visits",
            "jurisdiction": "region",
            "period": "period",
            "group": "grp",
            "exposure": "ex",
        },
        "policy": {"target_group": "b", "adopters": {"R0": 3}},
        "model": {"family": "poisson", "covariates": "age"},
        "priors": {"effect": 0.5},
    },
    {
        "data": {
            "table": "table.csv",
            "outcome": "visits",
            "jurisdiction": "region",
            "period": "period",
            "group": "grp",
            "trials": "age",
        },
        "policy": {"target_group": "b", "adopters": {"R0": 2}},
        "model": {"family": "binomial"},
        "crosscheck": {"draws": 99},
    },
]

VALUES = [
    0,
    1,
    -1,
    2,
    3,
    10,
    1.5,
    -1.5,
    0.0,
    1e308,
    -1e308,
    float("nan"),
    float("inf"),
    "",
    " ",
    "y",
    "region",
    "grp",
    "period",
    "b",
    "a",
    "R0",
    "R9",
    "2023Q1",
    "gaussian",
    "poisson",
    "binomial",
    "negbinomial",
    "drop",
    "error",
    "age",
    "age + C(grp)",
    "age +",
    "C(",
    "y",
    "visits",
    "age ~ grp",
    "region",
    "C(period)",
    True,
    False,
    [],
    [1, 2],
    ["a"],
    [1, 2, 3, 4],
    {},
    {"R0": 3},
    {"R1": 2, "R0": 4},
    {"R0": "x"},
    datetime.date(2024, 1, 1),
    2**63 - 1,
    -(2**63),
]
KEYS = [
    "table",
    "outcome",
    "jurisdiction",
    "period",
    "group",
    "exposure",
    "trials",
    "period_order",
    "adopters",
    "target_group",
    "family",
    "log_outcome",
    "covariates",
    "missing",
    "effect",
    "gap_noise",
    "chains",
    "draws",
    "tune",
    "seed",
    "threshold",
    "weights",
    "placebos",
    "placebo_lag",
    "nonsense",
]
SECTIONS = ["data", "policy", "model", "priors", "sampler", "decision", "crosscheck", "checks", "title", "extra"]
OWN_KEYS = {
    "data": KEYS[:8],
    "policy": ["adopters", "target_group"],
    "model": ["family", "log_outcome", "covariates", "missing"],
    "priors": ["effect", "gap_noise"],
    "sampler": ["chains", "draws", "tune", "seed"],
    "decision": ["threshold"],
    "crosscheck": ["seed", "draws", "weights", "placebos"],
    "checks": ["placebo_lag"],
    "extra": ["nonsense"],
}
CELL_VALUES = [np.nan, "", "n/a", "NA", "x", -1, 0, 0.5, 1e300, np.inf, -np.inf, True, "2023Q1", 3, "R0", "b", 7]


def _mutate_study(raw: dict, r: random.Random) -> dict:
    raw = copy.deepcopy(raw)
    for _ in range(r.randint(1, 3)):
        op = r.random()
        sec = r.choice(SECTIONS)
        if op < 0.35:  # set a key of a section to a random value
            if sec == "title":
                raw["title"] = r.choice(VALUES)
                continue
            d = raw.setdefault(sec, {}) if isinstance(raw.get(sec, {}), dict) else {}
            d[r.choice(OWN_KEYS[sec] if r.random() < 0.85 else KEYS)] = copy.deepcopy(r.choice(VALUES))
        elif op < 0.55:  # delete a key
            d = raw.get(sec)
            if isinstance(d, dict) and d:
                d.pop(r.choice(sorted(d)))
            else:
                raw.pop(sec, None)
        elif op < 0.65:  # a section replaced by a plain value
            raw[sec] = copy.deepcopy(r.choice(VALUES))
        elif op < 0.8:  # the adopters and their starts
            names = [f"R{j}" for j in range(8)] + ["", "b"]
            starts = [1, 2, 3, 4, 5, "3", 2.0, "2023Q1", -1]
            raw.setdefault("policy", {})
            if isinstance(raw["policy"], dict):
                raw["policy"]["adopters"] = {r.choice(names): r.choice(starts) for _ in range(r.randint(1, 6))}
        elif op < 0.9:  # an explicit period order
            d = raw.get("data")
            if isinstance(d, dict):
                order = [1, 2, 3, 4]
                r.shuffle(order)
                d["period_order"] = order[: r.randint(0, 4)] + r.choice([[], [4], ["2023Q1"]])
        else:  # two roles swap their columns
            d = raw.get("data")
            if isinstance(d, dict):
                a, b = r.sample(["outcome", "jurisdiction", "period", "group"], 2)
                d[a], d[b] = d.get(b, "grp"), d.get(a, "y")
    return raw


def _mutate_table(frame: pd.DataFrame, r: random.Random) -> pd.DataFrame:
    f = frame.copy()
    for _ in range(r.randint(1, 3)):
        if f.columns.duplicated().any():  # a duplicated name is fault enough; further edits need unique names
            break
        op = r.random()
        col = r.choice(list(f.columns)) if len(f.columns) else None
        if col is None:
            break
        if op < 0.35 and len(f):  # a few cells changed
            f = f.astype({col: object})
            for _ in range(r.randint(1, 4)):
                f.iloc[r.randrange(len(f)), list(f.columns).index(col)] = r.choice(CELL_VALUES)
        elif op < 0.5:  # rows of one jurisdiction, period or group removed
            key = r.choice(["region", "period", "grp"])
            if key in f.columns and len(f):
                f = f[f[key] != r.choice(f[key].tolist())]
        elif op < 0.6:  # random rows removed
            f = f.sample(frac=r.uniform(0, 1), random_state=r.randrange(10**6)) if len(f) else f
        elif op < 0.7:  # a column renamed (maybe onto another's name) or removed
            if r.random() < 0.5:
                f = f.rename(columns={col: r.choice(list(f.columns) + ["other"])})
            else:
                f = f.drop(columns=[col])
        elif op < 0.8:  # a column made constant
            f = f.assign(**{col: r.choice(CELL_VALUES[5:])})
        elif op < 0.97 and "period" in f.columns:  # period labels of other kinds
            kind = r.choice(["mixed", "text", "float"])
            f = f.assign(
                period=f["period"].map(
                    lambda t: (
                        r.choice([t, f"2023Q{t}"])
                        if kind == "mixed"
                        else f"2023Q{t}"
                        if kind == "text"
                        else pd.to_numeric(t, errors="coerce")
                    )
                )
            )
        else:
            f = f.iloc[0:0]
    return f


def _write_case(work: Path, k: int):
    r = random.Random(k)
    base = copy.deepcopy(BASES[k % len(BASES)])
    raw = _mutate_study(base, r) if r.random() < 0.6 else base
    frame = _table(np.random.default_rng(k))
    if r.random() < 0.6 or raw is base:
        frame = _mutate_table(frame, r)
    csv = frame.to_csv(index=False).encode("utf-8")
    roll = r.random()
    if roll < 0.04:
        csv = csv.replace(b"R1", b"R\xe91")  # mis-encoded bytes
    elif roll < 0.08:
        csv = csv[: r.randrange(len(csv) + 1)]  # truncated file
    (work / "table.csv").write_bytes(csv)
    try:
        text = tomli_w.dumps(raw).encode("utf-8")
    except Exception:  # a value TOML cannot hold: the case mutates the text instead
        text = tomli_w.dumps(base).encode("utf-8")
    roll = r.random()
    if roll < 0.04:
        lines = text.split(b"\n")
        lines.pop(r.randrange(len(lines)))
        text = b"\n".join(lines)
    elif roll < 0.07:
        text = text[: r.randrange(len(text) + 1)] + b"\xff"
    (work / "study.toml").write_bytes(text)


@pytest.mark.parametrize("chunk", range(CHUNKS))
def test_fuzzed_inputs_are_refused_cleanly_or_reach_the_fit(tmp_path, capsys, monkeypatch, chunk):
    monkeypatch.setattr(bayesdid.run, "analyse", _stop_before_compile)
    outcomes = {"refused": 0, "reached": 0}
    for k in range(chunk, CASES, CHUNKS):
        work = tmp_path / f"case{k}"
        work.mkdir()
        _write_case(work, k)
        out = work / "run"
        try:
            code = main(["fit", str(work / "study.toml"), "--out", str(out), "--quiet"])
        except Reached:
            outcomes["reached"] += 1
            continue
        except Exception as exc:  # the failure names the case that reproduces it
            pytest.fail(f"fuzz case {k}: uncaught {type(exc).__name__}: {exc}")
        err = capsys.readouterr().err
        assert code == 2, f"fuzz case {k}: exit {code}: {err}"
        assert "bayesdid: error: " in err and "Traceback" not in err, f"fuzz case {k}: {err}"
        assert not out.exists(), f"fuzz case {k}: wrote {out}"
        outcomes["refused"] += 1
    # the mutations are neither all harmless nor all fatal
    assert outcomes["refused"] > 0 and outcomes["reached"] > 0, outcomes
