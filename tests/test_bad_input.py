"""Bad input: refused before any work with exit code 2, one message naming the key, column or value at
fault, no traceback, nothing written, and no model compiled.

The catalogue below holds one faulty input per entry (study-file faults, command-line overrides, table
faults, family faults, output faults); each runs the real command line in this process, on a small
valid study changed in one place. A few run as subprocesses to prove the exit code and a clean stderr.
"""

from __future__ import annotations

import dataclasses
import os
import re
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from bayesdid import sample
from bayesdid.cli import main

STUDY = """title = "refusal catalogue"

[data]
table = "table.csv"
outcome = "y"
jurisdiction = "region"
period = "period"
group = "grp"

[policy]
target_group = "b"
adopters = { "R0" = 3 }

[model]
log_outcome = false

[sampler]
draws = 20
tune = 20

[decision]
threshold = -0.5
"""


def base_table() -> pd.DataFrame:
    """6 invented jurisdictions x 2 groups x 4 periods x 3 rows; positive outcome, count columns too."""
    rng = np.random.default_rng(0)
    rows = [
        (
            f"R{j}",
            g,
            t,
            float(rng.normal(15, 1)),
            int(rng.poisson(3)),
            1.0 + t / 10,
            int(rng.integers(20, 60)),
            float(rng.integers(0, 2)),
        )
        for j in range(6)
        for g in ("a", "b")
        for t in range(1, 5)
        for _ in range(3)
    ]
    return pd.DataFrame(rows, columns=["region", "grp", "period", "y", "visits", "ex", "age", "flag"])


@dataclasses.dataclass
class Case:
    pattern: str  # regex the message must match
    study: Callable[[str], str] | None = None  # change of the study text
    table: Callable[[pd.DataFrame], pd.DataFrame] | None = None
    args: tuple = ()  # extra command-line arguments
    setup: Callable[[Path], None] | None = None  # raw files written before the run (work folder)
    command: str = "fit"
    study_path: str = "study.toml"
    out: str = "run"


def sub(old, new):
    def f(text):
        assert old in text, old
        return text.replace(old, new)

    return f


def add(section_line):
    return lambda text: text + "\n" + section_line + "\n"


def cell(col, row, value):
    def f(frame):
        frame = frame.astype({col: object})
        frame.loc[row, col] = value
        return frame

    return f


def write_bytes(name, data: bytes):
    return lambda d: (d / name).write_bytes(data)


def _rows_of(frame, **eq):
    m = np.ones(len(frame), dtype=bool)
    for k, v in eq.items():
        m &= (frame[k] == v).to_numpy()
    return m


_SUMMARY_KEYS = 'group = "grp"\nsummary = "mean"\ncount = "n"\nsd = "s"'


def _panel_ids(frame):
    """The base table as a balanced panel: the k-th row of each cell is the same unit in every period."""
    k = frame.groupby(["region", "grp", "period"]).cumcount().astype(str)
    return frame.assign(pid=frame["region"] + "-" + frame["grp"] + "-" + k)


def _means(frame):
    """The base table as cell means with count and sd."""
    agg = frame.groupby(["region", "grp", "period"])["y"].agg(["mean", "count", "std"]).reset_index()
    return agg.rename(columns={"mean": "y", "count": "n", "std": "s"})


def _parquet_parts(d: Path) -> None:
    (d / "parts").mkdir()
    f = base_table()
    f.iloc[:40].to_parquet(d / "parts" / "a.parquet", index=False)
    f.iloc[40:].assign(period=f["period"].iloc[40:].astype(str)).to_parquet(d / "parts" / "b.parquet", index=False)


