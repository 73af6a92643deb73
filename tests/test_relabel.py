"""A compiled model reused for a second data set of the same shape labels the draws with the second
data set's own jurisdictions (not the first one's)."""

from __future__ import annotations

import pytest

from bayesdid.cells import collapse
from bayesdid.model.terms import resolve_scales
from bayesdid.sample import COMPILES, fit_cells
from bayesdid.simulate import Scenario, simulate
from bayesdid.study import SamplerSettings, make_study

pytestmark = pytest.mark.slow


def test_reused_model_takes_new_labels(tmp_path):
    sc = Scenario(jurisdictions=6, periods=4, groups=1, starts={0: 2}, rows_per_cell=5)
    fits = []
    for tag, seed in (("A", 1), ("B", 1)):  # same numbers, new labels: the same ModelSpec
        names = [f"{tag}-region-{i}" for i in range(6)]
        frame, truth = simulate(sc, seed, names=names)
        st = make_study(
            table=tmp_path / "x.csv", outcome="y", jurisdiction="region", period="period", adopters=truth["starts"]
        )
        cells = collapse(st, frame)
        scales = {k: v["scale"] for k, v in resolve_scales(cells, st.priors).items()}
        before = COMPILES["count"]
        fits.append((fit_cells(cells, scales, SamplerSettings(draws=50, tune=50, seed=3)), before))
    (a, _), (b, before_b) = fits
    assert COMPILES["count"] == before_b  # the second fit reused the compiled model
    assert list(b.posterior["jurisdiction"].values) == [f"B-region-{i}" for i in range(6)]
    assert list(b.posterior["adopter"].values) == ["B-region-0"]
    assert list(a.posterior["adopter"].values) == ["A-region-0"]
