"""The notebook API used as a notebook would: a DataFrame in, effects as xarray, figures as matplotlib."""

from __future__ import annotations

import json
import warnings

import matplotlib.figure
import numpy as np
import pytest

import bayesdid
import bayesdid.notebook as bn
from bayesdid.simulate import Scenario, simulate


@pytest.fixture(scope="module")
def result():
    frame, truth = simulate(Scenario(jurisdictions=10, periods=6, starts={0: 4}, rows_per_cell=8, tau=-0.3), 3)
    study = bayesdid.make_study(
        table=frame,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters=truth["starts"],
        draws=150,
        tune=150,
        seed=9,
        wording={"policy": "the walk-in pilot", "outcome": "clinic visits"},
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return bn.fit(study), frame


def test_a_data_frame_is_a_table_with_its_own_hash(result):
    res, frame = result
    m = json.loads((res.folder / "manifest.json").read_text())
    assert m["table"].startswith("in-memory:") and len(m["data_sha256"]) == 64
    assert m["data_sha256"].startswith(m["table"].removeprefix("in-memory:"))
    changed = frame.copy()
    changed.loc[0, "y"] += 1.0
    other = bayesdid.make_study(
        table=changed,
        outcome="y",
        jurisdiction="region",
        period="period",
        group="group",
        target_group="target",
        adopters={"Aldmoor": 5},
    )
    assert str(other.table) != m["table"]  # another frame, another identity


def test_effects_are_xarray_and_agree_with_the_summary(result):
    res, _ = result
    eff = res.effects
    assert eff["att"].dims == ("chain", "draw") and eff["tau_adopter"].dims == ("chain", "draw", "adopter")
    s = res.summary["effect"]
    assert float(eff["att"].median()) == pytest.approx(s["median"], rel=1e-12)
    assert np.allclose(eff["att"].quantile([0.05, 0.95]).values, s["eti_90"])


def test_each_report_figure_is_a_matplotlib_figure(result):
    res, _ = result
    figs = res.figures()
    assert {"effect", "cross-check"} <= set(figs)
    assert all(isinstance(f, matplotlib.figure.Figure) for f in figs.values())
    assert figs["effect"].axes and figs["effect"].axes[0].get_xlabel().startswith("change in clinic visits")
    # (150 draws: the headline may open with NOT RELIABLE; the sentence itself follows)
    assert "In the adopting jurisdiction" in res.headline and "the walk-in pilot" in res.headline