CASES: dict[str, Case] = {
    # ---- study file: structure and keys -------------------------------------------------------------
    "unknown top-level key": Case(r"unknown key\(s\) \['famly'\] in \[top level\]", study=lambda s: "famly = 1\n" + s),
    "unknown key in [model]": Case(
        r"unknown key\(s\) \['famly'\] in \[model\]",
        study=sub("log_outcome = false", "log_outcome = false\nfamly = 'gaussian'"),
    ),
    "[model] given a number": Case(
        r"study key 'model'.*found 5", study=lambda s: "model = 5\n" + s.replace("[model]\nlog_outcome = false\n", "")
    ),
    "[sampler] given text": Case(
        r"study key 'sampler'.*found 'fast'",
        study=lambda s: "sampler = 'fast'\n" + s.replace("[sampler]\ndraws = 20\ntune = 20\n", ""),
    ),
    "[priors] given a list": Case(r"study key 'priors'.*found \[1, 2\]", study=lambda s: "priors = [1, 2]\n" + s),
    "no [data] section": Case(
        r"needs a \[data\] section", study=lambda s: s[: s.index("[data]")] + s[s.index("[policy]") :]
    ),
    "outcome key missing": Case(r"'data.outcome' is missing", study=sub('outcome = "y"\n', "")),
    "outcome key a number": Case(r"'data.outcome'.*found 5", study=sub('outcome = "y"', "outcome = 5")),
    "table key empty": Case(r"'data.table'.*found ''", study=sub('table = "table.csv"', 'table = ""')),
    "no [policy] section": Case(
        r"\[policy\] section", study=lambda s: s[: s.index("[policy]")] + s[s.index("[model]") :]
    ),
    "adopters empty": Case(r"'policy.adopters'.*found \{\}", study=sub('{ "R0" = 3 }', "{}")),
    "adopters given text": Case(r"'policy.adopters'.*found 'R0'", study=sub('{ "R0" = 3 }', '"R0"')),
    "adopter start a date": Case(
        r"'policy.adopters.R0'.*datetime.date", study=sub('{ "R0" = 3 }', '{ "R0" = 2024-01-01 }')
    ),
    "target group missing (DDD)": Case(r"'policy.target_group' is missing", study=sub('target_group = "b"\n', "")),
    "target group without group (DiD)": Case(
        r"'policy.target_group' is set but 'data.group' is not", study=sub('group = "grp"\n\n', "\n")
    ),
    "unknown family": Case(r"'model.family'.*found 'gamma'", study=sub("log_outcome = false", 'family = "gamma"')),
    "unknown missing rule": Case(
        r"'model.missing'.*found 'keep'", study=sub("log_outcome = false", 'missing = "keep"')
    ),
    "log_outcome given text": Case(
        r"'model.log_outcome'.*found 'yes'", study=sub("log_outcome = false", 'log_outcome = "yes"')
    ),
    "log outcome with a count family": Case(
        r"'model.log_outcome'.*non-gaussian", study=sub("log_outcome = false", 'log_outcome = true\nfamily = "poisson"')
    ),
    "count family without exposure": Case(
        r"family 'poisson' needs 'data.exposure'", study=sub("log_outcome = false", 'family = "poisson"')
    ),
    "trials with the gaussian family": Case(
        r"'data.trials'.*'visits'", study=sub('group = "grp"', 'group = "grp"\ntrials = "visits"')
    ),
    "two roles, one column": Case(
        r"'data.jurisdiction' and 'data.group' name the same column 'region'",
        study=sub('group = "grp"', 'group = "region"'),
    ),
    "title a number": Case(r"study key 'title'.*found 7", study=sub('title = "refusal catalogue"', "title = 7")),
    "period_order empty": Case(
        r"'data.period_order'.*found \[\]", study=sub('group = "grp"', 'group = "grp"\nperiod_order = []')
    ),
    "period_order repeats a period": Case(
        r"'data.period_order'.*each period once.*listed twice",
        study=sub('group = "grp"', 'group = "grp"\nperiod_order = [1, 2, 2, 3, 4]'),
    ),
    "period_order misses a period": Case(
        r"period\(s\) \[4\] that 'data.period_order' does not list",
        study=sub('group = "grp"', 'group = "grp"\nperiod_order = [1, 2, 3]'),
    ),
    "bad covariate formula": Case(
        r"'model.covariates': 'age \+' is not a formula", study=sub("log_outcome = false", 'covariates = "age +"')
    ),
    "covariate column absent": Case(
        r"column\(s\) \['income'\] named in the study are not in the table",
        study=sub("log_outcome = false", 'covariates = "income"'),
    ),
    "covariate formula with a left-hand side": Case(
        r"'model.covariates': 'y ~ age' has a left-hand side",
        study=sub("log_outcome = false", 'covariates = "y ~ age"'),
    ),
    "covariate is the outcome": Case(
        r"'model.covariates' uses column 'y', which is the outcome column",
        study=sub("log_outcome = false", 'covariates = "age + y"'),
    ),
    # ---- study file: values ---------------------------------------------------------------------------
    "prior scale negative": Case(r"'priors.effect'.*positive number, found -1", study=add("[priors]\neffect = -1")),
    "prior scale text": Case(r"'priors.effect'.*finite number, found 'wide'", study=add("[priors]\neffect = 'wide'")),
    "unknown prior": Case(r"unknown key\(s\) \['efect'\] in \[priors\]", study=add("[priors]\nefect = 1.0")),
    "chains zero in the file": Case(
        r"'sampler.chains'.*at least 1, found 0", study=sub("draws = 20", "draws = 20\nchains = 0")
    ),
    "draws below 10 in the file": Case(r"'sampler.draws'.*at least 10, found 5", study=sub("draws = 20", "draws = 5")),
    "draws a fraction": Case(r"'sampler.draws'.*an integer, found 20.5", study=sub("draws = 20", "draws = 20.5")),
    "seed negative in the file": Case(
        r"'sampler.seed'.*at least 0, found -1", study=sub("draws = 20", "draws = 20\nseed = -1")
    ),
    "tune absurdly large": Case(
        r"'sampler.tune'.*at most 1000000, found 100000000", study=sub("tune = 20", "tune = 100000000")
    ),
    "threshold text": Case(
        r"'decision.threshold'.*finite number, found 'big'", study=sub("threshold = -0.5", "threshold = 'big'")
    ),
    "threshold nan": Case(
        r"'decision.threshold'.*finite number, found nan", study=sub("threshold = -0.5", "threshold = nan")
    ),
    "threshold -150% on a log outcome": Case(
        r"'decision.threshold'.*above -1 for a log outcome.*found -1.5",
        study=lambda s: s.replace("log_outcome = false", "log_outcome = true").replace(
            "threshold = -0.5", "threshold = -1.5"
        ),
    ),
    "threshold -100% on a rate ratio": Case(
        r"'decision.threshold'.*above -1 for family 'poisson'.*found -1",
        study=lambda s: (
            s.replace("log_outcome = false", 'family = "poisson"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("threshold = -0.5", "threshold = -1")
        ),
    ),
    "cross-check weights unknown": Case(
        r"'crosscheck.weights'.*found 'normal'", study=add("[crosscheck]\nweights = 'normal'")
    ),
    "cross-check draws too few": Case(
        r"'crosscheck.draws'.*at least 19, found 5", study=add("[crosscheck]\ndraws = 5")
    ),
    "placebo lag zero": Case(r"'checks.placebo_lag'.*at least 1, found 0", study=add("[checks]\nplacebo_lag = 0")),
    # ---- study file: the file itself -------------------------------------------------------------------
    "study not TOML": Case(r"study file '.*study.toml' is not valid TOML", study=lambda s: s + "\nthis is not toml\n"),
    "study not UTF-8": Case(
        r"study file '.*bad.toml' is not UTF-8 text: byte 0xe9 on line 1",
        setup=write_bytes("bad.toml", 'title = "caf\xe9"\n'.encode("latin-1")),
        study_path="bad.toml",
    ),
    "study path a folder": Case(
        r"study file '.*sub' is a folder, not a file", setup=lambda d: (d / "sub").mkdir(), study_path="sub"
    ),
    "study path missing": Case(r"study file '.*nowhere.toml' does not exist", study_path="nowhere.toml"),
    "study path a broken symbolic link": Case(
        r"study file '.*gone.toml' is a symbolic link that leads nowhere",
        setup=lambda d: os.symlink(d / "moved.toml", d / "gone.toml"),
        study_path="gone.toml",
    ),
    # ---- command-line overrides: the same checks and messages as the study file -------------------
    "--chains 0": Case(
        r"--chains 0: study key 'sampler.chains': expected an integer of at least 1", args=("--chains", "0")
    ),
    "--chains 1000": Case(r"--chains 1000: study key 'sampler.chains'.*at most 64", args=("--chains", "1000")),
    "--draws 0": Case(r"--draws 0: study key 'sampler.draws'.*at least 10", args=("--draws", "0")),
    "--draws -10": Case(r"--draws -10: study key 'sampler.draws'.*found -10", args=("--draws", "-10")),
    "--tune 5": Case(r"--tune 5: study key 'sampler.tune'", args=("--tune", "5")),
    "--seed -3": Case(r"--seed -3: study key 'sampler.seed'", args=("--seed", "-3")),
    "--seed beyond 64 bits": Case(
        r"--seed 18446744073709551616: study key 'sampler.seed'.*at most", args=("--seed", str(2**64))
    ),
    "analyze --draws 0": Case(r"--draws 0: study key 'sampler.draws'", args=("--draws", "0"), command="analyze"),
    "checks --chains 0": Case(r"--chains 0: study key 'sampler.chains'", args=("--chains", "0"), command="checks"),
    "checks --only unknown": Case(r"unknown check 'nope' for --only", args=("--only", "nope"), command="checks"),
    "checks --lead-tolerance negative": Case(
        r"--lead-tolerance -1.0: expected a positive", args=("--lead-tolerance", "-1"), command="checks"
    ),
    # ---- table: the file --------------------------------------------------------------------------------
    "table missing": Case(r"table '.*nowhere.csv' does not exist", study=sub("table.csv", "nowhere.csv")),
    "table path an empty folder": Case(
        r"table '.*tables' is a folder holding no data file",
        study=sub("table.csv", "tables"),
        setup=lambda d: (d / "tables").mkdir(),
    ),
    "table of unknown kind": Case(
        r"unknown file kind '.xlsx'", study=sub("table.csv", "t.xlsx"), setup=write_bytes("t.xlsx", b"PK\x03\x04")
    ),
    "table a symbolic link that loops": Case(
        r"table '.*loop.csv' is a symbolic link that leads nowhere",
        study=sub("table.csv", "loop.csv"),
        setup=lambda d: os.symlink(d / "loop.csv", d / "loop.csv"),
    ),
    "table separated by semicolons": Case(
        r"not in the table.*the file seems to separate fields with ';'",
        study=sub("table.csv", "semi.csv"),
        setup=lambda d: pd.read_csv(d / "table.csv").to_csv(d / "semi.csv", sep=";", index=False),
    ),
    "table empty file": Case(
        r"table '.*empty.csv' is empty", study=sub("table.csv", "empty.csv"), setup=write_bytes("empty.csv", b"")
    ),
    "table header only": Case(r"has no rows", table=lambda f: f.iloc[0:0]),
    "table not UTF-8": Case(
        r"table '.*latin.csv' is not UTF-8 text: byte 0xe9 on line 3",
        study=sub("table.csv", "latin.csv"),
        setup=lambda d: (d / "latin.csv").write_bytes(
            "region,grp,period,y\nR0,a,1,1.0\nR\xe9,a,1,2.0\n".encode("latin-1")
        ),
    ),
    "table malformed CSV": Case(
        r"not a well-formed CSV file.*line 3",
        study=sub("table.csv", "ragged.csv"),
        setup=write_bytes("ragged.csv", b"region,grp,period,y\nR0,a,1,1.0\nR0,a,1,2.0,9\n"),
    ),
    "empty Parquet file": Case(
        r"table '.*t.parquet' could not be read as a Parquet file \(0 bytes",
        study=sub("table.csv", "t.parquet"),
        setup=write_bytes("t.parquet", b""),
    ),
    "duplicated column name": Case(
        r"more than one column named \['y'\]", table=lambda f: f.rename(columns={"age": "y"})
    ),
    # ---- table: roles -------------------------------------------------------------------------------
    "role column absent": Case(
        r"column\(s\) \['nope'\] named in the study are not in the table", study=sub('group = "grp"', 'group = "nope"')
    ),
    "adopter not in the table": Case(r"adopter\(s\) \['Atlantis'\]", study=sub('{ "R0" = 3 }', '{ "Atlantis" = 3 }')),
    "start outside the periods": Case(r"start of adopter 'R0' \(9", study=sub('{ "R0" = 3 }', '{ "R0" = 9 }')),
    "no pre-period": Case(r"adopter 'R0' starts in the first period", study=sub('{ "R0" = 3 }', '{ "R0" = 1 }')),
    "single group level": Case(r"column 'grp' has a single level", table=lambda f: f.assign(grp="b")),
    "three group levels": Case(r"column 'grp' has 3 levels", table=cell("grp", 0, "c")),
    "no comparison jurisdiction": Case(
        r"no comparison jurisdiction",
        study=sub('{ "R0" = 3 }', '{ "R0" = 3, "R1" = 3, "R2" = 2, "R3" = 4, "R4" = 3, "R5" = 3 }'),
    ),
    "jurisdiction value missing": Case(
        r"column 'region' \(jurisdiction\) has 1 missing", table=cell("region", 4, np.nan)
    ),
    "period value missing": Case(r"column 'period' \(period\) has 1 missing", table=cell("period", 4, np.nan)),
    "outcome text": Case(r"outcome column 'y' holds text.*table lines 7\).*'twelve'", table=cell("y", 5, "twelve")),
    "outcome 'n/a' is text, not missing": Case(
        r"outcome column 'y' holds text.*lines 4, 9\).*'n/a'",
        table=lambda f: cell("y", 7, "n/a")(cell("y", 2, "n/a")(f)),
    ),
    "outcome missing": Case(r"outcome column 'y' has 1 missing value", table=cell("y", 3, np.nan)),
    "outcome true/false": Case(
        r"outcome column 'y' holds true/false values.*give 0 and 1",
        study=sub("table.csv", "t.parquet"),
        setup=lambda d: base_table().assign(y=lambda f: f["y"] > 15).to_parquet(d / "t.parquet"),
    ),
    "outcome too large to square": Case(
        r"outcome column 'y' holds values as large as 1.*e\+3\d\d.*rescale", table=lambda f: f.assign(y=f["y"] * 1e300)
    ),
    "outcome infinite": Case(r"outcome column 'y' has 1 infinite", table=cell("y", 2, np.inf)),
    "outcome not positive under log": Case(
        r"at or below zero.*log_outcome",
        table=cell("y", 3, -1.0),
        study=sub("log_outcome = false", "log_outcome = true"),
    ),
    "outcome constant": Case(
        r"outcome column 'y' has the same value \(4\) in every row", table=lambda f: f.assign(y=4.0)
    ),
    "outcome constant over the comparisons": Case(
        r"same value \(4\) in every row of the comparison jurisdictions",
        table=lambda f: f.assign(y=np.where(f["region"] == "R0", f["y"], 4.0)),
    ),
    "outcome constant within every comparison cell": Case(
        r"does not vary within any comparison cell",
        table=lambda f: f.assign(y=f.groupby(["region", "grp", "period"])["y"].transform("first")),
    ),
    "period labels of mixed kinds": Case(
        r"period column 'period' mixes kinds of labels.*'data.period_order'",
        table=lambda f: f.assign(period=f["period"].map({1: "2023Q1", 2: "2023Q2", 3: "3", 4: "4"})),
    ),
    "adopter without a pre-period with both groups": Case(
        r"adopter 'R0' is observed with both groups in 0 period\(s\) before its start",
        table=lambda f: f[~(_rows_of(f, region="R0", grp="a") & (f["period"] < 3).to_numpy())],
    ),
    "covariate mixes numbers and text": Case(
        r"covariate column 'age' mixes numbers and text.*'unknown'",
        table=cell("age", 6, "unknown"),
        study=sub("log_outcome = false", 'covariates = "age"'),
    ),
    "covariate value missing": Case(
        r"covariate column 'age' has 1 missing value.*model.missing",
        table=cell("age", 6, np.nan),
        study=sub("log_outcome = false", 'covariates = "age"'),
    ),
    # ---- families ---------------------------------------------------------------------------------------
    "binomial outcome not 0/1": Case(
        r"outcome column 'flag' must be 0 or 1.*table lines 2",
        table=cell("flag", 0, 2.0),
        study=lambda s: s.replace('outcome = "y"', 'outcome = "flag"').replace(
            "log_outcome = false", 'family = "binomial"'
        ),
    ),
    "binomial with no success": Case(
        r"outcome column 'flag' holds no success in every row",
        table=lambda f: f.assign(flag=0.0),
        study=lambda s: s.replace('outcome = "y"', 'outcome = "flag"').replace(
            "log_outcome = false", 'family = "binomial"'
        ),
    ),
    "trials below successes": Case(
        r"trials column 'age' is below the successes in 'visits'",
        table=lambda f: cell("visits", 1, 5)(cell("age", 1, 2)(f)),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\ntrials = "age"')
            .replace("log_outcome = false", 'family = "binomial"')
        ),
    ),
    "counts negative": Case(
        r"outcome column 'visits'.*negative",
        table=cell("visits", 3, -2),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("log_outcome = false", 'family = "poisson"')
        ),
    ),
    "counts not whole": Case(
        r"outcome column 'visits'.*not whole numbers \(e.g. 2.5\)",
        table=cell("visits", 3, 2.5),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("log_outcome = false", 'family = "negbinomial"')
        ),
    ),
    "counts all zero": Case(
        r"outcome column 'visits' is 0 in every row",
        table=lambda f: f.assign(visits=0),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("log_outcome = false", 'family = "poisson"')
        ),
    ),
    "exposure zero": Case(
        r"exposure column 'ex' must be positive.*table lines 6",
        table=cell("ex", 4, 0.0),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("log_outcome = false", 'family = "poisson"')
        ),
    ),
    "exposure text": Case(
        r"exposure column 'ex' holds text.*'none'",
        table=cell("ex", 4, "none"),
        study=lambda s: (
            s.replace('outcome = "y"', 'outcome = "visits"')
            .replace('group = "grp"', 'group = "grp"\nexposure = "ex"')
            .replace("log_outcome = false", 'family = "poisson"')
        ),
    ),
    # ---- input shapes: weights, panels, summary rows, Parquet folders ------------------------------------
    "weight zero": Case(
        r"weight column 'w' must hold positive, finite sampling weights; 1 row\(s\) \(table lines 7\)",
        study=sub('group = "grp"', 'group = "grp"\nweight = "w"'),
        table=lambda f: cell("w", 5, 0.0)(f.assign(w=1.5)),
    ),
    "weight negative": Case(
        r"weight column 'w' .*smallest -2",
        study=sub('group = "grp"', 'group = "grp"\nweight = "w"'),
        table=lambda f: cell("w", 5, -2.0)(f.assign(w=1.5)),
    ),
    "weight missing": Case(
        r"weight column 'w' has 1 row\(s\) \(table lines 7\) missing",
        study=sub('group = "grp"', 'group = "grp"\nweight = "w"'),
        table=lambda f: cell("w", 5, np.nan)(f.assign(w=1.5)),
    ),
    "unit in two jurisdictions": Case(
        r"1 unit\(s\) of column 'pid' appear in more than one jurisdiction",
        study=sub('group = "grp"', 'group = "grp"\nunit = "pid"'),
        table=lambda f: cell("region", 0, "R5")(_panel_ids(f)),
    ),
    "summary count below 1": Case(
        r"count column 'n' must hold whole numbers of at least 1",
        study=sub('group = "grp"', _SUMMARY_KEYS),
        table=lambda f: cell("n", 2, 0)(_means(f)),
    ),
    "summary sd missing": Case(
        r"sd column 's' is empty in 1 row\(s\) \(table lines 4\)",
        study=sub('group = "grp"', _SUMMARY_KEYS),
        table=lambda f: cell("s", 2, np.nan)(_means(f)),
    ),
    "summary sd where count is 1": Case(
        r"sd column 's' holds a value in 1 row\(s\) \(table lines 4\) whose count",
        study=sub('group = "grp"', _SUMMARY_KEYS),
        table=lambda f: cell("n", 2, 1)(_means(f)),
    ),
    "summary and observation rows mixed": Case(
        r"look like observation-level rows mixed into a table of cell summaries",
        study=sub('group = "grp"', _SUMMARY_KEYS),
        table=lambda f: pd.concat([_means(f), f.head(3)], ignore_index=True),
    ),
    "Parquet folder, types disagree": Case(
        r"files of the table disagree on the type of column 'period'",
        study=sub('table = "table.csv"', 'table = "parts"'),
        setup=lambda d: _parquet_parts(d),
    ),
    # ---- output folder ------------------------------------------------------------------------------------
    "--out is a file": Case(
        r"--out '.*afile' is a file, not a folder.*never replaces a file",
        args=("--replace",),
        out="afile",
        setup=write_bytes("afile", b"the user's notes"),
    ),
    "--out under a file": Case(
        r"'.*afile' is a file, not a folder, so the run folder cannot be created",
        out="afile/run",
        setup=write_bytes("afile", b"the user's notes"),
    ),
    "--out a foreign folder": Case(
        r"--out '.*mine' already exists and holds files bayesdid did not write \(it holds keep.txt\)",
        out="mine",
        setup=lambda d: ((d / "mine").mkdir(), (d / "mine" / "keep.txt").write_text("x")),
    ),
    "--replace over a foreign folder": Case(
        r"never replaced, not even with --replace",
        out="mine",
        args=("--replace",),
        setup=lambda d: ((d / "mine").mkdir(), (d / "mine" / "keep.txt").write_text("x")),
    ),
    "--out an earlier run, no --replace": Case(
        r"--out '.*old' already exists and is not empty: it holds a bayesdid run folder.*--replace",
        out="old",
        setup=lambda d: ((d / "old").mkdir(), (d / "old" / "manifest.json").write_text('{"bayesdid": "0.1.0"}')),
    ),
    "--out a broken symbolic link": Case(
        r"--out '.*dangling' is a broken symbolic link",
        out="dangling",
        setup=lambda d: os.symlink(d / "gone", d / "dangling"),
    ),
    "checks --out a file": Case(
        r"--out '.*afile' is a file, not a folder", out="afile", command="checks", setup=write_bytes("afile", b"x")
    ),
    "--out where nothing can be created": Case(
        r"nothing can be written in folder '/sys'", out="/sys/bayesdid-refusal-test"
    ),
}


