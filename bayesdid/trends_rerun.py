"""Recompute the parallel-trends bound of an existing run folder (``bayesdid trends RUN_DIR``).

It re-reads the table through the fit pipeline (:func:`bayesdid.run.prepare`), so it sits above it;
the bound itself is :mod:`bayesdid.trends`.
"""

from __future__ import annotations

from pathlib import Path

from .trends import TrendBounds, model_threshold, trend_bounds  # noqa: F401

__all__ = ["trends_from_run"]


def trends_from_run(run_dir, *, multiples=None) -> TrendBounds:
    """Recompute the bound from a run folder's posterior.nc (the study as run, from its manifest)."""
    import json

    import xarray as xr

    from .errors import BayesDidError
    from .model.terms import model_spec
    from .run import prepare
    from .sample import Fit
    from .study import _parse

    run = Path(run_dir)
    man = run / "manifest.json"
    if not man.is_file() or not (run / "posterior.nc").is_file():
        raise BayesDidError(
            f"'{run}' is not a run folder (needs manifest.json and posterior.nc); make one with "
            "'bayesdid fit STUDY --out DIR'."
        )
    raw = json.loads(man.read_text(encoding="utf-8"))["study"]
    study = _parse(raw, run)
    cells, _, _ = prepare(study)
    tree = xr.open_datatree(run / "posterior.nc", engine="h5netcdf")
    post = tree["posterior"].to_dataset().load()
    fit = Fit(
        cells=cells,
        tree=xr.DataTree.from_dict({"posterior": post}),
        spec=model_spec(cells, study.model.family),
        scales={},
        settings=study.sampler,
    )
    mult = multiples if multiples is not None else study.trends.multiples
    return trend_bounds(fit, multiples=mult, threshold=model_threshold(study, cells), level=study.decision.level)
