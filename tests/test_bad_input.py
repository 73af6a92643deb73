"""Bad input: a clear error naming what is wrong, exit code 2, nothing written."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from bayesdid.cli import main


def _table(tmp_path, **changes):
    rng = np.random.default_rng(0)
    rows = [(f"R{j}", g, t, float(rng.normal(5, 1)) + 10) for j in range(4) for g in ("a", "b")
            for t in range(1, 5) for _ in range(3)]
    f = pd.DataFrame(rows, columns=["region", "grp", "period", "y"])
    for k, v in changes.items():
        f = v(f)
    p = tmp_path / "table.csv"
    f.to_csv(p, index=False)
    return p


def _study(tmp_path, table="table.csv", adopters='{ "R0" = 3 }', extra="", group='group = "grp"',
           target='target_group = "b"', log="false"):
    text = f"""
[data]
table = "{table}"
outcome = "y"
jurisdiction = "region"
period = "period"
{group}

[policy]
{target}
adopters = {adopters}

[model]
log_outcome = {log}
{extra}
"""
    p = tmp_path / "study.toml"
    p.write_text(text)
    return p


CASES = {
    "missing column": (dict(), dict(group='group = "nope"'), r"column\(s\) \['nope'\].*not in the table"),
    "unknown adopter": (dict(), dict(adopters='{ "Atlantis" = 3 }'), r"adopter\(s\) \['Atlantis'\]"),
    "start outside periods": (dict(), dict(adopters='{ "R0" = 9 }'), r"start of adopter 'R0' \(9"),
    "no pre-period": (dict(), dict(adopters='{ "R0" = 1 }'), r"no pre-period"),
    "single group level": (dict(f=lambda f: f.assign(grp="b")), dict(), r"single level"),
    "no comparison": (dict(), dict(adopters='{ "R0" = 3, "R1" = 3, "R2" = 2, "R3" = 4 }'),
                      r"no comparison jurisdiction"),
    "non-numeric outcome": (dict(f=lambda f: f.assign(y=f["y"].astype(str).where(f.index != 5, "twelve"))),
                            dict(), r"outcome column 'y' is not numeric"),
    "infinite outcome": (dict(f=lambda f: f.assign(y=f["y"].where(f.index != 2, np.inf))), dict(),
                         r"infinite"),
    "non-positive under log": (dict(f=lambda f: f.assign(y=f["y"].where(f.index != 3, -1.0))),
                               dict(log="true"), r"at or below zero.*log_outcome"),
    "empty table": (dict(f=lambda f: f.iloc[0:0]), dict(), r"no rows"),
    "unknown study key": (dict(), dict(extra="famly = 'gaussian'"), r"unknown key\(s\) \['famly'\]"),
    "missing table": (dict(), dict(table="nowhere.csv"), r"does not exist"),
}


@pytest.mark.parametrize("name", list(CASES))
def test_bad_input_exit_2_and_nothing_written(tmp_path, capsys, name):
    tchanges, schanges, pattern = CASES[name]
    _table(tmp_path, **tchanges)
    study = _study(tmp_path, **schanges)
    out = tmp_path / "run"
    code = main(["fit", str(study), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2
    assert "error:" in err
    import re

    assert re.search(pattern, err.replace("\n  ", " ")), err
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".run")]


def test_existing_output_folder_is_not_overwritten(tmp_path, capsys):
    _table(tmp_path)
    study = _study(tmp_path)
    out = tmp_path / "run"
    out.mkdir()
    (out / "keep.txt").write_text("earlier results")
    assert main(["fit", str(study), "--out", str(out), "--quiet"]) == 2
    assert "already exists" in capsys.readouterr().err
    assert (out / "keep.txt").read_text() == "earlier results"