def _snapshot(root: Path) -> dict:
    return {
        str(p.relative_to(root)): (p.is_dir(), p.lstat().st_size if not p.is_dir() else 0, p.lstat().st_mtime_ns)
        for p in root.rglob("*")
    }


def _prepare(tmp_path: Path, case: Case) -> tuple[Path, list[str]]:
    work = tmp_path / "work"
    work.mkdir()
    frame = base_table()
    if case.table is not None:
        frame = case.table(frame)
    frame.to_csv(work / "table.csv", index=False)
    text = STUDY if case.study is None else case.study(STUDY)
    (work / "study.toml").write_text(text, encoding="utf-8")
    if case.setup is not None:
        case.setup(work)
    out = case.out if case.out.startswith("/") else str(work / case.out)
    argv = [case.command, str(work / case.study_path), "--out", out, "--quiet", *case.args]
    return work, argv


def test_catalogue_is_large_and_distinct():
    assert len(CASES) >= 60
    assert len({c.pattern for c in CASES.values()}) == len(CASES)  # each names its own fault


@pytest.mark.parametrize("name", list(CASES))
def test_refused_before_any_work(tmp_path, capsys, name):
    case = CASES[name]
    if case.out.startswith("/sys") and (not Path("/sys").is_dir() or sys.platform != "linux"):
        pytest.skip("needs Linux's /sys, where no folder can be created")
    work, argv = _prepare(tmp_path, case)
    before = _snapshot(work)
    compiles = sample.COMPILES["count"]
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.startswith("bayesdid: error: ") and "Traceback" not in err
    assert re.search(case.pattern, err.replace("\n  ", " ")), err
    assert sample.COMPILES["count"] == compiles  # refused before compiling
    assert _snapshot(work) == before  # nothing written, nothing changed, nothing left behind
    if not case.out.startswith("/"):
        assert os.path.lexists(work / case.out) == (case.out in before)
    else:
        assert not Path(case.out).exists()


