"""The effects as a typed result (effects.Effects): summary.json stays what it was, key by key.

``_legacy_effects`` is the body of ``compute_effects`` as it was before it returned a dataclass
(main at e2b40dc): a dict of :class:`~bayesdid.effects.Effect` objects, summaries and per-adopter
rows, which ``Analysis.summary`` then laid out in summary.json. The test fits two demo studies of
the end-to-end matrix (a Gaussian DDD on the log scale: effect, percent, per-adopter percents; a
Poisson DDD: the natural-scale measures), writes the run folder as ``bayesdid fit`` does, and
compares every effect entry of the summary.json on disk with the old layout of the same draws,
key by key, and the order of the top-level keys.
"""

from __future__ import annotations

import json

import numpy as np
import pytest

from bayesdid.effects import (
    AdopterEffect,
    Effect,
    Effects,
    att_draws,
    att_weights,
    natural_effects,
    percent_change,
)
from bayesdid.model.family import family_record
from bayesdid.run import analyse, json_text, write_run
from bayesdid.study import load_study

pytestmark = pytest.mark.slow


def _legacy_effects(fit, threshold):
    """compute_effects before this change (verbatim apart from the family's measure lookup)."""
    cells = fit.cells
    tau_a = fit.draws("tau_adopter")
    w = att_weights(cells)
    att = att_draws(tau_a, cells)
    rec = family_record(fit.spec.family)
    log = cells.log_outcome or rec.ratio_scale
    thr_model = np.log1p(threshold) if (log and threshold is not None) else threshold
    measure = rec.model_measure or ("difference in log outcome" if log else "difference in outcome")
    out = {"effect": Effect("ATT", measure, "model", att, thr_model)}
    if cells.log_outcome:
        out["effect_percent"] = Effect("ATT", "percent change, exp(ATT) - 1", "percent", percent_change(att), threshold)
    out["effect_natural"] = natural_effects(fit, threshold, att=att)
    per = []
    for a, j in enumerate(cells.adopters):
        e = Effect(cells.jurisdictions[j], measure, "model", tau_a[:, a], thr_model)
        v = cells.periods[cells.start[j]]
        row = {"adopter": cells.jurisdictions[j], "start": v.item() if hasattr(v, "item") else v}
        row.update(weight=float(w[a]), **e.summary)
        if cells.log_outcome:
            row["percent"] = Effect(
                cells.jurisdictions[j], "percent change", "percent", percent_change(tau_a[:, a]), threshold
            ).summary
        per.append(row)
    out["per_adopter"] = per
    return out


def _as_written(obj):
    return json.loads(json_text(obj))


@pytest.mark.parametrize("name", ["gaussian_ddd", "poisson_ddd"])
def test_summary_json_effects_are_unchanged_by_the_typed_result(name, tmp_path):
    from e2e_runs import _study_toml, _table

    frame, truth = _table(name)
    frame.to_csv(tmp_path / "table.csv", index=False)
    (tmp_path / "study.toml").write_text(_study_toml(name, truth), encoding="utf-8")
    study = load_study(tmp_path / "study.toml").replace(sampler={"draws": 100, "tune": 150, "chains": 2})
    an = analyse(study, full_cross_check=False)
    assert isinstance(an.effects, Effects) and all(isinstance(a, AdopterEffect) for a in an.effects.per_adopter)
    write_run(an, tmp_path / "run")
    disk = json.loads((tmp_path / "run" / "summary.json").read_text(encoding="utf-8"))

    old = _legacy_effects(an.fit, study.decision.threshold)
    expected = {
        "effect": old["effect"].summary,
        "per_adopter": old["per_adopter"],
        "effect_natural": old["effect_natural"].summary,
    }
    if "effect_percent" in old:
        expected["effect_percent"] = old["effect_percent"].summary
    assert ("effect_percent" in disk) == (name == "gaussian_ddd")
    assert len(disk["effect_natural"]) == (1 if name == "gaussian_ddd" else 4)
    for key, value in _as_written(expected).items():
        got = disk[key]
        if isinstance(value, dict):
            assert list(got) == list(value), key
            for k in value:
                assert got[k] == value[k], f"{key}.{k}"
        else:
            assert len(got) == len(value), key
            for i, (g, v) in enumerate(zip(got, value, strict=True)):
                assert list(g) == list(v), f"{key}[{i}]"
                for k in v:
                    assert g[k] == v[k], f"{key}[{i}].{k}"
    # the old layout: effect and per_adopter first, the percent and natural entries last
    keys = list(disk)
    assert keys[:3] == ["title", "effect", "per_adopter"]
    tail = [k for k in keys if k in ("effect_percent", "effect_natural")]
    assert keys[-len(tail) - 1 : -1] == tail and keys[-1] == "identity"
    assert an.effects.to_dict() == {k: expected[k] for k in an.effects.to_dict()}