def test_base_study_of_the_catalogue_is_valid(tmp_path):
    """The catalogue's faults are faults: the unchanged study passes every check before the fit."""
    from bayesdid.run import prepare
    from bayesdid.study import load_study

    work, _ = _prepare(tmp_path, Case(pattern=""))
    cells, digest, _ = prepare(load_study(work / "study.toml"))
    assert cells.shape == (6, 2, 4) and len(digest) == 64


@pytest.mark.parametrize(
    "argv_tail,pattern",
    [
        (["--chains", "0"], "--chains 0: study key 'sampler.chains'"),
        (["--out", "{work}/afile/run"], "is a file, not a folder"),
        (["--study", "bad.toml"], "is not UTF-8 text"),
    ],
)
def test_subprocess_exit_code_and_clean_stderr(tmp_path, argv_tail, pattern):
    work, argv = _prepare(
        tmp_path,
        Case(
            pattern="",
            setup=lambda d: ((d / "afile").write_text("x"), (d / "bad.toml").write_bytes(b"title = '\xff'\n")),
        ),
    )
    if argv_tail[0] == "--study":
        argv[1] = str(work / argv_tail[1])
        argv_tail = []
    argv = argv[:3] + [argv_tail[1].format(work=work)] + argv[4:] if argv_tail[:1] == ["--out"] else argv + argv_tail
    before = _snapshot(work)
    proc = subprocess.run([sys.executable, "-m", "bayesdid.cli", *argv], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2, proc.stderr
    assert "Traceback" not in proc.stderr and pattern in proc.stderr.replace("\n  ", " ")
    assert proc.stdout == ""
    assert _snapshot(work) == before


def test_sparse_comparison_jurisdiction_is_named_in_a_warning_and_kept(tmp_path):
    """A comparison jurisdiction seen with both groups in one period contributes nothing to the comparison
    of changes: a warning names it, the fit goes on, and the run's notes keep the message."""
    from bayesdid.errors import SparseJurisdictionWarning
    from bayesdid.run import prepare
    from bayesdid.study import load_study

    work, _ = _prepare(tmp_path, Case(pattern="", table=lambda f: f[~((f["region"] == "R5") & (f["period"] > 1))]))
    with pytest.warns(SparseJurisdictionWarning, match=r"'R5' \(1 period\) are observed with both groups"):
        cells, _, _ = prepare(load_study(work / "study.toml"))
    assert "R5" in cells.jurisdictions and "'R5'" in cells.extra["warnings"][0]


def test_numbers_written_as_text_sort_as_numbers(tmp_path):
    """Period labels "1".."10" held as text (a Parquet string column) are put in numeric order, not 1, 10, 2."""
    from bayesdid.data import period_levels
    from bayesdid.study import load_study

    work, _ = _prepare(tmp_path, Case(pattern=""))
    study = load_study(work / "study.toml")
    frame = pd.DataFrame({"period": [str(t) for t in (10, 2, 1, 9)]})
    assert period_levels(study, frame) == ["1", "2", "9", "10"]
